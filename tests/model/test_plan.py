"""Tests of the study plan's reference models: shared fits, the models folder and its index.

Each model of the plan must be exactly what the single fit gives (fit_reference, whose own
checks against lifelines and statsmodels are in tests/model/test_reference.py); the data are
the invented demo network.
"""

from __future__ import annotations

import copy
import datetime as dt
import json

import numpy as np
import pytest

from casemix import demo, read_records
from casemix.data.spec import spec_from_dict
from casemix.errors import InputError, ModelFileError, SpecError
from casemix.model.plan import INDEX_FILE, PlanModels, fit_plan
from casemix.model.reference import fit_reference

REFERENCE = (dt.date(2017, 1, 1), dt.date(2021, 12, 31))


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    paths = demo.write_demo(tmp_path_factory.mktemp("plan"))
    return read_records(paths["reference"], paths["spec"], cutoff=demo.REFERENCE_CUTOFF)


def _spec(reference, analyses: dict):
    d = copy.deepcopy(reference.spec.to_dict())
    d["analyses"] = analyses
    return spec_from_dict(d)


def _analysis(outcome: str, horizon: int, window=REFERENCE) -> dict:
    return {"outcome": outcome, "horizon_days": horizon, "reference_from": window[0],
            "reference_to": window[1]}


@pytest.fixture(scope="module")
def small_plan(reference):
    """Two analyses share one model (same outcome, horizon and reference window)."""
    return _spec(reference, {
        "death_1y": _analysis("death", 365),
        "death_1y_recent": {**_analysis("death", 365), "cohort_from": dt.date(2024, 1, 1)},
        "graft_30d": _analysis("graft_failure", 30),
    })


@pytest.fixture(scope="module")
def models(reference, small_plan):
    return fit_plan(reference, small_plan)


def test_each_model_is_the_single_fit_and_equal_fits_are_shared(reference, small_plan, models):
    assert list(models) == ["death_1y", "death_1y_recent", "graft_30d"]
    assert models["death_1y"] is models["death_1y_recent"]
    assert models.files["death_1y"] == models.files["death_1y_recent"] == "death_365d.json"
    single = fit_reference(reference, small_plan, "graft_failure", 30, demo.REFERENCE_CUTOFF,
                           window=REFERENCE)
    plan = models["graft_30d"]
    assert plan.fingerprint == single.fingerprint
    np.testing.assert_array_equal(plan.fit.coef, single.fit.coef)
    assert plan.to_dict() == single.to_dict()


def test_progress_is_called_once_per_fit(reference, small_plan):
    seen = []
    fit_plan(reference, small_plan, progress=seen.append)
    assert seen == ["fitting death_1y", "fitting graft_30d"]


def test_saved_folder_has_one_file_per_model_and_an_index(models, tmp_path):
    saved = models.save(tmp_path / "models")
    assert saved.folder == tmp_path / "models"
    assert sorted(p.name for p in saved.folder.iterdir()) == [
        "death_365d.json", "graft_failure_30d.json", INDEX_FILE]
    index = json.loads((saved.folder / INDEX_FILE).read_text(encoding="utf-8"))
    assert index["format_version"] == 1
    entry = index["analyses"][2]
    assert entry["analysis"] == "graft_30d" and entry["model"] == "graft_failure_30d.json"
    assert entry["reference_window"] == ["2017-01-01", "2021-12-31"]
    assert entry["reference_cutoff"] == "2022-12-31"
    assert entry["fingerprint"] == models["graft_30d"].fingerprint
    back = PlanModels.load(saved.folder)
    assert list(back) == list(models) and back.spec == models.spec
    assert back["death_1y"] is back["death_1y_recent"]
    assert back["graft_30d"].to_dict() == models["graft_30d"].to_dict()


def test_a_changed_model_file_is_refused(models, tmp_path):
    folder = models.save(tmp_path / "models").folder
    path = folder / "death_365d.json"
    path.write_text(path.read_text(encoding="utf-8") + " ", encoding="utf-8")
    with pytest.raises(ModelFileError, match=r"death_365d\.json of analysis 'death_1y' is "
                                             "missing or changed"):
        PlanModels.load(folder)


def test_a_folder_without_an_index_is_refused(tmp_path):
    with pytest.raises(ModelFileError, match="cannot read the model index"):
        PlanModels.load(tmp_path)


def test_saving_again_replaces_every_model_of_the_old_index(reference, models, tmp_path):
    folder = models.save(tmp_path / "models").folder
    other = fit_plan(reference, _spec(reference, {"graft_30d": _analysis("graft_failure", 30)}))
    other.save(folder)
    assert sorted(p.name for p in folder.iterdir()) == ["graft_failure_30d.json", INDEX_FILE]


def test_models_of_one_outcome_and_horizon_with_two_windows_get_distinct_names(reference):
    spec = _spec(reference, {"a": _analysis("death", 30),
                             "b": _analysis("death", 30, (dt.date(2019, 1, 1), None))})
    files = fit_plan(reference, spec).files
    assert files == {"a": "death_30d_2017-01-01_2021-12-31.json",
                     "b": "death_30d_2019-01-01_open.json"}


def test_a_horizon_the_reference_cannot_support_names_the_analysis(reference):
    # The window could in principle support the horizon (its first day plus the horizon is
    # the cut-off), but its first transplant is a year later: the data cannot.
    start = dt.date(2016, 1, 1)
    horizon = (demo.REFERENCE_CUTOFF - start).days
    spec = _spec(reference, {"too_long": _analysis("death", horizon,
                                                   (start, dt.date(2017, 1, 31)))})
    with pytest.raises(InputError, match=f"analysis 'too_long': .*cannot support a horizon of "
                                         f"{horizon} days"):
        fit_plan(reference, spec)
    spec = _spec(reference, {"late": _analysis("death", 365, (dt.date(2022, 6, 1), None))})
    with pytest.raises(SpecError, match="analysis 'late': a horizon of 365 days cannot be "
                                        "supported"):
        fit_plan(reference, spec)


def test_a_spec_without_a_plan_is_refused(reference):
    with pytest.raises(InputError, match="has no study plan"):
        fit_plan(reference, _spec(reference, {}))
