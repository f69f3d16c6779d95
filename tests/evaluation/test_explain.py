"""Case-mix decomposition of log(E / E_avg) over covariate groups, on rossi.

The outside references are lifelines (Cox fit, baseline read as a step function) for E and
E_avg = exp(sum_g c_g) sum_i H0(t_i), and scipy.integrate.quad for the Aumann-Shapley path
integral int_0^1 sum_i w_i(s) lp_ig ds, with weights w_i(s) proportional to H0(t_i) exp(s lp_i).
The anchor c_g is that path integral over the whole reference population, so that
exp(sum_g c_g) = sum_j H0(t_j) exp(lp_j) / sum_j H0(t_j), the reference population's own
follow-up weighted mean relative risk.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rossi_records as rr
from scipy import integrate

from casemix import build_cohort, fit_reference, load_spec, read_records
from casemix.evaluation.expected import expected_events
from casemix.evaluation.explain import TOTAL, casemix_contributions
from casemix.evaluation.programs import program_table

# All of model A's covariates as plain numbers, so that a recipient can sit exactly at the
# reference means (a binary covariate cannot be 0.28).
NUMERIC = {"wexp": "numeric", "mar": "numeric", "paro": "numeric"}
COLUMNS = ["program", "group", "contribution", "factor", "expected", "expected_average"]


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("explain")


@pytest.fixture(scope="module")
def rossi():
    return rr.rossi()


def _read(folder: Path, name: str, table: pd.DataFrame, covariates, **kwargs):
    spec = load_spec(rr.write_spec(folder / f"{name}.toml", covariates, **kwargs))
    table.to_csv(folder / f"{name}.csv", index=False, float_format="%.17g")
    return read_records(folder / f"{name}.csv", spec)


def _explain(records, model, horizon_days=rr.HORIZON_DAYS):
    cohort = build_cohort(records, rr.OUTCOME, horizon_days, rr.ROSSI_CUTOFF)
    expected = expected_events(cohort, model)
    return expected, casemix_contributions(expected, model)


def _fit(records):
    return fit_reference(records, records.spec, rr.OUTCOME, rr.HORIZON_DAYS, rr.ROSSI_CUTOFF)


def _by_race(rossi):
    return rr.extract(rossi, rr.by(rossi, "race"))


@pytest.fixture(scope="module")
def model_a(folder, rossi):
    records = _read(folder, "a", _by_race(rossi), rr.MODEL_A, kinds=NUMERIC)
    return records, _fit(records)


@pytest.fixture(scope="module")
def explained(model_a):
    return _explain(*model_a)


def _lifelines_terms(cph, rossi) -> np.ndarray:
    names = list(cph.params_.index)
    centred = rossi[names].to_numpy(float) - rossi[names].to_numpy(float).mean(axis=0)
    return centred * cph.params_.to_numpy()


def _aumann_shapley(hazard: np.ndarray, lp_groups: np.ndarray) -> np.ndarray:
    """Each group's path integral by adaptive quadrature (scipy.integrate.quad)."""
    lp = lp_groups.sum(axis=1)

    def share(s: float, g: int) -> float:
        w = hazard * np.exp(s * lp)
        return float(w @ lp_groups[:, g] / w.sum())

    groups = range(lp_groups.shape[1])
    return np.array([integrate.quad(share, 0.0, 1.0, args=(g,), epsabs=1e-13)[0] for g in groups])


def _anchor(cph, rossi) -> np.ndarray:
    """The reference population's own path shares (lifelines hazard, scipy quad)."""
    hazard, _ = rr.lifelines_hazard_and_risk(cph, rossi, rossi, rossi["week"])
    return _aumann_shapley(hazard, _lifelines_terms(cph, rossi))


def test_tidy_layout(explained):
    expected, table = explained
    assert list(table.columns) == COLUMNS
    assert table["program"].unique().tolist() == ["race0", "race1"]
    groups = [*rr.MODEL_A, TOTAL]
    assert table["group"].tolist() == groups * 2
    np.testing.assert_allclose(table["factor"], np.exp(table["contribution"]), rtol=1e-14)
    parts = table[table["group"] != TOTAL]
    assert parts["expected"].isna().all() and parts["expected_average"].isna().all()
    totals = table[table["group"] == TOTAL].set_index("program")
    programs = program_table(expected).set_index("program")
    np.testing.assert_allclose(totals["expected"], programs["expected"], rtol=1e-12)


def test_contributions_sum_to_the_total_for_every_program(explained):
    _, table = explained
    for program, rows in table.groupby("program"):
        parts = rows.loc[rows["group"] != TOTAL, "contribution"].sum()
        total = rows.loc[rows["group"] == TOTAL, "contribution"].item()
        assert parts == pytest.approx(total, abs=1e-10), program


def test_total_is_log_e_over_e_average_from_lifelines(explained, rossi):
    _, table = explained
    totals = table[table["group"] == TOTAL].set_index("program")
    cph = rr.lifelines_fit(rossi, rr.MODEL_A)
    # lifelines' baseline is at the covariate means: H0(t_i) is the expected count of the
    # reference-average recipient followed as long as recipient i (step read at its week).
    hazard, risk = rr.lifelines_hazard_and_risk(cph, rossi, rossi, rossi["week"])
    offset = _anchor(cph, rossi).sum()
    # the anchor is the follow-up weighted mean relative risk of the reference population
    assert np.exp(offset) == pytest.approx(hazard @ risk / hazard.sum(), rel=1e-10)
    for program, race in (("race0", 0), ("race1", 1)):
        rows = (rossi["race"] == race).to_numpy()
        e, e_avg = float(hazard[rows] @ risk[rows]), float(hazard[rows].sum() * np.exp(offset))
        # E: docs/validation.md section 5, model A by race, 15.2347 / 98.7653.
        assert e == pytest.approx({"race0": 15.2347, "race1": 98.7653}[program], rel=1e-5)
        row = totals.loc[program]
        assert row.expected == pytest.approx(e, rel=1e-5)
        assert row.expected_average == pytest.approx(e_avg, rel=1e-5)
        assert row.contribution == pytest.approx(np.log(e / e_avg), abs=1e-5)


def test_groups_match_an_independent_path_integral(explained, rossi):
    _, table = explained
    cph = rr.lifelines_fit(rossi, rr.MODEL_A)
    names = list(cph.params_.index)
    hazard, _ = rr.lifelines_hazard_and_risk(cph, rossi, rossi, rossi["week"])
    terms = _lifelines_terms(cph, rossi)
    lp_groups = terms - _anchor(cph, rossi)
    for program, race in (("race0", 0), ("race1", 1)):
        rows = (rossi["race"] == race).to_numpy()
        theirs = _aumann_shapley(hazard[rows], lp_groups[rows])
        ours = table[(table["program"] == program) & (table["group"] != TOTAL)]
        assert ours["group"].tolist() == names
        # Cox coefficients of two optimisers agree to ~1e-5 (docs/validation.md Tolerances).
        np.testing.assert_allclose(ours["contribution"], theirs, atol=1e-5)


def test_the_reference_population_as_a_whole_has_no_case_mix_effect(folder, rossi, model_a):
    # The whole reference population as one program: its expected count is its observed
    # count (Breslow), and the anchor makes its case-mix factor exactly 1, every group 0.
    _, model = model_a
    records = _read(folder, "whole", rr.extract(rossi, ["all"] * len(rossi)), rr.MODEL_A,
                    kinds=NUMERIC)
    _, out = _explain(records, model)
    total = out[out["group"] == TOTAL].iloc[0]
    assert total.expected == pytest.approx(rossi["arrest"].sum(), rel=1e-9)  # 114 arrests
    assert total.factor == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(out["contribution"], 0.0, atol=1e-10)
    # the anchors agree with the lifelines/scipy path integral over the reference population
    np.testing.assert_allclose(model.group_offsets,
                               _anchor(rr.lifelines_fit(rossi, rr.MODEL_A), rossi), atol=1e-5)


def test_the_average_recipient_has_no_case_mix_effect(folder, rossi, model_a):
    _, model = model_a
    # Five recipients at the anchor: each covariate's term (x - mean) * beta equals its
    # anchor c_g (means from pandas), with different follow-up, in a program of their own.
    means = rossi[list(rr.MODEL_A)].mean()
    np.testing.assert_allclose(model.fit.center, means.to_numpy(), rtol=1e-14)
    at = means.to_numpy() + np.asarray(model.group_offsets) / model.fit.coef
    average = rossi.head(5).assign(
        recipient_id=[f"M{i}" for i in range(5)], week=[3, 10, 26, 40, 52],
        arrest=[1, 0, 1, 1, 0], **{name: float(v) for name, v in zip(rr.MODEL_A, at, strict=True)},
    )  # fmt: skip
    table = pd.concat([_by_race(rossi), rr.extract(average, ["average"] * 5)], ignore_index=True)
    records = _read(folder, "with_average", table, rr.MODEL_A, kinds=NUMERIC)
    _, out = _explain(records, model)
    rows = out[out["program"] == "average"]
    np.testing.assert_allclose(rows["contribution"], 0.0, atol=1e-12)
    total = rows[rows["group"] == TOTAL].iloc[0]
    assert total.expected == pytest.approx(total.expected_average, rel=1e-12)


def test_a_categorical_is_one_group(folder, rossi):
    # prio banded into three levels (0, 1-3, 4 or more): two design columns, one group.
    band = pd.cut(rossi["prio"], [-1, 0, 3, 100], labels=["none", "some", "many"]).astype(str)
    table = _by_race(rossi).assign(prio_band=band.to_numpy())
    extra = '[covariates.prio_band]\nkind = "categorical"\nreference = "none"\n'
    records = _read(folder, "banded", table, ["age"], extra=extra)
    model = _fit(records)
    assert model.fit.names == ("age", "prio_band[many]", "prio_band[some]")
    _, out = _explain(records, model)
    assert out["group"].tolist() == ["age", "prio_band", TOTAL] * 2
    # Against lifelines on the same two 0/1 columns, and the quad path integral where the
    # band's two terms form one group.
    dummies = rossi.assign(many=(band == "many").astype(int), some=(band == "some").astype(int))
    cph = rr.lifelines_fit(dummies, ["age", "many", "some"])
    np.testing.assert_allclose(model.fit.coef, cph.params_.to_numpy(), atol=1e-4)
    hazard, _ = rr.lifelines_hazard_and_risk(cph, dummies, dummies, dummies["week"])
    x = dummies[["age", "many", "some"]].to_numpy(float)
    terms = (x - x.mean(axis=0)) * cph.params_.to_numpy()
    lp_groups = np.column_stack([terms[:, 0], terms[:, 1] + terms[:, 2]])
    lp_groups = lp_groups - _aumann_shapley(hazard, lp_groups)
    for program, race in (("race0", 0), ("race1", 1)):
        rows = (rossi["race"] == race).to_numpy()
        ours = out[(out["program"] == program) & (out["group"] != TOTAL)]["contribution"]
        np.testing.assert_allclose(ours, _aumann_shapley(hazard[rows], lp_groups[rows]), atol=1e-5)
        whole = out[(out["program"] == program)]
        assert whole["contribution"].iloc[:2].sum() == pytest.approx(
            whole["contribution"].iloc[2], abs=1e-10
        )


def test_stratified_model_sums_to_the_total(folder, rossi):
    records = _read(folder, "strata", _by_race(rossi), ["age", "wexp", "prio"], strata="fin")
    _, out = _explain(records, _fit(records))
    cph = rr.CoxPHFitter(strata=["fin"]).fit(
        rossi[["age", "wexp", "prio", "fin", "week", "arrest"]], "week", "arrest"
    )
    names = list(cph.params_.index)
    terms = (rossi[names].to_numpy(float) - cph._norm_mean.to_numpy()) * cph.params_.to_numpy()
    risk = np.exp(terms.sum(axis=1))
    hazard = np.empty(len(rossi))
    for level in (0, 1):
        rows = (rossi["fin"] == level).to_numpy()
        hazard[rows] = rr.step_read(cph.baseline_cumulative_hazard_[level], rossi["week"][rows])
    # the anchor: the reference population's follow-up weighted mean relative risk
    offset = np.log(hazard @ risk / hazard.sum())
    for program, race in (("race0", 0), ("race1", 1)):
        rows_ = out[out["program"] == program]
        total = rows_[rows_["group"] == TOTAL].iloc[0]
        assert rows_["contribution"].iloc[:-1].sum() == pytest.approx(total.contribution, abs=1e-10)
        rows = (rossi["race"] == race).to_numpy()
        # Each recipient's baseline is his or her own stratum's (lifelines, step read).
        assert total.expected == pytest.approx(hazard[rows] @ risk[rows], rel=1e-5)
        assert total.expected_average == pytest.approx(
            hazard[rows].sum() * np.exp(offset), rel=1e-5
        )


def test_a_spline_is_one_group(folder, rossi):
    # age as a 4-knot natural spline: three design columns, one group.
    records = _read(folder, "spline", _by_race(rossi), ["age", "prio"], kinds={"age": "spline"})
    model = _fit(records)
    assert model.fit.names == ("age:spline1", "age:spline2", "age:spline3", "prio")
    _, out = _explain(records, model)
    assert out["group"].tolist() == ["age", "prio", TOTAL] * 2
    for _, rows in out.groupby("program"):
        total = rows["contribution"].iloc[-1]
        assert rows["contribution"].iloc[:-1].sum() == pytest.approx(total, abs=1e-10)
        assert total == pytest.approx(
            np.log(rows["expected"].iloc[-1] / rows["expected_average"].iloc[-1]), abs=1e-12
        )
