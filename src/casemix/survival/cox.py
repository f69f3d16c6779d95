"""Cox proportional-hazards fit (Efron or Breslow ties, strata, case weights) and its baseline.

Written by hand because the general-purpose libraries are too slow or too memory-hungry at
registry scale (10^6 recipients): a Newton step here costs one weighted cross-product
X^T diag(v) X plus O(n p) work, with risk-set sums taken over sorted distinct times and no
n x n or n x (number of times) matrices. The second-derivative terms that would need a p x p
matrix per risk set are regrouped by subject (each subject's x x^T enters every risk set up to
its own time, so its weight is a cumulative sum over event times), which is what makes a
single cross-product enough.

Conventions
-----------
* A subject with time t is at risk at every event time <= t of its stratum (events at the same
  time as a censoring count the censored subject as at risk). Time 0 events count.
* Covariates are centred at their weighted means ``center`` inside the fit; the stored
  baseline cumulative hazard is the Breslow estimate at x = center. ``at_zero=True`` converts:
  H0(t | x = 0) = H0(t | x = center) * exp(-beta . center).
* The baseline is the Breslow estimator d_k / S0_k for both tie methods, so on the fitting
  data the expected events sum exactly to the observed events.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy import special

from casemix.errors import ConvergenceError, ConvergenceWarning, InputError, plural
from casemix.survival._gram import weighted_gram, weighted_group_sums
from casemix.survival.validate import as_matrix, as_time_event, as_weights, check_columns

__all__ = [
    "DIVERGED_COEF",
    "DIVERGED_SE",
    "TIES",
    "BaselineHazard",
    "ChiSquareTest",
    "CoxFit",
    "fit_cox",
]

TIES = ("efron", "breslow")
# A coefficient whose standard error exceeds this many covariate standard deviations' worth
# of log hazard, or whose size exceeds DIVERGED_COEF on that scale, is running to infinity.
DIVERGED_SE = 50.0
DIVERGED_COEF = 20.0


@dataclass(frozen=True)
class ChiSquareTest:
    """A chi-square test: statistic, degrees of freedom and p-value."""

    statistic: float
    df: int
    p_value: float


@dataclass(frozen=True, eq=False)
class BaselineHazard:
    """Breslow cumulative baseline hazard of one stratum, a right-continuous step function.

    Attributes
    ----------
    times : ndarray, shape (k,)
        Distinct event times, ascending.
    cumhaz : ndarray, shape (k,)
        H0 at x = center just after each time (the jump at the time is included).
    last_time : float
        Largest follow-up time (event or censored) in the stratum's fitting data; the function
        is not defined beyond it.
    """

    times: np.ndarray
    cumhaz: np.ndarray
    last_time: float

    def at(self, t, *, allow_beyond: bool = False) -> np.ndarray:
        """Return H0 at each time in ``t`` (0 before the first event time).

        Raises
        ------
        InputError
            If a time lies beyond ``last_time`` and ``allow_beyond`` is False, or is negative.
        """
        t = np.atleast_1d(np.asarray(t, dtype=float))
        if (t < 0).any() or np.isnan(t).any():
            raise InputError("cumulative hazard asked at a negative or NaN time")
        beyond = t > self.last_time
        if beyond.any() and not allow_beyond:
            raise InputError(
                f"{plural(int(beyond.sum()), 'time', ('lies', 'lie'))} beyond the last follow-up "
                f"time of the fitting data ({self.last_time:g}), up to {t.max():g}; the baseline "
                "hazard is unknown there: shorten the horizon or refit on data with longer "
                "follow-up"
            )
        idx = np.searchsorted(self.times, t, side="right") - 1
        values = self.cumhaz[np.clip(idx, 0, None)] if self.times.size else np.zeros(t.size)
        return np.where(idx >= 0, values, 0.0)


@dataclass(frozen=True, eq=False)
class CoxFit:
    """The result of :func:`fit_cox`, a snapshot that does not change after it is made.

    Attributes
    ----------
    coef, se : ndarray, shape (p,)
    cov : ndarray, shape (p, p)
        Inverse of the observed information at ``coef``.
    names : tuple of str, length p
    center : ndarray, shape (p,)
        Weighted covariate means; the stored baselines are at x = center.
    loglik, loglik_null : float
        Log partial likelihood at ``coef`` and at beta = 0.
    n, n_events, n_iter : int
    converged : bool
    ties : str
    wald_test, score_test, lr_test : ChiSquareTest
    strata_levels : tuple
        Stratum labels in sorted order; ``(None,)`` when unstratified.
    baselines : tuple of BaselineHazard
        One per stratum, in the order of ``strata_levels``.
    """

    coef: np.ndarray
    cov: np.ndarray
    se: np.ndarray
    names: tuple[str, ...]
    center: np.ndarray
    loglik: float
    loglik_null: float
    n: int
    n_events: int
    n_iter: int
    converged: bool
    ties: str
    wald_test: ChiSquareTest
    score_test: ChiSquareTest
    lr_test: ChiSquareTest
    strata_levels: tuple
    baselines: tuple[BaselineHazard, ...]

    def linear_predictor(self, X) -> np.ndarray:
        """Return X beta (uncentred), shape (n,)."""
        return _as_design(X, self.names) @ self.coef

    def relative_risk(self, X) -> np.ndarray:
        """Return exp((x - center) . beta), shape (n,); refuses values that overflow."""
        eta = _as_design(X, self.names) @ self.coef - self.center @ self.coef
        huge = eta > 700
        if huge.any():
            raise InputError(
                f"exp(x . beta) overflows for {plural(int(huge.sum()), 'row')} (first at row "
                f"{int(np.flatnonzero(huge)[0])}); check those covariate values for data errors"
            )
        return np.exp(eta)

    def cumulative_hazard(
        self, t, strata=None, *, at_zero: bool = False, allow_beyond: bool = False
    ) -> np.ndarray:
        """Return the baseline cumulative hazard at each time in ``t``, in each row's stratum.

        ``at_zero=False`` gives H0(t | x = center); ``True`` gives H0(t | x = 0).
        """
        t = np.atleast_1d(np.asarray(t, dtype=float))
        codes = self.stratum_codes(strata, t.size)
        out = np.empty(t.size)
        for code, baseline in enumerate(self.baselines):
            rows = codes == code
            if rows.any():
                out[rows] = baseline.at(t[rows], allow_beyond=allow_beyond)
        if at_zero:
            out = out * np.exp(-self.center @ self.coef)
        return out

    def expected_events(self, time, X, strata=None, *, allow_beyond: bool = False) -> np.ndarray:
        """Return each subject's expected events H0(t_i) exp(x_i . beta) at its own time.

        Parameters
        ----------
        time : array_like, shape (n,)
        X : array_like, shape (n, p)
        strata : array_like, shape (n,), optional
            Stratum labels (required when the fit is stratified).
        allow_beyond : bool, default False
            Hold the last baseline value past the fitting data's follow-up instead of raising.
        """
        risk = self.relative_risk(X)
        time = np.asarray(time, dtype=float)
        if time.shape != risk.shape:
            raise InputError(f"time has shape {time.shape} but X has {plural(risk.size, 'row')}")
        return self.cumulative_hazard(time, strata, allow_beyond=allow_beyond) * risk

    def survival(self, time, X, strata=None, *, allow_beyond: bool = False) -> np.ndarray:
        """Return each subject's predicted survival exp(-expected events) at its own time."""
        return np.exp(-self.expected_events(time, X, strata, allow_beyond=allow_beyond))

    def stratum_codes(self, strata, n: int) -> np.ndarray:
        """Return each row's index into ``strata_levels`` (all 0 when unstratified)."""
        if self.strata_levels == (None,):
            if strata is not None:
                raise InputError("strata given, but the model was fitted without strata")
            return np.zeros(n, dtype=np.intp)
        if strata is None:
            raise InputError(
                "the model is stratified: give each row's stratum "
                f"(one of {list(self.strata_levels)})"
            )
        strata = np.asarray(strata, dtype=object)
        lookup = {level: code for code, level in enumerate(self.strata_levels)}
        unknown = sorted({str(s) for s in strata if s not in lookup})
        if unknown:
            raise InputError(
                f"stratum {unknown[:5]} does not occur in the fitting data "
                f"(known: {list(self.strata_levels)})"
            )
        return np.fromiter((lookup[s] for s in strata), dtype=np.intp, count=strata.size)


def _as_design(X, names: tuple[str, ...]) -> np.ndarray:
    """Check a covariate matrix handed to a fitted model (shape and finite values)."""
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None] if len(names) == 1 else X[None, :]
    if X.ndim != 2 or X.shape[1] != len(names):
        raise InputError(f"X must have {plural(len(names), 'column')} ({', '.join(names)}); "
                         f"got {X.shape}")
    return as_matrix(X, X.shape[0], names)[0]


class _RiskSets:
    """Risk-set bookkeeping in (stratum, time) order, fixed for the whole fit (internal).

    X itself is neither copied nor sorted (at registry scale a copy is 160 MB): ``order``
    maps sorted positions to its rows, group sums read it through a sparse matrix, and the
    cross-product centres it block by block.
    """

    def __init__(self, time, event, X, weights, codes, center, ties):
        order = np.argsort(time, kind="stable")
        if codes.any():
            order = order[np.argsort(codes[order], kind="stable")]
        self.order = order
        self.time = time[order]
        self.codes = codes[order]
        self.weights = weights[order]
        self.X = X
        self.center = center
        is_event = event[order].astype(bool)
        n = time.size
        new_group = np.ones(n, dtype=bool)
        new_group[1:] = (np.diff(self.time) != 0) | (np.diff(self.codes) != 0)
        self.starts = np.flatnonzero(new_group)
        self.group_of_row = np.cumsum(new_group) - 1
        self.group_of_x_row = np.empty_like(self.group_of_row)  # the same, in X's row order
        self.group_of_x_row[order] = self.group_of_row
        n_groups = self.starts.size
        self.group_code = self.codes[self.starts]
        self.group_time = self.time[self.starts]
        # first group of the next stratum, for suffix sums that stop at a stratum's end
        stratum_start = np.flatnonzero(np.r_[True, np.diff(self.group_code) != 0])
        stratum_stop = np.r_[stratum_start[1:], n_groups]
        self.stop_of_group = np.repeat(stratum_stop, np.diff(np.r_[stratum_start, n_groups]))
        self.start_of_group = np.repeat(stratum_start, np.diff(np.r_[stratum_start, n_groups]))
        self.event_rows = np.flatnonzero(is_event)
        event_groups_of_rows = self.group_of_row[self.event_rows]
        self.event_groups, first, counts = np.unique(
            event_groups_of_rows, return_index=True, return_counts=True
        )
        self.event_starts = first
        self.event_index_of_row = np.searchsorted(self.event_groups, event_groups_of_rows)
        self.Xe = np.take(X, order[self.event_rows], axis=0) - center
        we = self.weights[self.event_rows]
        self.event_weight = np.add.reduceat(we, first)  # W_k
        self.score_const = we @ self.Xe
        self.weighted_x_eta_rows = we
        # tie terms: one per tied event (Efron) or one per event time (Breslow)
        if ties == "efron":
            self.term_k = np.repeat(np.arange(counts.size), counts)
            rank = np.arange(self.term_k.size) - np.repeat(first, counts)
            self.term_a = rank / counts[self.term_k]
            self.term_c = (self.event_weight / counts)[self.term_k]
        else:
            self.term_k = np.arange(counts.size)
            self.term_a = np.zeros(counts.size)
            self.term_c = self.event_weight

    def suffix(self, per_group: np.ndarray) -> np.ndarray:
        """Sum over groups g' >= g of the same stratum (risk-set sums), per group."""
        total = np.cumsum(per_group[::-1], axis=0)[::-1]
        total = np.concatenate([total, np.zeros((1, *per_group.shape[1:]))])
        return total[: per_group.shape[0]] - total[self.stop_of_group]

    def prefix(self, per_group: np.ndarray) -> np.ndarray:
        """Sum over groups g' <= g of the same stratum, per group."""
        total = np.concatenate([[0.0], np.cumsum(per_group)])
        return total[1:] - total[self.start_of_group]


@dataclass(frozen=True, eq=False)
class _Likelihood:
    """The log partial likelihood at one beta and the risk-set sums behind it (internal)."""

    loglik: float
    r: np.ndarray  # exp(eta - shift) times the case weights, in sorted order
    shift: float
    R0: np.ndarray  # per group sums of r
    S0: np.ndarray  # risk-set sums of r at the event groups
    E0: np.ndarray  # per event group sums of r over its events
    den: np.ndarray  # per tie term: S0 - a E0

    @property
    def baseline_denominator(self) -> np.ndarray:
        return self.S0 * np.exp(self.shift)


def _likelihood(rs: _RiskSets, beta: np.ndarray) -> _Likelihood:
    """Log partial likelihood at ``beta`` (centred covariates)."""
    eta = (rs.X @ beta)[rs.order] - rs.center @ beta
    shift = eta.max()
    r = rs.weights * np.exp(eta - shift)
    R0 = np.add.reduceat(r, rs.starts)
    S0 = rs.suffix(R0)[rs.event_groups]
    E0 = np.add.reduceat(r[rs.event_rows], rs.event_starts)
    den = S0[rs.term_k] - rs.term_a * E0[rs.term_k]
    loglik = rs.weighted_x_eta_rows @ eta[rs.event_rows] - rs.term_c @ (np.log(den) + shift)
    return _Likelihood(loglik, r, shift, R0, S0, E0, den)


def _derivatives(rs: _RiskSets, lik: _Likelihood) -> tuple[np.ndarray, np.ndarray]:
    """Score and observed information at the beta of ``lik``, reusing its risk-set sums."""
    r, R0, den = lik.r, lik.R0, lik.den
    re = r[rs.event_rows]
    r_rows = np.empty_like(r)
    r_rows[rs.order] = r
    R1 = weighted_group_sums(rs.X, r_rows, rs.group_of_x_row, rs.starts.size)
    R1 -= np.outer(R0, rs.center)
    S1 = rs.suffix(R1)[rs.event_groups]
    K = lik.S0.size
    E1 = weighted_group_sums(rs.Xe, re, rs.event_index_of_row, K)
    k, a, c = rs.term_k, rs.term_a, rs.term_c
    A = np.bincount(k, c / den, minlength=K)
    B = np.bincount(k, c * a / den, minlength=K)
    score = rs.score_const - A @ S1 + B @ E1
    alpha = np.bincount(k, c / den**2, minlength=K)
    beta2 = np.bincount(k, c * a / den**2, minlength=K)
    gamma = np.bincount(k, c * a**2 / den**2, minlength=K)
    per_group = np.zeros(rs.starts.size)
    per_group[rs.event_groups] = A
    # v >= 0: an event row's B share never exceeds the A of its own group (0 <= a < 1)
    v = r * rs.prefix(per_group)[rs.group_of_row]
    v[rs.event_rows] -= re * B[rs.event_index_of_row]
    v_rows = np.empty_like(v)
    v_rows[rs.order] = v
    cross = (S1 * beta2[:, None]).T @ E1
    info = (
        weighted_gram(rs.X, v_rows, rs.center)
        - (S1 * alpha[:, None]).T @ S1
        + cross
        + cross.T
        - (E1 * gamma[:, None]).T @ E1
    )
    return score, info


def _evaluate(rs: _RiskSets, beta: np.ndarray):
    """Log partial likelihood, score, information and baseline denominators at ``beta``."""
    return _complete(rs, _likelihood(rs, beta))


def _complete(rs: _RiskSets, lik: _Likelihood):
    score, info = _derivatives(rs, lik)
    return lik.loglik, score, info, lik.baseline_denominator


def _solve(info: np.ndarray, score: np.ndarray) -> np.ndarray:
    try:
        factor = np.linalg.cholesky(info)
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(info, score, rcond=None)[0]
    return np.linalg.solve(factor.T, np.linalg.solve(factor, score))


def _chi2(statistic: float, df: int) -> ChiSquareTest:
    # chdtrc is what scipy.stats.chi2.sf computes on its support (a statistic below 0 by
    # rounding has p = 1 there); scipy.special loads in a fifth of the time of scipy.stats.
    p_value = special.chdtrc(df, max(float(statistic), 0.0))
    return ChiSquareTest(float(statistic), df, float(p_value))


def _check_information(info: np.ndarray, scale: np.ndarray, names: tuple[str, ...]) -> None:
    """Refuse collinear columns and columns without information (a singular I(0))."""
    scaled = info / np.outer(scale, scale)
    eigval, eigvec = np.linalg.eigh(scaled)
    tiny = eigval < 1e-10 * max(eigval.max(), 1e-300)
    if tiny.any():
        vec = eigvec[:, np.flatnonzero(tiny)[0]]
        involved = np.flatnonzero(np.abs(vec) > 1e-6)
        listed = ", ".join(f"'{names[j]}'" for j in involved)
        if involved.size > 1:
            raise InputError(
                f"columns {listed} are collinear within the risk sets (one is a linear "
                "combination of the others), so their effects cannot be separated; drop one "
                "of them or merge categories (with strata: a covariate may be constant within "
                "every stratum)"
            )
        raise InputError(
            f"column {listed} carries no information about the hazard: within every risk set "
            "it is constant (for example a covariate that is constant within every stratum, or "
            "one that varies only among recipients censored before the first event); drop it, "
            "or do not stratify on it"
        )


def _check_divergence(beta, cov, scale, names) -> None:
    se = np.sqrt(np.clip(np.diag(cov), 0, None))
    diverged = (se * scale > DIVERGED_SE) | (np.abs(beta) * scale > DIVERGED_COEF)
    if diverged.any():
        listed = ", ".join(f"'{names[j]}'" for j in np.flatnonzero(diverged))
        raise ConvergenceError(
            f"the coefficient of {listed} runs to infinity (monotone likelihood): one value or "
            "level of the covariate has no events, or only events; merge sparse levels, drop "
            "the covariate, or stratify on it"
        )


def _newton(rs, beta, start, max_iter, tol):
    """Newton-Raphson with step-halving from ``beta`` whose evaluation is ``start``.

    Returns (beta, loglik, score, info, n_iter, converged, S0).
    """
    loglik, score, info, S0 = start
    for n_iter in range(1, max_iter + 1):
        step = _solve(info, score)
        if score @ step < tol:  # Newton decrement: predicted gain is negligible
            return beta, loglik, score, info, n_iter - 1, True, S0
        for _ in range(40):
            trial = beta + step
            lik = _likelihood(rs, trial)
            if np.isfinite(lik.loglik) and lik.loglik >= loglik - 1e-12 * abs(loglik):
                break
            step = step / 2
        else:
            raise ConvergenceError(
                "the log partial likelihood could not be increased by step-halving; check the "
                "covariates for extreme values or near-collinearity"
            )
        beta = trial
        loglik, score, info, S0 = _complete(rs, lik)  # the accepted trial's sums, reused
    converged = bool(score @ _solve(info, score) < tol)
    return beta, loglik, score, info, max_iter, converged, S0


def fit_cox(
    time,
    event,
    X,
    *,
    ties: str = "efron",
    strata=None,
    weights=None,
    names=None,
    init=None,
    max_iter: int = 50,
    tol: float = 1e-12,
) -> CoxFit:
    """Fit a Cox proportional-hazards model by Newton-Raphson with step-halving.

    Parameters
    ----------
    time : array_like, shape (n,)
        Follow-up time, >= 0.
    event : array_like, shape (n,)
        1 = event, 0 = censored.
    X : array_like, shape (n, p)
        Covariates.
    ties : {"efron", "breslow"}, default "efron"
        Handling of tied event times (Efron 1977; Breslow 1974).
    strata : array_like, shape (n,), optional
        Stratum labels: a separate baseline hazard per stratum, shared coefficients.
    weights : array_like, shape (n,), optional
        Positive case weights.
    names : sequence of str, optional
        Covariate names for messages and the result (default x0, x1, ...).
    init : array_like, shape (p,), optional
        Starting coefficients (default 0).
    max_iter : int, default 50
    tol : float, default 1e-12
        Convergence when the Newton decrement U' I^-1 U falls below ``tol`` (the squared
        distance to the optimum in standard-error units).

    Returns
    -------
    CoxFit

    Raises
    ------
    InputError
        Bad arrays (NaN, negative times, events not 0/1, no events, constant or collinear
        columns).
    ConvergenceError
        A coefficient running to infinity (monotone likelihood).
    """
    if ties not in TIES:
        raise InputError(f"ties must be one of {TIES}; got {ties!r}")
    time, event = as_time_event(time, event)
    n = time.size
    if n == 0:
        raise InputError("no rows to fit")
    X, names = as_matrix(X, n, names)
    weights = as_weights(weights, n)
    if not event.any():
        raise InputError(
            f"no events among {plural(n, 'row')}: a Cox model needs at least one event; "
            "check the outcome definition and the follow-up window"
        )
    levels, codes = _strata_codes(strata, n)
    center, scale = check_columns(X, names, weights)
    rs = _RiskSets(time, event, X, weights, codes, center, ties)
    p = X.shape[1]
    zero = np.zeros(p)
    null = _evaluate(rs, zero)
    loglik0, score0, info0 = null[:3]
    _check_information(info0, scale, names)
    if init is None:
        start = null
    else:
        init = np.asarray(init, dtype=float).copy()
        if init.shape != (p,):
            raise InputError(f"init must have {p} values; got shape {init.shape}")
        start = _evaluate(rs, init)
    beta, loglik, _, info, n_iter, converged, S0 = _newton(
        rs, zero if init is None else init, start, max_iter, tol
    )
    cov = np.linalg.inv(info)
    _check_divergence(beta, cov, scale, names)
    if not converged:
        warnings.warn(
            f"the Cox fit stopped at its limit of {max_iter} iterations before converging; "
            "raise max_iter or check the covariates",
            ConvergenceWarning,
            stacklevel=2,
        )
    return CoxFit(
        coef=beta,
        cov=cov,
        se=np.sqrt(np.diag(cov)),
        names=names,
        center=center,
        loglik=float(loglik),
        loglik_null=float(loglik0),
        n=n,
        n_events=int(event.sum()),
        n_iter=n_iter,
        converged=converged,
        ties=ties,
        wald_test=_chi2(beta @ info @ beta, p),
        score_test=_chi2(score0 @ _solve(info0, score0), p),
        lr_test=_chi2(2 * (loglik - loglik0), p),
        strata_levels=levels,
        baselines=_baselines(rs, S0, len(levels)),
    )


def _strata_codes(strata, n: int) -> tuple[tuple, np.ndarray]:
    if strata is None:
        return (None,), np.zeros(n, dtype=np.intp)
    strata = np.asarray(strata, dtype=object)
    if strata.shape != (n,):
        raise InputError(f"strata must have one label per row ({n}); got shape {strata.shape}")
    missing = np.array([s is None or (isinstance(s, float) and np.isnan(s)) for s in strata])
    if missing.any():
        raise InputError(
            f"strata are missing for {plural(int(missing.sum()), 'row')} (first at row "
            f"{int(np.flatnonzero(missing)[0])}); give every row a stratum"
        )
    labels = [s.item() if hasattr(s, "item") else s for s in strata]
    # sorted by type name first, so that mixed int and text labels have an order
    levels = tuple(sorted(set(labels), key=lambda label: (type(label).__name__, label)))
    lookup = {label: code for code, label in enumerate(levels)}
    return levels, np.fromiter((lookup[s] for s in labels), dtype=np.intp, count=n)


def _baselines(rs: _RiskSets, S0: np.ndarray, n_strata: int) -> tuple[BaselineHazard, ...]:
    hazard = rs.event_weight / S0
    event_code = rs.group_code[rs.event_groups]
    event_time = rs.group_time[rs.event_groups]
    out = []
    for code in range(n_strata):
        rows = event_code == code
        in_stratum = rs.codes == code
        out.append(
            BaselineHazard(
                times=event_time[rows],
                cumhaz=np.cumsum(hazard[rows]),
                last_time=float(rs.time[in_stratum].max()),
            )
        )
    return tuple(out)
