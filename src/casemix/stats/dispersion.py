"""Overdispersion of program O/E ratios (Spiegelhalter 2005, "Funnel plots for comparing
institutional performance", section on overdispersion).

Each program's O/E is turned into a z-score under the null HR = 1 with the Poisson standard
error, :math:`z_i = (O_i/E_i - 1)\\sqrt{E_i}`. The z-scores are winsorised (values beyond the
10% and 90% quantiles are pulled in to them, numpy's default linear quantile) so that a few
outlying programs do not inflate the estimate, and

.. math:: \\hat\\phi = \\frac1n \\sum_i z_{w,i}^2, \\qquad n\\hat\\phi \\sim \\chi^2_{n-1},
          \\qquad \\hat\\tau^2 = \\max\\Bigl(0, \\frac{n\\hat\\phi - (n-1)}
          {\\sum_i w_i - \\sum_i w_i^2 / \\sum_i w_i}\\Bigr), \\quad w_i = 1/s_i^2 = E_i.

phi inflates the funnel limits multiplicatively (1 +- z sqrt(phi / E)); tau^2 adds a
between-program variance (1 +- z sqrt(1/E + tau^2)). Short formulas, written out here; no
library offers them.

The test of "no overdispersion" is calibrated by simulation, not by the chi-squared(n - 1)
distribution: winsorising shrinks n phi, so that reference distribution makes the test far
too cautious (a real size of about 0.8% at a nominal 5% with 16 programs). Under the null
every O_i ~ Poisson(E_i) independently (HR = 1 everywhere); the statistic
is recomputed, winsorising included, on ``simulations`` seeded draws, and the p-value is
(1 + #{T* >= T}) / (1 + B) (Davison & Hinkley 1997, section 4.2). Its size and
power are in docs/dispersion.md.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from casemix.errors import InputError
from casemix.stats.poisson import as_observed_expected, check_level

__all__ = [
    "ADJUSTMENTS",
    "Overdispersion",
    "adjusted_funnel_limits",
    "null_statistics",
    "overdispersion",
]

ADJUSTMENTS = ("multiplicative", "additive")
MIN_PROGRAMS = 3


@dataclass(frozen=True, eq=False)
class Overdispersion:
    """Dispersion of program z-scores and its test.

    Attributes
    ----------
    z : ndarray, shape (n,)
        z-scores (O/E - 1) sqrt(E), in input order.
    z_winsorised : ndarray, shape (n,)
    limits : tuple of float
        The quantiles the z-scores were winsorised to (low, high).
    phi : float
        Mean squared winsorised z-score (1 when there is no overdispersion).
    statistic : float
        n phi.
    df : int
        n - 1.
    p_value : float
        Monte Carlo p-value of n phi under Poisson(E) counts (module docstring).
    tau2 : float
        Additive between-program variance of the O/E ratio (0 when n phi <= n - 1).
    simulations : int
        Null data sets drawn for the p-value.
    p_value_raw : float
        The same test on the raw z-scores (no winsorising), on the same simulated data: it
        keeps the outlying programs, so it has more power when they are real.
    """

    z: np.ndarray
    z_winsorised: np.ndarray
    limits: tuple[float, float]
    phi: float
    statistic: float
    df: int
    p_value: float
    tau2: float
    simulations: int
    p_value_raw: float


def _winsorised_statistic(z: np.ndarray, winsor: float) -> tuple[np.ndarray, np.ndarray]:
    """n phi of each row of z (shape (..., n)) and the winsorised z-scores."""
    low, high = np.quantile(z, [winsor, 1.0 - winsor], axis=-1, keepdims=True)
    zw = np.clip(z, low, high)
    return (zw**2).sum(axis=-1), zw


def null_statistics(expected, *, winsor: float = 0.1, simulations: int = 2000, seed: int = 0):
    """n phi on data sets simulated with O ~ Poisson(E) and no overdispersion.

    Parameters
    ----------
    expected : array_like of float, shape (n,)
        Expected events per program, > 0.
    winsor : float, default 0.1
    simulations : int, default 2000
    seed : int, default 0

    Returns
    -------
    ndarray of float, shape (simulations,)
    """
    e = np.asarray(expected, dtype=float)
    rng = np.random.default_rng(seed)
    draws = rng.poisson(e, size=(int(simulations), e.size))
    return _winsorised_statistic((draws - e) / np.sqrt(e), winsor)[0]


def _simulated_p(statistic: float, null: np.ndarray) -> float:
    """(1 + #{null >= statistic}) / (1 + B); ties with the statistic count as at least as large."""
    return (1 + int((null >= statistic * (1 - 1e-12)).sum())) / (1 + null.size)


def overdispersion(
    observed, expected, *, winsor: float = 0.1, simulations: int = 2000, seed: int = 0
) -> Overdispersion:
    """Estimate multiplicative (phi) and additive (tau^2) overdispersion of O/E ratios.

    Parameters
    ----------
    observed : array_like of int, shape (n,)
        Observed events per program.
    expected : array_like of float, shape (n,)
        Expected events per program, > 0 (drop programs with E = 0 first: they carry no
        information about the ratio).
    winsor : float, default 0.1
        Fraction winsorised at each end, in [0, 0.5).
    simulations : int, default 2000
        Null data sets for the p-value (at least 100); its Monte Carlo standard error near
        p = 0.05 is about 0.005 with 2000.
    seed : int, default 0
        Seed of the simulation: the same inputs give the same p-value.

    Returns
    -------
    Overdispersion
    """
    o, e = as_observed_expected(observed, expected)
    if o.ndim != 1 or o.size < MIN_PROGRAMS:
        raise InputError(
            f"overdispersion needs at least {MIN_PROGRAMS} programs, one value each; got "
            f"shape {o.shape}"
        )
    if (e <= 0).any():
        raise InputError(
            f"expected must be > 0 for every program; program(s) at positions "
            f"{np.flatnonzero(e <= 0).tolist()} have E = 0: leave them out of this check"
        )
    if not 0 <= winsor < 0.5:
        raise InputError(f"winsor must be in [0, 0.5) (for example 0.1), got {winsor!r}")
    if isinstance(simulations, bool) or int(simulations) != simulations or simulations < 100:
        raise InputError(f"simulations must be a whole number of at least 100, not {simulations!r}")
    z = (o - e) / np.sqrt(e)
    statistic, zw = _winsorised_statistic(z, winsor)
    statistic = float(statistic)
    low, high = np.quantile(z, [winsor, 1.0 - winsor])
    n = z.size
    phi = statistic / n
    p_value = _simulated_p(statistic, null_statistics(e, winsor=winsor,
                                                      simulations=simulations, seed=seed))
    p_raw = _simulated_p(float((z**2).sum()), null_statistics(e, winsor=0.0,
                                                              simulations=simulations, seed=seed))
    w = e  # 1 / s^2 with s^2 = 1/E on the O/E scale
    tau2 = max(0.0, (statistic - (n - 1)) / (w.sum() - (w**2).sum() / w.sum()))
    return Overdispersion(
        z=z,
        z_winsorised=zw,
        limits=(float(low), float(high)),
        phi=phi,
        statistic=statistic,
        df=n - 1,
        p_value=p_value,
        tau2=float(tau2),
        simulations=int(simulations),
        p_value_raw=p_raw,
    )


def adjusted_funnel_limits(
    expected, dispersion: Overdispersion, *, level: float = 0.95, method: str = "multiplicative"
) -> tuple[np.ndarray, np.ndarray]:
    """Funnel limits for O/E widened for overdispersion (normal approximation).

    Parameters
    ----------
    expected : array_like of float, any shape
        Expected events, > 0 (for example a grid to draw the funnel on).
    dispersion : Overdispersion
        From :func:`overdispersion`.
    level : float, default 0.95
        Coverage of the limits.
    method : {"multiplicative", "additive"}, default "multiplicative"
        1 +- z sqrt(max(phi, 1) / E), or 1 +- z sqrt(1 / E + tau^2).

    Returns
    -------
    lower, upper : ndarray of float, same shape as `expected`
        Limits on the O/E scale; the lower limit is clipped at 0.
    """
    level = check_level(level)
    if method not in ADJUSTMENTS:
        raise InputError(f"unknown adjustment {method!r}; use one of {', '.join(ADJUSTMENTS)}")
    e = np.asarray(expected, dtype=float)
    if not np.isfinite(e).all() or (e <= 0).any():
        raise InputError("expected must be finite and > 0 to draw funnel limits")
    zq = stats.norm.isf((1.0 - level) / 2.0)
    if method == "multiplicative":
        # limits are only ever widened: phi below 1 is taken as no overdispersion
        half = zq * np.sqrt(max(dispersion.phi, 1.0) / e)
    else:
        half = zq * np.sqrt(1.0 / e + dispersion.tau2)
    return np.maximum(1.0 - half, 0.0), 1.0 + half
