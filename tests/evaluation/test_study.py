"""Tests of the study plan run (casemix.evaluation.study) on the invented demo network.

Each analysis of a plan run must give exactly the numbers of the equivalent single run
(fit_reference + evaluate with the same windows), whose own checks against lifelines,
statsmodels and scipy are in tests/model and tests/evaluation; the demo's late-excess
program is the generator's known truth (casemix.demo.LATE).
"""

from __future__ import annotations

import copy
import datetime as dt
import json
import warnings

import pandas as pd
import pytest

from casemix import demo, evaluate, fit_reference, read_records
from casemix.data.spec import spec_from_dict
from casemix.errors import CasemixWarning, DataWarning, InputError, SpecError
from casemix.evaluation.evaluate import PROGRAM_COLUMNS, Evaluation
from casemix.evaluation.study import Study, evaluate_plan
from casemix.model.plan import fit_plan

ANALYSES = ["graft_30d", "death_30d", "graft_1y", "death_1y", "graft_3y", "death_3y"]


@pytest.fixture(scope="module")
def paths(tmp_path_factory):
    return demo.write_demo(tmp_path_factory.mktemp("study"))


@pytest.fixture(scope="module")
def reference(paths):
    return read_records(paths["reference"], paths["spec"], cutoff=demo.REFERENCE_CUTOFF)


@pytest.fixture(scope="module")
def cohort(paths):
    return read_records(paths["cohort"], paths["spec"], cutoff=demo.COHORT_CUTOFF)


@pytest.fixture(scope="module")
def models(reference, tmp_path_factory):
    return fit_plan(reference).save(tmp_path_factory.mktemp("models") / "models")


@pytest.fixture(scope="module")
def study(cohort, models, paths) -> Study:
    with warnings.catch_warnings():
        warnings.simplefilter("error", CasemixWarning)  # the demo plan warns of nothing
        return evaluate_plan(cohort, models, paths["rules"])


@pytest.fixture(scope="module")
def saved(study, tmp_path_factory):
    return study.save(tmp_path_factory.mktemp("out") / "study")


def test_the_demo_plan_has_the_six_analyses(study):
    assert list(study) == ANALYSES and len(study) == 6
    windows = {name: study[name].run["analysis"]["cohort_window"] for name in study}
    assert windows["graft_30d"] == ["2023-06-02", "2025-05-31"]  # the default
    assert windows["graft_1y"] == ["2022-01-01", "2024-12-31"]
    assert windows["death_3y"] == ["2022-01-01", "2022-12-31"]


@pytest.mark.parametrize("name", ANALYSES)
def test_each_analysis_gives_exactly_the_numbers_of_the_single_run(
        name, study, reference, cohort, paths, saved, tmp_path):
    planned = cohort.spec.analyses[name]
    model = fit_reference(reference, reference.spec, planned.outcome, planned.horizon_days,
                          demo.REFERENCE_CUTOFF, window=planned.reference_window)
    with warnings.catch_warnings():
        # the single run warns that its window leaves out most of the extract (the plan
        # run, whose extract serves every window, does not)
        warnings.simplefilter("ignore", DataWarning)
        single = evaluate(cohort, model, paths["rules"], cutoff=demo.COHORT_CUTOFF,
                          window=planned.cohort_window(demo.COHORT_CUTOFF))
    pd.testing.assert_frame_equal(study[name].programs, single.programs, check_exact=True)
    pd.testing.assert_frame_equal(study[name].recipients, single.recipients, check_exact=True)
    single.save(tmp_path / "single")
    for table in ("programs.csv", "recipients.csv", "curves.csv", "casemix.csv"):
        assert (saved / name / table).read_bytes() == (tmp_path / "single" / table).read_bytes()


def test_late_program_is_fine_at_30_days_and_has_excess_failures_at_three_years(study):
    # Generator truth (casemix.demo.LATE): LV08's graft failures are four times as frequent
    # from a year after each transplant on, as the others' before that.
    verdicts = study.overview.set_index(["analysis", "program"])["verdict"]
    assert verdicts["graft_30d", demo.LATE.program] == "consistent"
    assert verdicts["graft_1y", demo.LATE.program] == "consistent"
    assert verdicts["graft_3y", demo.LATE.program] == "excess"


def test_overview_is_one_row_per_analysis_and_program_in_stable_order(study, saved):
    overview = study.overview
    assert list(overview.columns) == ["analysis", *PROGRAM_COLUMNS]
    assert list(overview["analysis"].unique()) == ANALYSES
    assert len(overview) == 16 * 6
    for name in ANALYSES:
        part = overview[overview["analysis"] == name].drop(columns="analysis")
        pd.testing.assert_frame_equal(part.reset_index(drop=True), study[name].programs)
    read = pd.read_csv(saved / "overview.csv")
    assert list(read["analysis"]) == list(overview["analysis"])


def test_study_folder_has_a_folder_per_analysis_and_the_study_files(saved, models):
    assert sorted(p.name for p in saved.iterdir()) == sorted(
        [*ANALYSES, "overview.csv", "recipients.csv", "study.json"])
    run = json.loads((saved / "graft_3y" / "run.json").read_text(encoding="utf-8"))
    assert run["window"] == ["2022-01-01", "2022-12-31"]
    entry = run["analysis"]
    assert entry["cohort_window"] == run["window"]
    assert entry["cohort_window_source"] == {"cohort_from": "spec", "cohort_to": "spec"}
    assert entry["reference_window"] == ["2017-01-01", "2021-12-31"]
    assert entry["reference_overlaps_cohort"] is False
    assert run["inputs"]["model"]["path"] == str(models.folder / "graft_failure_1095d.json")
    facts = json.loads((saved / "study.json").read_text(encoding="utf-8"))
    assert [a["folder"] for a in facts["analyses"]] == ANALYSES
    assert facts["cutoff"] == "2025-06-30"


def test_membership_of_each_cohort_is_traceable_from_recipients_csv(study, saved, cohort):
    members = pd.read_csv(saved / "recipients.csv", dtype={"recipient": str})
    assert list(members.columns[:3]) == ["recipient", "program", "transplant_date"]
    assert list(members.columns[3:]) == ANALYSES
    assert len(members) == len(cohort.frame)
    for name in ANALYSES:
        inside = pd.read_csv(saved / name / "recipients.csv", dtype={"recipient": str})
        assert set(members.loc[members[name] == 1, "recipient"]) == set(inside["recipient"])
        start, end = study[name].run["analysis"]["cohort_window"]
        dates = members.loc[members[name] == 1, "transplant_date"]
        assert dates.between(start, end).all()


def test_saving_again_removes_an_analysis_no_longer_planned(study, tmp_path):
    folder = study.save(tmp_path / "study")
    fewer = Study({"graft_1y": study["graft_1y"]}, study.membership[
        ["recipient", "program", "transplant_date", "graft_1y"]],
        {**study.run, "analyses": [a for a in study.run["analyses"] if a["folder"] == "graft_1y"]})
    fewer.save(folder)
    assert sorted(p.name for p in folder.iterdir()) == [
        "graft_1y", "overview.csv", "recipients.csv", "study.json"]


def test_a_folder_of_other_files_is_refused(study, tmp_path):
    (tmp_path / "notes.txt").write_text("mine\n", encoding="utf-8")
    with pytest.raises(InputError, match="is not empty"):
        study.save(tmp_path)


def test_unknown_analysis_names_the_closest(study):
    with pytest.raises(KeyError, match="closest: 'graft_1y'"):
        study["graft_1yr"]


def _plan_models(reference, analyses: dict):
    d = copy.deepcopy(reference.spec.to_dict())
    d["analyses"] = analyses
    return fit_plan(reference, spec_from_dict(d))


def test_overlapping_reference_and_cohort_windows_are_warned_and_recorded(reference, cohort):
    models = _plan_models(reference, {"both": {
        "outcome": "death", "horizon_days": 30, "cohort_from": dt.date(2021, 7, 1),
        "cohort_to": dt.date(2024, 12, 31)}})
    with pytest.warns(DataWarning, match=r"analysis 'both': the reference window \(open to "
                                         r"2022-12-31\) overlaps the cohort window"):
        result = evaluate_plan(cohort, models)
    assert result["both"].run["analysis"]["reference_overlaps_cohort"] is True
    assert result.run["analyses"][0]["reference_overlaps_cohort"] is True


def test_a_cohort_window_after_the_cutoff_names_the_analysis(reference, cohort):
    models = _plan_models(reference, {"future": {
        "outcome": "death", "horizon_days": 30, "cohort_to": dt.date(2025, 12, 31)}})
    with pytest.raises(SpecError, match=r"analysis 'future': 'analyses\.future\.cohort_to'"):
        evaluate_plan(cohort, models)


def test_an_empty_cohort_names_the_analysis(reference, cohort):
    models = _plan_models(reference, {"none": {
        "outcome": "death", "horizon_days": 30, "cohort_from": dt.date(2021, 1, 1),
        "cohort_to": dt.date(2021, 6, 30), "reference_to": dt.date(2020, 12, 31)}})
    with pytest.raises(InputError, match="analysis 'none': no recipient"):
        evaluate_plan(cohort, models)


def test_load_gives_back_the_saved_study(study, saved):
    loaded = Study.load(saved)
    assert list(loaded) == ANALYSES
    assert loaded.run == json.loads((saved / "study.json").read_text(encoding="utf-8"))
    for name in ANALYSES:  # Evaluation.load reads counts back as floats
        one = Evaluation.load(saved / name)
        pd.testing.assert_frame_equal(loaded[name].programs, one.programs, check_exact=True)
        pd.testing.assert_frame_equal(loaded[name].programs, study[name].programs,
                                      check_exact=True, check_dtype=False)
        assert loaded[name].run == study[name].run
    pd.testing.assert_frame_equal(loaded.overview, study.overview, check_exact=True,
                                  check_dtype=False)
    pd.testing.assert_frame_equal(loaded.membership, study.membership, check_dtype=False)


def test_load_names_the_folder_and_the_file_it_cannot_read(saved, tmp_path):
    with pytest.raises(InputError, match=r"no study\.json, so this is not a study folder"):
        Study.load(saved / "graft_1y")
    broken = tmp_path / "broken"
    broken.mkdir()
    (broken / "study.json").write_text("{", encoding="utf-8")
    with pytest.raises(InputError, match=r"broken/study.json: not valid JSON"):
        Study.load(broken)
    (broken / "study.json").write_text(json.dumps({"analyses": [{"folder": "graft_1y"}]}),
                                       encoding="utf-8")
    with pytest.raises(InputError, match=r"analysis 'graft_1y' of .*broken/study.json: .*"
                                         r"broken/graft_1y: not a folder"):
        Study.load(broken)
