"""Tests of the invented Lorran Valley demo network (casemix.demo).

The generator's truth is known (it is a simulation), so the outside checks here fit lifelines
(CoxPHFitter, KaplanMeierFitter; a reference library, lifelines 0.30.3) on the generated data
and compare with that truth. Nothing else of casemix is used, except the spec parser to show
that the shipped spec is valid.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import importlib.util
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from oracles import lifelines

from casemix import demo
from casemix.data.spec import load_spec
from casemix.errors import InputError
from casemix.stats.verdict import Rules, load_rules

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10 only
    import tomli as tomllib

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "lorran_valley"
EVENTS = ["graft_loss_date", "retransplant_date", "death_date"]
HARD, FAVORABLE, HIDDEN_EXCESS = "LV03", "LV04", "LV05"
RISING = demo.RISE.program
LATE = demo.LATE.program
SMALL = ("LV09", "LV14")


@pytest.fixture(scope="module")
def network() -> demo.DemoNetwork:
    return demo.generate()


def _cutoff(network: demo.DemoNetwork, role: str) -> pd.Timestamp:
    return pd.Timestamp(network.cohort_cutoff if role == "cohort" else network.reference_cutoff)


def _clean(network: demo.DemoNetwork, role: str) -> pd.DataFrame:
    frame = getattr(network, role)
    return frame[~frame["recipient_id"].isin(network.planted["recipient_id"])]


def _graft_failure(frame: pd.DataFrame, cutoff: pd.Timestamp) -> pd.DataFrame:
    """Days to the earliest failure date, or to last seen / cut-off; built here, by hand."""
    failure = frame[EVENTS].min(axis=1)
    end = frame["last_seen_date"].clip(upper=cutoff)
    event = failure.notna() & (failure <= end)
    stop = failure.where(event, end)
    return pd.DataFrame(
        {"time": (stop - frame["transplant_date"]).dt.days, "event": event.astype(int)},
        index=frame.index,
    )


def _one_year_failure(outcome: pd.DataFrame) -> float:
    km = lifelines().KaplanMeierFitter().fit(outcome["time"], outcome["event"])
    return 1.0 - float(km.survival_function_at_times(365).iloc[0])


def _simple_encoding(frame: pd.DataFrame) -> pd.DataFrame:
    """The covariates coded by hand, one column per true term of the simulation."""
    return pd.DataFrame(
        {
            "recipient_age": frame["recipient_age"].astype(float),
            "recipient_sex[male]": (frame["recipient_sex"] == "male").astype(float),
            "bmi": frame["bmi"],
            "diabetes": frame["diabetes"].astype("float64"),
            "dialysis_years": frame["dialysis_years"],
            "previous_transplant": frame["previous_transplant"].astype(float),
            "cpra": frame["cpra"].astype(float),
            "donor_type[living]": (frame["donor_type"] == "living").astype(float),
            "donor_age": frame["donor_age"].astype(float),
            "donor_age_over_50": np.maximum(frame["donor_age"] - 50.0, 0.0),
            "cold_ischaemia_hours": frame["cold_ischaemia_hours"],
            "hla_mismatches": frame["hla_mismatches"].astype(float),
        },
        index=frame.index,
    )


# --- determinism and files ----------------------------------------------------------------


def test_same_seed_same_data_other_seed_other_data(network):
    again = demo.generate(2026)
    for role in ("reference", "cohort", "truth", "planted"):
        pd.testing.assert_frame_equal(getattr(network, role), getattr(again, role))
    other = demo.generate(7)
    assert not other.cohort["transplant_date"].equals(network.cohort["transplant_date"])


def test_write_demo_gives_identical_bytes_on_reruns(tmp_path):
    first = demo.write_demo(tmp_path / "a")
    second = demo.write_demo(tmp_path / "b")
    assert {k: p.name for k, p in first.items()} == {
        "reference": "reference.csv", "cohort": "cohort.csv",
        "spec": "spec.toml", "rules": "rules.toml",
    }
    for role, path in first.items():
        assert path.read_bytes() == second[role].read_bytes(), role
    # Rewriting into the same folder replaces the files and leaves no temporary files.
    demo.write_demo(tmp_path / "a")
    assert sorted(p.name for p in (tmp_path / "a").iterdir()) == sorted(
        p.name for p in first.values()
    )


def test_csv_reads_back_to_the_frame(network, tmp_path):
    paths = demo.write_demo(tmp_path)
    back = pd.read_csv(paths["cohort"], parse_dates=list(demo.COLUMNS[2:7]), dtype={
        "diabetes": "Int64"})
    pd.testing.assert_frame_equal(back, network.cohort, check_dtype=False)
    text = paths["cohort"].read_text(encoding="utf-8")
    assert text.splitlines()[0] == ",".join(demo.COLUMNS)
    assert "NaT" not in text and "nan" not in text.lower()  # missing values are empty fields


def test_dates_are_built_without_a_float_cast_and_equal_pandas_own_dates():
    # Reference: pandas' own Timestamp + Timedelta arithmetic, one date at a time, in the unit
    # pandas gives the dates it parses. Not pandas.to_datetime(float days, unit="D"): that cast
    # itself can raise a FloatingPointError from uninitialised scratch memory, the very
    # failure the demo avoids. The demo's dates are whole days with NaN for "no date".
    rng = np.random.default_rng(3)
    days = rng.integers(16_000, 20_500, size=2_000).astype(float)
    days[rng.random(days.size) < 0.3] = np.nan
    ours = pd.DatetimeIndex(demo._dates(days))
    epoch = pd.Timestamp("1970-01-01")
    theirs = pd.DatetimeIndex(
        [pd.NaT if np.isnan(d) else epoch + pd.Timedelta(days=int(d)) for d in days]
    ).as_unit(pd.to_datetime(["2020-01-01"]).unit)
    pd.testing.assert_index_equal(ours, theirs)
    assert ours.isna().sum() == np.isnan(days).sum() > 0
    with np.errstate(all="raise"):  # no floating-point step that could raise
        demo._dates(days)


def test_write_demo_refuses_a_file_as_folder(tmp_path):
    target = tmp_path / "taken"
    target.write_text("x", encoding="utf-8")
    with pytest.raises(InputError, match=r"demo output folder '.*taken' is an existing file"):
        demo.write_demo(target)


@pytest.mark.parametrize("seed", [-1, 2.5, "2026", True])
def test_bad_seed_is_an_input_error(seed):
    with pytest.raises(InputError, match=r"demo seed must be a non-negative whole number"):
        demo.generate(seed)


def test_example_files_are_the_packaged_ones(network):
    assert (EXAMPLE / "spec.toml").read_text(encoding="utf-8") == network.spec_text
    assert (EXAMPLE / "rules.toml").read_text(encoding="utf-8") == network.rules_text


def test_regenerate_script_writes_what_write_demo_writes(tmp_path):
    module_spec = importlib.util.spec_from_file_location("regenerate", EXAMPLE / "regenerate.py")
    module = importlib.util.module_from_spec(module_spec)
    module_spec.loader.exec_module(module)
    module.main(["--out", str(tmp_path / "script")])
    expected = demo.write_demo(tmp_path / "library")
    for path in expected.values():
        assert (tmp_path / "script" / path.name).read_bytes() == path.read_bytes()


# --- spec and rules -----------------------------------------------------------------------


def test_spec_is_valid_and_names_extract_columns(network, tmp_path):
    spec = load_spec(demo.write_demo(tmp_path)["spec"])
    kinds = {c.name: (c.kind, c.missing, c.reference, c.lower, c.upper) for c in spec.covariates}
    assert kinds == {  # the covariate list of the demo's brief
        "recipient_age": ("numeric", "exclude", None, 18, 90),
        "recipient_sex": ("categorical", "exclude", "female", None, None),
        "bmi": ("numeric", "median", None, 12, 60),
        "diabetes": ("binary", "indicator", None, None, None),
        "dialysis_years": ("numeric", "indicator", None, 0, 30),
        "previous_transplant": ("binary", "exclude", None, None, None),
        "cpra": ("numeric", "exclude", None, 0, 100),
        "donor_type": ("categorical", "exclude", "deceased", None, None),
        "donor_age": ("spline", "exclude", None, 0, 90),
        "cold_ischaemia_hours": ("numeric", "indicator", None, 0, 72),
        "hla_mismatches": ("numeric", "exclude", None, 0, 6),
    }
    assert spec.covariate("donor_age").knots == 4
    assert spec.outcome("graft_failure").dates == tuple(EVENTS)
    assert spec.outcome("death").dates == ("death_date",)
    assert spec.analysis.horizon_days == 365
    assert set(spec.required_columns) <= set(network.cohort.columns)


def test_rules_file_has_the_verdict_prior_and_monitoring_tables(network):
    rules = tomllib.loads(network.rules_text)
    assert rules == {"verdict": {"probability": 0.975, "upper_margin": 1.0,
                                 "lower_margin": 1.0, "min_expected": 1.0,
                                 "credible_level": 0.95, "power": 0.8, "bayesian_fdr": 0.0},
                     "prior": {"method": "hierarchical", "free_mean": False,
                               "hyperprior": {
                                   "spread": {"distribution": "halfcauchy", "scale": 0.25},
                                   "mean": {"distribution": "lognorm", "s": 1.0,
                                            "scale": 1.0}}},
                     "monitoring": {"rho_up": 2.0, "rho_down": 0.5, "level": 0.05,
                                    "restart": True, "replicates": 1000, "seed": 2026}}
    # the file states the defaults: reading it gives the default rules
    assert rules_from_toml(network.rules_text) == Rules()


def rules_from_toml(text):
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "rules.toml"
        path.write_text(text, encoding="utf-8")
        return load_rules(path)


# --- shape of the extracts ----------------------------------------------------------------


def test_sizes_programs_and_ids(network):
    assert 19_000 <= len(network.reference) <= 21_000
    assert 4_700 <= len(network.cohort) <= 5_300
    for role in ("reference", "cohort"):
        frame = getattr(network, role)
        assert tuple(frame.columns) == demo.COLUMNS
        assert set(frame["program"].dropna()) == {f"LV{i:02d}" for i in range(1, 17)}
    ids = pd.concat([network.reference["recipient_id"], network.cohort["recipient_id"]])
    assert ids.is_unique and ids.str.fullmatch(r"R\d{6}").all()
    sizes = network.cohort["program"].value_counts()
    assert sizes.max() >= 600 and sizes.min() <= 80  # sizes vary a lot
    assert sorted(sizes[sizes <= 80].index) == list(SMALL)
    assert all(60 <= sizes[p] <= 80 for p in SMALL)


def test_truth_table(network):
    truth = network.truth.set_index("program")
    assert list(network.truth.columns) == [
        "program", "true_hr", "recipients_reference", "recipients_cohort", "story",
        "reference_hr", "rise_from", "rise_factor", "late_from_day", "late_factor",
    ]
    for role in ("reference", "cohort"):
        counts = getattr(network, role)["program"].value_counts()
        assert truth[f"recipients_{role}"].to_dict() == counts.to_dict()
    assert truth.loc[HARD, "true_hr"] == 1.0
    assert truth.loc[FAVORABLE, "true_hr"] == 0.6
    assert truth.loc[HIDDEN_EXCESS, "true_hr"] == 1.6
    rest = truth.drop([HARD, FAVORABLE, HIDDEN_EXCESS, *SMALL])
    assert rest["true_hr"].between(0.85, 1.2).all()
    # Reference effects are milder and average to 1 over the reference population.
    assert (np.abs(np.log(truth["reference_hr"])) <= np.abs(np.log(truth["true_hr"])) + 0.01).all()
    weights = truth["recipients_reference"]
    assert abs(np.average(np.log(truth["reference_hr"]), weights=weights)) < 1e-3
    assert truth["story"].str.len().gt(20).all()
    rising = truth[truth["rise_factor"] != 1.0]
    assert list(rising.index) == [RISING] and rising["rise_factor"].item() == 2.0
    assert rising["rise_from"].item() == demo.RISE.start.isoformat()
    late = truth[truth["late_factor"] != 1.0]
    assert list(late.index) == [LATE] and late["late_factor"].item() == 4.0
    assert late["late_from_day"].item() == demo.LATE.after_days == 365
    assert truth["late_from_day"].drop(LATE).isna().all()


def test_windows_and_cutoffs(network):
    assert network.reference_window == (dt.date(2017, 1, 1), dt.date(2021, 12, 31))
    assert network.cohort_window == (dt.date(2022, 1, 1), dt.date(2024, 12, 31))
    assert network.reference_cutoff == dt.date(2022, 12, 31)
    assert network.cohort_cutoff == dt.date(2025, 6, 30)
    for role, (start, end) in (("reference", network.reference_window),
                               ("cohort", network.cohort_window)):
        dates = _clean(network, role)["transplant_date"]
        assert dates.between(pd.Timestamp(start), pd.Timestamp(end)).all()
        assert dates.min() - pd.Timestamp(start) < pd.Timedelta(days=10)
        assert pd.Timestamp(end) - dates.max() < pd.Timedelta(days=10)


def test_missingness_rates(network):
    both = pd.concat([network.reference, network.cohort], ignore_index=True)
    rates = both.isna().mean()
    # Targets of the demo brief: bmi ~3%, diabetes ~2%, dialysis ~5%, cold ischaemia ~4%.
    assert 0.025 <= rates["bmi"] <= 0.035
    assert 0.015 <= rates["diabetes"] <= 0.025
    assert 0.04 <= rates["dialysis_years"] <= 0.06
    assert 0.035 <= rates["cold_ischaemia_hours"] <= 0.045
    complete = ["recipient_id", "transplant_date", "last_seen_date", "recipient_age",
                "recipient_sex", "previous_transplant", "cpra", "donor_type", "donor_age",
                "hla_mismatches"]
    assert rates[complete].eq(0).all()
    by_program = both["dialysis_years"].isna().groupby(both["program"]).mean()
    assert sorted(by_program[by_program > 0.10].index) == ["LV07", "LV12"]


def test_realistic_correlations(network):
    frame = network.reference
    living = frame["donor_type"] == "living"
    cold = frame["cold_ischaemia_hours"]
    assert cold[living].median() < 4 < 10 < cold[~living].median()
    assert frame.loc[living, "donor_age"].mean() < frame.loc[~living, "donor_age"].mean() - 3
    assert 0.2 <= living.mean() <= 0.45
    diabetes = frame["diabetes"].astype("float64")
    assert diabetes[frame["recipient_age"] >= 60].mean() > 1.5 * diabetes[
        frame["recipient_age"] < 40].mean()
    previous = frame["previous_transplant"] == 1
    assert frame.loc[previous, "cpra"].mean() > 2 * frame.loc[~previous, "cpra"].mean()
    assert frame["hla_mismatches"].between(0, 6).all()


# --- planted problems and date consistency --------------------------------------------------


def _problem_present(row: pd.Series, problem: str, cutoff: pd.Timestamp) -> bool:
    checks = {
        "event_before_transplant": lambda: row["graft_loss_date"] < row["transplant_date"],
        "last_seen_before_transplant": lambda: row["last_seen_date"] < row["transplant_date"],
        "missing_program": lambda: pd.isna(row["program"]),
        "implausible_age": lambda: not 18 <= row["recipient_age"] <= 90,
        "transplant_after_cutoff": lambda: row["transplant_date"] > cutoff,
        "death_after_last_seen": lambda: row["death_date"] > row["last_seen_date"],
        "last_seen_after_cutoff": lambda: row["last_seen_date"] > cutoff,
    }
    return bool(checks[problem]())


def test_planted_records_are_present(network):
    planted = network.planted
    assert 10 <= (planted["role"] == "cohort").sum() <= 20
    assert 1 <= (planted["role"] == "reference").sum() <= 10
    assert planted["recipient_id"].is_unique
    for role in ("reference", "cohort"):
        frame = getattr(network, role).set_index("recipient_id")
        mine = planted[planted["role"] == role]
        assert mine["problem"].nunique() == 7
        for rid, problem in zip(mine["recipient_id"], mine["problem"], strict=True):
            assert _problem_present(frame.loc[rid], problem, _cutoff(network, role)), rid


def test_event_dates_consistent_outside_planted_records(network):
    for role in ("reference", "cohort"):
        frame, cutoff = _clean(network, role), _cutoff(network, role)
        transplant, seen = frame["transplant_date"], frame["last_seen_date"]
        assert (seen >= transplant).all() and (seen <= cutoff).all()
        for column in EVENTS:
            date = frame[column].dropna()
            assert (date >= transplant[date.index]).all(), column
            assert (date <= seen[date.index]).all(), column
        dead = frame["death_date"].notna()
        assert (frame.loc[dead, "death_date"] == seen[dead]).all()
        both = frame["graft_loss_date"].notna() & frame["retransplant_date"].notna()
        assert (frame.loc[both, "retransplant_date"] > frame.loc[both, "graft_loss_date"]).all()
        assert frame["recipient_age"].between(18, 90).all()


def test_lost_to_followup_share(network):
    for role in ("reference", "cohort"):
        frame, cutoff = _clean(network, role), _cutoff(network, role)
        early = (frame["last_seen_date"] < cutoff - pd.Timedelta(days=90)) & frame[
            "death_date"].isna()
        assert 0.02 <= early.mean() <= 0.04  # the brief's ~3% lost to follow-up


# --- outcomes: calibration and recovery of the truth ----------------------------------------


def test_one_and_three_year_graft_failure(network):
    outcome = _graft_failure(_clean(network, "reference"), _cutoff(network, "reference"))
    km = lifelines().KaplanMeierFitter().fit(outcome["time"], outcome["event"])
    one, three = 1.0 - km.survival_function_at_times([365, 1095]).to_numpy()
    # Design targets of the scenario (the brief): one-year 6-10%, three-year 15-20%.
    assert 0.06 <= one <= 0.10
    assert 0.15 <= three <= 0.20


def test_lifelines_cox_recovers_true_covariate_effects(network):
    frame = _clean(network, "reference")
    data = _simple_encoding(frame).join(_graft_failure(frame, _cutoff(network, "reference")))
    data = data.assign(program=frame["program"]).dropna()
    # Reference library: lifelines CoxPHFitter (Efron ties), stratified by program so that
    # the programs' own hazard ratios do not leak into the covariate effects.
    fit = lifelines().CoxPHFitter().fit(data, "time", "event", strata=["program"])
    truth = pd.Series(dict(demo.TRUE_LOG_HAZARD_RATIOS))
    z = (fit.params_[truth.index] - truth) / fit.standard_errors_[truth.index]
    assert z.abs().max() < 3.5, z.round(2).to_dict()
    # Precise enough to mean something: every effect but the two weakest is told from zero.
    strong = truth.drop(["recipient_sex[male]", "donor_age"]).index
    assert (fit.params_[strong].abs() / fit.standard_errors_[strong]).min() > 3


def test_lifelines_cox_recovers_program_hazard_ratios(network):
    frame = _clean(network, "cohort")
    programs = pd.get_dummies(frame["program"], dtype=float).drop(columns="LV01")
    data = _simple_encoding(frame).join(programs)
    data = data.join(_graft_failure(frame, _cutoff(network, "cohort"))).dropna()
    # Reference library: lifelines CoxPHFitter; LV01 (true HR 1.0) is the reference program.
    # The rising and the late programs' hazard ratios change in time (see the next tests).
    fit = lifelines().CoxPHFitter().fit(data, "time", "event")
    truth = np.log(network.truth.set_index("program")["true_hr"].drop(["LV01", RISING, LATE]))
    z = (fit.params_[truth.index] - truth) / fit.standard_errors_[truth.index]
    assert z.abs().max() < 3.0, z.round(2).to_dict()
    assert fit.params_[HIDDEN_EXCESS] - 2 * fit.standard_errors_[HIDDEN_EXCESS] > 0
    assert fit.params_[FAVORABLE] + 2 * fit.standard_errors_[FAVORABLE] < 0


def test_rising_program_doubles_its_hazard_from_the_rise_date(network):
    """Follow-up split at the rise date (counting process, delayed entry after it); a Cox
    fit (lifelines CoxPHFitter, entry_col) of the clean cohort with the generator's
    covariates, program terms, and a term for the rising program after its rise."""
    frame = _clean(network, "cohort")
    outcome = _graft_failure(frame, _cutoff(network, "cohort"))
    covariates = _simple_encoding(frame).assign(program=frame["program"]).join(outcome)
    covariates = covariates.dropna()
    rise = (pd.Timestamp(demo.RISE.start) - frame["transplant_date"]).dt.days
    rise = rise.loc[covariates.index]
    fit = _split_fit(covariates, rise.clip(lower=0), RISING, "rising_after")
    # truth: the program's hazard ratio is true_hr before the rise and twice that after it
    true_hr = network.truth.set_index("program").loc[RISING, "true_hr"]
    z_before = (fit.params_[RISING] - np.log(true_hr)) / fit.standard_errors_[RISING]
    z_rise = (fit.params_["rising_after"] - np.log(2.0)) / fit.standard_errors_["rising_after"]
    assert abs(z_before) < 3.0 and abs(z_rise) < 3.0, (z_before, z_rise)
    assert fit.params_["rising_after"] - 2 * fit.standard_errors_["rising_after"] > 0


def test_late_program_quadruples_its_hazard_after_the_first_year(network):
    """Follow-up split at day 365 after each transplant (counting process, delayed entry); a
    Cox fit (lifelines CoxPHFitter, entry_col) of the clean cohort with the generator's
    covariates, program terms, and a term for the late program after day 365."""
    frame = _clean(network, "cohort")
    outcome = _graft_failure(frame, _cutoff(network, "cohort"))
    covariates = _simple_encoding(frame).assign(program=frame["program"]).join(outcome)
    covariates = covariates.dropna()
    # (the rising program's change in calendar time is not modelled: only the late
    # program's terms are checked)
    fit = _split_fit(covariates, float(demo.LATE.after_days), LATE, "late_after")
    # truth: the program's hazard ratio is true_hr in the first year, four times that later
    true_hr = network.truth.set_index("program").loc[LATE, "true_hr"]
    z_first = (fit.params_[LATE] - np.log(true_hr)) / fit.standard_errors_[LATE]
    z_late = (fit.params_["late_after"] - np.log(demo.LATE.factor)) / fit.standard_errors_[
        "late_after"]
    assert abs(z_first) < 3.0 and abs(z_late) < 3.0, (z_first, z_late)
    assert fit.params_["late_after"] - 2 * fit.standard_errors_["late_after"] > 0


@pytest.mark.parametrize("story", ["RISE", "LATE"])
def test_each_planted_change_leaves_every_other_record_as_it_was(network, monkeypatch, story):
    """The records drawn without the rise (or without the late excess) are the same except
    that program's later graft-loss dates; its own generator is the only thing that differs."""
    change = getattr(demo, story)
    monkeypatch.setattr(demo, story, dataclasses.replace(change, factor=1.0))
    without = demo.generate()
    monkeypatch.undo()
    pd.testing.assert_frame_equal(without.reference, network.reference)
    # compared as text, a missing value as "-" (pandas 3 refuses a number as a text column's fill)
    changed = (without.cohort.astype(str).where(without.cohort.notna(), "-")
               != network.cohort.astype(str).where(network.cohort.notna(), "-"))
    rows = changed.any(axis=1)
    assert rows.sum() > 10
    assert set(network.cohort.loc[rows, "program"]) == {change.program}
    assert list(changed.columns[changed.any()]) == ["graft_loss_date"]
    loss = network.cohort.loc[rows, "graft_loss_date"]
    if story == "RISE":
        assert (loss >= pd.Timestamp(demo.RISE.start)).all()
    else:
        days = (loss - network.cohort.loc[rows, "transplant_date"]).dt.days
        assert (days >= demo.LATE.after_days).all()


def test_raw_one_year_failure_tells_the_stories(network):
    frame = _clean(network, "cohort")
    outcome = _graft_failure(frame, _cutoff(network, "cohort"))
    network_rate = _one_year_failure(outcome)
    rate = {p: _one_year_failure(outcome[frame["program"] == p])
            for p in (HARD, FAVORABLE, HIDDEN_EXCESS)}
    assert rate[HARD] > network_rate + 0.03  # poor raw survival ...
    assert rate[FAVORABLE] < network_rate - 0.02
    # ... while the true-HR-1.6 program looks like the network before case-mix adjustment.
    assert abs(rate[HIDDEN_EXCESS] - network_rate) < 0.02
    profile = frame.groupby("program").agg(
        age=("recipient_age", "mean"), donor=("donor_age", "mean"),
        living=("donor_type", lambda s: (s == "living").mean()),
        diabetes=("diabetes", "mean"),
    )
    mean = profile.mean()
    hard, easy = profile.loc[HARD], profile.loc[HIDDEN_EXCESS]
    assert hard["age"] > mean["age"] + 3 and hard["donor"] > mean["donor"] + 3
    assert hard["diabetes"] > mean["diabetes"] + 0.1 and hard["living"] < mean["living"] - 0.1
    assert easy["age"] < mean["age"] - 5 and easy["living"] > mean["living"] + 0.2


def test_patient_death_dates_include_deaths_after_graft_loss(network):
    frame = _clean(network, "reference")
    after_loss = frame["death_date"] > frame["graft_loss_date"]
    with_graft = frame["death_date"].notna() & frame["graft_loss_date"].isna() & frame[
        "retransplant_date"].isna()
    assert after_loss.sum() > 50 and with_graft.sum() > 300


def _split_fit(covariates: pd.DataFrame, change, program: str, term: str):
    """Lifelines Cox fit with each follow-up split at ``change`` (days after transplant, one
    value or one per recipient), delayed entry for the second piece, and a 0/1 ``term`` for
    ``program`` after the change."""
    before = covariates.assign(entry=0.0, stop=np.minimum(covariates["time"], change),
                               after=0.0)
    before["event"] = before["event"] * (covariates["time"] <= before["stop"])
    later = covariates["time"] > change
    after = covariates[later].assign(
        entry=change[later] if isinstance(change, pd.Series) else change,
        stop=covariates["time"], after=1.0)
    pieces = pd.concat([before, after])
    pieces = pieces[pieces["stop"] > pieces["entry"]]
    pieces[term] = pieces["after"] * (pieces["program"] == program)
    dummies = pd.get_dummies(pieces["program"], dtype=float).drop(columns="LV01")
    data = pieces.drop(columns=["program", "time", "after"]).join(dummies)
    return lifelines().CoxPHFitter().fit(data, "stop", "event", entry_col="entry")
