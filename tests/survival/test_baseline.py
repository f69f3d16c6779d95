"""Tests of the Breslow baseline cumulative hazard and of expected events per subject.

Reference values: docs/validation.md sections 4 and 5 (lifelines baseline read as a step
function, scikit-survival, hand Breslow sums), or lifelines / statsmodels computed in the test.
Neither statsmodels' raw baseline (one step late) nor lifelines' interpolated
``predict_cumulative_hazard(times=...)`` is used as the truth (docs/validation.md, Conventions).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from oracles import LIFELINES_MISSING

pytest.importorskip("lifelines", reason=LIFELINES_MISSING)
from lifelines import CoxPHFitter
from lifelines.datasets import load_rossi
from statsmodels.duration.hazard_regression import PHReg

from casemix.errors import InputError
from casemix.survival import BaselineHazard, fit_cox

ROSSI_COVARIATES = ("fin", "age", "race", "wexp", "mar", "paro", "prio")
MODEL_A = ("age", "wexp", "mar", "paro", "prio")
MODEL_B = ("age", "race", "wexp", "mar", "paro", "prio")
CHECK_WEEKS = np.array([1.0, 2.0, 8.0, 10.0, 20.0, 26.0, 30.0, 40.0, 52.0])


def _arrays(frame: pd.DataFrame, covariates=ROSSI_COVARIATES):
    return (
        frame["week"].to_numpy(dtype=float),
        frame["arrest"].to_numpy(dtype=int),
        frame[list(covariates)].to_numpy(dtype=float),
    )


@pytest.fixture(scope="module")
def rossi():
    return load_rossi()


@pytest.fixture(scope="module")
def full_fit(rossi):
    time, event, X = _arrays(rossi)
    return fit_cox(time, event, X, ties="efron", names=ROSSI_COVARIATES)


def _tight_lifelines(frame, **kwargs) -> CoxPHFitter:
    # lifelines' default stopping rule leaves coefficients ~4e-5 from the optimum; tighten it.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return CoxPHFitter().fit(
            frame, "week", "arrest", fit_options={"precision": 1e-12}, **kwargs
        )


def _step_read(index: np.ndarray, values: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Last tabulated value at or before t (0 before the first): a step read, no interpolation."""
    idx = np.searchsorted(index, t, side="right") - 1
    return np.where(idx >= 0, values[np.clip(idx, 0, None)], 0.0)


# --------------------------------------------------------------------------------------------
# Baseline step values, both centrings
# --------------------------------------------------------------------------------------------


def test_baseline_at_center_quoted_values(full_fit):
    # REFERENCE LIBRARY: lifelines 0.30.3 baseline_cumulative_hazard_ (step read), equal to a
    # hand Breslow sum to 3e-17 (docs/validation.md section 4, "Breslow H0 at covariate means")
    expected = [0.001958, 0.003922, 0.023800, 0.029885, 0.083775, 0.115918, 0.130213,
                0.193511, 0.274373]
    # tolerance: rel 1e-5 as listed, or half a unit of the printed 6th decimal if larger
    np.testing.assert_allclose(full_fit.cumulative_hazard(CHECK_WEEKS), expected, rtol=1e-5,
                               atol=5e-7)
    np.testing.assert_allclose(full_fit.baselines[0].at(CHECK_WEEKS), expected, rtol=1e-5,
                               atol=5e-7)
    # same source: baseline survival at week 52 is 0.760049
    assert np.exp(-full_fit.cumulative_hazard(52.0)[0]) == pytest.approx(0.760049, abs=5e-7)


def test_baseline_at_zero_quoted_values(full_fit):
    # REFERENCE LIBRARY: sksurv 0.28.0 cum_baseline_hazard_; lifelines value x exp(-beta.xbar)
    # (docs/validation.md section 4, "Breslow H0 at x = 0")
    expected = [0.006803, 0.013627, 0.082691, 0.103832, 0.291071, 0.402750, 0.452419,
                0.672342, 0.953292]
    at_zero = full_fit.cumulative_hazard(CHECK_WEEKS, at_zero=True)
    np.testing.assert_allclose(at_zero, expected, rtol=1e-5, atol=5e-7)


def test_centring_conversion_factor(full_fit):
    # docs/validation.md Conventions 1: on rossi beta.xbar = -1.2454336, factor 3.4744410
    assert full_fit.coef @ full_fit.center == pytest.approx(-1.2454336, abs=5e-6)
    ratio = full_fit.cumulative_hazard(CHECK_WEEKS, at_zero=True) / full_fit.cumulative_hazard(
        CHECK_WEEKS
    )
    np.testing.assert_allclose(ratio, 3.4744410, rtol=5e-6)
    # both conversions of one subject's expected count agree (H0 at center x rr = H0 at 0 x e^xb)
    X = load_rossi()[list(ROSSI_COVARIATES)].to_numpy(dtype=float)
    at_zero = full_fit.cumulative_hazard(np.full(len(X), 20.0), at_zero=True) * np.exp(
        full_fit.linear_predictor(X)
    )
    np.testing.assert_allclose(full_fit.expected_events(np.full(len(X), 20.0), X), at_zero,
                               rtol=1e-12)


def test_baseline_matches_lifelines_at_every_event_time(rossi, full_fit):
    ref = _tight_lifelines(rossi)  # REFERENCE LIBRARY: lifelines, computed here
    table = ref.baseline_cumulative_hazard_.iloc[:, 0]
    baseline = full_fit.baselines[0]
    event_times = np.unique(rossi.loc[rossi["arrest"] == 1, "week"].to_numpy(dtype=float))
    np.testing.assert_array_equal(baseline.times, event_times)
    assert baseline.times.size == 49  # docs/validation.md 3.1: 49 distinct event times
    np.testing.assert_allclose(baseline.cumhaz, table.loc[event_times].to_numpy(), rtol=1e-7)
    assert baseline.last_time == 52.0


def test_breslow_ties_baseline_against_shifted_statsmodels(rossi):
    """statsmodels' Breslow baseline (x = 0) is one failure time late (docs/validation.md,
    Conventions 2): its value at the (k+1)-th failure time is the right-continuous H0 at the
    k-th. Shifted back, it is an outside reference for the Breslow-ties fit."""
    time, event, X = _arrays(rossi)
    ref = PHReg(time, X, status=event, ties="breslow").fit()  # REFERENCE LIBRARY: statsmodels
    sm_times, sm_cumhaz, _ = ref.baseline_cumulative_hazard[0]
    fit = fit_cox(time, event, X, ties="breslow")
    ours = fit.cumulative_hazard(sm_times, at_zero=True)
    np.testing.assert_allclose(ours[:-1], sm_cumhaz[1:], rtol=1e-6)
    assert not np.allclose(ours, sm_cumhaz, rtol=1e-3)  # the one-step-late values are wrong


def test_step_function_conventions(full_fit):
    baseline = full_fit.baselines[0]
    assert isinstance(baseline, BaselineHazard)
    # right-continuous step: 0 before the first event time, the jump at a time included, flat
    # in between (lifelines' table read as a step function, docs/validation.md section 4)
    values = baseline.at([0.0, 0.5, 1.0, 1.5, 1.999, 2.0])
    np.testing.assert_allclose(values, [0, 0, 0.001958, 0.001958, 0.001958, 0.003922],
                               rtol=0, atol=5e-7)
    assert values[2] == values[3] == values[4] > 0
    assert baseline.at(52.0)[0] == pytest.approx(0.274373, rel=1e-5)


def test_refuses_times_beyond_follow_up(full_fit):
    with pytest.raises(InputError, match=r"(?s)(?=.*52)(?=.*(beyond|after|past))"):
        full_fit.cumulative_hazard([10.0, 53.0])
    with pytest.raises(InputError, match=r"(?s)(?=.*52)(?=.*(beyond|after|past))"):
        full_fit.baselines[0].at(60.0)
    X = load_rossi()[list(ROSSI_COVARIATES)].to_numpy(dtype=float)[:2]
    with pytest.raises(InputError, match="52"):
        full_fit.expected_events([20.0, 80.0], X)
    # allowed explicitly: held at the last value (docs/validation.md section 4: H0(52) = 0.274373)
    held = full_fit.cumulative_hazard([53.0, 500.0], allow_beyond=True)
    np.testing.assert_allclose(held, 0.274373, rtol=1e-5)
    held_e = full_fit.expected_events([20.0, 80.0], X, allow_beyond=True)
    np.testing.assert_allclose(held_e[1], 0.274373 * full_fit.relative_risk(X[1:])[0], rtol=1e-5)


# --------------------------------------------------------------------------------------------
# Expected events on the fitting data
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("ties", ["efron", "breslow"])
def test_sum_expected_equals_observed(rossi, ties):
    # COMMON PRACTICE: property of the Breslow estimator at any beta; on rossi sum E = 114
    # (docs/validation.md section 4; lifelines martingale residuals sum to -1.4e-14)
    time, event, X = _arrays(rossi)
    fit = fit_cox(time, event, X, ties=ties)
    assert fit.expected_events(time, X).sum() == pytest.approx(114.0, abs=1e-8)


def test_row_zero_expected_count(full_fit):
    # REFERENCE LIBRARY: lifelines martingale residuals (E = event - residual) and sksurv
    # predict_cumulative_hazard_function at t = 20: E = 0.102132, residual 0.897868
    # (docs/validation.md section 4; rossi row 0: week 20, arrested)
    X = load_rossi()[list(ROSSI_COVARIATES)].to_numpy(dtype=float)[:1]
    assert full_fit.expected_events([20.0], X)[0] == pytest.approx(0.102132, rel=1e-5)


def test_expected_events_equal_lifelines_martingale(rossi, full_fit):
    ref = _tight_lifelines(rossi)  # REFERENCE LIBRARY: lifelines, computed here
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        residuals = ref.compute_residuals(rossi, "martingale")
    residuals = residuals.sort_index()
    expected = residuals["arrest"].astype(float) - residuals["martingale"]
    time, _, X = _arrays(rossi)
    np.testing.assert_allclose(full_fit.expected_events(time, X), expected.to_numpy(), rtol=1e-6)


@pytest.mark.parametrize(
    ("ties", "by", "expected"),
    [
        # REFERENCE LIBRARY: lifelines and hand Breslow (docs/validation.md section 5, model A)
        ("efron", "fin", {0: 55.7993, 1: 58.2007}),
        ("efron", "race", {0: 15.2347, 1: 98.7653}),
        # REFERENCE LIBRARY: statsmodels (Breslow) + hand Breslow baseline (section 5)
        ("breslow", "fin", {0: 55.7986, 1: 58.2014}),
        ("breslow", "race", {0: 15.2310, 1: 98.7690}),
    ],
)
def test_group_expected_model_a(rossi, ties, by, expected):
    time, event, X = _arrays(rossi, MODEL_A)
    fit = fit_cox(time, event, X, ties=ties, names=MODEL_A)
    values = fit.expected_events(time, X)
    for level, total in expected.items():
        rows = rossi[by].to_numpy() == level
        assert values[rows].sum() == pytest.approx(total, rel=1e-5)


# --------------------------------------------------------------------------------------------
# Reference population -> evaluation cohort (model B)
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def model_b(rossi):
    reference = rossi[rossi["fin"] == 0]
    cohort = rossi[rossi["fin"] == 1]
    return reference, cohort


@pytest.mark.parametrize(
    ("ties", "expected"),
    [
        # REFERENCE LIBRARY: hand Breslow step evaluation = lifelines baseline read as a step
        # function, 74.74057 (docs/validation.md section 5; lifelines' interpolating
        # predict_cumulative_hazard(times=) would give 74.82251, which is wrong)
        ("efron", 74.7406),
        # same source, Breslow ties: 74.7211
        ("breslow", 74.7211),
    ],
)
def test_reference_to_cohort(model_b, ties, expected):
    reference, cohort = model_b
    time, event, X = _arrays(reference, MODEL_B)
    fit = fit_cox(time, event, X, ties=ties, names=MODEL_B)
    assert (fit.n, fit.n_events) == (216, 66)  # docs/validation.md section 5
    # the reference population's own E equals its O = 66 (COMMON PRACTICE Breslow property)
    assert fit.expected_events(time, X).sum() == pytest.approx(66.0, abs=1e-8)
    c_time, c_event, c_X = _arrays(cohort, MODEL_B)
    assert c_event.sum() == 48
    assert fit.expected_events(c_time, c_X).sum() == pytest.approx(expected, rel=1e-5)


def test_model_b_coefficients(model_b):
    # REFERENCE LIBRARY: lifelines = statsmodels (docs/validation.md section 5, model B)
    reference, _ = model_b
    time, event, X = _arrays(reference, MODEL_B)
    fit = fit_cox(time, event, X, names=MODEL_B)
    np.testing.assert_allclose(
        fit.coef, [-0.021285, 0.351932, -0.190559, -0.489512, -0.334676, 0.122538], atol=1e-5
    )
    assert fit.loglik == pytest.approx(-333.715389, abs=1e-6)


def test_horizon_truncated_expected(model_b):
    # hand Breslow on the lifelines fit (docs/validation.md section 5): time = min(week, 26),
    # event only for an arrest at <= 26 weeks -> O = 22, E = 34.1238
    reference, cohort = model_b
    fit = fit_cox(*_arrays(reference, MODEL_B), names=MODEL_B)
    c_time, c_event, c_X = _arrays(cohort, MODEL_B)
    horizon_time = np.minimum(c_time, 26.0)
    assert int((c_event * (c_time <= 26)).sum()) == 22
    assert fit.expected_events(horizon_time, c_X).sum() == pytest.approx(34.1238, rel=1e-5)


def test_expected_survival_at_horizons(model_b):
    # REFERENCE LIBRARY: lifelines / sksurv predict_survival_function, hand (docs/validation.md
    # section 5): mean predicted survival 0.849889 at 26 and 0.690845 at 52 weeks;
    # H0_ref(26 | x=0) = 0.179476, H0_ref(52 | x=0) = 0.426239
    reference, cohort = model_b
    fit = fit_cox(*_arrays(reference, MODEL_B), names=MODEL_B)
    _, _, c_X = _arrays(cohort, MODEL_B)
    n = len(c_X)
    assert fit.survival(np.full(n, 26.0), c_X).mean() == pytest.approx(0.849889, rel=1e-6)
    assert fit.survival(np.full(n, 52.0), c_X).mean() == pytest.approx(0.690845, rel=1e-6)
    np.testing.assert_allclose(
        fit.cumulative_hazard([26.0, 52.0], at_zero=True), [0.179476, 0.426239], rtol=1e-5
    )


# --------------------------------------------------------------------------------------------
# Strata, weights, time 0
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def stratified(rossi):
    covariates = ("fin", "age", "race", "mar", "paro", "prio")
    labels = np.where(rossi["wexp"].to_numpy() == 1, "worked", "never").astype(object)
    time, event, X = _arrays(rossi, covariates)
    fit = fit_cox(time, event, X, strata=labels, names=covariates)
    return fit, time, event, X, labels, covariates


def test_stratified_baselines_match_lifelines(rossi, stratified):
    fit, time, event, _, labels, covariates = stratified
    # REFERENCE LIBRARY: lifelines CoxPHFitter(strata=["wexp"]); its baselines are at the
    # overall covariate means (lifelines _norm_mean), as ours
    frame = rossi[["week", "arrest", "wexp", *covariates]]
    ref = _tight_lifelines(frame, strata=["wexp"])
    np.testing.assert_allclose(fit.center, ref._norm_mean.to_numpy(), rtol=1e-12)
    assert fit.strata_levels == ("never", "worked")
    for level, code in (("never", 0), ("worked", 1)):
        baseline = fit.baselines[fit.strata_levels.index(level)]
        in_stratum = labels == level
        np.testing.assert_array_equal(
            baseline.times, np.unique(time[in_stratum & (event == 1)])
        )
        table = ref.baseline_cumulative_hazard_[code]
        np.testing.assert_allclose(baseline.cumhaz, table.loc[baseline.times].to_numpy(),
                                   rtol=1e-7)
        assert baseline.last_time == time[in_stratum].max()


def test_stratified_expected_sums_per_stratum(stratified):
    fit, time, event, X, labels, _ = stratified
    values = fit.expected_events(time, X, labels)
    for level in fit.strata_levels:
        rows = labels == level
        # COMMON PRACTICE: the Breslow property holds within each stratum
        assert values[rows].sum() == pytest.approx(event[rows].sum(), abs=1e-8)


def test_stratified_model_needs_known_strata(stratified):
    fit, time, _, X, labels, _ = stratified
    with pytest.raises(InputError, match=r"(?i)(?=.*stratif)(?=.*never)"):
        fit.expected_events(time, X)
    with pytest.raises(InputError, match=r"(?s)(?=.*retired)(?=.*never)"):
        fit.expected_events(time[:2], X[:2], np.array(["never", "retired"], dtype=object))
    unstratified = fit_cox(time, labels == "never", X)
    with pytest.raises(InputError, match=r"(?i)strat"):
        unstratified.expected_events(time, X, labels)


def test_weighted_baseline_matches_lifelines(rossi):
    weights = np.random.default_rng(20240611).uniform(0.5, 2.0, len(rossi))
    # REFERENCE LIBRARY: lifelines CoxPHFitter(weights_col=..., robust=False), computed here
    ref = _tight_lifelines(rossi.assign(w=weights), weights_col="w", robust=False)
    time, event, X = _arrays(rossi)
    fit = fit_cox(time, event, X, weights=weights)
    # lifelines centres at the unweighted means, we at the weighted ones: compare at x = 0
    lifelines_means = ref._norm_mean.to_numpy()
    np.testing.assert_allclose(lifelines_means, X.mean(axis=0), rtol=1e-12)
    table = ref.baseline_cumulative_hazard_.iloc[:, 0] * np.exp(
        -lifelines_means @ ref.params_.to_numpy()
    )
    times = fit.baselines[0].times
    np.testing.assert_allclose(
        fit.cumulative_hazard(times, at_zero=True), table.loc[times].to_numpy(), rtol=1e-6
    )
    # COMMON PRACTICE: weighted Breslow property, sum w E = sum w d
    expected = fit.expected_events(time, X)
    assert weights @ expected == pytest.approx(weights @ event, rel=1e-10)


def test_time_zero_jump_included(rossi):
    frame = rossi.assign(week=np.where(rossi["week"] <= 2, 0, rossi["week"]))
    ref = _tight_lifelines(frame)  # REFERENCE LIBRARY: lifelines, computed here
    time, event, X = _arrays(frame)
    fit = fit_cox(time, event, X)
    h0 = ref.baseline_cumulative_hazard_.iloc[:, 0]
    assert h0.index[0] == 0.0
    # the two failures at time 0 give the baseline a jump at 0 (lifelines: about 0.003916)
    assert fit.cumulative_hazard(0.0)[0] == pytest.approx(h0.iloc[0], rel=1e-7)
    assert fit.cumulative_hazard(0.0)[0] > 0
    zero_rows = time == 0
    assert (fit.expected_events(time, X)[zero_rows] > 0).all()
    assert fit.expected_events(time, X).sum() == pytest.approx(114.0, abs=1e-8)


# --------------------------------------------------------------------------------------------
# Bad input to expected_events
# --------------------------------------------------------------------------------------------


def test_expected_events_refuses_nan_covariates(full_fit):
    X = load_rossi()[list(ROSSI_COVARIATES)].to_numpy(dtype=float)[:4].copy()
    X[2, 1] = np.nan
    with pytest.raises(InputError, match=r"(?is)(?=.*\bage\b)(?=.*(nan|missing))"):
        full_fit.expected_events(np.full(4, 10.0), X)


def test_expected_events_refuses_bad_times(full_fit):
    X = load_rossi()[list(ROSSI_COVARIATES)].to_numpy(dtype=float)[:3]
    with pytest.raises(InputError, match=r"(?s)(?=.*time)(?=.*\b3\b)"):
        full_fit.expected_events(np.full(2, 10.0), X)
    with pytest.raises(InputError, match=r"(?i)negative"):
        full_fit.expected_events(np.array([1.0, -1.0, 2.0]), X)
    with pytest.raises(InputError, match=r"(?i)nan"):
        full_fit.expected_events(np.array([1.0, np.nan, 2.0]), X)


def test_expected_events_refuses_wrong_width(full_fit):
    X = load_rossi()[list(ROSSI_COVARIATES)].to_numpy(dtype=float)[:3, :5]
    with pytest.raises(InputError, match=r"\b7\b"):
        full_fit.expected_events(np.full(3, 10.0), X)
