"""Own-data influence: does a program's presence in the reference population pull E towards it?

For every program that has recipients in the reference population, the reference model is
refitted without them (same design matrix rows otherwise, Newton started from the full fit)
and the program's expected count in the evaluation cohort is recomputed. A program whose own
poor (good) results raised (lowered) the reference hazard looks better (worse) than it is; the
refit shows by how much. The refits go through the same map function as the bootstrap.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd

from casemix.audit.bootstrap import ProgramArrays
from casemix.parallel import replicate_map
from casemix.survival import fit_cox

__all__ = ["leave_one_program_out"]


@dataclass(frozen=True, eq=False)
class _Without:
    """Refit without one program's reference recipients (picklable for a process pool)."""

    time: np.ndarray
    event: np.ndarray
    X: np.ndarray
    strata: np.ndarray | None
    reference_program: np.ndarray
    ties: str
    init: np.ndarray
    cohort: ProgramArrays

    def __call__(self, program: str) -> np.ndarray:
        keep = self.reference_program != program
        fit = fit_cox(
            self.time[keep], self.event[keep], self.X[keep],
            ties=self.ties, strata=None if self.strata is None else self.strata[keep],
            init=self.init,
        )  # fmt: skip
        return self.cohort.expected(fit)


def leave_one_program_out(
    data,
    fit,
    reference_program,
    cohort: ProgramArrays,
    observed,
    *,
    map_fn: Callable | None = None,
) -> pd.DataFrame:
    """O/E of each program with and without its own recipients in the reference population.

    Parameters
    ----------
    data : ReferenceData
        The model's fitting data.
    fit : CoxFit
        The full reference fit.
    reference_program : array_like of str, shape (n,)
        Program of each reference recipient.
    cohort : ProgramArrays
        The evaluation cohort.
    observed : array_like of int, shape (k,)
        Observed events per program, in the order of ``cohort.programs``.
    map_fn : callable, optional
        ``map_fn(func, items)``; default :func:`casemix.parallel.replicate_map`.

    Returns
    -------
    DataFrame
        One row per cohort program: ``program, reference_recipients, observed, expected,
        oe_ratio, expected_without, oe_ratio_without, oe_change`` (without minus with).
        Programs absent from the reference population keep their E (nothing to remove).
    """
    reference_program = np.asarray(reference_program).astype(str)
    observed = np.asarray(observed, dtype=float)
    e_full = cohort.expected(fit)
    present = [p for p in cohort.programs if (reference_program == p).any()]
    task = _Without(
        data.time, data.event, data.X, data.strata, reference_program, fit.ties, fit.coef, cohort
    )
    mapper = replicate_map if map_fn is None else map_fn
    refits = dict(zip(present, mapper(task, present), strict=True))
    rows = []
    for j, program in enumerate(cohort.programs):
        e_without = refits[program][j] if program in refits else e_full[j]
        rows.append(
            {
                "program": program,
                "reference_recipients": int((reference_program == program).sum()),
                "observed": int(observed[j]),
                "expected": e_full[j],
                "expected_without": e_without,
            }
        )
    table = pd.DataFrame(rows)
    with np.errstate(divide="ignore", invalid="ignore"):
        table.insert(4, "oe_ratio", table["observed"] / table["expected"])
        table["oe_ratio_without"] = table["observed"] / table["expected_without"]
    table["oe_change"] = table["oe_ratio_without"] - table["oe_ratio"]
    return table
