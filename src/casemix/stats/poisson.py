"""Exact Poisson limits, one-sided p-values and funnel-plot limits for observed counts.

Everything here treats the expected count E as fixed and known, so the observed count O is
Poisson(HR * E). All functions are vectorised over arrays of O and E (numpy broadcasting) and
use scipy.stats for the distributions; only the interpolated funnel limit (an option; the
default funnel limits are exact quantiles), which scipy does not offer, is written out here.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import stats

from casemix.errors import InputError

__all__ = [
    "FUNNEL_METHODS",
    "as_observed_expected",
    "check_level",
    "exact_p_values",
    "funnel_limits",
    "garwood_interval",
    "network_oe",
    "oe_interval",
]

_MAX_LISTED = 5


def _where(bad: np.ndarray) -> str:
    """Say which elements are bad: ``"elements 2, 7 (2 of 10)"``; at most a few listed."""
    flat = np.flatnonzero(bad)
    listed = ", ".join(str(i) for i in flat[:_MAX_LISTED])
    more = ", ..." if flat.size > _MAX_LISTED else ""
    return f"element(s) {listed}{more} ({flat.size} of {bad.size}, counting from 0)"


def check_level(level: float, name: str = "level") -> float:
    """Return `level` as a float after checking that it lies strictly between 0 and 1.

    Raises
    ------
    InputError
        When `level` is not a number in (0, 1); the message names `name`.
    """
    if not isinstance(level, (int, float, np.floating)) or not 0.0 < float(level) < 1.0:
        raise InputError(
            f"{name} must be a number strictly between 0 and 1 (for example 0.95), got {level!r}."
        )
    return float(level)


def _as_float_array(values: Any, name: str) -> np.ndarray:
    try:
        array = np.asarray(values, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"{name} must be numbers; could not read them as numbers ({exc}). "
            "Convert the column to numeric values first."
        ) from exc
    bad = ~np.isfinite(array)
    if bad.any():
        raise InputError(
            f"{name} has missing or infinite values at {_where(bad)}. "
            "Remove those programs or fill in the values."
        )
    return array


def _as_observed(observed: Any) -> np.ndarray:
    counts = _as_float_array(observed, "observed")
    bad = (counts < 0) | (counts != np.floor(counts))
    if bad.any():
        raise InputError(
            f"observed must be whole numbers of events >= 0; not so at {_where(bad)}. "
            "Pass event counts, not rates or proportions."
        )
    return counts


def _as_expected(expected: Any, *, positive: bool = False) -> np.ndarray:
    values = _as_float_array(expected, "expected")
    bad = values <= 0 if positive else values < 0
    if bad.any():
        bound = "> 0" if positive else ">= 0"
        raise InputError(
            f"expected must be {bound}; not so at {_where(bad)}. "
            "Expected events come from the reference model and cannot be negative."
        )
    return values


def as_observed_expected(observed: Any, expected: Any) -> tuple[np.ndarray, np.ndarray]:
    """Validate and broadcast observed counts and expected events.

    Parameters
    ----------
    observed : array_like of int, shape (n,) or broadcastable
        Observed events: whole numbers >= 0 (floats holding whole numbers are accepted).
    expected : array_like of float, shape (n,) or broadcastable
        Expected events: finite and >= 0.

    Returns
    -------
    observed, expected : ndarray of float, the broadcast shape
        Copies as float arrays.

    Raises
    ------
    InputError
        Missing, non-finite, negative or fractional counts, negative expected events, or shapes
        that do not broadcast; the message names the offending elements.
    """
    counts = _as_observed(observed)
    values = _as_expected(expected)
    try:
        counts, values = np.broadcast_arrays(counts, values)
    except ValueError as exc:
        raise InputError(
            f"observed (shape {counts.shape}) and expected (shape {values.shape}) must have "
            "the same length, one value per program."
        ) from exc
    return counts.copy(), values.copy()


def garwood_interval(observed: Any, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Exact (Garwood) confidence limits for the mean of a Poisson count.

    .. math:: L = \\tfrac12 \\chi^2_{\\alpha/2}(2O), \\qquad
              U = \\tfrac12 \\chi^2_{1-\\alpha/2}(2O + 2), \\qquad \\alpha = 1 - \\text{level}

    with :math:`L = 0` when :math:`O = 0`.

    Parameters
    ----------
    observed : array_like of int, any shape
        Observed counts, whole numbers >= 0.
    level : float, default 0.95
        Two-sided confidence level, strictly between 0 and 1.

    Returns
    -------
    lower, upper : ndarray of float, same shape as `observed`
        Limits on the count scale.
    """
    level = check_level(level)
    counts = _as_observed(observed)
    alpha = 1.0 - level
    # chi2 with 0 degrees of freedom is undefined in scipy; the limit is 0 by definition.
    lower = np.where(
        counts > 0, stats.chi2.ppf(alpha / 2.0, 2.0 * np.maximum(counts, 1.0)) / 2.0, 0.0
    )
    upper = stats.chi2.ppf(1.0 - alpha / 2.0, 2.0 * counts + 2.0) / 2.0
    return lower, upper


def oe_interval(observed: Any, expected: Any, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Exact limits for the ratio O/E: Garwood limits of O divided by E (E taken as fixed).

    Parameters
    ----------
    observed : array_like of int, shape (n,)
        Observed counts, whole numbers >= 0.
    expected : array_like of float, shape (n,)
        Expected events, >= 0. Where E = 0 the ratio is undefined and both limits are NaN.
    level : float, default 0.95
        Two-sided confidence level.

    Returns
    -------
    lower, upper : ndarray of float, shape (n,)
        Limits on the O/E scale.
    """
    counts, values = as_observed_expected(observed, expected)
    lower, upper = garwood_interval(counts, level)
    safe = np.where(values > 0, values, 1.0)
    undefined = values == 0
    return np.where(undefined, np.nan, lower / safe), np.where(undefined, np.nan, upper / safe)


def exact_p_values(observed: Any, expected: Any) -> tuple[np.ndarray, np.ndarray]:
    """One-sided exact Poisson p-values of O against E (hazard ratio 1).

    Parameters
    ----------
    observed : array_like of int, shape (n,)
        Observed counts, whole numbers >= 0.
    expected : array_like of float, shape (n,)
        Expected events, >= 0 (E = 0 means Y = 0 surely).

    Returns
    -------
    p_more : ndarray of float, shape (n,)
        :math:`P(Y \\ge O \\mid E)`, small when there are more events than expected.
    p_fewer : ndarray of float, shape (n,)
        :math:`P(Y \\le O \\mid E)`, small when there are fewer events than expected.
    """
    counts, values = as_observed_expected(observed, expected)
    return stats.poisson.sf(counts - 1.0, values), stats.poisson.cdf(counts, values)


def _interpolated_quantile(p: float, expected: np.ndarray) -> np.ndarray:
    """Poisson p-quantile with the CDF interpolated linearly between r - 1 and r.

    r is the smallest integer with P(O <= r) >= p; the result is r - (P(O <= r) - p) / P(O = r).
    """
    r = stats.poisson.ppf(p, expected)
    step = (stats.poisson.cdf(r, expected) - p) / stats.poisson.pmf(r, expected)
    return r - step


FUNNEL_METHODS = ("exact", "interpolated")


def funnel_limits(
    expected: Any, level: float = 0.95, method: str = "exact"
) -> tuple[np.ndarray, np.ndarray]:
    """Funnel-plot control limits for O/E under the null hypothesis HR = 1.

    O ~ Poisson(E). ``"exact"`` (default): the limits are r_lo / E and r_hi / E with r_lo,
    r_hi the (1 - level)/2 and (1 + level)/2 Poisson quantiles (smallest r with
    P(O <= r) >= p), so that P(O/E > upper) <= (1 - level)/2 and P(O/E < lower) <=
    (1 - level)/2 at every E; they step with E because counts are whole numbers.
    ``"interpolated"``: the same quantiles with the CDF interpolated linearly between r - 1
    and r (Spiegelhalter 2005), smooth in E but not exact: at E = 1 a program at HR = 1 lies
    above the 95% upper limit with probability 0.08, not 0.025. The lower limit is clipped
    at 0.

    Parameters
    ----------
    expected : array_like of float, any shape
        Expected events, > 0 (for example a grid to draw the funnel on).
    level : float, default 0.95
        Coverage of the limits, strictly between 0 and 1 (0.95 and 0.998 are usual).
    method : {"exact", "interpolated"}, default "exact"

    Returns
    -------
    lower, upper : ndarray of float, same shape as `expected`
        Limits on the O/E scale.

    References
    ----------
    Spiegelhalter, D. J. (2005). Funnel plots for comparing institutional performance.
    Statistics in Medicine 24, 1185-1202.
    """
    level = check_level(level)
    if method not in FUNNEL_METHODS:
        raise InputError(f"funnel method must be one of {', '.join(FUNNEL_METHODS)}; got "
                         f"{method!r}.")
    values = _as_expected(expected, positive=True)
    tail = (1.0 - level) / 2.0
    if method == "exact":
        low, high = stats.poisson.ppf(tail, values), stats.poisson.ppf(1.0 - tail, values)
    else:
        low, high = _interpolated_quantile(tail, values), _interpolated_quantile(1 - tail, values)
    return np.maximum(low / values, 0.0), high / values


def network_oe(observed: Any, expected: Any, level: float = 0.95) -> dict[str, float]:
    """The network's overall O/E with its exact interval and an exact test of HR = 1.

    Parameters
    ----------
    observed, expected : array_like, shape (n,)
        Per program; summed over the network.
    level : float, default 0.95

    Returns
    -------
    dict
        ``observed``, ``expected``, ``oe``, ``oe_lower``, ``oe_upper`` (Garwood limits of the
        total over the total E) and ``p_value``: the two-sided exact Poisson p-value of the
        total against the total E, min(1, 2 min(P(Y >= O), P(Y <= O))) (the doubled
        one-sided test, common practice).
    """
    counts, values = as_observed_expected(observed, expected)
    total_o, total_e = float(counts.sum()), float(values.sum())
    lower, upper = oe_interval([total_o], [total_e], level)
    p_more, p_fewer = exact_p_values([total_o], [total_e])
    return {
        "observed": int(total_o),
        "expected": total_e,
        "oe": total_o / total_e if total_e > 0 else float("nan"),
        "oe_lower": float(lower[0]),
        "oe_upper": float(upper[0]),
        "p_value": float(min(1.0, 2.0 * min(p_more[0], p_fewer[0]))),
    }
