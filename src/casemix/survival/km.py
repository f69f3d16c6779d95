"""Kaplan-Meier estimate with Greenwood standard errors and log(-log) confidence limits."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from casemix.errors import InputError
from casemix.survival.validate import as_time_event, as_weights

__all__ = [
    "KaplanMeier",
    "kaplan_meier",
]


@dataclass(frozen=True, eq=False)
class KaplanMeier:
    """A Kaplan-Meier curve, right-continuous, tabulated at every distinct observed time.

    Attributes
    ----------
    times : ndarray, shape (k,)
        Distinct observed times (events or censorings), ascending.
    at_risk, events, censored : ndarray, shape (k,)
        (Weighted) numbers at risk just before each time, events and censorings at it.
    survival : ndarray, shape (k,)
        S(t) just after each time.
    se : ndarray, shape (k,)
        Greenwood standard error of S(t) (NaN where S(t) = 0).
    lower, upper : ndarray, shape (k,)
        Pointwise log(-log) ("exponential Greenwood") confidence limits at ``level``.
    level : float
    """

    times: np.ndarray
    at_risk: np.ndarray
    events: np.ndarray
    censored: np.ndarray
    survival: np.ndarray
    se: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    level: float

    def at(self, t) -> np.ndarray:
        """Return S at each time in ``t``: 1 before the first time, NaN past the last one.

        Past the last observed time the curve is unknown, except when it has reached 0 (then it
        stays 0).
        """
        return self._step(self.survival, t, before=1.0)

    def lower_at(self, t) -> np.ndarray:
        """Return the lower confidence limit at each time in ``t`` (same conventions)."""
        return self._step(self.lower, t, before=1.0)

    def upper_at(self, t) -> np.ndarray:
        """Return the upper confidence limit at each time in ``t`` (same conventions)."""
        return self._step(self.upper, t, before=1.0)

    def at_risk_at(self, t) -> np.ndarray:
        """Return the number at risk just before each time in ``t``."""
        t = np.atleast_1d(np.asarray(t, dtype=float))
        idx = np.searchsorted(self.times, t, side="left")
        padded = np.r_[self.at_risk, 0.0]
        return padded[idx]

    def _step(self, values: np.ndarray, t, before: float) -> np.ndarray:
        t = np.atleast_1d(np.asarray(t, dtype=float))
        idx = np.searchsorted(self.times, t, side="right") - 1
        out = np.where(idx >= 0, values[np.clip(idx, 0, None)], before)
        unknown = (t > self.times[-1]) & (self.survival[-1] > 0)
        return np.where(unknown, np.nan, out)


def kaplan_meier(time, event, weights=None, level: float = 0.95) -> KaplanMeier:
    """Estimate a survival curve by Kaplan-Meier.

    Parameters
    ----------
    time : array_like, shape (n,)
    event : array_like, shape (n,)
        1 = event, 0 = censored.
    weights : array_like, shape (n,), optional
        Case weights (counts are then weighted sums).
    level : float, default 0.95
        Confidence level of the pointwise limits.

    Returns
    -------
    KaplanMeier
        S(t) = prod over event times <= t of (1 - d/n); Greenwood variance
        S^2 sum d / (n (n - d)); limits S^exp(+-z sqrt(sum d/(n(n-d))) / ln S).
    """
    if not 0 < level < 1:
        raise InputError(f"level must lie between 0 and 1; got {level}")
    from scipy import stats  # here, not at import: the Cox fit's path does not need it

    time, event = as_time_event(time, event)
    if time.size == 0:
        raise InputError("no rows: a Kaplan-Meier curve needs at least one recipient")
    weights = as_weights(weights, time.size)
    times, inverse = np.unique(time, return_inverse=True)
    events = np.bincount(inverse, weights * event, minlength=times.size)
    total = np.bincount(inverse, weights, minlength=times.size)
    at_risk = np.cumsum(total[::-1])[::-1]
    with np.errstate(divide="ignore", invalid="ignore"):
        survival = np.cumprod(1.0 - events / at_risk)
        greenwood = np.cumsum(np.where(events > 0, events / (at_risk * (at_risk - events)), 0.0))
        se = np.where(survival > 0, survival * np.sqrt(greenwood), np.nan)
        z = stats.norm.ppf(0.5 + level / 2)
        log_s = np.log(survival)
        half = z * np.sqrt(greenwood) / log_s
        lower = np.where(greenwood > 0, survival ** np.exp(-half), survival)
        upper = np.where(greenwood > 0, survival ** np.exp(half), survival)
    zero = survival <= 0
    lower = np.where(zero, 0.0, lower)
    upper = np.where(zero, 0.0, upper)
    return KaplanMeier(
        times=times,
        at_risk=at_risk,
        events=events,
        censored=total - events,
        survival=survival,
        se=se,
        lower=np.minimum(lower, upper),
        upper=np.maximum(lower, upper),
        level=level,
    )
