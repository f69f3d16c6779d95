"""Case-mix decomposition: which covariates make a program's expected events high or low.

For a program's recipients with baseline hazards H_i (each at his or her own follow-up time and
stratum) and log relative risks lp_i = sum_g lp_ig (lp_ig: the terms of covariate group g),
the case-mix effect is

    log(E / E_avg) = log sum_i H_i exp(lp_i) - log sum_i H_i - sum_g c_g,

where E_avg = exp(sum_g c_g) sum_i H_i is the expected count had every recipient carried the
reference population's own follow-up weighted mean relative risk,
exp(sum_g c_g) = sum_j H_j exp(lp_j) / sum_j H_j over the reference population (stored in the
model as the per-group anchor c_g). So the reference population as a whole gets a factor of
exactly 1. The log ratio is split over covariate groups by the Aumann-Shapley path
decomposition (`casemix.model.reference.path_contributions`): group g's contribution is its
path share for the program less its path share c_g for the reference population, so the
groups sum to the total and each is 0 for the reference population itself. A group is all
columns of one covariate (every level of a categorical, every term of a spline, a
missing-value indicator with its covariate).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from casemix.evaluation.expected import ExpectedEvents
from casemix.model.reference import ReferenceModel, group_terms, path_contributions

__all__ = ["TOTAL", "casemix_contributions"]

TOTAL = "total"


def casemix_contributions(expected: ExpectedEvents, model: ReferenceModel) -> pd.DataFrame:
    """Split each program's case-mix effect on its expected events over covariate groups.

    Returns
    -------
    DataFrame
        Tidy, one row per program and covariate group plus one ``total`` row per program:
        ``program``, ``group``, ``contribution`` (log scale; the groups sum to the total),
        ``factor`` (exp(contribution): the multiplier on expected events),
        ``expected`` and ``expected_average`` (E and E_avg, on the total row only).
    """
    X, _ = model.matrices(expected.cohort)
    groups, terms = group_terms(model.design, model.fit, X)
    offsets = np.asarray(model.group_offsets)
    frame = expected.frame
    hazard = np.where(
        frame["expected"].to_numpy() > 0,
        frame["expected"].to_numpy() / np.exp(frame["lp"].to_numpy()),
        0.0,
    )
    rows = []
    codes = frame["program"].to_numpy()
    for program in np.unique(codes):
        at = codes == program
        rows.extend(_one_program(program, hazard[at], terms[at], groups, offsets))
    return pd.DataFrame(
        rows, columns=["program", "group", "contribution", "factor", "expected", "expected_average"]
    )


def _one_program(program, hazard, terms, groups, offsets) -> list[tuple]:
    expected = float(hazard @ np.exp(terms.sum(axis=1)))
    average = float(hazard.sum() * np.exp(offsets.sum()))
    if average <= 0:
        parts = np.full(len(groups), np.nan)
        total = np.nan
    else:
        parts = path_contributions(hazard, terms) - offsets
        total = float(np.log(expected / average))
    out = [
        (program, name, float(part), float(np.exp(part)), np.nan, np.nan)
        for name, part in zip(groups, parts, strict=True)
    ]
    out.append((program, TOTAL, total, float(np.exp(total)), expected, average))
    return out
