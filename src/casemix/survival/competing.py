"""Cumulative incidence with a competing event (Aalen-Johansen), beside one minus Kaplan-Meier.

With two kinds of end, the event of interest (code 1) and a competing event (code 2) that
stops follow-up for good (death in death-censored graft failure), one minus the Kaplan-Meier
estimate that treats code 2 as censoring answers "how many would have failed had nobody
died", which overstates the share who actually fail. The Aalen-Johansen estimate

.. math:: F_1(t) = \\sum_{t_j \\le t} \\hat S(t_j-) \\, \\frac{d_{1j}}{n_j},

with :math:`\\hat S` the Kaplan-Meier estimate of being free of *either* end, is the share who
actually have the event by t. Point estimates only. A cumulative sum over the distinct times,
written by hand because the survival engine takes no pandas (lifelines'
``AalenJohansenFitter`` is the test's reference).

References
----------
Aalen, O. O., & Johansen, S. (1978). An empirical transition matrix for non-homogeneous
Markov chains based on censored observations. Scandinavian Journal of Statistics, 5, 141-150.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from casemix.errors import InputError
from casemix.survival.validate import as_weights

__all__ = ["CumulativeIncidence", "cumulative_incidence"]


@dataclass(frozen=True, eq=False)
class CumulativeIncidence:
    """Cumulative incidence of the event of interest, right-continuous, at each distinct time.

    Attributes
    ----------
    times : ndarray, shape (k,)
        Distinct observed times, ascending.
    at_risk : ndarray, shape (k,)
        Numbers at risk just before each time.
    events, competing : ndarray, shape (k,)
        Events of interest and competing events at each time.
    incidence : ndarray, shape (k,)
        Aalen-Johansen F_1(t) just after each time.
    one_minus_km : ndarray, shape (k,)
        1 - S_1(t), the Kaplan-Meier estimate with competing events treated as censored.
    """

    times: np.ndarray
    at_risk: np.ndarray
    events: np.ndarray
    competing: np.ndarray
    incidence: np.ndarray
    one_minus_km: np.ndarray

    def at(self, t) -> np.ndarray:
        """F_1 at each time in ``t``: 0 before the first time, NaN past the last one."""
        return self._step(self.incidence, t)

    def one_minus_km_at(self, t) -> np.ndarray:
        """1 - S_1 at each time in ``t`` (same conventions)."""
        return self._step(self.one_minus_km, t)

    def _step(self, values: np.ndarray, t) -> np.ndarray:
        t = np.atleast_1d(np.asarray(t, dtype=float))
        idx = np.searchsorted(self.times, t, side="right") - 1
        out = np.where(idx >= 0, values[np.clip(idx, 0, None)], 0.0)
        return np.where(t > self.times[-1], np.nan, out)


def cumulative_incidence(time, code, weights=None) -> CumulativeIncidence:
    """Aalen-Johansen cumulative incidence of code 1 with code 2 competing.

    Parameters
    ----------
    time : array_like of float, shape (n,)
        Follow-up times, >= 0.
    code : array_like of int, shape (n,)
        0 = censored, 1 = event of interest, 2 = competing event.
    weights : array_like of float, shape (n,), optional
        Case weights.

    Returns
    -------
    CumulativeIncidence
    """
    time = np.asarray(time, dtype=float)
    code = np.asarray(code)
    if time.ndim != 1 or code.shape != time.shape or time.size == 0:
        raise InputError(
            f"give one time and one code per recipient (at least one); got shapes {time.shape} "
            f"and {code.shape}"
        )
    if not np.isfinite(time).all() or (time < 0).any():
        raise InputError("time must be finite and >= 0 for every recipient")
    if not np.isin(code, (0, 1, 2)).all():
        raise InputError("code must be 0 (censored), 1 (event) or 2 (competing event)")
    w = as_weights(weights, time.size)
    times, inverse = np.unique(time, return_inverse=True)
    d1 = np.bincount(inverse, w * (code == 1), minlength=times.size)
    d2 = np.bincount(inverse, w * (code == 2), minlength=times.size)
    at_risk = np.cumsum(np.bincount(inverse, w, minlength=times.size)[::-1])[::-1]
    with np.errstate(divide="ignore", invalid="ignore"):
        free = np.cumprod(1.0 - (d1 + d2) / at_risk)  # free of either end, just after t_j
        before = np.r_[1.0, free[:-1]]
        incidence = np.cumsum(before * d1 / at_risk)
        one_minus_km = 1.0 - np.cumprod(1.0 - d1 / at_risk)
    return CumulativeIncidence(times, at_risk, d1, d2, incidence, one_minus_km)
