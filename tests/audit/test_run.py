"""run_audit end to end on a slice of the invented demo network (known truth: LV05 has an
excess and LV04 fewer events than expected, see casemix.demo)."""

from __future__ import annotations

import importlib.util
import json
import warnings

import numpy as np
import pandas as pd
import pytest

from casemix.audit import run_audit
from casemix.data.cohort import DAY_ZERO_TIME, build_cohort
from casemix.data.records import read_records
from casemix.data.spec import load_spec
from casemix.demo import (
    COHORT_CUTOFF,
    REFERENCE_CUTOFF,
    REFERENCE_WINDOW,
    generate,
)
from casemix.errors import InputError
from casemix.model.reference import fit_reference


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo")
    network = generate()
    (folder / "spec.toml").write_text(network.spec_text, encoding="utf-8")
    # every third reference recipient keeps the test fast; the whole cohort
    network.reference.iloc[::3].to_csv(folder / "reference.csv", index=False)
    network.cohort.to_csv(folder / "cohort.csv", index=False)
    spec = load_spec(folder / "spec.toml")
    with warnings.catch_warnings():
        # the demo plants broken records on purpose; their DataWarnings are not under test
        warnings.simplefilter("ignore")
        reference = read_records(folder / "reference.csv", spec, cutoff=REFERENCE_CUTOFF)
        cohort = read_records(folder / "cohort.csv", spec, cutoff=COHORT_CUTOFF)
        model = fit_reference(reference, spec, cutoff=REFERENCE_CUTOFF, window=REFERENCE_WINDOW)
        audit = run_audit(reference, model, cohort, bootstrap=8, seed=4, map_fn=map)
    return {"reference": reference, "cohort": cohort, "model": model, "audit": audit,
            "folder": folder, "truth": network.truth}  # fmt: skip


def test_tables_and_findings(demo):
    audit = demo["audit"]
    expected = {
        "ph", "concordance", "calibration_risk", "calibration_regression",
        "calibration_horizon", "crosscheck", "coefficients", "joint_tests", "calibration_size",
        "overdispersion", "dispersion_programs", "prior_sensitivity", "prior_verdicts",
        "bootstrap", "bootstrap_coefficients", "bootstrap_draws", "influence", "fdr",
    }  # fmt: skip
    assert set(audit.tables) == expected
    assert sorted(audit.tables["concordance"]["population"]) == ["cohort", "reference"]
    # REFERENCE LIBRARY statsmodels PHReg and lifelines agree with the fit (tolerances of
    # docs/validation.md: coef abs 1e-4, loglik abs 1e-6, E rel 1e-5)
    cross = audit.tables["crosscheck"].set_index(["library", "quantity"])
    assert cross.loc[("statsmodels", "coef"), "max_abs_difference"] < 1e-4
    assert cross.loc[("statsmodels", "loglik"), "max_abs_difference"] < 1e-6
    if importlib.util.find_spec("lifelines") is not None:
        assert cross.loc[("lifelines", "expected"), "max_rel_difference"] < 1e-4
    else:  # the plain install: the lifelines cross-check is left out, not filled in
        assert "lifelines" not in cross.index.get_level_values("library")
    assert any("agrees with statsmodels on coef" in f for f in audit.findings)
    # known truth of the invented network: LV05's true HR is the highest, LV04's the lowest
    truth = demo["truth"].set_index("program")["true_hr"]
    fdr = audit.tables["fdr"].set_index("program")
    assert fdr.loc[truth.idxmax(), "q_more"] < 0.05
    assert audit.tables["bootstrap"]["width_ratio"].between(0.8, 2.0).all()
    assert audit.facts["bootstrap"] == 8 and audit.facts["bootstrap_failed"] == 0


def test_same_seed_same_tables(demo):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        again = run_audit(demo["reference"], demo["model"], demo["cohort"], bootstrap=8,
                          seed=4, map_fn=map)  # fmt: skip
    for name, table in demo["audit"].tables.items():
        assert table.equals(again.tables[name]), name
    assert again.findings == demo["audit"].findings


def test_save_writes_the_folder(demo, tmp_path):
    out = demo["audit"].save(tmp_path / "audit")
    names = sorted(p.name for p in out.iterdir())
    assert "audit.html" in names and "findings.json" in names and "ph.csv" in names
    assert json.loads((out / "findings.json").read_text()) == list(demo["audit"].findings)
    html = (out / "audit.html").read_text()
    assert "Statistical audit" in html and "<svg" in html and "Proportional hazards" in html


def test_without_cohort_only_model_checks(demo):
    audit = run_audit(demo["reference"], demo["model"])
    assert "bootstrap" not in audit.tables and "ph" in audit.tables
    assert np.isclose(
        audit.tables["concordance"]["c"].iloc[0], demo["model"].concordance, atol=1e-12
    )


def test_refuses_records_that_are_not_the_fitting_data(demo):
    with pytest.raises(InputError, match="are not the data the model was fitted on"):
        run_audit(demo["cohort"], demo["model"])


def test_day_zero_events_follow_one_convention_in_both_populations(tmp_path):
    # invented demo network: the reference's day-0 failures are removed, the cohort keeps its
    # own (casemix.demo plants a few). Both populations put day 0 at DAY_ZERO_TIME; the cohort's
    # day-0 failures are expected with the reference's day-0 hazard, here none (E = 0).
    network = generate()
    dates = ["graft_loss_date", "retransplant_date", "death_date"]
    ref = network.reference.iloc[::3]
    same_day = (ref[dates].apply(pd.to_datetime).sub(pd.to_datetime(ref["transplant_date"]),
                                                     axis=0) == pd.Timedelta(0)).any(axis=1)
    ref[~same_day].to_csv(tmp_path / "reference.csv", index=False)
    network.cohort.to_csv(tmp_path / "cohort.csv", index=False)
    (tmp_path / "spec.toml").write_text(network.spec_text, encoding="utf-8")
    spec = load_spec(tmp_path / "spec.toml")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reference = read_records(tmp_path / "reference.csv", spec, cutoff=REFERENCE_CUTOFF)
        cohort = read_records(tmp_path / "cohort.csv", spec, cutoff=COHORT_CUTOFF)
        model = fit_reference(reference, spec, cutoff=REFERENCE_CUTOFF, window=REFERENCE_WINDOW)
        audit = run_audit(reference, model, cohort, bootstrap=2, seed=1, map_fn=map)
    built = build_cohort(cohort, "graft_failure", 365, COHORT_CUTOFF)
    day0 = built.frame[(built.frame["event"] == 1) & (built.frame["time"] < 1)]
    assert len(day0) > 0 and (day0["time"] == DAY_ZERO_TIME).all()
    assert model.fit.baselines[0].times[0] >= 1  # no reference event before day 1
    regression = audit.tables["calibration_regression"].set_index(["population", "term"])
    assert regression.loc[("cohort", "in_the_large"), "events_without_risk"] == len(day0)
    assert any("happened before the reference population's first event" in f
               for f in audit.findings)
    assert "log" in set(audit.tables["ph"]["transform"])  # every time is > 0


def test_calibration_risk_groups_share_one_scale(demo):
    # both populations' risk groups are on the log relative risk against the reference
    # average: the reference's groups straddle 0 and the cohort's overlap them
    table = demo["audit"].tables["calibration_risk"]
    ref = table[table["population"] == "reference"]
    coh = table[table["population"] == "cohort"]
    assert ref["risk_low"].min() < 0 < ref["risk_high"].max()
    assert coh["risk_low"].min() < ref["risk_high"].max()
    assert coh["risk_high"].max() > ref["risk_low"].min()
    # centred: the reference's mean relative risk is close to 1 on this scale (the average
    # recipient; exp of the mean log risk is below the mean risk by Jensen's inequality)
    model = demo["model"]
    joint = demo["audit"].tables["joint_tests"].set_index("covariate")
    spline = [g for g in dict.fromkeys(model.design.groups)
              if list(model.design.groups).count(g) > 1]
    assert spline and (joint.loc[spline, "columns"] > 1).all()
