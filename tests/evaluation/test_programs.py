"""The program table and survival curves, with rossi groups standing in for programs.

Reference values: docs/validation.md sections 1.3, 5 and 6; scipy.stats (Garwood limits,
Poisson tails) and lifelines (Kaplan-Meier with its log(-log) limits, Cox baseline read as a
step function) computed in the test.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rossi_records as rr
from lifelines import KaplanMeierFitter
from scipy import stats

from casemix import build_cohort, fit_reference, load_spec, read_records
from casemix.evaluation.expected import expected_events
from casemix.evaluation.programs import MAX_CURVE_POINTS, program_table, survival_curves

TABLE_COLUMNS = [
    "program", "recipients", "observed", "expected", "oe_ratio", "oe_lower", "oe_upper",
    "observed_survival", "observed_survival_lower", "observed_survival_upper",
    "expected_survival", "p_more_exact", "p_fewer_exact", "competing_events",
    "cumulative_incidence",
]  # fmt: skip
LATE_TX = "2021-03-01"  # 121 days before the cut-off: nobody of this program reaches day 364


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("programs")


@pytest.fixture(scope="module")
def rossi():
    return rr.rossi()


def _read(folder: Path, name: str, frame: pd.DataFrame, program, covariates):
    spec = load_spec(rr.write_spec(folder / f"{name}.toml", covariates))
    path = rr.write_extract(folder / f"{name}.csv", frame, program)
    return read_records(path, spec, cutoff=rr.ROSSI_CUTOFF)


def _fit(records):
    return fit_reference(records, records.spec, rr.OUTCOME, rr.HORIZON_DAYS, rr.ROSSI_CUTOFF)


def _expected(records, model, horizon_days=rr.HORIZON_DAYS):
    return expected_events(build_cohort(records, rr.OUTCOME, horizon_days), model)


@pytest.fixture(scope="module")
def model_a(folder, rossi):
    records = _read(folder, "a_fin", rossi, rr.by(rossi, "fin"), rr.MODEL_A)
    return records, _fit(records)


@pytest.fixture(scope="module")
def table_a(model_a):
    records, model = model_a
    return program_table(_expected(records, model)).set_index("program")


@pytest.fixture(scope="module")
def model_b(folder, rossi):
    reference, cohort = rossi[rossi["fin"] == 0], rossi[rossi["fin"] == 1]
    model = _fit(_read(folder, "b_ref", reference, rr.by(reference, "fin"), rr.MODEL_B))
    return _read(folder, "b_cohort", cohort, rr.by(cohort, "fin"), rr.MODEL_B), model


def test_columns_and_order(table_a):
    assert ["program", *table_a.columns] == TABLE_COLUMNS
    assert table_a.index.tolist() == ["fin0", "fin1"]
    assert table_a["recipients"].tolist() == [216, 216]


def test_model_a_observed_expected_and_garwood_limits_by_fin(table_a):
    # docs/validation.md section 5, model A by fin (lifelines, hand Breslow): O 66 / 48,
    # E 55.7993 / 58.2007 (rel 1e-5); O/E 1.1828 (Garwood 95% 0.9148 to 1.5048) and
    # 0.8247 (0.6081 to 1.0935), printed to 4 decimals (abs 5e-5).
    assert table_a["observed"].tolist() == [66, 48]
    np.testing.assert_allclose(table_a["expected"], [55.7993, 58.2007], rtol=1e-5)
    np.testing.assert_allclose(table_a["oe_ratio"], [1.1828, 0.8247], atol=5e-5)
    np.testing.assert_allclose(table_a["oe_lower"], [0.9148, 0.6081], atol=5e-5)
    np.testing.assert_allclose(table_a["oe_upper"], [1.5048, 1.0935], atol=5e-5)


def test_model_a_by_race(folder, rossi):
    records = _read(folder, "a_race", rossi, rr.by(rossi, "race"), rr.MODEL_A)
    table = program_table(_expected(records, _fit(records))).set_index("program")
    # docs/validation.md section 5, model A by race: O 12 / 102, E 15.2347 / 98.7653;
    # O/E 0.7877 (0.4070 to 1.3759) and 1.0328 (0.8421 to 1.2537).
    assert table["observed"].tolist() == [12, 102]
    np.testing.assert_allclose(table["expected"], [15.2347, 98.7653], rtol=1e-5)
    np.testing.assert_allclose(table["oe_ratio"], [0.7877, 1.0328], atol=5e-5)
    np.testing.assert_allclose(table["oe_lower"], [0.4070, 0.8421], atol=5e-5)
    np.testing.assert_allclose(table["oe_upper"], [1.3759, 1.2537], atol=5e-5)


@pytest.mark.parametrize("level", [0.95, 0.90])
def test_garwood_limits_and_exact_tails_against_scipy(model_a, level):
    records, model = model_a
    table = program_table(_expected(records, model), level=level)
    o, e = table["observed"].to_numpy(), table["expected"].to_numpy()
    alpha = 1 - level
    # Garwood (docs/validation.md section 6): lower chi2(alpha/2; 2O)/2, upper
    # chi2(1 - alpha/2; 2O + 2)/2, divided by E; scipy.stats.chi2, rel 1e-9.
    np.testing.assert_allclose(
        table["oe_lower"], stats.chi2.ppf(alpha / 2, 2 * o) / 2 / e, rtol=1e-9
    )
    np.testing.assert_allclose(
        table["oe_upper"], stats.chi2.ppf(1 - alpha / 2, 2 * o + 2) / 2 / e, rtol=1e-9
    )
    # Exact one-sided tails P(Y >= O | E) and P(Y <= O | E): scipy.stats.poisson.
    np.testing.assert_allclose(table["p_more_exact"], stats.poisson.sf(o - 1, e), rtol=1e-9)
    np.testing.assert_allclose(table["p_fewer_exact"], stats.poisson.cdf(o, e), rtol=1e-9)


def test_observed_survival_is_kaplan_meier_at_the_horizon(table_a, rossi):
    # Censoring only at week 52, so KM = 1 - O / n (docs/validation.md 1.3, closed form).
    np.testing.assert_allclose(
        table_a["observed_survival"], [1 - 66 / 216, 1 - 48 / 216], rtol=1e-12
    )
    # The limits: lifelines KaplanMeierFitter's log(-log) interval (Conventions 8).
    for program, fin in (("fin0", 0), ("fin1", 1)):
        group = rossi[rossi["fin"] == fin]
        kmf = KaplanMeierFitter().fit(group["week"], group["arrest"])
        limits = kmf.confidence_interval_.iloc[-1].to_numpy()
        row = table_a.loc[program]
        np.testing.assert_allclose(
            [row.observed_survival_lower, row.observed_survival_upper], limits, rtol=1e-6
        )


@pytest.mark.parametrize(
    ("weeks", "observed", "expected"),
    # docs/validation.md section 5, model B fin = 1 cohort: observed KM 0.898148 (26 weeks)
    # and 0.777778 (52); expected, the mean of each recipient's predicted survival (direct
    # adjustment, COMMON PRACTICE), 0.849889 and 0.690845 (lifelines, sksurv), rel 1e-6.
    [(26, 0.898148, 0.849889), (52, 0.777778, 0.690845)],
)
def test_model_b_observed_and_expected_survival(model_b, rossi, weeks, observed, expected):
    records, model = model_b
    row = program_table(_expected(records, model, horizon_days=7 * weeks)).iloc[0]
    assert row.observed_survival == pytest.approx(observed, rel=1e-6)
    assert row.expected_survival == pytest.approx(expected, rel=1e-6)
    reference, cohort = rossi[rossi["fin"] == 0], rossi[rossi["fin"] == 1]
    cph = rr.lifelines_fit(reference, rr.MODEL_B)
    hazard, risk = rr.lifelines_hazard_and_risk(cph, reference, cohort, np.full(216, weeks))
    assert row.expected_survival == pytest.approx(np.exp(-hazard * risk).mean(), rel=1e-6)


@pytest.fixture(scope="module")
def odd_programs(folder, rossi, model_a):
    """fin0 and fin1 plus a program transplanted late (no one reaches the horizon) and a
    program whose three recipients all had the event."""
    _, model = model_a
    late = rossi[rossi["arrest"] == 0].head(8).assign(transplant_date=LATE_TX)
    late = late.assign(recipient_id=[f"L{i:03d}" for i in range(8)])
    failed = rossi[rossi["arrest"] == 1].head(3)
    failed = failed.assign(recipient_id=[f"F{i:03d}" for i in range(3)])
    frame = pd.concat([rossi, late, failed], ignore_index=True)
    program = [*rr.by(rossi, "fin"), *["late"] * 8, *["failed"] * 3]
    records = _read(folder, "odd", frame, program, rr.MODEL_A)
    assert records.exclusions.empty and len(records.frame) == 432 + 8 + 3
    return program_table(_expected(records, model)).set_index("program"), failed


def test_program_with_no_one_followed_to_the_horizon(odd_programs):
    table, _ = odd_programs
    row = table.loc["late"]
    assert (row.recipients, row.observed) == (8, 0)
    assert np.isnan(row.observed_survival)  # documented: unknown past the follow-up
    # Expected survival is defined to the horizon whatever the follow-up (direct adjustment).
    assert 0 < row.expected_survival < 1
    assert row.oe_ratio == 0 and row.oe_lower == 0
    # Garwood upper limit for O = 0: -ln(0.025) = 3.68888 (docs/validation.md section 6).
    assert row.oe_upper * row.expected == pytest.approx(3.68888, abs=1e-5)


def test_program_where_everyone_failed_has_survival_zero(odd_programs):
    table, failed = odd_programs
    row = table.loc["failed"]
    assert (row.recipients, row.observed) == (3, 3)
    # lifelines KaplanMeierFitter: once the curve reaches 0 it stays 0 (computed here).
    kmf = KaplanMeierFitter().fit(failed["week"], failed["arrest"])
    assert kmf.survival_function_at_times(52).iloc[0] == 0.0
    assert row.observed_survival == 0.0


def test_survival_curves_match_lifelines(model_b, rossi):
    records, model = model_b
    expected = _expected(records, model)
    curves = survival_curves(expected, model)
    assert list(curves.columns) == [
        "program",
        "time",
        "observed",
        "observed_lower",
        "observed_upper",
        "at_risk",
        "expected",
    ]
    # Every whole day from 0 to the 364-day horizon fits under MAX_CURVE_POINTS.
    np.testing.assert_array_equal(curves["time"], np.arange(0, 365, dtype=float))
    assert MAX_CURVE_POINTS >= 365
    cohort = rossi[rossi["fin"] == 1]
    kmf = KaplanMeierFitter().fit(cohort["week"], cohort["arrest"])
    weeks = curves["time"].to_numpy() / 7
    np.testing.assert_allclose(
        curves["observed"], rr.step_read(kmf.survival_function_, weeks), rtol=1e-12
    )
    for column, bound in (("observed_lower", 0), ("observed_upper", 1)):
        theirs = rr.step_read(kmf.confidence_interval_.iloc[:, bound], weeks)
        # lifelines has no interval at time 0 (its table starts with S = 1, limits 1).
        np.testing.assert_allclose(curves[column][7:], theirs[7:], rtol=1e-6)
    # Numbers at risk at each event time: lifelines event_table.
    table = kmf.event_table
    at_days = curves.set_index("time").loc[7 * table.index[1:].to_numpy(), "at_risk"]
    np.testing.assert_array_equal(at_days.to_numpy(), table["at_risk"].iloc[1:].to_numpy())
    # Expected: mean predicted survival from lifelines' step-read baseline, every day.
    reference = rossi[rossi["fin"] == 0]
    cph = rr.lifelines_fit(reference, rr.MODEL_B)
    _, risk = rr.lifelines_hazard_and_risk(cph, reference, cohort, cohort["week"])
    hazard = rr.step_read(cph.baseline_cumulative_hazard_, weeks)
    np.testing.assert_allclose(
        curves["expected"], np.exp(-np.outer(hazard, risk)).mean(axis=1), rtol=1e-6
    )
    # The curves end where the program table's horizon values are.
    row = program_table(expected).iloc[0]
    last = curves.iloc[-1]
    assert (last.observed, last.expected) == (row.observed_survival, row.expected_survival)


def test_survival_curves_are_thinned_for_long_horizons(model_b):
    records, model = model_b
    # A 182-day cohort on the 364-day model: 183 whole days, no thinning needed...
    curves = survival_curves(_expected(records, model, horizon_days=182), model)
    assert curves["time"].iloc[-1] == 182.0 and len(curves) == 183
    assert curves["expected"].iloc[0] == 1.0 and curves["observed"].iloc[0] == 1.0
    assert (np.diff(curves["expected"]) <= 0).all()
