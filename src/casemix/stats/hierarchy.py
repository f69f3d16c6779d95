"""Hierarchical gamma-Poisson prior: integrate over the prior's shape (and mean) by quadrature.

Model: O_i | HR_i ~ Poisson(HR_i E_i); HR_i | a, b ~ Gamma(a, b); (a, b) ~ a weakly informative
hyperprior. Integrating HR_i out, the programs' counts have the negative-binomial likelihood
L(a, b) = prod_i NB(O_i; a, b / (b + E_i)) (see `casemix.stats.shrinkage.log_marginal`), and

.. math:: p(HR_i \\mid O) = \\int \\mathrm{Gamma}(HR_i; a + O_i, b + E_i)\\,
          p(a, b \\mid O)\\, da\\, db,

so with quadrature nodes (a_k, b_k) and weights w_k proportional to (node weight) x
(hyperprior density) x L(a_k, b_k), every program's posterior is the mixture
sum_k w_k Gamma(a_k + O_i, b_k + E_i). No sampler is needed and nothing runs to a boundary: when
the programs vary no more than chance allows, the hyperposterior simply piles up at small
spreads and the programs are shrunk hard towards the centre.

Coordinates: the spread tau = 1 / sqrt(a) (the prior's coefficient of variation of HR) on the
log scale, and, when the mean is free, the prior mean m = a / b on the log scale. The
hyperprior may be given on tau or on a, and on m or on b; densities are carried over with their
Jacobians. The tau grid is Gauss-Legendre on log tau over [TAU_MIN, TAU_MAX] in two passes (a
coarse pass over the whole range, then a fine one over the part that holds all but e^-40 of
the integrand); the mass below TAU_MIN, where the likelihood is flat to within tau**2, is kept
as one node at TAU_MIN. The mean grid is Gauss-Legendre on log m, for each tau node over the
likelihood's mode +- 12 of its standard deviations. Every grid is fixed by the data
deterministically (no random numbers). scipy.stats gives the hyperprior densities; the
quadrature is written out here because scipy.integrate would need thousands of calls of a
function that is a sum over programs, where one vectorised pass over the grid suffices.

References
----------
Clayton, D. & Kaldor, J. (1987). Empirical Bayes estimates of age-standardized relative risks
for use in disease mapping. Biometrics 43, 671-681.
Carlin, B. P. & Louis, T. A. (2000). Bayes and Empirical Bayes Methods for Data Analysis,
2nd ed. Chapman & Hall/CRC (chapter 3: empirical Bayes and why plug-in intervals are too short).
Gelman, A. (2006). Prior distributions for variance parameters in hierarchical models.
Bayesian Analysis 1, 515-533 (half-Cauchy priors on a group-level spread).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import special, stats

from casemix.errors import InputError, plural
from casemix.stats.poisson import as_observed_expected
from casemix.stats.shrinkage import Prior, empirical_bayes_prior, fixed_prior

__all__ = [
    "DISTRIBUTIONS",
    "PRIOR_CHOICES",
    "TAU_MAX",
    "TAU_MIN",
    "HyperDensity",
    "Hyperprior",
    "PriorSettings",
    "hierarchical_prior",
    "hyperprior_from_dict",
    "prior_settings_from_dict",
]

TAU_MIN, TAU_MAX = 1e-4, 100.0
_COARSE_NODES, _FINE_NODES, _MEAN_NODES = 96, 128, 48
_MEAN_HALF_WIDTH = 12.0
_KEEP_BELOW = 40.0  # integrand below max - 40 (e^-40 of the peak) is outside the fine grid
_MIN_WEIGHT = 1e-11

DISTRIBUTIONS: dict[str, tuple[str, ...]] = {
    "halfcauchy": ("scale",),
    "halfnorm": ("scale",),
    "expon": ("scale",),
    "gamma": ("a", "scale"),
    "lognorm": ("s", "scale"),
}
"""scipy.stats distributions a hyperprior may use, with the parameters each needs."""

_FIRST = ("spread", "shape")
_SECOND = ("mean", "rate")


@dataclass(frozen=True)
class HyperDensity:
    """A hyperprior density on one parameter of the gamma prior.

    Attributes
    ----------
    parameter : {"spread", "shape", "mean", "rate"}
        spread tau = 1 / sqrt(shape); shape a; mean a / b; rate b.
    distribution : str
        A key of `DISTRIBUTIONS` (a scipy.stats name).
    params : tuple of (str, float)
        Its parameters, e.g. ``(("scale", 0.25),)``.
    """

    parameter: str
    distribution: str
    params: tuple[tuple[str, float], ...]

    def __post_init__(self) -> None:
        if self.parameter not in _FIRST + _SECOND:
            raise InputError(
                f"hyperprior parameter must be one of {', '.join(_FIRST + _SECOND)}; "
                f"got {self.parameter!r}."
            )
        wanted = DISTRIBUTIONS.get(self.distribution)
        if wanted is None:
            raise InputError(
                f"hyperprior distribution must be one of {', '.join(DISTRIBUTIONS)}; got "
                f"{self.distribution!r}."
            )
        given = dict(self.params)
        if sorted(given) != sorted(wanted):
            raise InputError(
                f"hyperprior {self.distribution} on {self.parameter} needs exactly the "
                f"parameters {', '.join(wanted)}; got {', '.join(sorted(given)) or 'none'}."
            )
        for key, value in given.items():
            ok = isinstance(value, (int, float)) and not isinstance(value, bool)
            if not ok or not math.isfinite(value) or value <= 0:
                raise InputError(
                    f"hyperprior {self.distribution} on {self.parameter}: {key} must be a "
                    f"finite number > 0, got {value!r}."
                )

    def logpdf(self, x: np.ndarray) -> np.ndarray:
        """Log density at x (scipy.stats)."""
        return getattr(stats, self.distribution)(**dict(self.params)).logpdf(x)

    def to_dict(self) -> dict[str, Any]:
        """``{"distribution": ..., <params>}``: the rules file's table for this parameter."""
        return {"distribution": self.distribution, **{k: float(v) for k, v in self.params}}

    def text(self) -> str:
        """Plain words, e.g. ``"spread ~ halfcauchy(scale 0.25)"``."""
        inside = ", ".join(f"{k} {v:g}" for k, v in self.params)
        return f"{self.parameter} ~ {self.distribution}({inside})"


def _spread_default() -> HyperDensity:
    return HyperDensity("spread", "halfcauchy", (("scale", 0.25),))


def _mean_default() -> HyperDensity:
    return HyperDensity("mean", "lognorm", (("s", 1.0), ("scale", 1.0)))


@dataclass(frozen=True)
class Hyperprior:
    """Hyperprior of the gamma prior's shape and, when free, its mean.

    The default puts a half-Cauchy with scale 0.25 on the spread tau = 1 / sqrt(shape) (the
    prior's coefficient of variation of the hazard ratios: its median is a spread of 0.25,
    programs typically within a factor of about 1.5 of the centre, and its heavy tail lets the
    data show far more) and, for a free mean, a log-normal with log-scale sd 1 around 1 on
    the mean (a factor of e either way at one sd: weak on the scale of a network's overall O/E).

    Attributes
    ----------
    first : HyperDensity
        On ``spread`` or ``shape``.
    second : HyperDensity
        On ``mean`` or ``rate``; used only when the mean is free.
    """

    first: HyperDensity = field(default_factory=_spread_default)
    second: HyperDensity = field(default_factory=_mean_default)

    def __post_init__(self) -> None:
        if self.first.parameter not in _FIRST:
            raise InputError(f"the first hyperprior must be on spread or shape, not "
                             f"{self.first.parameter!r}.")
        if self.second.parameter not in _SECOND:
            raise InputError(f"the second hyperprior must be on mean or rate, not "
                             f"{self.second.parameter!r}.")

    def to_dict(self) -> dict[str, Any]:
        """The ``[prior.hyperprior]`` content: one table per parameter."""
        return {self.first.parameter: self.first.to_dict(),
                self.second.parameter: self.second.to_dict()}


def hyperprior_from_dict(values: Mapping[str, Any], *, source: str = "rules") -> Hyperprior:
    """Build a Hyperprior from tables keyed by parameter, e.g. ``{"spread": {...}}``.

    Parameters
    ----------
    values : mapping
        At most one of ``spread`` / ``shape`` and one of ``mean`` / ``rate``, each a table
        with ``distribution`` and that distribution's parameters (see `DISTRIBUTIONS`); a
        parameter left out takes the default.
    source : str
        Named in error messages.
    """
    if not isinstance(values, Mapping):
        raise InputError(f"{source}: [prior.hyperprior] must be a table, got {values!r}.")
    unknown = sorted(set(values) - set(_FIRST + _SECOND))
    if unknown:
        raise InputError(f"{source}: unknown key(s) in [prior.hyperprior]: {', '.join(unknown)}; "
                         f"allowed: {', '.join(_FIRST + _SECOND)}.")
    chosen = {}
    for group, default in ((_FIRST, _spread_default()), (_SECOND, _mean_default())):
        given = [key for key in group if key in values]
        if len(given) > 1:
            raise InputError(f"{source}: give only one of {' or '.join(group)} in "
                             "[prior.hyperprior].")
        if not given:
            chosen[group] = default
            continue
        table = values[given[0]]
        if not isinstance(table, Mapping) or "distribution" not in table:
            raise InputError(
                f"{source}: [prior.hyperprior] {given[0]} must be a table with a distribution "
                'key, e.g. {distribution = "halfcauchy", scale = 0.25}.'
            )
        params = tuple(sorted((k, v) for k, v in table.items() if k != "distribution"))
        try:
            chosen[group] = HyperDensity(given[0], str(table["distribution"]), params)
        except InputError as exc:
            raise InputError(f"{source}: {exc}") from None
    return Hyperprior(first=chosen[_FIRST], second=chosen[_SECOND])


def _log_first(hyper: HyperDensity, log_tau: np.ndarray) -> np.ndarray:
    """Log hyperprior density per unit log tau."""
    tau = np.exp(log_tau)
    if hyper.parameter == "spread":
        return hyper.logpdf(tau) + log_tau
    shape = tau**-2.0
    return hyper.logpdf(shape) + np.log(2.0 * shape)  # |d shape / d log tau| = 2 shape


def _log_second(hyper: HyperDensity, log_m: np.ndarray, shape: np.ndarray) -> np.ndarray:
    """Log hyperprior density per unit log mean, at the given shapes."""
    if hyper.parameter == "mean":
        return hyper.logpdf(np.exp(log_m)) + log_m
    rate = shape / np.exp(log_m)
    return hyper.logpdf(rate) + np.log(rate)  # |d rate / d log m| = rate


def _nb_total(o: np.ndarray, e: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Summed negative-binomial log marginal over programs, at each (a, b) (any shape)."""
    a, b = a[..., None], b[..., None]
    terms = (special.gammaln(a + o) - special.gammaln(a) - special.gammaln(o + 1.0)
             - a * np.log1p(e / b) + special.xlogy(o, e / (b + e)))
    return terms.sum(axis=-1)


def _legendre(low: float, high: float, n: int) -> tuple[np.ndarray, np.ndarray]:
    x, w = np.polynomial.legendre.leggauss(n)
    half = (high - low) / 2.0
    return low + half * (x + 1.0), half * w


def _mean_grids(o, e, shape: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights in log m, shape (len(shape), nodes), one row per
    shape a, around the mode of the likelihood in m at that a (+- 12 of its sd)."""
    if o.sum() == 0:
        # The likelihood falls in m like exp(-m sum E): cover it down to e^-50.
        high = math.log(50.0 / e.sum())
        x, w = _legendre(high - math.log(1e8), high, 2 * _MEAN_NODES)
        return np.tile(x, (shape.size, 1)), np.tile(w, (shape.size, 1))
    a = shape[:, None]
    m = _best_means(o, e, shape)[:, None]
    info = np.sum((a + o) * a * m * e / (a + m * e) ** 2, axis=1, keepdims=True)
    half = _MEAN_HALF_WIDTH / np.sqrt(info)
    x, w = np.polynomial.legendre.leggauss(_MEAN_NODES)
    return np.log(m) + half * x, half * w


def _best_means(o, e, shape: np.ndarray) -> np.ndarray:
    """Per shape a, the mode in m of the likelihood: the root of sum (O - m E) / (a + m E),
    by bisection on log m (the score falls in m), vectorised over the shapes."""
    a = shape[:, None]
    low = np.full(shape.size, 1e-12)
    high = np.full(shape.size, float(np.max(o / np.where(e > 0, e, np.inf))) + 1.0)
    for _ in range(100):
        middle = np.sqrt(low * high)
        up = np.sum((o - middle[:, None] * e) / (a + middle[:, None] * e), axis=1) > 0
        low, high = np.where(up, middle, low), np.where(up, high, middle)
        if np.all(high / low < 1 + 1e-12):
            break
    return np.sqrt(low * high)


def _nodes(o, e, log_tau: np.ndarray, tau_weight: np.ndarray, hyper: Hyperprior,
           free_mean: bool):
    """Component shapes, rates and log weights (unnormalised) for the given tau nodes."""
    shape = np.exp(-2.0 * log_tau)
    log_w = np.log(tau_weight) + _log_first(hyper.first, log_tau)
    if not free_mean:
        return shape, shape.copy(), log_w + _nb_total(o, e, shape, shape)
    log_m, w_m = _mean_grids(o, e, shape)
    a_k = np.broadcast_to(shape[:, None], log_m.shape)
    b_k = a_k / np.exp(log_m)
    logs = (log_w[:, None] + np.log(w_m) + _log_second(hyper.second, log_m, a_k)
            + _nb_total(o, e, a_k, b_k))
    return a_k.ravel(), b_k.ravel(), logs.ravel()


def _tau_marginal(log_tau, logs, free_mean: bool) -> np.ndarray:
    if not free_mean:
        return logs
    return special.logsumexp(logs.reshape(log_tau.size, -1), axis=1)


def _fine_range(o, e, hyper: Hyperprior, free_mean: bool) -> tuple[float, float]:
    """The part of [TAU_MIN, TAU_MAX] (log scale) holding all but e^-40 of the integrand."""
    low, high = math.log(TAU_MIN), math.log(TAU_MAX)
    log_tau, w = _legendre(low, high, _COARSE_NODES)
    _, _, logs = _nodes(o, e, log_tau, w, hyper, free_mean)
    per_node = _tau_marginal(log_tau, logs, free_mean) - np.log(w)  # density, not mass
    inside = np.flatnonzero(per_node > per_node.max() - _KEEP_BELOW)
    edges = np.r_[low, (log_tau[1:] + log_tau[:-1]) / 2.0, high]
    return float(edges[max(inside[0] - 1, 0)]), float(edges[min(inside[-1] + 2, log_tau.size)])


def _below_tau_min(o, e, hyper: Hyperprior, free_mean: bool):
    """One node at TAU_MIN carrying the hyperprior mass below it (likelihood flat there)."""
    if hyper.first.parameter == "spread":
        dist = getattr(stats, hyper.first.distribution)(**dict(hyper.first.params))
        mass = float(dist.cdf(TAU_MIN))
    else:  # tau < TAU_MIN is shape > TAU_MIN**-2
        dist = getattr(stats, hyper.first.distribution)(**dict(hyper.first.params))
        mass = float(dist.sf(TAU_MIN**-2.0))
    if mass <= 0:
        return None
    log_tau = np.array([math.log(TAU_MIN)])
    # _nodes multiplies by the density per log tau; divide it out and use the mass instead.
    shapes, rates, logs = _nodes(o, e, log_tau, np.ones(1), hyper, free_mean)
    return shapes, rates, logs - _log_first(hyper.first, log_tau)[0] + math.log(mass)


def _summary(a, b, w, hyper: Hyperprior, free_mean: bool) -> dict[str, Any]:
    tau = a**-0.5
    order = np.argsort(tau, kind="stable")
    cum = np.cumsum(w[order])
    quantiles = [float(tau[order][min(np.searchsorted(cum, q), tau.size - 1)])
                 for q in (0.05, 0.5, 0.95)]
    out = {
        "hyperprior": hyper.to_dict() if free_mean else {
            hyper.first.parameter: hyper.first.to_dict()},
        "quadrature": (f"Gauss-Legendre on log spread over [{TAU_MIN:g}, {TAU_MAX:g}] "
                       f"({_COARSE_NODES} then {_FINE_NODES} nodes)"
                       + (f" x {_MEAN_NODES} on log mean around the likelihood's mode"
                          if free_mean else "")),
        "posterior_shape_mean": float(w @ a),
        "posterior_rate_mean": float(w @ b),
        "posterior_spread_median": quantiles[1],
        "posterior_spread_90": [quantiles[0], quantiles[2]],
        "posterior_mean_mean": float(w @ (a / b)),
    }
    return out


def hierarchical_prior(
    observed: Any,
    expected: Any,
    *,
    free_mean: bool = False,
    hyperprior: Hyperprior | None = None,
) -> Prior:
    """The programs' prior integrated over a hyperprior: a mixture of gammas.

    Parameters
    ----------
    observed : array_like of int, shape (n,)
        Observed events per program.
    expected : array_like of float, shape (n,)
        Expected events per program; programs with E = 0 carry no information and are left
        out of the likelihood (they still get a posterior).
    free_mean : bool, default False
        Integrate over the prior mean too (2-D quadrature) instead of holding it at 1.
    hyperprior : Hyperprior, optional
        Default `Hyperprior()` (half-Cauchy(0.25) on the spread; log-normal(0, 1) on the
        mean).

    Returns
    -------
    Prior
        method ``"hierarchical"``, with ``components`` (shape_k, rate_k, hyperposterior
        weight_k) and ``hyperprior`` (what was used, and hyperposterior summaries such as
        the posterior means of a and b); ``shape`` and ``rate`` summarise the mixture by the
        single gamma with its mean and standard deviation. ``log_marginal`` is the log
        evidence: the data's marginal likelihood under the hyperprior.

    Raises
    ------
    InputError
        Invalid counts, or a free mean with no program having expected events.
    """
    hyper = Hyperprior() if hyperprior is None else hyperprior
    o_all, e_all = as_observed_expected(observed, expected)
    used = e_all.ravel() > 0
    o, e = o_all.ravel()[used], e_all.ravel()[used]
    if free_mean and o.size == 0:
        raise InputError("a free prior mean needs at least one program with expected events > 0.")
    low, high = _fine_range(o, e, hyper, free_mean)
    log_tau, w_tau = _legendre(low, high, _FINE_NODES)
    parts = [_nodes(o, e, log_tau, w_tau, hyper, free_mean)]
    if low <= math.log(TAU_MIN) + 1e-12 and (extra := _below_tau_min(o, e, hyper, free_mean)):
        parts.append(extra)
    a, b, logs = (np.concatenate(column) for column in zip(*parts, strict=True))
    log_evidence = float(special.logsumexp(logs))
    w = np.exp(logs - log_evidence)
    keep = w > _MIN_WEIGHT
    a, b, w = a[keep], b[keep], w[keep] / w[keep].sum()
    summary = _summary(a, b, w, hyper, free_mean)
    how = (f"mean integrated over ({hyper.second.text()})" if free_mean
           else "mean fixed at 1 (the reference)")
    lo90, hi90 = summary["posterior_spread_90"]
    note = (
        f"Hierarchical prior from {plural(o.size, 'program')}: the spread of hazard "
        f"ratios is integrated "
        f"over the hyperprior {hyper.first.text()}, {how}. Its posterior median is "
        f"{summary['posterior_spread_median']:.3g} (90% {lo90:.3g} to {hi90:.3g}); each "
        "program's posterior is a mixture of gammas that carries this uncertainty."
    )
    # shape and rate summarise the mixture by the single gamma of the same mean and sd
    mean = float(w @ (a / b))
    variance = float(w @ (a * (a + 1.0) / b**2)) - mean**2
    return Prior(
        shape=mean**2 / variance,
        rate=mean / variance,
        method="hierarchical",
        free_mean=free_mean,
        log_marginal=log_evidence,
        note=note,
        components=tuple(zip(a.tolist(), b.tolist(), w.tolist(), strict=True)),
        hyperprior=summary,
    )


PRIOR_CHOICES = ("hierarchical", "empirical_bayes", "fixed")


@dataclass(frozen=True)
class PriorSettings:
    """How the programs' prior is chosen (the ``[prior]`` table of the rules file).

    Attributes
    ----------
    method : {"hierarchical", "empirical_bayes", "fixed"}, default "hierarchical"
        Integrate over a hyperprior (default), plug-in empirical Bayes (for comparison; it
        falls back to Gamma(2, 2) at the boundary), or the fixed Gamma(shape, rate).
    free_mean : bool, default False
        Estimate (integrate over) the prior mean instead of holding it at 1.
    shape, rate : float, default 2.0
        The fixed prior's parameters (method "fixed" only).
    hyperprior : Hyperprior
        For method "hierarchical".
    """

    method: str = "hierarchical"
    free_mean: bool = False
    shape: float = 2.0
    rate: float = 2.0
    hyperprior: Hyperprior = field(default_factory=Hyperprior)

    def __post_init__(self) -> None:
        if self.method not in PRIOR_CHOICES:
            raise InputError(f"[prior] method must be one of {', '.join(PRIOR_CHOICES)}; got "
                             f"{self.method!r}.")
        if not isinstance(self.free_mean, bool):
            raise InputError(f"[prior] free_mean must be true or false; got {self.free_mean!r}.")
        for key in ("shape", "rate"):
            value = getattr(self, key)
            ok = isinstance(value, (int, float)) and not isinstance(value, bool)
            if not ok or not math.isfinite(value) or value <= 0:
                raise InputError(f"[prior] {key} must be a finite number > 0; got {value!r}.")

    def choose(self, observed: Any, expected: Any) -> Prior:
        """The prior these settings give for the programs' counts."""
        if self.method == "fixed":
            return fixed_prior(self.shape, self.rate)
        if self.method == "empirical_bayes":
            return empirical_bayes_prior(observed, expected, free_mean=self.free_mean)
        return hierarchical_prior(observed, expected, free_mean=self.free_mean,
                                  hyperprior=self.hyperprior)

    def to_dict(self) -> dict[str, Any]:
        """The ``[prior]`` table's content."""
        return {"method": self.method, "free_mean": self.free_mean, "shape": float(self.shape),
                "rate": float(self.rate), "hyperprior": self.hyperprior.to_dict()}


def prior_settings_from_dict(values: Mapping[str, Any], *, source: str = "rules") -> PriorSettings:
    """Build PriorSettings from a ``[prior]`` table; keys left out take the defaults.

    Raises
    ------
    InputError
        Unknown keys or invalid values; the message names `source` and the key.
    """
    if not isinstance(values, Mapping):
        raise InputError(f"{source}: [prior] must be a table of keys, got {values!r}.")
    allowed = ("method", "free_mean", "shape", "rate", "hyperprior")
    unknown = sorted(set(values) - set(allowed))
    if unknown:
        raise InputError(f"{source}: unknown key(s) in [prior]: {', '.join(unknown)}. Allowed "
                         f"keys: {', '.join(allowed)}.")
    given = {k: v for k, v in values.items() if k != "hyperprior"}
    hyper = hyperprior_from_dict(values.get("hyperprior", {}), source=source)
    try:
        return PriorSettings(**given, hyperprior=hyper)
    except InputError as exc:
        raise InputError(f"{source}: {exc}") from None
