"""How much of the uncertainty in each program's E comes from the reference model itself.

Two answers. The **delta method** carries the coefficient covariance V to each program's
expected count :math:`E = \\sum_i H_0(t_i \\mid \\bar x) e^{(x_i - \\bar x)\\beta}` through its
gradient :math:`g = \\sum_i E_i (x_i - \\bar x)`, so :math:`\\mathrm{Var}(E) \\approx g' V g`,
with the baseline at the reference population's mean covariates held fixed (the Breslow
baseline's own sampling error is left out, so this slightly understates the uncertainty).
The **bootstrap** resamples reference recipients, refits the Cox model on the same design
matrix rows, and recomputes every program's E, baseline included; each program's posterior
hazard ratio is then the equal-weight mixture of Gamma(a + O, b + E_b) over the replicates (the
prior held at the evaluation's), whose quantiles are found by root finding on the mixture CDF.

Replicates run through one map function (:func:`casemix.parallel.replicate_map`: joblib
worker processes, or a Dask cluster); pass any ``map_fn(func, items)`` with the semantics of
the built-in ``map`` instead. Every replicate draws from its own child of
``numpy.random.SeedSequence(seed)``, so results do not depend on the map or the worker count.
"""

from __future__ import annotations

import sys
import warnings
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from casemix.errors import ConvergenceError, ConvergenceWarning, InputError
from casemix.parallel import replicate_map
from casemix.stats.poisson import check_level
from casemix.stats.shrinkage import mixture_quantile, posterior
from casemix.survival import fit_cox

__all__ = [
    "BootstrapResult",
    "ProgramArrays",
    "bootstrap_expected",
    "check_replicates",
    "delta_expected",
    "mixture_interval",
    "resample_indices",
]


@dataclass(frozen=True, eq=False)
class ProgramArrays:
    """The evaluation cohort as arrays: what every replicate needs to recompute E.

    Attributes
    ----------
    time : ndarray, shape (m,)
        Each cohort recipient's follow-up.
    X : ndarray, shape (m, p)
        Design matrix under the reference model's frozen design.
    strata : ndarray, shape (m,) or None
    code : ndarray of int, shape (m,)
        Program of each recipient, as an index into ``programs``.
    programs : tuple of str
        Program codes, sorted.
    """

    time: np.ndarray
    X: np.ndarray
    strata: np.ndarray | None
    code: np.ndarray
    programs: tuple[str, ...]

    @classmethod
    def build(cls, time, X, strata, program) -> ProgramArrays:
        """Make the arrays from per-recipient values; ``program`` labels, shape (m,)."""
        labels, code = np.unique(np.asarray(program).astype(str), return_inverse=True)
        return cls(
            time=np.asarray(time, dtype=float),
            X=np.asarray(X, dtype=float),
            strata=None if strata is None else np.asarray(strata, dtype=object),
            code=code.reshape(-1),
            programs=tuple(labels.tolist()),
        )

    def sums(self, per_recipient: np.ndarray) -> np.ndarray:
        """Per-program sums, shape (k,) or (k, q) for a (m, q) input."""
        k = len(self.programs)
        if per_recipient.ndim == 1:
            return np.bincount(self.code, per_recipient, minlength=k)
        return np.stack(
            [np.bincount(self.code, col, minlength=k) for col in per_recipient.T], axis=1
        )

    def expected(self, fit) -> np.ndarray:
        """Per-program expected events under ``fit``, shape (k,)."""
        # a resample may lack the longest follow-up; the baseline is flat there, so hold it
        e = fit.expected_events(self.time, self.X, self.strata, allow_beyond=True)
        return self.sums(e)


@dataclass(frozen=True, eq=False)
class BootstrapResult:
    """Bootstrap of the reference fit carried to each program.

    Attributes
    ----------
    programs : DataFrame
        One row per program: ``program, observed, expected, expected_lower, expected_upper``
        (bootstrap percentile interval of E), ``hr_lower, hr_upper`` (posterior interval with
        E fixed), ``hr_lower_boot, hr_upper_boot`` (integrated over the bootstrap E's),
        ``width_ratio`` (boot width / plain width).
    coefficients : DataFrame
        ``term, coef, se, se_bootstrap``.
    draws : ndarray, shape (successful replicates, programs)
        The replicates' expected counts.
    replicates, failed, seed : int
        Replicates asked for, those that failed to converge (left out), and the seed.
    """

    programs: pd.DataFrame
    coefficients: pd.DataFrame
    draws: np.ndarray
    replicates: int
    failed: int
    seed: int


def _with_progress(results: Iterable, total: int, label: str, show: bool) -> list:
    """Collect ``results``, with a rich progress bar only when asked and on a terminal."""
    if not (show and sys.stderr.isatty()):
        return list(results)
    from rich.console import Console
    from rich.progress import track

    console = Console(stderr=True)
    return list(track(results, total=total, description=label, transient=True, console=console))


def resample_indices(n: int, seed_sequence: np.random.SeedSequence) -> np.ndarray:
    """Row indices of one bootstrap resample: n draws with replacement, shape (n,)."""
    return np.random.default_rng(seed_sequence).integers(0, n, n)


@dataclass(frozen=True, eq=False)
class _Refit:
    """One bootstrap replicate (picklable, so that a process pool can run it)."""

    time: np.ndarray
    event: np.ndarray
    X: np.ndarray
    strata: np.ndarray | None
    ties: str
    init: np.ndarray
    cohort: ProgramArrays

    def __call__(self, seed_sequence: np.random.SeedSequence) -> tuple | None:
        rows = resample_indices(self.time.size, seed_sequence)
        strata = None if self.strata is None else self.strata[rows]
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("error", ConvergenceWarning)
                fit = fit_cox(
                    self.time[rows], self.event[rows], self.X[rows],
                    ties=self.ties, strata=strata, init=self.init,
                )  # fmt: skip
            return fit.coef, self.cohort.expected(fit)
        except (ConvergenceError, ConvergenceWarning, InputError):
            # a resample can lose every event of a rare category or a whole stratum level
            return None


def mixture_interval(
    shape, rates, level: float = 0.95, weights=None
) -> tuple[float, float]:
    """Equal-tailed interval of a mixture of Gamma(shape_b, rate_b) laws.

    Parameters
    ----------
    shape : float or array_like of float, shape (B,)
    rates : array_like of float, shape (B,)
        Broadcast against `shape`.
    level : float, default 0.95
    weights : array_like of float, shape (B,), optional
        Default equal weights.

    Returns
    -------
    lower, upper : float
        By `casemix.stats.shrinkage.mixture_quantile`.
    """
    tail = (1.0 - check_level(level)) / 2.0
    return (mixture_quantile(tail, shape, rates, weights),
            mixture_quantile(1.0 - tail, shape, rates, weights))


def delta_expected(fit, cohort: ProgramArrays, *, level: float = 0.95) -> pd.DataFrame:
    """Delta-method interval of each program's E from the coefficient covariance.

    Parameters
    ----------
    fit : CoxFit
    cohort : ProgramArrays
    level : float, default 0.95

    Returns
    -------
    DataFrame
        ``program, expected, expected_se, delta_lower, delta_upper``; the interval is
        E exp(+-z se / E) (computed on the log scale, so it stays positive).
    """
    zq = stats.norm.isf((1.0 - check_level(level)) / 2.0)
    e_i = fit.expected_events(cohort.time, cohort.X, cohort.strata)
    e = cohort.sums(e_i)
    grad = cohort.sums(e_i[:, None] * (cohort.X - fit.center))  # (k, p)
    se = np.sqrt(np.einsum("kp,pq,kq->k", grad, fit.cov, grad))
    with np.errstate(divide="ignore", invalid="ignore"):
        half = np.where(e > 0, zq * se / e, np.nan)
    return pd.DataFrame(
        {
            "program": list(cohort.programs),
            "expected": e,
            "expected_se": se,
            "delta_lower": e * np.exp(-half),
            "delta_upper": e * np.exp(half),
        }
    )


def check_replicates(replicates: Any) -> int:
    """Return the number of bootstrap replicates as an int, refusing fewer than 2.

    Raises
    ------
    InputError
        Not a whole number, or below 2.
    """
    if isinstance(replicates, bool) or not isinstance(replicates, (int, np.integer)):
        raise InputError(f"bootstrap replicates must be a whole number, got {replicates!r}")
    if replicates < 2:
        raise InputError(
            f"bootstrap replicates must be at least 2 (200 is usual), got {replicates}"
        )
    return int(replicates)


def _program_rows(cohort, observed, e_full, draws, prior, level) -> pd.DataFrame:
    tail = (1.0 - level) / 2.0
    plain = posterior(observed, e_full, prior, level=level)
    a, b, w = prior.arrays()
    rows = []
    for j, program in enumerate(cohort.programs):
        # every prior component with every bootstrap draw of E, equally weighted over draws
        shapes = np.repeat(a + observed[j], draws.shape[0])
        rates = (b[:, None] + draws[None, :, j]).ravel()
        weights = np.repeat(w, draws.shape[0]) / draws.shape[0]
        lower, upper = mixture_interval(shapes, rates, level, weights)
        rows.append(
            {
                "program": program,
                "observed": int(observed[j]),
                "expected": e_full[j],
                "expected_lower": np.quantile(draws[:, j], tail),
                "expected_upper": np.quantile(draws[:, j], 1.0 - tail),
                "hr_lower": plain["hr_lower"].iloc[j],
                "hr_upper": plain["hr_upper"].iloc[j],
                "hr_lower_boot": lower,
                "hr_upper_boot": upper,
            }
        )
    table = pd.DataFrame(rows)
    table["width_ratio"] = (table["hr_upper_boot"] - table["hr_lower_boot"]) / (
        table["hr_upper"] - table["hr_lower"]
    )
    return table


def bootstrap_expected(
    data,
    fit,
    cohort: ProgramArrays,
    observed,
    prior,
    *,
    replicates: int = 200,
    seed: int = 0,
    level: float = 0.95,
    map_fn: Callable | None = None,
    progress: bool = False,
) -> BootstrapResult:
    """Bootstrap the reference fit and carry it to every program's E and HR interval.

    Parameters
    ----------
    data : ReferenceData
        The model's fitting data (``time``, ``event``, ``X``, ``strata``).
    fit : CoxFit
        The reference fit (its ties are reused, its coefficients start every refit).
    cohort : ProgramArrays
        The evaluation cohort.
    observed : array_like of int, shape (k,)
        Observed events per program, in the order of ``cohort.programs``.
    prior : Prior
        The evaluation's prior, held fixed across replicates.
    replicates : int, default 200
    seed : int, default 0
    level : float, default 0.95
    map_fn : callable, optional
        ``map_fn(func, items)`` returning the results in order; default
        :func:`casemix.parallel.replicate_map` (2 local worker processes).
    progress : bool, default False
        Show a progress bar (only on a terminal).

    Returns
    -------
    BootstrapResult
    """
    replicates = check_replicates(replicates)
    level = check_level(level)
    observed = np.asarray(observed, dtype=float)
    task = _Refit(data.time, data.event, data.X, data.strata, fit.ties, fit.coef, cohort)
    children = np.random.SeedSequence(seed).spawn(replicates)
    mapper = replicate_map if map_fn is None else map_fn
    results = _with_progress(mapper(task, children), replicates, "bootstrap", progress)
    good = [r for r in results if r is not None]
    if len(good) < 2:
        raise ConvergenceError(
            f"only {len(good)} of {replicates} bootstrap refits converged; the reference model "
            "is too fragile to bootstrap (rare categories?): merge sparse levels and refit"
        )
    coefs = np.stack([r[0] for r in good])
    draws = np.stack([r[1] for r in good])
    e_full = cohort.expected(fit)
    coefficients = pd.DataFrame(
        {
            "term": list(fit.names),
            "coef": fit.coef,
            "se": fit.se,
            "se_bootstrap": coefs.std(axis=0, ddof=1),
        }
    )
    return BootstrapResult(
        programs=_program_rows(cohort, observed, e_full, draws, prior, level),
        coefficients=coefficients,
        draws=draws,
        replicates=replicates,
        failed=replicates - len(good),
        seed=int(seed),
    )
