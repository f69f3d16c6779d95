"""Prior sensitivity: would another reasonable prior change any verdict?

Every program's posterior and verdict are recomputed under the evaluation's prior, under fixed
mean-1 priors Gamma(s, s) for a grid of shapes s (0.5 is vague, 5 shrinks hard), under an
empirical-Bayes prior whose mean is estimated too, under plug-in empirical Bayes with the mean
fixed at 1, and under the hierarchical prior with the half-Cauchy hyperprior's scale on the
spread set to each of `HYPER_SCALES` (the hyperprior's sensitivity; the default is 0.25) and
with a free mean. The verdict rules are the evaluation's.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from casemix.errors import PriorWarning
from casemix.stats.hierarchy import HyperDensity, Hyperprior, hierarchical_prior
from casemix.stats.shrinkage import Prior, empirical_bayes_prior, fixed_prior, posterior
from casemix.stats.verdict import Rules, assign_verdicts

__all__ = [
    "HYPER_SCALES",
    "PRIOR_SHAPES",
    "changed_programs",
    "prior_sensitivity",
    "verdict_changes",
]

PRIOR_SHAPES = (0.5, 1.0, 2.0, 5.0)
HYPER_SCALES = (0.1, 0.25, 0.5, 1.0)
AS_EVALUATED = "as_evaluated"


def _priors(observed, expected, prior: Prior) -> tuple[dict[str, Prior], list[str]]:
    """The priors compared, by label, and the notes of any empirical-Bayes fallback."""
    priors = {AS_EVALUATED: prior}
    priors.update({f"gamma_{s:g}": fixed_prior(s, s) for s in PRIOR_SHAPES})
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", PriorWarning)
        priors["eb_free_mean"] = empirical_bayes_prior(observed, expected, free_mean=True)
        priors["eb_plug_in"] = empirical_bayes_prior(observed, expected)
    for scale in HYPER_SCALES:
        hyper = Hyperprior(first=HyperDensity("spread", "halfcauchy", (("scale", scale),)))
        priors[f"hier_spread_{scale:g}"] = hierarchical_prior(observed, expected,
                                                              hyperprior=hyper)
    priors["hier_free_mean"] = hierarchical_prior(observed, expected, free_mean=True)
    notes = [str(w.message) for w in caught if issubclass(w.category, PriorWarning)]
    return priors, notes


def prior_sensitivity(
    programs: pd.DataFrame, prior: Prior, rules: Rules | None = None
) -> tuple[pd.DataFrame, list[str]]:
    """Posterior summaries and verdicts of every program under each prior.

    Parameters
    ----------
    programs : DataFrame
        One row per program with ``program``, ``observed``, ``expected``.
    prior : Prior
        The evaluation's prior (listed as ``as_evaluated``).
    rules : Rules, optional
        The evaluation's verdict rules (default: the default rules).

    Returns
    -------
    table : DataFrame
        Long format, sorted by program then prior: ``program, prior, shape, rate, observed,
        expected, hr_mean, hr_lower, hr_upper, p_above, p_below, verdict, changed`` where
        ``changed`` says whether the verdict differs from the one under ``as_evaluated``.
    notes : list of str
        Notes of an empirical-Bayes prior that fell back to its default.
    """
    rules = Rules() if rules is None else rules
    frame = programs.sort_values("program", kind="stable").reset_index(drop=True)
    o, e = frame["observed"].to_numpy(), frame["expected"].to_numpy()
    priors, notes = _priors(o, e, prior)
    parts = []
    for label, each in priors.items():
        post = posterior(
            o, e, each, level=rules.credible_level,
            upper_margin=rules.upper_margin, lower_margin=rules.lower_margin,
        )  # fmt: skip
        verdicts = assign_verdicts(o, e, each, rules)
        parts.append(
            pd.DataFrame(
                {
                    "program": frame["program"].to_numpy(),
                    "prior": label,
                    "shape": each.shape,
                    "rate": each.rate,
                    "observed": o.astype(int),
                    "expected": e,
                    "hr_mean": post["hr_mean"].to_numpy(),
                    "hr_lower": post["hr_lower"].to_numpy(),
                    "hr_upper": post["hr_upper"].to_numpy(),
                    "p_above": post["p_above"].to_numpy(),
                    "p_below": post["p_below"].to_numpy(),
                    "verdict": verdicts["verdict"].to_numpy(),
                }
            )
        )
    table = pd.concat(parts, ignore_index=True)
    base = table.loc[table["prior"] == AS_EVALUATED].set_index("program")["verdict"]
    table["changed"] = table["verdict"].to_numpy() != table["program"].map(base).to_numpy()
    order = {label: i for i, label in enumerate(priors)}
    table = table.sort_values(
        ["program", "prior"], key=lambda s: s.map(order) if s.name == "prior" else s
    )
    return table.reset_index(drop=True), notes


def verdict_changes(table: pd.DataFrame) -> pd.DataFrame:
    """One row per program, one column per prior, holding the verdicts; plus ``changes``.

    Parameters
    ----------
    table : DataFrame
        From :func:`prior_sensitivity`.

    Returns
    -------
    DataFrame
        ``program``, one column per prior (in the order of the table), ``changes`` (bool).
    """
    labels = list(dict.fromkeys(table["prior"]))
    wide = table.pivot(index="program", columns="prior", values="verdict")[labels]
    wide["changes"] = table.groupby("program")["changed"].any()
    return wide.reset_index().rename_axis(columns=None)


def changed_programs(table: pd.DataFrame) -> np.ndarray:
    """Programs whose verdict differs under at least one prior, sorted."""
    return np.sort(table.loc[table["changed"], "program"].unique())
