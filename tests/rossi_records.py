"""The rossi recidivism data (lifelines.datasets.load_rossi) as a casemix extract and spec.

Shared by the tests of the reference model, expected events, the program table, the case-mix
decomposition and the evaluation API. Each of the 432 subjects becomes one recipient with an
invented id, transplanted on ``ROSSI_TX``; follow-up ends ``7 * week`` days later (the arrest
date for the 114 arrests, the last-seen date otherwise). A Cox fit does not change when time
is multiplied by 7, so every rossi value of docs/validation.md holds with days for weeks.

The independent checks read lifelines' ``baseline_cumulative_hazard_`` as a right-continuous
step function (last value at or before t), never through its interpolating predict functions
(docs/validation.md, Conventions 3).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from oracles import LIFELINES_MISSING

pytest.importorskip("lifelines", reason=LIFELINES_MISSING)
from lifelines import CoxPHFitter
from lifelines.datasets import load_rossi

ROSSI_TX = dt.date(2020, 1, 6)
# After everyone's follow-up (the last ends on 2021-01-04, 52 weeks after ROSSI_TX).
ROSSI_CUTOFF = dt.date(2021, 6, 30)
HORIZON_DAYS = 52 * 7
FULL = ("fin", "age", "race", "wexp", "mar", "paro", "prio")
MODEL_A = ("age", "wexp", "mar", "paro", "prio")
MODEL_B = ("age", "race", "wexp", "mar", "paro", "prio")
BINARY = ("fin", "race", "wexp", "mar", "paro")
OUTCOME = "arrest"


def rossi() -> pd.DataFrame:
    """The rossi data with an invented ``recipient_id`` per row (R0001 ... R0432)."""
    frame = load_rossi()
    return frame.assign(recipient_id=[f"R{i + 1:04d}" for i in range(len(frame))])


def extract(frame: pd.DataFrame, program: Sequence[str] | pd.Series) -> pd.DataFrame:
    """One extract row per rossi row: dates from ``week`` and ``arrest``, covariates as given.

    Parameters
    ----------
    frame : DataFrame
        Rows of :func:`rossi`, optionally with a ``transplant_date`` column (where it is
        missing or empty the transplant is on ``ROSSI_TX``).
    program : sequence of str, shape (n,)
        Program label of each row.
    """
    tx = pd.Series(pd.Timestamp(ROSSI_TX), index=frame.index)
    if "transplant_date" in frame:
        tx = pd.to_datetime(frame["transplant_date"]).fillna(tx)
    end = tx + pd.to_timedelta(7 * frame["week"].to_numpy(), unit="D")
    out = pd.DataFrame(
        {
            "recipient_id": frame["recipient_id"].to_numpy(),
            "program": np.asarray(program, dtype=object),
            "transplant_date": tx.dt.strftime("%Y-%m-%d").to_numpy(),
            "last_seen_date": end.dt.strftime("%Y-%m-%d").to_numpy(),
            "arrest_date": np.where(frame["arrest"] == 1, end.dt.strftime("%Y-%m-%d"), ""),
        }
    )
    for name in FULL:
        out[name] = frame[name].to_numpy()
    return out


def by(frame: pd.DataFrame, column: str) -> pd.Series:
    """Program labels from a binary rossi column: ``fin0``/``fin1``, ``race0``/``race1``."""
    return column + frame[column].astype(int).astype(str)


def write_extract(path: Path, frame: pd.DataFrame, program) -> Path:
    """Write :func:`extract` of ``frame`` as CSV (floats at full precision)."""
    extract(frame, program).to_csv(path, index=False, float_format="%.17g")
    return path


def spec_text(
    covariates: Sequence[str],
    *,
    kinds: dict[str, str] | None = None,
    strata: str | None = None,
    extra: str = "",
) -> str:
    """A study spec for :func:`extract` files.

    Binary rossi columns are ``binary`` and the others ``numeric`` unless ``kinds`` says
    otherwise. Two outcomes read the same date column: ``arrest`` and ``rearrest`` (the
    second exists only to test refusals of a mismatched outcome).
    """
    kinds = kinds or {}
    lines = [
        "[columns]",
        'recipient = "recipient_id"',
        'program = "program"',
        'transplant_date = "transplant_date"',
        'last_seen = "last_seen_date"',
        "",
        f"[outcomes.{OUTCOME}]",
        'dates = ["arrest_date"]',
        "",
        "[outcomes.rearrest]",
        'dates = ["arrest_date"]',
        "",
    ]
    for name in covariates:
        kind = kinds.get(name, "binary" if name in BINARY else "numeric")
        lines += [f"[covariates.{name}]", f'kind = "{kind}"', ""]
    if strata is not None:
        lines += ["[strata]", f'column = "{strata}"', ""]
    return "\n".join(lines) + extra


def write_spec(path: Path, covariates: Sequence[str], **kwargs) -> Path:
    """Write :func:`spec_text` to ``path``."""
    path.write_text(spec_text(covariates, **kwargs), encoding="utf-8")
    return path


def lifelines_fit(frame: pd.DataFrame, covariates: Sequence[str], **kwargs) -> CoxPHFitter:
    """lifelines Efron fit of ``week, arrest ~ covariates`` (the outside reference)."""
    columns = [*covariates, "week", "arrest"]
    return CoxPHFitter(**kwargs).fit(frame[columns], duration_col="week", event_col="arrest")


def step_read(baseline: pd.DataFrame | pd.Series, t) -> np.ndarray:
    """Read a lifelines baseline as a right-continuous step: the last value at or before t."""
    series = baseline.iloc[:, 0] if isinstance(baseline, pd.DataFrame) else baseline
    times = series.index.to_numpy(dtype=float)
    values = series.to_numpy(dtype=float)
    idx = np.searchsorted(times, np.asarray(t, dtype=float), side="right") - 1
    return np.where(idx >= 0, values[np.clip(idx, 0, None)], 0.0)


def lifelines_hazard_and_risk(
    cph: CoxPHFitter, reference: pd.DataFrame, cohort: pd.DataFrame, weeks
) -> tuple[np.ndarray, np.ndarray]:
    """Per cohort row: lifelines baseline H0(t) at the reference means (step read at ``weeks``)
    and the relative risk exp((x - reference mean) . beta).

    The expected events are their product; the baseline alone is the expected count of the
    reference population's average recipient with the same follow-up.
    """
    names = list(cph.params_.index)
    centred = cohort[names].to_numpy(float) - reference[names].to_numpy(float).mean(axis=0)
    risk = np.exp(centred @ cph.params_.to_numpy())
    return step_read(cph.baseline_cumulative_hazard_, weeks), risk


def lifelines_expected(
    cph: CoxPHFitter, reference: pd.DataFrame, cohort: pd.DataFrame, horizon_weeks=None
) -> np.ndarray:
    """Per cohort row, H0_ref(t_i) exp((x_i - mean_ref) . beta) from lifelines (step read).

    ``t_i`` is the row's week, truncated at ``horizon_weeks`` when given.
    """
    weeks = cohort["week"].to_numpy(dtype=float)
    if horizon_weeks is not None:
        weeks = np.minimum(weeks, horizon_weeks)
    hazard, risk = lifelines_hazard_and_risk(cph, reference, cohort, weeks)
    return hazard * risk
