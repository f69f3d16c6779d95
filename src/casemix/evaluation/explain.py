"""Case-mix decomposition: which covariates make a program's expected events high or low.

For a program's recipients with baseline hazards H_i (each at his or her own follow-up time and
stratum) and log relative risks lp_i = sum_g lp_ig (lp_ig: the terms of covariate group g),
the case-mix effect is

    log(E / E_avg) = log sum_i H_i exp(d_i) - log sum_i H_i,    d_ig = lp_ig - c_g,

where E_avg = exp(sum_g c_g) sum_i H_i is the expected count had every recipient been the
reference population's average recipient, with the same follow-up. "Average" is taken on the
risk scale: c_g is the log-mean-exp of group g's term over the reference population (stored in
the model), so a program whose case mix in a group matches the reference population's gets a
contribution near 0 for that group (at the covariate means, exp(lp) would understate the
average risk, because the mean of exp is above exp of the mean). The log ratio is split over
covariate groups by
the Aumann-Shapley path decomposition (the integral from s = 0 to 1 of the H_i exp(s lp_i)
weighted mean of lp_ig), which is symmetric in the groups and sums to the total by
construction; the integral is taken by Gauss-Legendre quadrature (error far below 1e-10 for
the smooth integrand). A group is all columns of one covariate (every level of a categorical,
every term of a spline, a missing-value indicator with its covariate).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from casemix.evaluation.expected import ExpectedEvents
from casemix.model.reference import ReferenceModel, group_terms

QUADRATURE_NODES = 32
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
    nodes, weights = np.polynomial.legendre.leggauss(QUADRATURE_NODES)
    nodes, weights = (nodes + 1) / 2, weights / 2
    rows = []
    codes = frame["program"].to_numpy()
    for program in np.unique(codes):
        at = codes == program
        rows.extend(
            _one_program(
                program, hazard[at], terms[at] - offsets, groups, offsets.sum(), nodes, weights
            )
        )
    return pd.DataFrame(
        rows, columns=["program", "group", "contribution", "factor", "expected", "expected_average"]
    )


def _one_program(program, hazard, lp_groups, groups, offset, nodes, weights) -> list[tuple]:
    """``lp_groups`` are the terms less the reference offsets; ``offset`` is their sum."""
    lp = lp_groups.sum(axis=1)
    expected = float(hazard @ np.exp(lp + offset))
    average = float(hazard.sum() * np.exp(offset))
    if average <= 0:
        parts = np.full(len(groups), np.nan)
        total = np.nan
    else:
        exponent = np.outer(nodes, lp)
        exponent -= exponent.max(axis=1, keepdims=True)
        path = hazard * np.exp(exponent)
        path /= path.sum(axis=1, keepdims=True)
        parts = weights @ (path @ lp_groups)
        total = float(np.log(expected / average))
    out = [
        (program, name, float(part), float(np.exp(part)), np.nan, np.nan)
        for name, part in zip(groups, parts, strict=True)
    ]
    out.append((program, TOTAL, total, float(np.exp(total)), expected, average))
    return out
