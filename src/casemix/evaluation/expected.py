"""Expected events per recipient of an evaluation cohort under a reference model.

Each recipient's expected events are H0(t_i) * exp((x_i - center) . beta) at his or her own
follow-up time t_i (horizon and cut-off already applied by the cohort stage), with the
reference model's Breslow baseline read as a right-continuous step function.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd

from casemix.data.cohort import Cohort
from casemix.errors import DataWarning, InputError, plural
from casemix.model.reference import ReferenceModel

__all__ = [
    "ExpectedEvents",
    "expected_events",
]


@dataclass(frozen=True, eq=False)
class ExpectedEvents:
    """Per-recipient expected events of a cohort.

    Attributes
    ----------
    frame : DataFrame
        One row per recipient: ``recipient``, ``program``, ``time``, ``event``, ``expected``,
        ``lp`` (log relative risk against the reference population's average recipient,
        (x - center) . beta), ``stratum``, ``expected_at_horizon`` (expected events had the
        recipient been followed to the full horizon).
    out_of_range : DataFrame
        Per program and covariate, the number of recipients whose value lies outside the range
        seen in the reference population (``program``, ``covariate``, ``recipients``).
    cohort : Cohort
    X : ndarray, shape (n, p)
        The cohort's design matrix under the model's frozen design, rows as in ``frame``.
    strata : ndarray, shape (n,), or None
        The cohort's strata (None for an unstratified model).
    """

    frame: pd.DataFrame
    out_of_range: pd.DataFrame
    cohort: Cohort
    X: np.ndarray
    strata: np.ndarray | None


def expected_events(cohort: Cohort, model: ReferenceModel) -> ExpectedEvents:
    """Compute expected events for every recipient of ``cohort``.

    Raises
    ------
    InputError
        When the cohort's horizon is longer than the reference model's, or the outcome differs.
    """
    if cohort.outcome != model.outcome:
        raise InputError(
            f"the cohort follows outcome '{cohort.outcome}' but the model was fitted for "
            f"'{model.outcome}'; build the cohort for '{model.outcome}' or use a matching model"
        )
    if cohort.horizon_days > model.horizon_days:
        raise InputError(
            f"the cohort's horizon ({cohort.horizon_days:g} days) is longer than the reference "
            f"model's ({model.horizon_days} days): the baseline hazard is unknown past it; "
            "fit a reference model with a longer horizon"
        )
    spec = model.spec
    frame = cohort.frame
    X, strata = model.matrices(cohort)
    time = frame["time"].to_numpy(dtype=float)
    risk = model.fit.relative_risk(X)
    horizon = np.full(time.size, float(cohort.horizon_days))
    out = pd.DataFrame(
        {
            "recipient": frame[spec.columns.recipient].to_numpy(),
            "program": frame[spec.columns.program].astype(str).to_numpy(),
            "time": time,
            "event": frame["event"].to_numpy(dtype=int),
            "expected": model.fit.cumulative_hazard(time, strata) * risk,
            "lp": np.log(risk),
            "stratum": None if strata is None else strata,
            "expected_at_horizon": model.fit.cumulative_hazard(horizon, strata) * risk,
        }
    )
    return ExpectedEvents(
        frame=out, out_of_range=_out_of_range(model, frame, out["program"]), cohort=cohort,
        X=X, strata=strata,
    )


def _out_of_range(model: ReferenceModel, frame: pd.DataFrame, programs: pd.Series) -> pd.DataFrame:
    flags = model.design.out_of_range(frame)
    columns = ["program", "covariate", "recipients"]
    if flags.empty or not flags.to_numpy().any():
        return pd.DataFrame(columns=columns)
    flags = flags.set_axis(programs.to_numpy(), axis=0)
    counts = flags.groupby(level=0, sort=True).sum().stack()
    table = counts[counts > 0].rename("recipients").rename_axis(["program", "covariate"])
    table = table.reset_index()
    n_outside = int(flags.any(axis=1).sum())
    warnings.warn(
        f"{plural(n_outside, 'recipient')} {'has' if n_outside == 1 else 'have'} covariate "
        "values outside the range seen in the reference population (by program and covariate: "
        + ", ".join(f"{r.program} {r.covariate} {r.recipients}" for r in table.head(8).itertuples())
        + ("; ..." if len(table) > 8 else "")
        + "); their expected events extrapolate the model",
        DataWarning,
        stacklevel=3,
    )
    return table[columns]
