"""Expected events per recipient: rossi groups standing in for programs.

Reference values: docs/validation.md sections 4 and 5 (lifelines baseline read as a step
function, hand Breslow sums), and lifelines fits computed in the test with the baseline read
as a step (never lifelines' interpolating predict functions; docs/validation.md Conventions 3).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rossi_records as rr

from casemix import build_cohort, fit_reference, load_spec, read_records
from casemix.errors import DataWarning, InputError
from casemix.evaluation.expected import expected_events


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("expected")


@pytest.fixture(scope="module")
def rossi():
    return rr.rossi()


def _read(folder: Path, name: str, frame: pd.DataFrame, program, covariates):
    spec = load_spec(rr.write_spec(folder / f"{name}.toml", covariates))
    return read_records(rr.write_extract(folder / f"{name}.csv", frame, program), spec)


def _fit(records, horizon_days=rr.HORIZON_DAYS, cutoff=rr.ROSSI_CUTOFF):
    return fit_reference(records, records.spec, rr.OUTCOME, horizon_days, cutoff)


def _expected(records, model, horizon_days=rr.HORIZON_DAYS, outcome=rr.OUTCOME):
    cohort = build_cohort(records, outcome, horizon_days, rr.ROSSI_CUTOFF)
    return expected_events(cohort, model)


@pytest.fixture(scope="module")
def model_a(folder, rossi):
    """Model A of docs/validation.md section 5 on all of rossi, programs = fin groups."""
    records = _read(folder, "model_a", rossi, rr.by(rossi, "fin"), rr.MODEL_A)
    return records, _fit(records)


@pytest.fixture(scope="module")
def model_b(folder, rossi):
    """Model B of docs/validation.md section 5: reference fin = 0, cohort fin = 1."""
    reference, cohort = rossi[rossi["fin"] == 0], rossi[rossi["fin"] == 1]
    ref_records = _read(folder, "b_ref", reference, rr.by(reference, "fin"), rr.MODEL_B)
    cohort_records = _read(folder, "b_cohort", cohort, rr.by(cohort, "fin"), rr.MODEL_B)
    return ref_records, cohort_records, _fit(ref_records)


def _sums(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.groupby("program", sort=True)[["event", "expected"]].sum()


def test_model_a_expected_by_fin(model_a, rossi):
    records, model = model_a
    out = _expected(records, model)
    sums = _sums(out.frame)
    # docs/validation.md section 5, model A by fin: O 66 / 48, E 55.7993 / 58.2007
    # (lifelines, hand Breslow), E rel 1e-5.
    assert sums["event"].tolist() == [66, 48]
    np.testing.assert_allclose(sums["expected"], [55.7993, 58.2007], rtol=1e-5)
    # Per recipient against lifelines computed here (baseline step-read at each own week).
    cph = rr.lifelines_fit(rossi, rr.MODEL_A)
    np.testing.assert_allclose(
        out.frame["expected"], rr.lifelines_expected(cph, rossi, rossi), rtol=1e-5
    )
    # Breslow on its own fitting data: total E = total O = 114 (docs/validation.md section 4,
    # COMMON PRACTICE property of the estimator), abs 1e-8.
    assert out.frame["expected"].sum() == pytest.approx(114.0, abs=1e-8)


def test_model_a_expected_by_race(folder, rossi):
    records = _read(folder, "model_a_race", rossi, rr.by(rossi, "race"), rr.MODEL_A)
    sums = _sums(_expected(records, _fit(records)).frame)
    # docs/validation.md section 5, model A by race: O 12 / 102, E 15.2347 / 98.7653.
    assert sums.index.tolist() == ["race0", "race1"]
    assert sums["event"].tolist() == [12, 102]
    np.testing.assert_allclose(sums["expected"], [15.2347, 98.7653], rtol=1e-5)


def test_one_recipient_of_the_full_model(folder, rossi):
    records = _read(folder, "full", rossi, rr.by(rossi, "fin"), rr.FULL)
    out = _expected(records, _fit(records)).frame
    # docs/validation.md section 4: rossi row 0 (week 20, arrested) E = 0.102132, with the
    # jump at its own event time included (lifelines martingale residual, sksurv), rel 1e-5.
    assert out["expected"].iloc[0] == pytest.approx(0.102132, rel=1e-5)
    assert (out["recipient"].iloc[0], out["time"].iloc[0], out["event"].iloc[0]) == (
        "R0001",
        140.0,
        1,
    )


def test_model_b_reference_to_cohort(model_b, rossi):
    ref_records, cohort_records, model = model_b
    out = _expected(cohort_records, model).frame
    # docs/validation.md section 5, model B: evaluation cohort fin = 1, O 48, E 74.7406 by
    # step evaluation (hand Breslow = lifelines baseline read as a step), rel 1e-5.
    assert (len(out), int(out["event"].sum())) == (216, 48)
    assert out["expected"].sum() == pytest.approx(74.7406, rel=1e-5)
    # Not the 74.82251 of lifelines' interpolating predict_cumulative_hazard (Conventions 3).
    assert abs(out["expected"].sum() - 74.82251) > 0.05
    reference, cohort = rossi[rossi["fin"] == 0], rossi[rossi["fin"] == 1]
    cph = rr.lifelines_fit(reference, rr.MODEL_B)
    np.testing.assert_allclose(
        out["expected"], rr.lifelines_expected(cph, reference, cohort), rtol=1e-5
    )
    # The log relative risk against the reference's average recipient, from lifelines.
    _, risk = rr.lifelines_hazard_and_risk(cph, reference, cohort, cohort["week"])
    np.testing.assert_allclose(out["lp"], np.log(risk), atol=1e-5)
    # docs/validation.md section 5: the reference population's own E = 66.0000 = its O.
    own = _expected(ref_records, model).frame
    assert own["expected"].sum() == pytest.approx(66.0, abs=1e-8)


def test_model_b_horizon_truncated_at_26_weeks(model_b, rossi):
    _, cohort_records, model = model_b
    out = _expected(cohort_records, model, horizon_days=26 * 7).frame
    # docs/validation.md section 5, horizon-truncated E: O = 22, E = 34.1238 (hand Breslow
    # on the lifelines fit), rel 1e-5.
    assert int(out["event"].sum()) == 22
    assert out["expected"].sum() == pytest.approx(34.1238, rel=1e-5)
    assert out["time"].max() == 182.0
    reference, cohort = rossi[rossi["fin"] == 0], rossi[rossi["fin"] == 1]
    cph = rr.lifelines_fit(reference, rr.MODEL_B)
    theirs = rr.lifelines_expected(cph, reference, cohort, horizon_weeks=26)
    np.testing.assert_allclose(out["expected"], theirs, rtol=1e-5)
    # Followed to the full (cohort) horizon, every recipient's expected events are those at
    # week 26 (docs/validation.md section 5: H0_ref(26 | x = 0) = 0.179476).
    hazard, risk = rr.lifelines_hazard_and_risk(cph, reference, cohort, np.full(216, 26.0))
    np.testing.assert_allclose(out["expected_at_horizon"], hazard * risk, rtol=1e-5)


def test_frame_columns_and_order(model_b):
    _, cohort_records, model = model_b
    out = _expected(cohort_records, model)
    assert list(out.frame.columns) == [
        "recipient", "program", "time", "event", "expected", "lp", "stratum",
        "expected_at_horizon",
    ]  # fmt: skip
    assert out.frame["recipient"].tolist() == cohort_records.frame["recipient_id"].tolist()
    assert out.frame["stratum"].isna().all()
    assert out.out_of_range.empty
    assert list(out.out_of_range.columns) == ["program", "covariate", "recipients"]


def test_refuses_a_cohort_horizon_longer_than_the_model(model_b):
    _, cohort_records, model = model_b
    cohort = build_cohort(cohort_records, rr.OUTCOME, 400, "2021-06-30")
    longer = r"horizon \(400.* days\) is longer than the reference model's \(364 days\)"
    with pytest.raises(InputError, match=longer):
        expected_events(cohort, model)


def test_refuses_a_different_outcome(model_b):
    _, cohort_records, model = model_b
    cohort = build_cohort(cohort_records, "rearrest", rr.HORIZON_DAYS, rr.ROSSI_CUTOFF)
    with pytest.raises(InputError, match="follows outcome 'rearrest' but the model was fitted for"):
        expected_events(cohort, model)


def test_refuses_times_past_the_reference_follow_up(folder, rossi, model_b):
    # The reference is complete only to week 30 (cut-off 210 days after the transplants):
    # fit_reference refuses a 364-day horizon, so the model is fitted at 210 days and then
    # given a 364-day horizon, as a model file written before that check could carry.
    reference = rossi[rossi["fin"] == 0]
    records = _read(folder, "short_ref", reference, rr.by(reference, "fin"), rr.MODEL_B)
    with pytest.raises(InputError, match=r"cannot support a horizon of 364 days"):
        _fit(records, cutoff="2020-08-03")
    short = dataclasses.replace(_fit(records, 210, cutoff="2020-08-03"), horizon_days=364)
    assert short.fit.baselines[0].last_time == 210.0
    _, cohort_records, _ = model_b
    beyond = r"beyond the last follow-up time of the fitting data \(210\)"
    with pytest.raises(InputError, match=beyond):
        _expected(cohort_records, short)


def test_out_of_range_covariates_warn_counted_per_program(folder, rossi, model_a):
    _, model = model_a
    cohort = rossi.copy()
    # rossi ages run 17-44 and prio 0-18 (lifelines.datasets.load_rossi): push 2 fin0
    # recipients' age and 1 fin1 recipient's prio (and age) outside the reference range.
    fin0 = cohort.index[cohort["fin"] == 0][:2]
    fin1 = cohort.index[cohort["fin"] == 1][:1]
    cohort.loc[fin0, "age"] = 60
    cohort.loc[fin1, ["age", "prio"]] = [12, 40]
    records = _read(folder, "out_of_range", cohort, rr.by(cohort, "fin"), rr.MODEL_A)
    with pytest.warns(
        DataWarning,
        match=r"^3 recipients have covariate values outside the range seen in the reference "
        r"population \(by program and covariate: fin0 age 2, fin1 age 1, fin1 prio 1\)",
    ):
        out = _expected(records, model)
    expected_table = pd.DataFrame(
        {"program": ["fin0", "fin1", "fin1"], "covariate": ["age", "age", "prio"],
         "recipients": [2, 1, 1]}
    )  # fmt: skip
    pd.testing.assert_frame_equal(
        out.out_of_range.reset_index(drop=True), expected_table, check_dtype=False
    )
    # Their expected events are still computed (extrapolated), not dropped.
    assert len(out.frame) == 432 and np.isfinite(out.frame["expected"]).all()


def test_one_out_of_range_recipient_reads_correctly(folder, rossi, model_a):
    _, model = model_a
    cohort = rossi.copy()
    cohort.loc[cohort.index[0], "age"] = 70
    records = _read(folder, "one_out", cohort, rr.by(cohort, "fin"), rr.MODEL_A)
    with pytest.warns(DataWarning, match=r"^1 recipient has "):
        _expected(records, model)
