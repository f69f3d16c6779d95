"""The reference model: rossi through read_records -> fit_reference, and the JSON model file.

Reference values: docs/validation.md sections 3.1, 4 and 5 (rossi, lifelines.datasets), and
lifelines fits computed in the test. Time is in days (7 x weeks), which leaves a Cox fit
unchanged; baselines are compared at 7 x the rossi weeks.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import rossi_records as rr

import casemix
from casemix import ReferenceModel, build_cohort, fit_reference, load_spec, read_records
from casemix.errors import InputError, ModelFileError, ModelVersionWarning, SpecError
from casemix.model.reference import FORMAT_VERSION, reference_data

# docs/validation.md section 3.1, Efron: PUBLISHED (from memory; verified) Fox & Weisberg,
# appendix to An R Companion to Applied Regression; REFERENCE LIBRARY lifelines,
# statsmodels, sksurv. Order fin, age, race, wexp, mar, paro, prio.
FULL_COEF = [-0.379422, -0.057438, 0.313900, -0.149796, -0.433704, -0.084871, 0.091497]
FULL_SE = [0.191379, 0.021999, 0.307993, 0.212224, 0.381868, 0.195757, 0.028649]
# docs/validation.md section 3.1, Breslow: PUBLISHED (from memory; verified) Allison,
# Survival Analysis Using SAS; REFERENCE LIBRARY statsmodels, sksurv.
BRESLOW_COEF = [-0.379022, -0.057246, 0.314130, -0.151115, -0.432783, -0.084983, 0.091112]
# docs/validation.md section 5, model A (lifelines = statsmodels).
MODEL_A_COEF = [-0.059072, -0.155726, -0.444302, -0.055246, 0.087815]
# docs/validation.md section 5, model B (reference = rossi fin = 0; lifelines = statsmodels).
MODEL_B_COEF = [-0.021285, 0.351932, -0.190559, -0.489512, -0.334676, 0.122538]
# docs/validation.md section 4: lifelines baseline_cumulative_hazard_ (step read), at the
# covariate means, full Efron model; equal to a hand Breslow sum.
CHECK_WEEKS = [1, 2, 8, 10, 20, 26, 30, 40, 52]
H0_AT_MEANS = [0.001958, 0.003922, 0.023800, 0.029885, 0.083775, 0.115918, 0.130213,
               0.193511, 0.274373]  # fmt: skip


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("reference")


@pytest.fixture(scope="module")
def rossi():
    return rr.rossi()


@pytest.fixture(scope="module")
def extract(folder, rossi) -> Path:
    return rr.write_extract(folder / "rossi.csv", rossi, rr.by(rossi, "fin"))


def _records(folder: Path, extract: Path, covariates, name: str, **kwargs):
    spec = load_spec(rr.write_spec(folder / f"{name}.toml", covariates, **kwargs))
    return read_records(extract, spec)


def _fit(records, **kwargs):
    kwargs = {"horizon_days": rr.HORIZON_DAYS, "cutoff": rr.ROSSI_CUTOFF, **kwargs}
    return fit_reference(records, records.spec, rr.OUTCOME, **kwargs)


@pytest.fixture(scope="module")
def full_records(folder, extract):
    return _records(folder, extract, rr.FULL, "full")


@pytest.fixture(scope="module")
def full_model(full_records):
    return _fit(full_records)


@pytest.fixture(scope="module")
def saved(folder, full_model) -> Path:
    return full_model.save(folder / "full.json")


# ------------------------------------------------------------------------ the fit on rossi


def test_full_model_matches_published_fit(full_model, full_records):
    fit = full_model.fit
    assert len(full_records.frame) == 432 and full_records.exclusions.empty
    assert fit.names == rr.FULL
    assert (fit.n, fit.n_events, fit.ties, fit.converged) == (432, 114, "efron", True)
    np.testing.assert_allclose(fit.coef, FULL_COEF, atol=1e-4)  # section 3.1, see FULL_COEF
    np.testing.assert_allclose(fit.se, FULL_SE, atol=1e-4)
    # docs/validation.md 3.1: LL -658.747659, null LL -675.380632 (abs 1e-6); LR 33.2659,
    # Wald 32.1126, score 33.5287 (abs 1e-3); Fox & Weisberg / statsmodels.
    assert fit.loglik == pytest.approx(-658.747659, abs=1e-6)
    assert fit.loglik_null == pytest.approx(-675.380632, abs=1e-6)
    tests = [fit.lr_test.statistic, fit.wald_test.statistic, fit.score_test.statistic]
    np.testing.assert_allclose(tests, [33.2659, 32.1126, 33.5287], atol=1e-3)
    # docs/validation.md 3.1 and 11: concordance 0.640329 (lifelines, sksurv).
    assert full_model.concordance == pytest.approx(0.6403292, abs=1e-6)


def test_full_model_matches_lifelines_covariance(full_model, rossi):
    # lifelines 0.30 CoxPHFitter (Efron) on the same data, computed here.
    cph = rr.lifelines_fit(rossi, rr.FULL)
    np.testing.assert_allclose(full_model.fit.coef, cph.params_.to_numpy(), atol=1e-4)
    np.testing.assert_allclose(full_model.fit.cov, cph.variance_matrix_.to_numpy(), atol=1e-5)


def test_breslow_ties_match_published_fit(full_records):
    fit = _fit(full_records, ties="breslow").fit
    assert fit.ties == "breslow"
    np.testing.assert_allclose(fit.coef, BRESLOW_COEF, atol=1e-4)  # section 3.1, Allison
    # docs/validation.md 3.1: Breslow LL -659.120606 (Allison's -2 log L 1318.241).
    assert fit.loglik == pytest.approx(-659.120606, abs=1e-6)


def test_model_a_coefficients(folder, extract):
    model = _fit(_records(folder, extract, rr.MODEL_A, "model_a"))
    np.testing.assert_allclose(model.fit.coef, MODEL_A_COEF, atol=1e-4)  # section 5


def test_model_b_coefficients_on_the_fin0_reference(folder, rossi):
    reference = rossi[rossi["fin"] == 0]
    path = rr.write_extract(folder / "fin0.csv", reference, rr.by(reference, "fin"))
    model = _fit(_records(folder, path, rr.MODEL_B, "model_b"))
    assert (model.fit.n, model.fit.n_events) == (216, 66)  # docs/validation.md section 5
    np.testing.assert_allclose(model.fit.coef, MODEL_B_COEF, atol=1e-4)
    # docs/validation.md section 5: model B LL -333.715389 (lifelines = statsmodels).
    assert model.fit.loglik == pytest.approx(-333.715389, abs=1e-6)


def test_baseline_is_the_breslow_step_at_the_means(full_model, rossi):
    baseline = full_model.fit.baselines[0]
    days = 7.0 * np.asarray(CHECK_WEEKS)
    # Printed to 6 decimals: half a unit of the last digit (docs/validation.md, Tolerances).
    np.testing.assert_allclose(baseline.at(days), H0_AT_MEANS, atol=5e-7)  # section 4
    # Between event times the step holds (weeks 52 and 51.5 differ; 26.5 reads 26's value).
    cph = rr.lifelines_fit(rossi, rr.FULL)
    weeks = np.arange(0, 52.01, 0.5)
    expected = rr.step_read(cph.baseline_cumulative_hazard_, weeks)
    np.testing.assert_allclose(baseline.at(7 * weeks), expected, rtol=1e-5, atol=1e-12)
    # The step table holds the 49 distinct event times (docs/validation.md 3.1 heading).
    assert baseline.times.size == 49 and baseline.last_time == rr.HORIZON_DAYS


@pytest.mark.parametrize(
    ("horizon_days", "cutoff"),
    # 2020-07-06 = tx + 182 d; the horizon may not outrun the follow-up the cut-off leaves
    [(26 * 7, rr.ROSSI_CUTOFF), (26 * 7, "2020-07-06")],
    ids=["horizon", "cutoff"],
)
def test_horizon_and_cutoff_truncate_the_reference(full_records, rossi, horizon_days, cutoff):
    model = _fit(full_records, horizon_days=horizon_days, cutoff=cutoff)
    # lifelines on rossi truncated at 26 weeks (computed here): a horizon and a cut-off 26
    # weeks after everyone's transplant are the same administrative censoring.
    truncated = rossi.assign(
        arrest=((rossi["arrest"] == 1) & (rossi["week"] <= 26)).astype(int),
        week=rossi["week"].clip(upper=26),
    )
    cph = rr.lifelines_fit(truncated, rr.FULL)
    assert model.fit.n_events == int(truncated["arrest"].sum())
    np.testing.assert_allclose(model.fit.coef, cph.params_.to_numpy(), atol=1e-4)
    assert model.fit.baselines[0].last_time == 182.0


def test_stratified_reference_matches_lifelines(folder, extract, rossi):
    records = _records(folder, extract, rr.MODEL_B, "strata", strata="fin")
    model = _fit(records)
    # lifelines CoxPHFitter(strata=["fin"]) computed here; baselines per stratum, step read.
    cph = rr.CoxPHFitter(strata=["fin"]).fit(
        rossi[[*rr.MODEL_B, "fin", "week", "arrest"]], duration_col="week", event_col="arrest"
    )
    np.testing.assert_allclose(model.fit.coef, cph.params_.to_numpy(), atol=1e-4)
    assert model.fit.strata_levels == ("0", "1")
    data = reference_data(records, records.spec, rr.OUTCOME, rr.HORIZON_DAYS, rr.ROSSI_CUTOFF)
    ours = model.fit.expected_events(data.time, data.X, data.strata)
    theirs = np.empty(len(rossi))
    names = list(cph.params_.index)
    risk = np.exp((rossi[names].to_numpy(float) - cph._norm_mean.to_numpy()) @ cph.params_)
    for level in (0, 1):
        rows = (rossi["fin"] == level).to_numpy()
        hazard = rr.step_read(cph.baseline_cumulative_hazard_[level], rossi["week"][rows])
        theirs[rows] = hazard * risk[rows]
        # Breslow: within each stratum the expected events equal the observed (COMMON
        # PRACTICE property, docs/validation.md section 4).
        assert ours[rows].sum() == pytest.approx(rossi["arrest"][rows].sum(), abs=1e-8)
    np.testing.assert_allclose(ours, theirs, rtol=1e-5)


def test_defaults_come_from_the_records_spec_and_the_analysis_table(folder, extract, full_model):
    extra = "[analysis]\nhorizon_days = 364\ncutoff = 2021-06-30\n"
    records = _records(folder, extract, rr.FULL, "with_analysis", extra=extra)
    model = fit_reference(records, outcome=rr.OUTCOME)
    assert (model.horizon_days, model.cutoff) == (rr.HORIZON_DAYS, rr.ROSSI_CUTOFF)
    np.testing.assert_array_equal(model.fit.coef, full_model.fit.coef)
    from_path = fit_reference(records, folder / "full.toml", rr.OUTCOME, 364, "2021-06-30")
    np.testing.assert_array_equal(from_path.fit.coef, full_model.fit.coef)


def test_fit_reference_errors_name_the_fix(full_records):
    with pytest.raises(InputError, match=r"no horizon: give horizon_days \(e\.g\. 365\)"):
        fit_reference(full_records, outcome=rr.OUTCOME, cutoff=rr.ROSSI_CUTOFF)
    with pytest.raises(InputError, match="no cut-off: give the date data are complete to"):
        fit_reference(full_records, outcome=rr.OUTCOME, horizon_days=364)
    with pytest.raises(InputError, match=r"cut-off 'June 2021' is not a date; write it as"):
        fit_reference(full_records, outcome=rr.OUTCOME, horizon_days=364, cutoff="June 2021")
    with pytest.raises(SpecError, match=r"has no outcome 'arest' \(closest: 'arrest'"):
        fit_reference(full_records, outcome="arest", horizon_days=364, cutoff=rr.ROSSI_CUTOFF)


def test_a_horizon_beyond_the_reference_follow_up_is_refused(full_records):
    # rossi follows everyone 52 weeks (lifelines.datasets): 364 days is the longest time.
    with pytest.raises(InputError, match=r"cannot support a horizon of 400 days: its longest "
                       r"follow-up is 364 days and none of its 432 recipients"):
        fit_reference(full_records, outcome=rr.OUTCOME, horizon_days=400,
                      cutoff=rr.ROSSI_CUTOFF)


def test_a_model_has_a_short_repr(full_model):
    text = repr(full_model)
    assert text.startswith(f"<ReferenceModel arrest at 364 days: 7 terms, 432 recipients, "
                           f"114 events, cut-off {rr.ROSSI_CUTOFF}")  # rossi: 114 arrests
    assert len(text) < 200


def test_fingerprint_follows_the_fitting_data(folder, rossi, full_records, full_model):
    assert len(full_model.fingerprint) == 64 and int(full_model.fingerprint, 16) >= 0
    assert _fit(full_records).fingerprint == full_model.fingerprint
    changed = rossi.copy()
    changed.loc[changed.index[5], "prio"] += 1
    path = rr.write_extract(folder / "changed.csv", changed, rr.by(changed, "fin"))
    other = _fit(read_records(path, full_records.spec))
    assert other.fingerprint != full_model.fingerprint


# ------------------------------------------------------------------------ the model file


def test_file_holds_the_documented_content(saved, full_model, rossi):
    content = json.loads(saved.read_text(encoding="utf-8"))
    assert content["format_version"] == FORMAT_VERSION
    assert content["casemix_version"] == casemix.__version__
    assert (content["outcome"], content["horizon_days"], content["cutoff"]) == (
        "arrest",
        364,
        "2021-06-30",
    )
    coefficients = content["coefficients"]
    assert coefficients["names"] == list(rr.FULL)
    np.testing.assert_allclose(coefficients["coef"], FULL_COEF, atol=1e-4)  # section 3.1
    assert np.asarray(coefficients["cov"]).shape == (7, 7)
    facts = content["fit"]
    assert (facts["n"], facts["events"], facts["ties"], facts["converged"]) == (
        432,
        114,
        "efron",
        True,
    )
    assert facts["loglik"] == pytest.approx(-658.747659, abs=1e-6)  # section 3.1
    assert facts["concordance"] == pytest.approx(0.6403292, abs=1e-6)  # section 11
    assert content["fingerprint"]["sha256"] == full_model.fingerprint
    assert len(content["checksum"]) == 64
    # The baseline step table: lifelines' Breslow baseline at its 49 event times (section 4).
    (table,) = content["baseline"]
    cph = rr.lifelines_fit(rossi, rr.FULL)
    lifelines_baseline = cph.baseline_cumulative_hazard_.iloc[:, 0]
    np.testing.assert_array_equal(table["times"], 7 * lifelines_baseline.index.to_numpy())
    np.testing.assert_allclose(table["cumhaz"], lifelines_baseline.to_numpy(), rtol=1e-5)
    assert table["stratum"] is None and table["last_time"] == 364.0
    assert [t["name"] for t in content["design"]["terms"]] == list(rr.FULL)


def test_round_trip_gives_identical_expected_events(saved, full_model, full_records):
    loaded = ReferenceModel.load(saved)
    assert loaded.design == full_model.design
    cohort = build_cohort(full_records, rr.OUTCOME, 300, rr.ROSSI_CUTOFF)
    np.testing.assert_array_equal(
        loaded.expected_events(cohort), full_model.expected_events(cohort)
    )
    # Saving the loaded model writes the same bytes.
    again = loaded.save(saved.parent / "again.json")
    assert again.read_bytes() == saved.read_bytes()


def test_round_trip_keeps_the_spec_and_its_covariate_order(saved, full_model):
    # The spec's covariate order is the design's column order (casemix.data.spec.Spec): a loaded
    # model must give back the spec it was fitted with, so that a refit on loaded.spec
    # builds the same design.
    loaded = ReferenceModel.load(saved)
    assert [c.name for c in loaded.spec.covariates] == list(rr.FULL)
    assert loaded.spec == full_model.spec
    assert loaded.to_dict() == full_model.to_dict()


def test_regenerating_gives_byte_identical_files(folder, extract, saved):
    records = _records(folder, extract, rr.FULL, "full")
    path = _fit(records).save(folder / "regenerated.json")
    assert path.read_bytes() == saved.read_bytes()


def _rewrite(saved: Path, target: Path, edit) -> Path:
    content = json.loads(saved.read_text(encoding="utf-8"))
    edit(content)
    target.write_text(json.dumps(content, indent=2), encoding="utf-8")
    return target


@pytest.mark.parametrize(
    "edit",
    [
        lambda c: c["coefficients"]["coef"].__setitem__(0, c["coefficients"]["coef"][0] + 1e-6),
        lambda c: c["baseline"][0]["cumhaz"].__setitem__(10, 0.5),
        lambda c: c.__setitem__("horizon_days", 365),
        lambda c: c.pop("checksum"),
    ],
    ids=["coefficient", "baseline", "horizon", "no_checksum"],
)
def test_a_tampered_file_is_refused(saved, tmp_path, edit):
    path = _rewrite(saved, tmp_path / "tampered.json", edit)
    with pytest.raises(ModelFileError, match=r"tampered\.json: the checksum does not match"):
        ReferenceModel.load(path)


def test_a_future_format_version_is_refused_before_anything_else(saved, tmp_path):
    # Everything else is wrong too (checksum, fields): the version is what gets reported.
    path = tmp_path / "future.json"
    path.write_text(json.dumps({"format_version": FORMAT_VERSION + 1, "checksum": "x"}))
    with pytest.raises(ModelFileError, match=r"model format_version 3 is not supported by casemix"):
        ReferenceModel.load(path)
    edited = _rewrite(saved, tmp_path / "old1.json", lambda c: c.update(format_version=1))
    with pytest.raises(ModelFileError, match=r"reads format_version 2\); refit the model"):
        ReferenceModel.load(edited)


def test_another_casemix_version_warns(folder, full_records, full_model, monkeypatch):
    monkeypatch.setattr(casemix, "__version__", "0.0.1")
    path = _fit(full_records).save(folder / "old_version.json")
    monkeypatch.undo()
    with pytest.warns(ModelVersionWarning, match=r"written by casemix 0\.0\.1, this is"):
        loaded = ReferenceModel.load(path)
    assert loaded.casemix_version == "0.0.1"
    np.testing.assert_array_equal(loaded.fit.coef, full_model.fit.coef)


def test_unreadable_files_are_refused_with_a_message(tmp_path, full_model, monkeypatch):
    with pytest.raises(ModelFileError, match=r"cannot read model file .*missing\.json"):
        ReferenceModel.load(tmp_path / "missing.json")
    pickled = tmp_path / "model.pkl"
    pickled.write_bytes(b"\x80\x04\x95\x00\x00")
    with pytest.raises(ModelFileError, match=r"model\.pkl is not valid JSON .*written by"):
        ReferenceModel.load(pickled)
    listed = tmp_path / "list.json"
    listed.write_text("[1, 2]")
    with pytest.raises(ModelFileError, match=r"list\.json does not hold a JSON object"):
        ReferenceModel.load(listed)
    # A correctly signed file that lacks a field (written through a stripped to_dict).
    whole = ReferenceModel.to_dict

    def stripped_dict(self):
        return {key: value for key, value in whole(self).items() if key != "baseline"}

    monkeypatch.setattr(ReferenceModel, "to_dict", stripped_dict)
    stripped = full_model.save(tmp_path / "stripped.json")
    monkeypatch.undo()
    with pytest.raises(ModelFileError, match=r"stripped\.json: malformed model file .*'baseline'"):
        ReferenceModel.load(stripped)


def test_reference_data_reuses_a_given_design(full_records, full_model):
    data = reference_data(
        full_records, full_records.spec, rr.OUTCOME, rr.HORIZON_DAYS, rr.ROSSI_CUTOFF,
        design=full_model.design,
    )  # fmt: skip
    assert data.design is full_model.design
    assert data.X.shape == (432, 7) and data.strata is None
    assert data.fingerprint() == full_model.fingerprint
    # docs/validation.md 3.1: 114 events; time in days = 7 x week.
    assert int(data.event.sum()) == 114
