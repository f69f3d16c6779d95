"""Proportional-hazards checks: scaled Schoenfeld residuals and the Grambsch-Therneau test.

Written by hand because neither reference library does what is needed here: statsmodels'
Schoenfeld residuals use the plain risk-set mean even for an Efron fit, and lifelines computes
them in a Python loop over subjects from its own fitted model only. Here one vectorised pass over
the distinct event times gives the Efron-weighted residuals of any fit in O(n p) time and
memory, with no n x n matrices.

Conventions
-----------
* A subject with time t is at risk at every event time <= t of its stratum.
* At a time with d tied events under Efron ties, every event there is compared with the
  average of the d Efron-weighted risk-set means
  :math:`\\frac1d \\sum_{l=0}^{d-1} (S_1 - \\tfrac ld D_1) / (S_0 - \\tfrac ld D_0)`, so the
  residuals sum to the score (zero at the Efron estimate).
* Scaled residuals are :math:`d\\,V r_k` without the coefficient added (add ``fit.coef`` to get
  the estimate of beta(t) that the plot shows).
* The test statistic is the score-test approximation of Grambsch & Therneau (1994) used by
  lifelines and by R's survival before version 3.0. A group of columns J (a spline's or a
  categorical covariate's) is tested jointly with T_J = d a_J' (V_JJ)^-1 a_J / sum_k g~_k^2,
  a = V sum_k g~_k r_k (|J| degrees of freedom); one
  column gives the per-covariate statistic and all columns the global one.
* The plotted smooth of beta(t) is an ordinary least-squares fit on a natural cubic spline of
  time (knots at event-time quantiles) with a pointwise confidence band: not a robust
  smoother, whose down-weighting follows the larger cluster of a binary covariate's
  residuals away from the coefficient. Least squares with an intercept averages to the mean
  of beta(t) at the events, which is the coefficient up to the score at the estimate.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from casemix.audit.wald import wald_groups
from casemix.data.design import natural_spline_basis
from casemix.errors import InputError, plural
from casemix.survival import kaplan_meier
from casemix.survival.validate import as_matrix, as_time_event, as_weights

__all__ = [
    "TRANSFORMS",
    "beta_smooth",
    "ph_test",
    "ph_test_groups",
    "schoenfeld_residuals",
    "time_transform",
]

# identity, log and rank follow lifelines; km is 1 - KM(t) after the drop at t (lifelines);
# km_left is the left-continuous 1 - KM(t-), the transform of R's cox.zph before 3.0.
TRANSFORMS = ("identity", "log", "rank", "km", "km_left")


@dataclass(frozen=True, eq=False)
class _Events:
    """The rows with an event, in ascending time order (ties by row), and their residuals."""

    rows: np.ndarray  # (m,) positions in the input arrays
    time: np.ndarray  # (m,)
    raw: np.ndarray  # (m, p) unscaled Schoenfeld residuals


def _check_fit(fit: Any, p: int) -> tuple[np.ndarray, np.ndarray, bool]:
    coef = np.asarray(fit.coef, dtype=float)
    cov = np.asarray(fit.cov, dtype=float)
    if coef.shape != (p,) or cov.shape != (p, p):
        raise InputError(
            f"the fit has {plural(coef.size, 'coefficient')} but X has {plural(p, 'column')}; pass "
            "the design matrix the model was fitted on"
        )
    if fit.ties not in ("efron", "breslow"):
        raise InputError(f"unknown ties method {fit.ties!r}; use 'efron' or 'breslow'")
    return coef, cov, fit.ties == "efron"


def _stratum_means(time, event, X, v, efron: bool) -> tuple[np.ndarray, np.ndarray]:
    """Risk-set means at each event of one stratum, rows sorted by (time, row).

    Returns the event rows (positions within the stratum) and their means, shape (m, p).
    """
    order = np.lexsort((np.arange(time.size), time))
    t, e, Xs, vs = time[order], event[order].astype(bool), X[order], v[order]
    # risk-set sums at a time = suffix sums from the first row with that time
    s0 = np.cumsum(vs[::-1])[::-1]
    s1 = np.cumsum((Xs * vs[:, None])[::-1], axis=0)[::-1]
    first_of_time = np.searchsorted(t, t, side="left")
    rows = np.flatnonzero(e)
    start = first_of_time[rows]  # one value per event; equal for tied events
    groups, group_of_event, counts = np.unique(start, return_inverse=True, return_counts=True)
    if efron:
        first_event = np.searchsorted(group_of_event, np.arange(groups.size))
        ve = vs[rows]
        d0 = np.add.reduceat(ve, first_event)
        d1 = np.add.reduceat(Xs[rows] * ve[:, None], first_event, axis=0)
        # l = 0..d-1 within each tie group: one Efron term per event
        frac = (np.arange(rows.size) - first_event[group_of_event]) / counts[group_of_event]
        num = s1[groups][group_of_event] - frac[:, None] * d1[group_of_event]
        den = s0[groups][group_of_event] - frac * d0[group_of_event]
        group_mean = np.add.reduceat(num / den[:, None], first_event, axis=0) / counts[:, None]
    else:
        group_mean = s1[groups] / s0[groups][:, None]
    return order[rows], group_mean[group_of_event]


def _strata_codes(strata, n: int) -> np.ndarray:
    if strata is None:
        return np.zeros(n, dtype=np.intp)
    labels = np.asarray(strata, dtype=object)
    if labels.shape != (n,):
        raise InputError(f"strata must have one label per row ({n}); got shape {labels.shape}")
    missing = pd.isna(labels)
    if missing.any():
        raise InputError(
            f"strata has {plural(int(missing.sum()), 'missing label')} (first at row "
            f"{int(np.flatnonzero(missing)[0])}); give every recipient a stratum"
        )
    return pd.factorize(labels, sort=True)[0]


def _events(fit, time, event, X, strata, weights) -> tuple[_Events, np.ndarray]:
    time, event = as_time_event(time, event)
    X, _ = as_matrix(X, time.size, None)
    coef, cov, efron = _check_fit(fit, X.shape[1])
    w = as_weights(weights, time.size)
    if not event.any():
        raise InputError("there are no events; the proportional-hazards check needs events")
    codes = _strata_codes(strata, time.size)
    rows, means = [], []
    for code in np.unique(codes):
        idx = np.flatnonzero(codes == code)
        lp = X[idx] @ coef
        v = w[idx] * np.exp(lp - lp.max())  # shifting lp cancels in every ratio
        r, m = _stratum_means(time[idx], event[idx], X[idx], v, efron)
        rows.append(idx[r])
        means.append(m)
    rows_all = np.concatenate(rows)
    means_all = np.concatenate(means)
    order = np.lexsort((rows_all, time[rows_all]))
    rows_all = rows_all[order]
    raw = X[rows_all] - means_all[order]
    return _Events(rows=rows_all, time=time[rows_all], raw=raw), cov


def schoenfeld_residuals(
    fit: Any, time, event, X, *, strata=None, weights=None, scaled: bool = True
) -> pd.DataFrame:
    """Return the Schoenfeld residuals of a Cox fit, one row per event.

    Parameters
    ----------
    fit : CoxFit
        Anything with ``coef`` (p,), ``cov`` (p, p), ``names`` and ``ties`` ("efron" or
        "breslow"), fitted on these data.
    time : array_like of float, shape (n,)
    event : array_like of {0, 1}, shape (n,)
    X : array_like of float, shape (n, p)
        The design matrix the model was fitted on.
    strata : array_like, shape (n,), optional
        Stratum labels; risk sets are formed within strata.
    weights : array_like of float, shape (n,), optional
        Case weights used in the fit.
    scaled : bool, default True
        Return :math:`d\\,V r_k` (d events, V the coefficient covariance) instead of
        :math:`r_k`. The coefficient is *not* added.

    Returns
    -------
    DataFrame, shape (number of events, 1 + p)
        Index ``row`` (position of the event in the inputs), column ``time`` and one column per
        covariate, sorted by time (ties by row).
    """
    ev, cov = _events(fit, time, event, X, strata, weights)
    values = ev.raw @ cov * ev.rows.size if scaled else ev.raw
    frame = pd.DataFrame(values, columns=list(fit.names), index=pd.Index(ev.rows, name="row"))
    frame.insert(0, "time", ev.time)
    return frame


def time_transform(time, event, kind: str = "rank", *, weights=None) -> np.ndarray:
    """Return the transformed time g(t) at each event, in ascending time order (ties by row).

    Parameters
    ----------
    time : array_like of float, shape (n,)
    event : array_like of {0, 1}, shape (n,)
    kind : {"identity", "log", "rank", "km", "km_left"}, default "rank"
        ``rank`` numbers the events 1..d in time order, ties in row order (lifelines); ``km``
        is 1 - KM(t) just after the drop at t; ``km_left`` the left-continuous 1 - KM(t-).
    weights : array_like of float, shape (n,), optional
        Case weights for the Kaplan-Meier estimate.

    Returns
    -------
    ndarray of float, shape (d,)
    """
    if kind not in TRANSFORMS:
        raise InputError(f"unknown time transform {kind!r}; use one of {', '.join(TRANSFORMS)}")
    time, event = as_time_event(time, event)
    rows = np.flatnonzero(event)
    t = time[rows][np.lexsort((rows, time[rows]))]
    if kind == "identity":
        return t
    if kind == "rank":
        return np.arange(1.0, t.size + 1.0)
    if kind == "log":
        if (t <= 0).any():
            raise InputError(
                "the log time transform needs event times > 0; "
                f"{plural(int((t <= 0).sum()), 'event')} happened at time 0: use 'rank' or 'km'"
            )
        return np.log(t)
    km = kaplan_meier(time, event, weights=weights)
    if kind == "km":
        return 1.0 - km.at(t)
    # S(t-) is S at the previous observed time (1 before the first)
    before = np.r_[1.0, km.survival][np.searchsorted(km.times, t, side="left")]
    return 1.0 - before


def _statistics(g: np.ndarray, raw: np.ndarray, cov: np.ndarray) -> tuple[np.ndarray, float]:
    """Per-covariate and global Grambsch-Therneau statistics from raw residuals."""
    d = raw.shape[0]
    gc = g - g.mean()
    ss = gc @ gc
    if ss <= 0:
        raise InputError(
            "all events happen at the same transformed time, so time-varying effects cannot be "
            "tested; the check needs events at two or more distinct times"
        )
    u = gc @ raw  # (p,) time-weighted sums of unscaled residuals
    per_covariate = d * (u @ cov) ** 2 / (np.diag(cov) * ss)
    global_stat = float(u @ cov @ u) * d / ss
    return per_covariate, global_stat


def ph_test(
    fit: Any, time, event, X, transform: str = "rank", *, strata=None, weights=None
) -> pd.DataFrame:
    """Test proportional hazards per covariate and globally (Grambsch & Therneau 1994).

    :math:`T_j = (\\sum_k \\tilde g_k r^*_{kj})^2 / (d V_{jj} \\sum_k \\tilde g_k^2)` with
    :math:`r^* = d V r` the scaled residuals and :math:`\\tilde g = g - \\bar g`; the global
    statistic is :math:`d (\\tilde g' R) V (R' \\tilde g) / \\sum_k \\tilde g_k^2` on p degrees of
    freedom.

    Parameters
    ----------
    fit : CoxFit
        As in :func:`schoenfeld_residuals`.
    time, event, X, strata, weights
        The fitting data, as in :func:`schoenfeld_residuals`.
    transform : {"identity", "log", "rank", "km", "km_left"}, default "rank"
        The function of time the residuals are tested against (see :func:`time_transform`).

    Returns
    -------
    DataFrame, shape (p + 1, 3)
        Index: the covariate names, then ``global``; columns ``statistic``, ``df``, ``p_value``.
    """
    ev, cov = _events(fit, time, event, X, strata, weights)
    g = time_transform(time, event, transform, weights=weights)
    per_covariate, global_stat = _statistics(g, ev.raw, cov)
    p = per_covariate.size
    statistic = np.r_[per_covariate, global_stat]
    df = np.r_[np.ones(p, dtype=int), p]
    return pd.DataFrame(
        {"statistic": statistic, "df": df, "p_value": stats.chi2.sf(statistic, df)},
        index=pd.Index([*fit.names, "global"], name="term"),
    )


def ph_test_groups(
    fit: Any, time, event, X, groups, transform: str = "rank", *, strata=None, weights=None
) -> pd.DataFrame:
    """Joint proportional-hazards tests, one per group of design columns (module docstring).

    Parameters
    ----------
    fit, time, event, X, transform, strata, weights
        As in :func:`ph_test`.
    groups : sequence of str, length p
        The group (covariate) of each design column, e.g. ``Design.groups``.

    Returns
    -------
    DataFrame
        Index ``group`` (first-seen order); columns ``statistic``, ``df``, ``p_value``.
    """
    ev, cov = _events(fit, time, event, X, strata, weights)
    g = time_transform(time, event, transform, weights=weights)
    gc = g - g.mean()
    ss = gc @ gc
    if ss <= 0:
        _statistics(g, ev.raw, cov)  # raises the message for a single transformed time
    a = (gc @ ev.raw) @ cov
    return wald_groups(a, cov, groups, scale=ev.rows.size / ss)


def beta_smooth(time, beta_t, *, knots: int = 4, level: float = 0.95, points: int = 100):
    """Least-squares natural-spline smooth of beta(t) with a pointwise confidence band.

    Parameters
    ----------
    time : array_like of float, shape (d,)
        Event times.
    beta_t : array_like of float, shape (d,)
        Scaled Schoenfeld residuals plus the coefficient.
    knots : int, default 4
        Knots at the event-time quantiles 0.05, 0.35, 0.65, 0.95 (fewer distinct times: a
        straight line).
    level : float, default 0.95
        Coverage of the pointwise band (Student t quantile, residual variance of the fit).
    points : int, default 100
        Grid points from the first to the last event time.

    Returns
    -------
    DataFrame
        ``time``, ``fit``, ``lower``, ``upper`` on the grid; ``attrs["mean_fit"]`` is the
        mean of the fitted values at the events (the mean of ``beta_t``).
    """
    t = np.asarray(time, dtype=float)
    y = np.asarray(beta_t, dtype=float)
    cuts = np.unique(np.quantile(t, np.linspace(0.05, 0.95, knots)))

    def basis(x):
        spline = natural_spline_basis(x, cuts) if cuts.size >= 3 else x[:, None]
        return np.column_stack([np.ones(x.size), spline])

    B = basis(t)
    coef, *_ = np.linalg.lstsq(B, y, rcond=None)
    fitted = B @ coef
    dof = max(y.size - B.shape[1], 1)
    sigma2 = float(((y - fitted) ** 2).sum() / dof)
    inv = np.linalg.pinv(B.T @ B)
    grid = np.linspace(t.min(), t.max(), points)
    G = basis(grid)
    se = np.sqrt(np.einsum("ij,jk,ik->i", G, inv, G) * sigma2)
    z = stats.t.isf((1 - level) / 2, dof)
    fit_grid = G @ coef
    frame = pd.DataFrame(
        {"time": grid, "fit": fit_grid, "lower": fit_grid - z * se, "upper": fit_grid + z * se}
    )
    frame.attrs["mean_fit"] = float(fitted.mean())
    return frame
