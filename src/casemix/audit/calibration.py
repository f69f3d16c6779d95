"""Calibration of expected against observed events (Crowson, Atkinson & Therneau 2016).

Tables of O, E and O/E (with exact Garwood limits) by group of predicted risk, by program
size and by horizon, and the Poisson regressions of each recipient's event indicator with
log E as offset: calibration-in-the-large (log mu = a + log E; exp(a) is the overall O/E)
and the calibration slope (log mu = a + b lp + (log E - lp); b = 1 when the model's risk
gradient is right, b < 1 when it is too steep). statsmodels GLM does the fitting.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from casemix._optional import require
from casemix.errors import InputError, plural
from casemix.stats.poisson import as_observed_expected, check_level, oe_interval

__all__ = [
    "calibration_by_group",
    "calibration_by_horizon",
    "calibration_by_risk",
    "calibration_by_size",
    "calibration_regression",
]

SIZE_GROUPS = ("small", "medium", "large")


def _recipient_arrays(event, expected, risk=None):
    o, e = as_observed_expected(event, expected)
    if o.ndim != 1:
        raise InputError(f"give one event and one expected count per recipient; got {o.shape}")
    if risk is None:
        return o, e, None
    lp = np.asarray(risk, dtype=float)
    if lp.shape != o.shape or not np.isfinite(lp).all():
        raise InputError(
            f"risk must be finite with one value per recipient ({o.size}); got shape {lp.shape}"
        )
    return o, e, lp


def calibration_by_group(observed, expected, group, *, level: float = 0.95) -> pd.DataFrame:
    """Sum observed and expected events within groups and compare them.

    Parameters
    ----------
    observed : array_like of int, shape (n,)
        Events (per recipient or per program).
    expected : array_like of float, shape (n,)
    group : array_like, shape (n,)
        Group labels; the table is sorted by them.
    level : float, default 0.95
        Level of the exact O/E interval.

    Returns
    -------
    DataFrame
        Columns ``group, units, observed, expected, oe_ratio, oe_lower, oe_upper``.
    """
    o, e = as_observed_expected(observed, expected)
    frame = pd.DataFrame({"group": np.asarray(group), "observed": o, "expected": e})
    table = (
        frame.groupby("group", sort=True, observed=True)
        .agg(units=("observed", "size"), observed=("observed", "sum"), expected=("expected", "sum"))
        .reset_index()
    )
    lower, upper = oe_interval(table["observed"], table["expected"], check_level(level))
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(table["expected"] > 0, table["observed"] / table["expected"], np.nan)
    return table.assign(
        observed=table["observed"].astype(int), oe_ratio=ratio, oe_lower=lower, oe_upper=upper
    )


def calibration_by_risk(event, expected, risk, *, groups: int = 10) -> pd.DataFrame:
    """O against E by group of predicted risk (deciles by default).

    Parameters
    ----------
    event : array_like of {0, 1}, shape (n,)
    expected : array_like of float, shape (n,)
        Each recipient's expected events at its own follow-up.
    risk : array_like of float, shape (n,)
        The risk score that orders recipients (the linear predictor).
    groups : int, default 10
        Number of quantile groups; fewer when tied scores make quantiles coincide.

    Returns
    -------
    DataFrame
        As :func:`calibration_by_group`, with ``group`` numbered from 1 (lowest risk) and the
        score range ``risk_low``, ``risk_high`` of each group.
    """
    o, e, lp = _recipient_arrays(event, expected, risk)
    if groups < 2 or groups > o.size:
        raise InputError(f"groups must be between 2 and the number of recipients; got {groups}")
    codes = pd.qcut(lp, groups, labels=False, duplicates="drop") + 1
    table = calibration_by_group(o, e, codes)
    ranges = pd.DataFrame({"group": codes, "risk": lp}).groupby("group")["risk"].agg(["min", "max"])
    table.insert(1, "risk_low", ranges["min"].to_numpy())
    table.insert(2, "risk_high", ranges["max"].to_numpy())
    return table


def _size_thirds(recipients: pd.Series) -> np.ndarray:
    """Group 0, 1 or 2 per program: ``pandas.qcut``'s thirds of the size ranks, exactly.

    Ranks first (ties by order) so that equal sizes cannot make two thirds coincide. The edges
    are qcut's (linearly interpolated quantiles of the ranks 1..n, bins closed on the right),
    compared in integer arithmetic: in floating point an edge that falls on a rank (n = 16:
    ranks 6 and 11) lands on either side of it, and pandas 2 and 3 disagree there.
    """
    k, n = len(SIZE_GROUPS), len(recipients)
    below = recipients.rank(method="first").to_numpy().astype(np.int64) - 1  # 0 .. n - 1
    # rank r is past edge j (1 + j (n - 1) / k) when (r - 1) k > j (n - 1)
    return ((below[:, None] * k) > (np.arange(1, k)[None, :] * (n - 1))).sum(axis=1)


def calibration_by_size(programs: pd.DataFrame) -> pd.DataFrame:
    """O against E for small, medium and large programs (thirds of the recipient counts).

    Parameters
    ----------
    programs : DataFrame
        One row per program with columns ``program``, ``recipients``, ``observed``,
        ``expected``.

    Returns
    -------
    DataFrame
        As :func:`calibration_by_group` (``units`` = programs), with ``recipients_low`` and
        ``recipients_high`` giving each group's size range.
    """
    missing = {"program", "recipients", "observed", "expected"} - set(programs.columns)
    if missing:
        raise InputError(f"the programs table lacks column(s) {sorted(missing)}")
    if len(programs) < len(SIZE_GROUPS):
        raise InputError(f"size groups need at least {plural(len(SIZE_GROUPS), 'program')}")
    codes = _size_thirds(programs["recipients"])
    table = calibration_by_group(programs["observed"], programs["expected"], codes)
    sizes = programs.groupby(codes)["recipients"].agg(["min", "max"])
    table.insert(1, "size", np.asarray(SIZE_GROUPS, dtype=object)[table["group"].to_numpy()])
    table.insert(2, "recipients_low", sizes["min"].to_numpy())
    table.insert(3, "recipients_high", sizes["max"].to_numpy())
    return table


def _poisson_glm(o, offset, exog):
    sm = require("statsmodels.api", "the calibration regression")
    return sm.GLM(o, exog, family=sm.families.Poisson(), offset=offset).fit()


def calibration_regression(event, expected, risk, *, level: float = 0.95) -> pd.DataFrame:
    """Calibration-in-the-large and calibration slope by Poisson regression.

    Recipients with E = 0 (follow-up ending before the first reference event time) are left
    out, and ``recipients`` says how many were used. An event among them (a cohort failure
    earlier than any in the reference, e.g. on the day of the transplant when the reference
    had none) cannot enter a regression on log E; such events are counted in
    ``events_without_risk`` rather than hidden.

    Parameters
    ----------
    event : array_like of {0, 1}, shape (n,)
    expected : array_like of float, shape (n,)
    risk : array_like of float, shape (n,)
        The linear predictor of each recipient.
    level : float, default 0.95

    Returns
    -------
    DataFrame, shape (2, 8)
        Index ``in_the_large`` (estimate = exp(a) = O/E) and ``slope`` (b); columns
        ``estimate, lower, upper, null, p_value, recipients, observed, events_without_risk``
        where ``p_value`` tests estimate = null (1 for both).
    """
    o, e, lp = _recipient_arrays(event, expected, risk)
    level = check_level(level)
    used = e > 0
    without_risk = int(o[~used].sum())
    o, log_e, lp = o[used], np.log(e[used]), lp[used]
    if o.sum() == 0:
        raise InputError("no recipient has an event, so calibration cannot be assessed")
    zq = stats.norm.isf((1 - level) / 2)
    large = _poisson_glm(o, log_e, np.ones((o.size, 1)))
    a, sa = float(large.params[0]), float(large.bse[0])
    slope = _poisson_glm(o, log_e - lp, np.column_stack([np.ones(o.size), lp]))
    b, sb = float(slope.params[1]), float(slope.bse[1])
    rows = {
        "in_the_large": (np.exp(a), np.exp(a - zq * sa), np.exp(a + zq * sa), a / sa),
        "slope": (b, b - zq * sb, b + zq * sb, (b - 1.0) / sb),
    }
    table = pd.DataFrame(
        {
            "estimate": [v[0] for v in rows.values()],
            "lower": [v[1] for v in rows.values()],
            "upper": [v[2] for v in rows.values()],
            "null": 1.0,
            "p_value": [2 * stats.norm.sf(abs(v[3])) for v in rows.values()],
            "recipients": int(o.size),
            "observed": int(o.sum()),
            "events_without_risk": without_risk,
        },
        index=pd.Index(list(rows), name="term"),
    )
    return table


def calibration_by_horizon(fit, time, event, X, horizons, *, strata=None) -> pd.DataFrame:
    """O/E and calibration slope with follow-up cut at each horizon.

    Parameters
    ----------
    fit : CoxFit
    time : array_like of float, shape (n,)
    event : array_like of {0, 1}, shape (n,)
    X : array_like of float, shape (n, p)
    horizons : sequence of float
        Follow-up cut-offs, in the time unit of ``time``, each within the fit's follow-up.
    strata : array_like, shape (n,), optional

    Returns
    -------
    DataFrame
        One row per horizon: ``horizon, recipients, observed, expected, oe_ratio, oe_lower,
        oe_upper, slope, slope_lower, slope_upper``.
    """
    time = np.asarray(time, dtype=float)
    event = np.asarray(event)
    lp = fit.linear_predictor(X)
    rows = []
    for h in sorted(float(h) for h in horizons):
        if not 0 < h <= time.max():
            raise InputError(
                f"horizon {h:g} lies outside the follow-up of these data (0 to {time.max():g}); "
                "give horizons within it"
            )
        cut = np.minimum(time, h)
        ev = (event == 1) & (time <= h)
        e = fit.expected_events(cut, X, strata)
        oe = calibration_by_group(ev.astype(int), e, np.zeros(e.size, dtype=int))
        reg = calibration_regression(ev.astype(int), e, lp)
        rows.append(
            {
                "horizon": h,
                "recipients": int(time.size),
                "observed": int(ev.sum()),
                "expected": float(e.sum()),
                "oe_ratio": float(oe["oe_ratio"].iloc[0]),
                "oe_lower": float(oe["oe_lower"].iloc[0]),
                "oe_upper": float(oe["oe_upper"].iloc[0]),
                "slope": float(reg.loc["slope", "estimate"]),
                "slope_lower": float(reg.loc["slope", "lower"]),
                "slope_upper": float(reg.loc["slope", "upper"]),
            }
        )
    return pd.DataFrame(rows)
