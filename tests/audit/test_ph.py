"""Scaled Schoenfeld residuals and the Grambsch-Therneau test against lifelines and R's figures."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from audit_helpers import ROSSI_FULL, ROSSI_SMALL
from oracles import lazy
from statsmodels.duration.hazard_regression import PHReg, PHRegResults

from casemix.audit.ph import (
    beta_smooth,
    ph_test,
    ph_test_groups,
    schoenfeld_residuals,
    time_transform,
)
from casemix.errors import InputError
from casemix.survival import fit_cox

CoxPHFitter = lazy("lifelines", "CoxPHFitter")
proportional_hazard_test = lazy("lifelines.statistics", "proportional_hazard_test")


def _data(rossi, names):
    return rossi["week"], rossi["arrest"], rossi[list(names)].to_numpy(float)


# docs/validation.md section 10, REFERENCE LIBRARY lifelines 0.30.3 proportional_hazard_test
# on the full rossi model (rank and km also PUBLISHED in the lifelines PH tutorial, from
# memory; verified). Order fin, age, race, wexp, mar, paro, prio.
LIFELINES_FULL = {
    "rank": [0.01506, 11.45350, 1.42648, 7.31493, 0.70947, 0.13427, 0.01883],
    "km": [0.01913, 11.03029, 1.43746, 7.47547, 0.60087, 0.11572, 0.02255],
    "identity": [0.05617, 12.06138, 1.48609, 6.93484, 0.75440, 0.12204, 0.01089],
    "log": [0.49136, 13.07381, 1.03112, 5.53975, 1.02927, 0.01050, 0.38402],
}


@pytest.mark.parametrize("transform", sorted(LIFELINES_FULL))
def test_full_rossi_model_matches_reference_table(rossi, rossi_fit, transform):
    table = ph_test(rossi_fit, *_data(rossi, ROSSI_FULL), transform)
    expected = LIFELINES_FULL[transform]
    np.testing.assert_allclose(table["statistic"].iloc[:-1], expected, atol=1e-3)
    assert list(table.index) == [*ROSSI_FULL, "global"]
    assert (table["df"] == [1] * 7 + [7]).all()


@pytest.mark.parametrize("transform", ["rank", "km", "identity", "log"])
def test_same_coefficients_give_lifelines_statistics_exactly(rossi, transform):
    # REFERENCE LIBRARY: lifelines proportional_hazard_test computed here, fed the same
    # coefficients and covariance so that only the residuals and the test are compared.
    names = list(ROSSI_FULL)
    cph = CoxPHFitter().fit(rossi[[*names, "week", "arrest"]], "week", "arrest")
    ref = proportional_hazard_test(cph, rossi[[*names, "week", "arrest"]], time_transform=transform)
    ref_stat = pd.Series(np.ravel(ref.test_statistic), index=[n for n in ref.name])
    ref_p = pd.Series(np.ravel(ref.p_value), index=[n for n in ref.name])
    fit = fit_cox(*_data(rossi, names), names=names)
    stand_in = replace(
        fit,
        coef=cph.params_[names].to_numpy(),
        cov=cph.variance_matrix_.loc[names, names].to_numpy(),
    )
    mine = ph_test(stand_in, *_data(rossi, names), transform)
    np.testing.assert_allclose(mine["statistic"].iloc[:-1], ref_stat[names], rtol=1e-9)
    np.testing.assert_allclose(mine["p_value"].iloc[:-1], ref_p[names], rtol=1e-9)


def test_old_r_convention_fin_age_prio(rossi, rossi_small_fit):
    # PUBLISHED (from memory): Fox & Weisberg appendix, cox.zph: chisq 0.00507, 6.54147,
    # 0.77288 (p 0.9433, 0.0105, 0.3793); GLOBAL 7.13184 remembered, 7.13046 computed
    # (docs/validation.md section 10: MISMATCH, global good to 3 significant figures).
    table = ph_test(rossi_small_fit, *_data(rossi, ROSSI_SMALL), "km_left")
    np.testing.assert_allclose(table["statistic"].iloc[:3], [0.00507, 6.54147, 0.77288], atol=1e-4)
    np.testing.assert_allclose(table["p_value"].iloc[:3], [0.9433, 0.0105, 0.3793], atol=5e-5)
    assert table.loc["global", "statistic"] == pytest.approx(7.13184, abs=5e-3)
    assert table.loc["global", "p_value"] == pytest.approx(0.0679, abs=5e-5)
    assert table.loc["global", "df"] == 3


def test_old_r_convention_full_model(rossi, rossi_fit):
    # docs/validation.md section 10, REFERENCE LIBRARY: lifelines Schoenfeld residuals with a
    # hand-coded 1 - KM(t-) transform: 0.00502, 11.27897, 1.41652, 7.14021, 0.68627, 0.15496,
    # 0.02304; global 17.65862 (7 df).
    table = ph_test(rossi_fit, *_data(rossi, ROSSI_FULL), "km_left")
    expected = [0.00502, 11.27897, 1.41652, 7.14021, 0.68627, 0.15496, 0.02304, 17.65862]
    np.testing.assert_allclose(table["statistic"], expected, atol=1e-3)


def test_lifelines_transforms_of_the_small_model(rossi, rossi_small_fit):
    # docs/validation.md section 10, REFERENCE LIBRARY lifelines: km 0.00004, 6.29397,
    # 0.81672; rank 0.00050, 6.62195, 0.77146; identity 0.00800, 7.24519, 0.68123;
    # log 0.29389, 8.67764, 0.00514.
    expected = {
        "km": [0.00004, 6.29397, 0.81672],
        "rank": [0.00050, 6.62195, 0.77146],
        "identity": [0.00800, 7.24519, 0.68123],
        "log": [0.29389, 8.67764, 0.00514],
    }
    for transform, values in expected.items():
        table = ph_test(rossi_small_fit, *_data(rossi, ROSSI_SMALL), transform)
        np.testing.assert_allclose(table["statistic"].iloc[:3], values, atol=1e-3)


def test_residuals_equal_lifelines_and_sum_to_zero(rossi, rossi_small_fit):
    names = list(ROSSI_SMALL)
    frame = rossi[[*names, "week", "arrest"]]
    cph = CoxPHFitter().fit(frame, "week", "arrest")
    stand_in = replace(
        rossi_small_fit,
        coef=cph.params_[names].to_numpy(),
        cov=cph.variance_matrix_.loc[names, names].to_numpy(),
    )
    raw = schoenfeld_residuals(stand_in, *_data(rossi, names), scaled=False)
    # REFERENCE LIBRARY: lifelines compute_residuals(kind="schoenfeld"), Efron-weighted.
    ref = cph.compute_residuals(frame, "schoenfeld")
    np.testing.assert_allclose(
        raw[names].to_numpy(), ref.loc[raw.index, names].to_numpy(), atol=1e-10
    )
    scaled = schoenfeld_residuals(stand_in, *_data(rossi, names))
    ref_scaled = cph.compute_residuals(frame, "scaled_schoenfeld")
    np.testing.assert_allclose(
        scaled[names].to_numpy(), ref_scaled.loc[scaled.index, names].to_numpy(), atol=1e-9
    )
    # docs/validation.md section 10: the Efron-weighted residuals sum to zero at the Efron
    # estimate, (-1e-7, -7e-6, -2e-6) up to convergence (abs 1e-4).
    own = schoenfeld_residuals(rossi_small_fit, *_data(rossi, names), scaled=False)
    np.testing.assert_allclose(own[names].sum(), 0.0, atol=1e-4)
    assert own["time"].is_monotonic_increasing and len(own) == 114


def test_breslow_residuals_use_plain_risk_set_means(rossi):
    # REFERENCE LIBRARY: statsmodels PHReg.schoenfeld_residuals uses the plain risk-set mean;
    # under Breslow ties that is the right residual. Column sums with plain means at the
    # Efron estimate: (0.0139, 0.4727, -0.5100) (docs/validation.md section 10).
    names = list(ROSSI_SMALL)
    time, event, X = _data(rossi, names)
    fit = fit_cox(time, event, X, names=names, ties="breslow")
    mine = schoenfeld_residuals(fit, time, event, X, scaled=False)
    model = PHReg(time.to_numpy(), X, status=event.to_numpy(), ties="breslow")
    ref = PHRegResults(model, fit.coef, fit.cov).schoenfeld_residuals
    np.testing.assert_allclose(mine[names].to_numpy(), ref[mine.index.to_numpy()], atol=1e-10)
    efron = fit_cox(time, event, X, names=names)
    plain = schoenfeld_residuals(replace(efron, ties="breslow"), time, event, X, scaled=False)
    np.testing.assert_allclose(plain[names].sum(), [0.0139, 0.4727, -0.5100], atol=1e-4)


def test_strata_residuals_are_formed_within_strata(rossi):
    # REFERENCE LIBRARY: lifelines CoxPHFitter(strata=["race"]) compute_residuals.
    names = ["fin", "age", "prio"]
    frame = rossi[[*names, "race", "week", "arrest"]]
    cph = CoxPHFitter().fit(frame, "week", "arrest", strata=["race"])
    time, event, X = _data(rossi, names)
    fit = fit_cox(time, event, X, names=names, strata=rossi["race"].to_numpy())
    stand_in = replace(
        fit,
        coef=cph.params_[names].to_numpy(),
        cov=cph.variance_matrix_.loc[names, names].to_numpy(),
    )
    mine = schoenfeld_residuals(stand_in, time, event, X, strata=rossi["race"], scaled=False)
    ref = cph.compute_residuals(frame, "schoenfeld")
    np.testing.assert_allclose(
        mine[names].to_numpy(), ref.loc[mine.index, names].to_numpy(), atol=1e-10
    )


def test_time_transforms_follow_their_definitions():
    # COMMON PRACTICE definitions: KM of times 1, 2, 2+, 3 is 3/4, 1/2 (after t=2), 0 after
    # t=3; the left-continuous value at t is KM at the previous time.
    time, event = [1.0, 2.0, 2.0, 3.0], [1, 1, 0, 1]
    np.testing.assert_allclose(time_transform(time, event, "km"), [0.25, 0.5, 1.0])
    np.testing.assert_allclose(time_transform(time, event, "km_left"), [0.0, 0.25, 0.5])
    np.testing.assert_allclose(time_transform(time, event, "rank"), [1, 2, 3])
    np.testing.assert_allclose(time_transform(time, event, "log"), np.log([1, 2, 3]))


def test_errors_name_the_problem(rossi, rossi_fit):
    time, event, X = _data(rossi, ROSSI_FULL)
    with pytest.raises(InputError, match="unknown time transform 'square'"):
        ph_test(rossi_fit, time, event, X, "square")
    with pytest.raises(InputError, match="the fit has 7 coefficients but X has 3 columns"):
        ph_test(rossi_fit, time, event, X[:, :3])
    with pytest.raises(InputError, match="there are no events"):
        ph_test(rossi_fit, time, np.zeros(time.size, dtype=int), X)
    with pytest.raises(InputError, match="1 event happened at time 0"):
        time_transform([0.0, 1.0, 2.0], [1, 1, 0], "log")
    with pytest.raises(InputError, match="strata has 1 missing label"):
        ph_test(rossi_fit, time, event, X, strata=[None] + ["a"] * (time.size - 1))


def test_joint_groups_reproduce_single_and_global_statistics(rossi, rossi_small_fit):
    # PUBLISHED (from memory): Fox & Weisberg, cox.zph on fin + age + prio: chisq 0.00507,
    # 6.54147, 0.77288 and GLOBAL 7.13184 (computed 7.13046; docs/validation.md section 10)
    data = _data(rossi, ROSSI_SMALL)
    single = ph_test_groups(rossi_small_fit, *data, ["fin", "age", "prio"], "km_left")
    np.testing.assert_allclose(single["statistic"], [0.00507, 6.54147, 0.77288], atol=1e-4)
    joint = ph_test_groups(rossi_small_fit, *data, ["fin", "x", "x"], "km_left")
    assert joint.loc["x", "df"] == 2 and list(joint.index) == ["fin", "x"]
    everything = ph_test_groups(rossi_small_fit, *data, ["all"] * 3, "km_left")
    assert everything.loc["all", "statistic"] == pytest.approx(7.13184, abs=5e-3)
    # a two-column group is not the sum of its single statistics (they are correlated)
    assert joint.loc["x", "statistic"] != pytest.approx(6.54147 + 0.77288, abs=1e-3)


def test_smooth_of_proportional_data_averages_to_the_coefficient():
    # simulation with a known truth: proportional hazards, one binary covariate with log HR
    # 0.254 (the case in which a robust smoother sat near -0.47). The least-squares smooth
    # averages to the coefficient (the score is zero at the estimate) and its band covers the
    # coefficient line; statsmodels' robust lowess (its default iterations) does not.
    lowess = pytest.importorskip("statsmodels.nonparametric.smoothers_lowess").lowess
    rng = np.random.default_rng(2026)
    n = 3000
    x = (rng.random(n) < 0.3).astype(float)
    t = rng.exponential(1 / (0.002 * np.exp(0.254 * x)))
    c = rng.uniform(0, 900, n)
    time, event = np.ceil(np.minimum(t, c)), (t <= c).astype(int)
    fit = fit_cox(time, event, x[:, None], names=["x"])
    res = schoenfeld_residuals(fit, time, event, x[:, None])
    beta_t = res["x"].to_numpy() + fit.coef[0]
    smooth = beta_smooth(res["time"], beta_t)
    assert smooth.attrs["mean_fit"] == pytest.approx(fit.coef[0], abs=1e-6)
    assert ((smooth["lower"] <= fit.coef[0]) & (fit.coef[0] <= smooth["upper"])).mean() > 0.9
    # REFERENCE LIBRARY statsmodels OLS on the same basis gives the same fitted values
    sm = pytest.importorskip("statsmodels.api")
    from casemix.data.design import natural_spline_basis

    knots = np.unique(np.quantile(res["time"], np.linspace(0.05, 0.95, 4)))
    B = sm.add_constant(natural_spline_basis(res["time"].to_numpy(), knots))
    ols = sm.OLS(beta_t, B).fit()
    G = sm.add_constant(natural_spline_basis(smooth["time"].to_numpy(), knots))
    pred = ols.get_prediction(G).summary_frame(alpha=0.05)
    np.testing.assert_allclose(smooth["fit"], pred["mean"], rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(smooth["upper"], pred["mean_ci_upper"], rtol=1e-6, atol=1e-6)
    robust = lowess(beta_t, res["time"], frac=0.4)[:, 1].mean()
    # the robust smooth follows the larger cluster (0.23 below the coefficient with this seed)
    assert abs(robust - fit.coef[0]) > 0.15
