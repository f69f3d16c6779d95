"""Tests of the study spec: the documented example, defaults, round trip and every error."""

from __future__ import annotations

import copy
import datetime as dt
import itertools
import json
import re
from pathlib import Path

import pytest

from casemix import load_spec
from casemix.data.spec import SPLINE_KNOT_QUANTILES, Covariate, spec_from_dict
from casemix.errors import SpecError

DOCS = Path(__file__).resolve().parents[2] / "docs" / "spec.md"

MINIMAL = {
    "columns": {
        "recipient": "recipient_id",
        "program": "program",
        "transplant_date": "transplant_date",
        "last_seen": "last_seen_date",
    },
    "outcomes": {"death": {"dates": ["death_date"]}},
}


def _with(**changes: object) -> dict:
    """MINIMAL with top-level tables replaced."""
    d = copy.deepcopy(MINIMAL)
    d.update(changes)
    return d


def _docs_example(tmp_path: Path) -> Path:
    """The complete example of docs/spec.md, written to a file (the docs must stay valid)."""
    text = DOCS.read_text(encoding="utf-8")
    block = re.search(r"```toml\n(.*?)```", text, flags=re.S).group(1)
    path = tmp_path / "spec.toml"
    path.write_text(block, encoding="utf-8")
    return path


def test_docs_example_reads_as_documented(tmp_path: Path) -> None:
    spec = load_spec(_docs_example(tmp_path))
    assert spec.path == tmp_path / "spec.toml"
    assert spec.columns.last_seen == "last_seen_date"
    assert list(spec.outcomes) == ["graft_failure", "graft_failure_death_censored", "death"]
    assert spec.outcomes["graft_failure"].dates == (
        "graft_loss_date",
        "retransplant_date",
        "death_date",
    )
    assert spec.outcomes["graft_failure_death_censored"].censor_at == ("death_date",)
    assert spec.columns.death == "death_date"
    assert [c.name for c in spec.covariates] == [
        "recipient_age",
        "recipient_sex",
        "bmi",
        "diabetes",
        "dialysis_years",
        "donor_type",
        "donor_age",
        "cold_ischaemia",
    ]
    assert spec.covariate("recipient_age") == Covariate(
        name="recipient_age", column="recipient_age", kind="numeric", lower=18.0, upper=90.0
    )
    assert spec.covariate("cold_ischaemia").column == "cold_ischaemia_hours"
    assert spec.covariate("donor_type").other == "deceased"
    assert spec.covariate("donor_age").knots == 4
    assert spec.strata == "era"
    assert spec.analysis.cutoff == dt.date(2025, 6, 30)
    assert spec.analysis.horizon_days == 365
    assert spec.analysis.window == (dt.date(2023, 1, 1), dt.date(2024, 12, 31))
    assert spec.date_format == "%d/%m/%Y"
    assert spec.event_columns == ("graft_loss_date", "retransplant_date", "death_date")
    assert "era" in spec.required_columns and "cold_ischaemia_hours" in spec.required_columns


def test_defaults() -> None:
    spec = spec_from_dict(_with(covariates={"age": {"kind": "spline"}}))
    cov = spec.covariate("age")
    assert (cov.column, cov.missing, cov.knots, cov.reference) == ("age", "exclude", 4, None)
    assert spec.strata is None and spec.date_format is None and spec.path is None
    assert spec.analysis.window == (None, None)


def test_round_trip_is_exact_and_json_able(tmp_path: Path) -> None:
    spec = load_spec(_docs_example(tmp_path))
    d = spec.to_dict()
    again = spec_from_dict(json.loads(json.dumps(d)))
    assert again == spec
    assert again.to_dict() == d
    assert d["analysis"]["cutoff"] == "2025-06-30"
    bmi = next(c for c in d["covariates"] if c["name"] == "bmi")
    assert "knots" not in bmi  # options only where they apply
    # Covariate order is the design's column order: it survives a key-sorting JSON writer.
    sorted_json = json.loads(json.dumps(d, sort_keys=True))
    assert spec_from_dict(sorted_json).covariates == spec.covariates


def test_covariates_as_a_list_of_tables() -> None:
    listed = _with(covariates=[{"name": "b", "kind": "numeric"}, {"name": "a", "kind": "binary"}])
    assert [c.name for c in spec_from_dict(listed).covariates] == ["b", "a"]
    twice = _with(covariates=[{"name": "a", "kind": "numeric"}, {"name": "a", "kind": "binary"}])
    with pytest.raises(SpecError, match=r"covariate 'a' is declared twice; keep one"):
        spec_from_dict(twice)
    with pytest.raises(SpecError, match=r"'covariates\[0\].name' must be a non-empty string"):
        spec_from_dict(_with(covariates=[{"kind": "numeric"}]))
    with pytest.raises(SpecError, match=r"'covariates' must be a table"):
        spec_from_dict(_with(covariates="age"))


def test_knot_quantiles_are_symmetric_and_increasing() -> None:
    # The table is the commonly recommended restricted-cubic-spline placement (Harrell,
    # Regression Modeling Strategies, 2nd ed., section 2.4.6; from memory): symmetric about 0.5.
    for k, q in SPLINE_KNOT_QUANTILES.items():
        assert len(q) == k
        assert all(a < b for a, b in itertools.pairwise(q))
        assert all(abs(a + b - 1) < 1e-4 for a, b in zip(q, reversed(q), strict=True))


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        ({"covariate": {}}, r"unknown key 'covariate' \(closest: 'covariates'\)"),
        ({"columns": {"recipient": "id"}}, r"\[columns\] lacks program, transplant_date"),
        ({"columns": {**MINIMAL["columns"], "donor": "d"}}, r"unknown key 'columns.donor'"),
        ({"columns": {**MINIMAL["columns"], "program": ""}}, r"'columns.program' must be a non"),
        ({"outcomes": {}}, r"\[outcomes\] is empty"),
        (
            {"outcomes": {"death": {"date": ["d"]}}},
            r"unknown key 'outcomes.death.date' \(closest: 'dates'\)",
        ),
        (
            {"outcomes": {"death": {"dates": "death_date"}}},
            r"'outcomes.death.dates' must be a non-empty list",
        ),
        ({"outcomes": "death"}, r"'outcomes' must be a table"),
        (
            {"covariates": {"age": {"kinds": "numeric"}}},
            r"unknown key 'covariates.age.kinds' \(closest: 'kind', 'knots'\)",
        ),
        ({"covariates": {"age": {}}}, r"'covariates.age.kind' is required"),
        (
            {"covariates": {"age": {"kind": "numerical"}}},
            r"'covariates.age.kind' = 'numerical' is not one of .* \(closest: 'numeric'",
        ),
        (
            {"covariates": {"age": {"kind": "numeric", "missing": "drop"}}},
            r"'covariates.age.missing' = 'drop'",
        ),
        (
            {"covariates": {"age": {"kind": "numeric", "reference": "x"}}},
            r"'covariates.age.reference' applies only to kind categorical",
        ),
        (
            {"covariates": {"sex": {"kind": "categorical", "lower": 0}}},
            r"'covariates.sex.lower' applies only to kind numeric or spline",
        ),
        (
            {"covariates": {"age": {"kind": "numeric", "knots": 4}}},
            r"'covariates.age.knots' applies only to kind spline",
        ),
        (
            {"covariates": {"age": {"kind": "spline", "knots": 9}}},
            r"'covariates.age.knots' must be a whole number from 3 to 7",
        ),
        (
            {"covariates": {"age": {"kind": "spline", "knots": True}}},
            r"'covariates.age.knots' must be a whole number",
        ),
        (
            {"covariates": {"age": {"kind": "numeric", "missing": "category"}}},
            r"'covariates.age.missing' = \"category\" applies only to kind categorical",
        ),
        (
            {"covariates": {"sex": {"kind": "categorical", "missing": "median"}}},
            r"\"median\" applies only to kind numeric or spline",
        ),
        (
            {"covariates": {"age": {"kind": "numeric", "lower": 90, "upper": 18}}},
            r"'covariates.age.lower' \(90.0\) must be below",
        ),
        (
            {"covariates": {"age": {"kind": "numeric", "lower": "18"}}},
            r"'covariates.age.lower' must be a number",
        ),
        ({"covariates": {"age:x": {"kind": "numeric"}}}, r"covariate name 'age:x' may not contain"),
        (
            {"covariates": {"d": {"kind": "numeric", "column": "death_date"}}},
            r"column 'death_date' is used as an outcome date and as covariates.d",
        ),
        (
            {"covariates": {"dt": {"kind": "categorical"}}, "strata": {"column": "dt"}},
            r"column 'dt' is used as covariates.dt and as strata.column",
        ),
        ({"strata": {}}, r"\[strata\] needs `column"),
        ({"strata": {"columns": "x"}}, r"unknown key 'strata.columns' \(closest: 'column'\)"),
        (
            {"analysis": {"cut_off": dt.date(2025, 1, 1)}},
            r"unknown key 'analysis.cut_off' \(closest: 'cutoff'\)",
        ),
        ({"analysis": {"cutoff": "30/06/2025"}}, r"'analysis.cutoff' = '30/06/2025' is not a date"),
        (
            {"analysis": {"cutoff": dt.datetime(2025, 6, 30, 12)}},
            r"'analysis.cutoff' must be a date such as",
        ),
        ({"analysis": {"horizon_days": 0}}, r"'analysis.horizon_days' must be a positive whole"),
        ({"analysis": {"horizon_days": 365.5}}, r"'analysis.horizon_days' must be a positive"),
        (
            {"analysis": {"cohort_from": "2024-01-01", "cohort_to": "2023-01-01"}},
            r"'analysis.cohort_from' \(2024-01-01\) is after",
        ),
        (
            {"records": {"date_format": "dd/mm/yyyy"}},
            r"'records.date_format' = 'dd/mm/yyyy' has no strftime codes",
        ),
        (
            {"records": {"dateformat": "%d"}},
            r"unknown key 'records.dateformat' \(closest: 'date_format'\)",
        ),
    ],
)
def test_errors_name_the_key(changes: dict, message: str) -> None:
    with pytest.raises(SpecError, match=message):
        spec_from_dict(_with(**changes))


def test_missing_tables() -> None:
    with pytest.raises(SpecError, match=r"the spec has no \[outcomes\] table"):
        spec_from_dict({"columns": MINIMAL["columns"]})


def test_file_errors_name_the_file(tmp_path: Path) -> None:
    with pytest.raises(SpecError, match=r"spec file '.*nowhere.toml' does not exist"):
        load_spec(tmp_path / "nowhere.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[columns\nrecipient = 1\n", encoding="utf-8")
    with pytest.raises(SpecError, match=r"spec file '.*bad.toml' is not valid TOML"):
        load_spec(bad)
    wrong = tmp_path / "wrong.toml"
    wrong.write_text('[columns]\nrecipient = "id"\n[outcomes.x]\ndates = ["d"]\n', "utf-8")
    with pytest.raises(SpecError, match=r"spec file '.*wrong.toml': \[columns\] lacks"):
        load_spec(wrong)


def test_unknown_outcome_and_covariate_suggest_the_closest() -> None:
    spec = spec_from_dict(_with(covariates={"donor_age": {"kind": "numeric"}}))
    with pytest.raises(SpecError, match=r"no outcome 'deaths' \(closest: 'death'\)"):
        spec.outcome("deaths")
    with pytest.raises(SpecError, match=r"no covariate 'donorage' \(closest: 'donor_age'\)"):
        spec.covariate("donorage")


def test_outcome_definitions_say_how_death_is_handled():
    spec = load_spec(Path(__file__).parents[2] / "examples" / "lorran_valley" / "spec.toml")
    death = spec.columns.death
    assert death == "death_date"
    assert spec.outcome("graft_failure").definition(death) == (
        "graft failure = the earliest of graft_loss_date, retransplant_date, death_date "
        "(a death counts as an event: all-cause)"
    )
    assert spec.outcome("graft_failure_death_censored").definition(death) == (
        "graft failure death censored = the earliest of graft_loss_date, retransplant_date; "
        "follow-up ends without an event at death_date (death-censored: a death ends "
        "follow-up and competes with the event)"
    )
    assert spec.outcome("death").definition(death) == "death = the earliest of death_date"


# --- the study plan ---------------------------------------------------------------------

PLAN = {
    "graft_1y": {"outcome": "death", "horizon_days": 365, "cohort_from": dt.date(2022, 1, 1),
                 "cohort_to": dt.date(2023, 12, 31), "reference_from": dt.date(2016, 1, 1),
                 "reference_to": dt.date(2021, 12, 31)},
    "death_30d": {"outcome": "death", "horizon_days": 30},
}


def _plan(**tables) -> dict:
    return _with(analyses=copy.deepcopy(tables or PLAN))


def test_plan_is_read_in_file_order_and_round_trips_through_sorted_json():
    spec = spec_from_dict(_plan())
    assert list(spec.analyses) == ["graft_1y", "death_30d"]
    one = spec.analyses["graft_1y"]
    assert (one.outcome, one.horizon_days) == ("death", 365)
    assert one.reference_window == (dt.date(2016, 1, 1), dt.date(2021, 12, 31))
    assert spec.analyses["death_30d"].reference_window == (None, None)
    back = spec_from_dict(json.loads(json.dumps(spec.to_dict(), sort_keys=True)))
    assert back == spec and list(back.analyses) == list(spec.analyses)


def test_a_spec_without_a_plan_has_none_and_writes_none():
    spec = spec_from_dict(MINIMAL)
    assert dict(spec.analyses) == {}
    assert "analyses" not in spec.to_dict()


def test_default_cohort_window_ends_one_horizon_before_the_cutoff_and_spans_two_years():
    spec = spec_from_dict(_plan())
    cutoff = dt.date(2025, 6, 30)
    start, end = spec.analyses["death_30d"].cohort_window(cutoff)
    assert end == dt.date(2025, 5, 31)  # 30 days before the cut-off
    assert (end - start).days + 1 == 730  # inclusive: 730 transplant days
    assert spec.analyses["graft_1y"].cohort_window(cutoff) == (dt.date(2022, 1, 1),
                                                                dt.date(2023, 12, 31))


@pytest.mark.parametrize(("table", "pattern"), [
    ({"outcome": "deth", "horizon_days": 30}, r"analyses\.a\.outcome.*'deth'.*closest: 'death'"),
    ({"outcome": "death", "horizon_days": 30, "cohort_form": "2024-01-01"},
     r"unknown key 'analyses\.a\.cohort_form' \(closest: 'cohort_from'"),
    ({"outcome": "death"}, r"\[analyses\.a\] lacks 'horizon_days'"),
    ({"outcome": "death", "horizon_days": 0}, r"analyses\.a\.horizon_days.*positive"),
    ({"outcome": "death", "horizon_days": 30, "cohort_from": dt.date(2024, 2, 1),
      "cohort_to": dt.date(2024, 1, 1)}, r"analyses\.a\.cohort_from' \(2024-02-01\) is after"),
    ({"outcome": "death", "horizon_days": 30, "reference_from": dt.date(2021, 2, 1),
      "reference_to": dt.date(2021, 1, 1)}, r"analyses\.a\.reference_from' .* is after"),
])
def test_plan_errors_name_the_analysis_and_key(table, pattern):
    with pytest.raises(SpecError, match=pattern):
        spec_from_dict(_plan(a=table))


def test_duplicate_and_unusable_analysis_names_are_refused():
    twice = _with(analyses=[{"name": "x", "outcome": "death", "horizon_days": 30},
                            {"name": "x", "outcome": "death", "horizon_days": 365}])
    with pytest.raises(SpecError, match="analysis 'x' is declared twice"):
        spec_from_dict(twice)
    with pytest.raises(SpecError, match="'a b' may hold only letters"):
        spec_from_dict(_plan(**{"a b": {"outcome": "death", "horizon_days": 30}}))


def test_windows_are_checked_against_the_cutoff_of_the_analysis_table():
    late = _plan(a={"outcome": "death", "horizon_days": 30, "cohort_to": dt.date(2026, 1, 1)})
    late["analysis"] = {"cutoff": dt.date(2025, 6, 30)}
    with pytest.raises(SpecError, match=r"analysis 'a': 'analyses\.a\.cohort_to' \(2026-01-01\)"
                                        r" is after the cut-off 2025-06-30"):
        spec_from_dict(late)
    long = _plan(a={"outcome": "death", "horizon_days": 1095,
                    "reference_from": dt.date(2024, 1, 1), "reference_to": dt.date(2024, 6, 30)})
    long["analysis"] = {"cutoff": dt.date(2025, 6, 30)}
    with pytest.raises(SpecError, match="analysis 'a': a horizon of 1095 days cannot be "
                                        "supported"):
        spec_from_dict(long)


def test_default_window_that_cannot_exist_is_an_error_naming_the_analysis():
    spec = spec_from_dict(_plan(a={"outcome": "death", "horizon_days": 365,
                                   "cohort_from": dt.date(2025, 1, 1)}))
    with pytest.raises(SpecError, match=r"analysis 'a': the cohort window starts 2025-01-01"):
        spec.analyses["a"].cohort_window(dt.date(2025, 6, 30))
