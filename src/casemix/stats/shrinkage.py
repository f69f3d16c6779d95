"""Gamma-Poisson shrinkage of each program's hazard ratio.

Model: HR ~ Gamma(shape a, rate b) across programs; O | HR ~ Poisson(HR * E) within a program.
The posterior of a program's HR is Gamma(a + O, b + E) and, integrating HR out, O has the
negative-binomial marginal distribution

.. math:: \\ln p(O) = \\ln\\Gamma(a+O) - \\ln\\Gamma(a) - \\ln O! + a\\ln\\frac{b}{b+E}
          + O\\ln\\frac{E}{b+E}.

The prior is fixed by the user, estimated by plug-in empirical Bayes (maximising the summed
marginal log-likelihood over programs), or integrated over with a hyperprior (see
`casemix.stats.hierarchy`). In the last case the prior is a finite mixture of gammas with
weights w_k (the quadrature's hyperposterior weights), and each program's posterior is the
mixture of Gamma(a_k + O, b_k + E) with the same weights; a single gamma is the mixture of one.
scipy does the optimising and root finding; the profile likelihood over the shape is written
out here because the plug-in estimate can run to the boundary a -> infinity (no spread of
hazard ratios beyond Poisson chance), which a plain optimiser reports as a huge finite number.
In plug-in empirical Bayes that case is detected and replaced by a documented fallback prior;
the hierarchical prior needs no fallback. Quantiles of a mixture are found by Brent's method
on its CDF (scipy has no mixture distribution).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any

import numpy as np
import pandas as pd
from scipy import optimize, special, stats

from casemix.errors import InputError, PriorWarning, plural
from casemix.stats.poisson import as_observed_expected, check_level

__all__ = [
    "PRIOR_METHODS",
    "Prior",
    "empirical_bayes_prior",
    "fixed_prior",
    "log_marginal",
    "mixture_cdf",
    "mixture_quantile",
    "mixture_sf",
    "posterior",
]

PRIOR_METHODS = ("fixed", "empirical_bayes", "empirical_bayes_fallback", "hierarchical")
MIN_PROGRAMS = 3
# Search range of the prior shape below max_shape; a shape of 1e-4 (prior sd 100) is far
# wider than any real spread of hazard ratios.
_MIN_SHAPE = 1e-4
_GRID_POINTS = 121


def _positive(value: Any, what: str) -> float:
    """Return `value` as a float after checking that it is a finite number > 0."""
    is_number = isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(
        value, bool
    )
    if not is_number or not math.isfinite(value) or value <= 0:
        raise InputError(f"{what} must be a finite number > 0, got {value!r}.")
    return float(value)


@dataclass(frozen=True)
class Prior:
    """A gamma prior for the programs' hazard ratios, and how it was chosen.

    Attributes
    ----------
    shape, rate : float
        Gamma shape a and rate b (> 0); prior mean a / b, variance a / b**2. For a mixture
        (``components`` given) they are the single gamma with the mixture's mean and
        variance, a summary only: the components are what is used.
    method : {"fixed", "empirical_bayes", "empirical_bayes_fallback", "hierarchical"}
        Given by the user, estimated from the programs (plug-in), the fallback used because
        the plug-in estimate could not be made (see `note`), or integrated over a hyperprior.
    free_mean : bool, default False
        For the estimated methods: whether the prior mean was estimated (True) or held at 1,
        the reference population being the standard (False). False for a fixed prior.
    log_marginal : float or None, default None
        Summed negative-binomial log marginal likelihood of the programs used in the
        estimate, at this prior. None for a fixed prior, which is chosen without the data.
    at_boundary : bool, default False
        True when the estimate ran to a -> infinity (no spread beyond Poisson chance).
    note : str, default ""
        One plain-words sentence or two for the report.
    components : tuple of (shape, rate, weight), default ()
        A mixture of gammas (weights > 0 summing to 1); empty for the single Gamma(shape,
        rate).
    hyperprior : dict or None, default None
        For ``"hierarchical"``: the hyperprior and quadrature used, and summaries of the
        hyperposterior (written to ``run.json``).
    """

    shape: float
    rate: float
    method: str
    free_mean: bool = False
    log_marginal: float | None = None
    at_boundary: bool = False
    note: str = ""
    components: tuple[tuple[float, float, float], ...] = ()
    hyperprior: dict | None = None

    def __post_init__(self) -> None:
        _positive(self.shape, "prior shape")
        _positive(self.rate, "prior rate")
        if self.method not in PRIOR_METHODS:
            raise InputError(
                f"prior method must be one of {', '.join(PRIOR_METHODS)}; got {self.method!r}."
            )
        if self.components:
            a, b, w = self.arrays()
            if not (np.all(a > 0) and np.all(b > 0) and np.all(w > 0)):
                raise InputError("prior mixture components need shape, rate and weight > 0.")
            if abs(float(w.sum()) - 1.0) > 1e-9:
                raise InputError(f"prior mixture weights must sum to 1, got {w.sum()!r}.")

    def arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Component shapes, rates and weights as arrays (one component for a single gamma)."""
        if not self.components:
            return np.array([self.shape]), np.array([self.rate]), np.array([1.0])
        a, b, w = (np.array(column, dtype=float) for column in zip(*self.components, strict=True))
        return a, b, w

    @property
    def mean(self) -> float:
        """Prior mean of the hazard ratio (for a mixture, the weighted mean of a_k / b_k)."""
        a, b, w = self.arrays()
        return float(np.sum(w * a / b))

    @property
    def sd(self) -> float:
        """Prior standard deviation of the hazard ratio (of the whole mixture)."""
        a, b, w = self.arrays()
        second = np.sum(w * a * (a + 1.0) / b**2)
        return float(math.sqrt(max(second - self.mean**2, 0.0)))

    @property
    def centre(self) -> str:
        """What the hazard ratios are shrunk towards, in words."""
        if self.method != "fixed" and not self.free_mean:
            return "the reference (prior mean fixed at 1)"
        if self.method == "fixed":
            return f"the fixed prior's mean, {self.mean:.3g}"
        return f"the network's estimated mean, {self.mean:.3g}"

    def to_dict(self) -> dict[str, Any]:
        """The JSON object written to ``run.json`` under ``"prior"``."""
        return {
            "shape": float(self.shape),
            "rate": float(self.rate),
            "mean": float(self.mean),
            "method": self.method,
            "free_mean": bool(self.free_mean),
            "log_marginal": None if self.log_marginal is None else float(self.log_marginal),
            "at_boundary": bool(self.at_boundary),
            "note": self.note,
            "sd": float(self.sd),
            "centre": self.centre,
            # (shape, rate, weight) per mixture component: enough to rebuild the prior exactly
            "components": [list(c) for c in self.components],
            "hyperprior": self.hyperprior,
        }

    @classmethod
    def from_dict(cls, values: Mapping[str, Any]) -> Prior:
        """Rebuild the prior from :meth:`to_dict`'s object (``run.json``'s ``"prior"``).

        The derived entries (``mean``, ``sd``, ``centre``) are recomputed, not read.

        Raises
        ------
        InputError
            A key the prior needs is missing, a value is invalid, or a hierarchical prior
            lacks its mixture ``components`` (written by versions that did not keep them: the
            summary gamma alone is not the prior that was used).
        """
        if not isinstance(values, Mapping):
            raise InputError(f"the prior must be an object of keys, got {values!r}.")
        missing = [k for k in ("shape", "rate", "method") if k not in values]
        if values.get("method") == "hierarchical" and not values.get("components"):
            missing.append("components")
        if missing:
            raise InputError(f"the prior lacks {', '.join(missing)}.")
        given = {f.name: values[f.name] for f in fields(cls) if f.name in values}
        try:
            given["components"] = tuple(tuple(float(x) for x in c)
                                        for c in given.get("components") or ())
            return cls(**given)
        except (TypeError, ValueError) as err:
            raise InputError(f"the prior cannot be rebuilt ({err}).") from err


def fixed_prior(shape: float, rate: float) -> Prior:
    """A prior Gamma(shape, rate) given by the user.

    Parameters
    ----------
    shape, rate : float
        Finite numbers > 0. shape = rate gives prior mean 1 (the reference standard); larger
        values shrink harder.

    Returns
    -------
    Prior
        With method ``"fixed"`` and no marginal likelihood.

    Raises
    ------
    InputError
        When shape or rate is not a finite number > 0.
    """
    a = _positive(shape, "prior shape (for example 2)")
    b = _positive(rate, "prior rate (for example 2)")
    note = (
        f"Fixed prior Gamma(shape {a:.4g}, rate {b:.4g}) given by the user: prior mean "
        f"{a / b:.3g}, prior standard deviation {math.sqrt(a) / b:.3g}."
    )
    return Prior(shape=a, rate=b, method="fixed", note=note)


def _log_marginal_terms(o: np.ndarray, e: np.ndarray, a: float, b: float) -> np.ndarray:
    """Per-program log marginal over already validated arrays (no checks: used in searches)."""
    return (
        special.gammaln(a + o)
        - special.gammaln(a)
        - special.gammaln(o + 1.0)
        - a * np.log1p(e / b)
        + special.xlogy(o, e / (b + e))
    )


def _total_log_marginal(o: np.ndarray, e: np.ndarray, a: float, b: float) -> float:
    return float(np.sum(_log_marginal_terms(o, e, a, b)))


def log_marginal(observed: Any, expected: Any, shape: float, rate: float) -> np.ndarray:
    """Negative-binomial log marginal likelihood of each program's count.

    Parameters
    ----------
    observed : array_like of int, shape (n,)
        Observed events, whole numbers >= 0.
    expected : array_like of float, shape (n,)
        Expected events, >= 0. E = 0 gives 0 when O = 0 and -inf when O > 0.
    shape, rate : float
        Prior Gamma(shape, rate), both > 0.

    Returns
    -------
    ndarray of float, shape (n,)
        ln p(O_i) with HR integrated out; equal to
        ``scipy.stats.nbinom.logpmf(O, shape, rate / (rate + E))``.
    """
    o, e = as_observed_expected(observed, expected)
    a = _positive(shape, "prior shape")
    b = _positive(rate, "prior rate")
    return _log_marginal_terms(o, e, a, b)


def _best_mean(o: np.ndarray, e: np.ndarray, a: float) -> float:
    """Prior mean m maximising the marginal likelihood at shape a (rate a / m).

    The score in m is proportional to sum((O - m E) / (a + m E)), which falls in m and is
    positive below min(O/E) and negative above max(O/E), so the root is bracketed there.
    """
    ratio = o / e
    lo, hi = float(ratio.min()), float(ratio.max())
    if lo == hi:
        return hi

    def score(m: float) -> float:
        return float(np.sum((o - m * e) / (a + m * e)))

    return optimize.brentq(score, lo, hi, xtol=1e-14, rtol=4 * np.finfo(float).eps)


def _profile(o: np.ndarray, e: np.ndarray, log_shape: float, free_mean: bool) -> float:
    a = math.exp(log_shape)
    mean = _best_mean(o, e, a) if free_mean else 1.0
    return _total_log_marginal(o, e, a, a / mean)


def _maximise_shape(
    o: np.ndarray, e: np.ndarray, free_mean: bool, max_shape: float
) -> tuple[float, float] | None:
    """Maximise the profile over the log shape; None when the optimum is the boundary.

    A coarse grid finds the best region (so a far-off local maximum is not missed), then a
    bounded Brent search refines it. As a grows the profile tends to the pure-Poisson
    log-likelihood (every HR equal to the prior mean); when the grid's best point is its
    upper end the profile is still climbing towards that limit at max_shape, and the answer
    is the boundary a -> infinity rather than a finite estimate.
    """
    grid = np.linspace(math.log(_MIN_SHAPE), math.log(max_shape), _GRID_POINTS)
    values = np.array([_profile(o, e, t, free_mean) for t in grid])
    best = int(np.argmax(values))
    if best == grid.size - 1:
        return None
    bracket = (grid[max(best - 1, 0)], grid[best + 1])
    found = optimize.minimize_scalar(
        lambda t: -_profile(o, e, t, free_mean),
        bounds=bracket,
        method="bounded",
        options={"xatol": 1e-10},
    )
    return math.exp(float(found.x)), -float(found.fun)


def _fallback(
    o: np.ndarray,
    e: np.ndarray,
    fallback: tuple[float, float],
    free_mean: bool,
    *,
    reason: str,
    skipped: str,
    at_boundary: bool = False,
) -> Prior:
    """The fallback prior, with a note giving `reason`, and a PriorWarning saying the same."""
    a, b = fallback
    note = (
        f"{reason} The documented fallback prior Gamma(shape {a:.4g}, rate {b:.4g}) "
        f"is used instead (prior mean {a / b:.3g}).{skipped}"
    )
    warnings.warn(note, PriorWarning, stacklevel=3)
    return Prior(
        shape=a,
        rate=b,
        method="empirical_bayes_fallback",
        free_mean=free_mean,
        log_marginal=_total_log_marginal(o, e, a, b) if o.size else None,
        at_boundary=at_boundary,
        note=note,
    )


def _skipped_text(count: int) -> str:
    if count == 0:
        return ""
    was, they = ("was", "it carries") if count == 1 else ("were", "they carry")
    return (
        f" {plural(count, 'program')} with zero expected events {was} left out of the estimate "
        f"because {they} no information about the spread."
    )


def empirical_bayes_prior(
    observed: Any,
    expected: Any,
    *,
    free_mean: bool = False,
    fallback: tuple[float, float] = (2.0, 2.0),
    max_shape: float = 1e4,
) -> Prior:
    """Estimate the gamma prior from the programs by maximum marginal likelihood.

    The summed negative-binomial log marginal likelihood (see `log_marginal`) is maximised
    over the shape a with the prior mean held at 1 (rate = shape: the reference population is
    the standard), or over shape and mean when `free_mean` is True (the mean is profiled out
    exactly). Programs with E = 0 are left out: their count carries no information about HR.

    Parameters
    ----------
    observed : array_like of int, shape (n,)
        Observed events per program, whole numbers >= 0.
    expected : array_like of float, shape (n,)
        Expected events per program, >= 0.
    free_mean : bool, default False
        Estimate the prior mean too instead of fixing it at 1.
    fallback : (float, float), default (2.0, 2.0)
        (shape, rate) used when no prior can be estimated (see Returns).
    max_shape : float, default 1e4
        Largest shape searched; a prior this tight (sd 1 / sqrt(max_shape) = 0.01 for mean 1)
        means no spread worth estimating, so reaching it counts as the boundary.

    Returns
    -------
    Prior
        method ``"empirical_bayes"`` with the estimate, or ``"empirical_bayes_fallback"``
        with the fallback values and a note saying why when (i) the likelihood keeps rising
        as a -> infinity (no spread beyond Poisson chance; ``at_boundary`` True), (ii) fewer
        than 3 programs have E > 0, or (iii) none of them has an event.

    Warns
    -----
    PriorWarning
        Whenever the fallback prior is returned.

    Raises
    ------
    InputError
        Invalid counts or expected events, or a fallback or max_shape that is not > 0.
    """
    o_all, e_all = as_observed_expected(observed, expected)
    fallback = (
        _positive(fallback[0], "fallback prior shape"),
        _positive(fallback[1], "fallback prior rate"),
    )
    max_shape = _positive(max_shape, "max_shape")
    if max_shape <= 1.0:
        raise InputError(f"max_shape must be > 1 (default 1e4), got {max_shape!r}.")
    used = e_all.ravel() > 0
    o, e = o_all.ravel()[used], e_all.ravel()[used]
    skipped = _skipped_text(int(used.size - used.sum()))
    if o.size < MIN_PROGRAMS:
        reason = (
            f"Only {plural(o.size, 'program', ('has', 'have'))} expected events above 0; at least "
            f"{MIN_PROGRAMS} are needed to estimate the spread of hazard ratios."
        )
        return _fallback(o, e, fallback, free_mean, reason=reason, skipped=skipped)
    if o.sum() == 0:
        reason = (f"None of the {plural(o.size, 'program')} has an observed event, so no "
                  "spread can be seen.")
        return _fallback(o, e, fallback, free_mean, reason=reason, skipped=skipped)
    optimum = _maximise_shape(o, e, free_mean, max_shape)
    if optimum is None:
        reason = (
            f"The {plural(o.size, 'program')} vary no more than Poisson chance allows: the "
            "marginal likelihood keeps rising as the prior shape grows without limit, so there "
            "is no finite estimate."
        )
        return _fallback(
            o, e, fallback, free_mean, reason=reason, skipped=skipped, at_boundary=True
        )
    shape, peak = optimum
    mean = _best_mean(o, e, shape) if free_mean else 1.0
    how = f"mean {mean:.3g} estimated" if free_mean else "mean fixed at 1 (the reference)"
    note = (
        f"Empirical Bayes from {plural(o.size, 'program')}: prior Gamma(shape {shape:.4g}, rate "
        f"{shape / mean:.4g}), {how}; the programs' hazard ratios spread with a prior "
        f"standard deviation of {mean / math.sqrt(shape):.3g}.{skipped}"
    )
    return Prior(
        shape=shape,
        rate=shape / mean,
        method="empirical_bayes",
        free_mean=free_mean,
        log_marginal=peak,
        note=note,
    )


def _index_of(values: Any, size: int) -> pd.Index:
    if isinstance(values, pd.Series) and len(values.index) == size:
        return values.index
    return pd.RangeIndex(size)


def _components(prior: Prior, o: np.ndarray, e: np.ndarray):
    """Posterior component shapes and rates, shape (n, K), and the weights, shape (K,)."""
    a, b, w = prior.arrays()
    return a[None, :] + o[:, None], b[None, :] + e[:, None], w


def mixture_sf(x: Any, prior: Prior, observed: Any, expected: Any) -> np.ndarray:
    """P(HR > x) under each program's posterior (a mixture of gammas), vectorised.

    Parameters
    ----------
    x : float or array_like, shape (n,)
    prior : Prior
    observed, expected : array_like, shape (n,)
        Validated counts (whole numbers >= 0) and expected events (>= 0).

    Returns
    -------
    ndarray of float, shape (n,)
    """
    o, e = np.atleast_1d(np.asarray(observed, float)), np.atleast_1d(np.asarray(expected, float))
    shape, rate, w = _components(prior, o, e)
    x = np.broadcast_to(np.asarray(x, dtype=float), o.shape)[:, None]
    return special.gammaincc(shape, x * rate) @ w


def mixture_cdf(x: Any, prior: Prior, observed: Any, expected: Any) -> np.ndarray:
    """P(HR < x) under each program's posterior; see `mixture_sf`."""
    o, e = np.atleast_1d(np.asarray(observed, float)), np.atleast_1d(np.asarray(expected, float))
    shape, rate, w = _components(prior, o, e)
    x = np.broadcast_to(np.asarray(x, dtype=float), o.shape)[:, None]
    return special.gammainc(shape, x * rate) @ w


def mixture_quantile(
    q: float, shapes: Any, rates: Any, weights: Any | None = None
) -> float:
    """The q-quantile of a mixture of Gamma(shape_k, rate_k) laws with weights w_k.

    Found by Brent's method on the mixture CDF, bracketed by Cantelli's inequality around the
    mixture's mean mu and sd s: P(X <= mu - k s) <= 1 / (1 + k**2), so the quantile lies in
    [max(0, mu - s sqrt((1 - q) / q)), mu + s sqrt(q / (1 - q))].

    Parameters
    ----------
    q : float
        In (0, 1).
    shapes, rates : array_like of float, shape (K,)
        Broadcast against each other.
    weights : array_like of float, shape (K,), optional
        Summing to 1; default equal weights.

    Returns
    -------
    float
    """
    shapes, rates = np.broadcast_arrays(np.asarray(shapes, float), np.asarray(rates, float))
    shapes, rates = shapes.ravel(), rates.ravel()
    w = np.full(shapes.size, 1.0 / shapes.size) if weights is None else np.asarray(weights)
    if shapes.size == 1:
        return float(stats.gamma.ppf(q, shapes[0], scale=1.0 / rates[0]))
    mean = float(w @ (shapes / rates))
    sd = math.sqrt(max(float(w @ (shapes * (shapes + 1.0) / rates**2)) - mean**2, 0.0))
    if sd <= 1e-12 * mean:
        return mean
    slack = 1.0 + 1e-6
    low = max(0.0, mean - slack * sd * math.sqrt((1.0 - q) / q))
    high = mean + slack * sd * math.sqrt(q / (1.0 - q))

    def gap(x: float) -> float:
        return float(special.gammainc(shapes, x * rates) @ w) - q

    return optimize.brentq(gap, low, high, xtol=1e-13, rtol=4 * np.finfo(float).eps)


def posterior(
    observed: Any,
    expected: Any,
    prior: Prior,
    *,
    level: float = 0.95,
    upper_margin: float = 1.0,
    lower_margin: float = 1.0,
) -> pd.DataFrame:
    """Posterior of each program's hazard ratio, summarised.

    For a single gamma prior the posterior is Gamma(a + O, b + E); for a mixture prior
    (hierarchical) it is the mixture of Gamma(a_k + O, b_k + E) with the prior's weights,
    whose quantiles are found by root-finding on its CDF.

    Parameters
    ----------
    observed : array_like of int, shape (n,)
        Observed events per program. A pandas Series lends its index to the result.
    expected : array_like of float, shape (n,)
        Expected events per program, >= 0 (E = 0 leaves the rate at the prior's).
    prior : Prior
        The prior (fixed, plug-in empirical Bayes or hierarchical).
    level : float, default 0.95
        Level of the equal-tailed credible interval.
    upper_margin, lower_margin : float, default 1.0
        Hazard ratios for ``p_above = P(HR > upper_margin)`` and
        ``p_below = P(HR < lower_margin)``; both > 0.

    Returns
    -------
    pandas.DataFrame, shape (n, 9)
        One row per program in input order, columns ``hr_mean``, ``hr_median``, ``hr_lower``,
        ``hr_upper``, ``p_above``, ``p_below``, ``weight`` (the posterior mean of
        E / (b + E), the weight of O/E in the posterior mean), ``post_shape``, ``post_rate``
        (the posterior gamma's parameters; NaN for a mixture prior, which has no single one).
    """
    o, e = as_observed_expected(observed, expected)
    o, e = np.atleast_1d(o), np.atleast_1d(e)
    if o.ndim != 1:
        raise InputError(f"observed and expected must be one value per program, got {o.shape}.")
    tail = (1.0 - check_level(level)) / 2.0
    upper_margin = _positive(upper_margin, "upper_margin")
    lower_margin = _positive(lower_margin, "lower_margin")
    shape, rate, w = _components(prior, o, e)
    if w.size == 1:
        dist = stats.gamma(shape[:, 0], scale=1.0 / rate[:, 0])
        median, lower, upper = dist.median(), dist.ppf(tail), dist.isf(tail)
        post_shape, post_rate = shape[:, 0], rate[:, 0]
    else:
        median, lower, upper = (
            np.array([mixture_quantile(q, shape[i], rate[i], w) for i in range(o.size)])
            for q in (0.5, tail, 1.0 - tail)
        )
        post_shape = post_rate = np.full(o.size, np.nan)
    columns = {
        "hr_mean": (shape / rate) @ w,
        "hr_median": median,
        "hr_lower": lower,
        "hr_upper": upper,
        "p_above": mixture_sf(upper_margin, prior, o, e),
        "p_below": mixture_cdf(lower_margin, prior, o, e),
        "weight": (e[:, None] / rate) @ w,
        "post_shape": post_shape,
        "post_rate": post_rate,
    }
    return pd.DataFrame(columns, index=_index_of(observed, o.size))
