"""Calibration tables and regressions against closed forms, scipy and a known-truth simulation."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from audit_helpers import ROSSI_FULL
from scipy import optimize, stats

from casemix.audit import (
    calibration_by_group,
    calibration_by_horizon,
    calibration_by_risk,
    calibration_by_size,
    calibration_regression,
)
from casemix.errors import InputError
from casemix.survival import fit_cox


def _rossi_arrays(rossi, fit):
    X = rossi[list(ROSSI_FULL)].to_numpy(float)
    return X, fit.expected_events(rossi["week"], X), fit.linear_predictor(X)


def test_group_table_uses_garwood_limits():
    table = calibration_by_group(
        [1, 0, 1, 1, 0], [0.5, 0.3, 0.8, 1.1, 0.2], ["b", "a", "b", "a", "a"]
    )
    assert list(table["group"]) == ["a", "b"]
    np.testing.assert_allclose(table["expected"], [1.6, 1.3])
    # docs/validation.md section 6, Garwood 95%: O = 1 (0.0253, 5.5716); O = 2 (0.2422, 7.2247)
    np.testing.assert_allclose(table["oe_lower"], [0.0253 / 1.6, 0.2422 / 1.3], atol=5e-5)
    np.testing.assert_allclose(table["oe_upper"], [5.5716 / 1.6, 7.2247 / 1.3], atol=5e-5)


def test_deciles_on_rossi_add_up(rossi, rossi_fit):
    _, e, lp = _rossi_arrays(rossi, rossi_fit)
    table = calibration_by_risk(rossi["arrest"], e, lp)
    # docs/validation.md section 4: on the fitting data sum E = sum O = 114 (Breslow property)
    assert table["observed"].sum() == 114 and table["expected"].sum() == pytest.approx(
        114, abs=1e-8
    )
    # decile membership from pandas.qcut directly (REFERENCE LIBRARY pandas)
    expected_sizes = pd.Series(pd.qcut(lp, 10, labels=False)).value_counts().sort_index()
    assert list(table["units"]) == list(expected_sizes)
    assert (table["risk_low"].diff().dropna() > 0).all()


def test_in_the_large_is_the_overall_ratio_and_slope_matches_scipy(rossi, rossi_fit):
    _, e, lp = _rossi_arrays(rossi, rossi_fit)
    o = rossi["arrest"].to_numpy()
    e_half = e * np.exp(-0.4 * (lp - lp.mean()))  # a deliberately too-flat risk gradient
    table = calibration_regression(o, e_half, lp)
    # closed form (COMMON PRACTICE: Poisson score equation with only an intercept):
    # exp(a) = sum O / sum E.
    assert table.loc["in_the_large", "estimate"] == pytest.approx(o.sum() / e_half.sum(), rel=1e-8)

    # REFERENCE LIBRARY: scipy.optimize on the Poisson log-likelihood written out here
    # (log mu = a + b lp + log E - lp).
    def nll(theta):
        mu = np.exp(theta[0] + theta[1] * lp + np.log(e_half) - lp)
        return mu.sum() - o @ np.log(mu)

    best = optimize.minimize(nll, [0.0, 1.0], method="BFGS", options={"gtol": 1e-10})
    assert table.loc["slope", "estimate"] == pytest.approx(best.x[1], abs=1e-5)
    # flattening lp by 0.4 makes E's gradient 0.6 of the model's, so the slope comes out
    # above 1 (about 1 / 0.6 of the full model's slope, which is close to 1 here)
    assert table.loc["slope", "estimate"] > 1.3
    assert table.loc["in_the_large", "recipients"] == 432


def test_simulated_slope_recovers_known_truth():
    # simulation with a known truth: exponential times with hazard exp(x), expected events
    # computed with the true cumulative hazard t * exp(x / 2): slope 2 by construction.
    rng = np.random.default_rng(3)
    x = rng.normal(size=20_000)
    t_event = rng.exponential(np.exp(-x))
    t = np.minimum(t_event, 1.0)
    event = (t_event <= 1.0).astype(int)
    table = calibration_regression(event, t * np.exp(x / 2), x / 2)
    lo, hi = table.loc["slope", ["lower", "upper"]]
    assert lo < 2.0 < hi and hi - lo < 0.15


def test_by_horizon_on_the_fitting_data(rossi, rossi_fit):
    X, _, _ = _rossi_arrays(rossi, rossi_fit)
    table = calibration_by_horizon(rossi_fit, rossi["week"], rossi["arrest"], X, [52, 26])
    assert list(table["horizon"]) == [26.0, 52.0]
    # the Breslow property holds at every cut: E(26) = O(26) on the fitting data
    # (docs/validation.md section 4); O(26) = (1 - 0.875) * 432 = 54 (section 1.3: S(26)).
    assert list(table["observed"]) == [54, 114]
    np.testing.assert_allclose(table["oe_ratio"], [1.0, 1.0], atol=1e-10)


def test_by_size_groups_thirds():
    programs = pd.DataFrame(
        {
            "program": list("abcdef"),
            "recipients": [50, 5, 20, 8, 100, 30],
            "observed": [4, 1, 2, 0, 9, 3],
            "expected": [5.0, 0.5, 2.0, 1.0, 10.0, 3.0],
        }
    )
    table = calibration_by_size(programs)
    assert list(table["size"]) == ["small", "medium", "large"]
    assert list(table["recipients_low"]) == [5, 20, 50]
    np.testing.assert_allclose(table["oe_ratio"], [1 / 1.5, 5 / 5.0, 13 / 15.0])
    np.testing.assert_allclose(
        table["oe_upper"], stats.chi2.ppf(0.975, 2 * table["observed"] + 2) / 2 / table["expected"]
    )


@pytest.mark.parametrize("n", [3, 8, 10, 16, 31, 60])
def test_size_thirds_are_qcut_thirds_with_exact_edges(n):
    # Reference: pandas.qcut on the ranks 1..n (linear quantiles, right-closed bins), with
    # its edges 1 + j (n - 1) / 3 moved just above any rank they fall on: there qcut's answer
    # depends on floating-point rounding (n = 16, edges 6 and 11: pandas 2 puts rank 6 in the
    # middle third, pandas 3 in the first) and the exact rule keeps the rank in the lower bin.
    sizes = np.random.default_rng(n).permutation(np.arange(10, 10 + 7 * n, 7))
    programs = pd.DataFrame({"program": [f"p{i}" for i in range(n)], "recipients": sizes,
                             "observed": np.ones(n, int), "expected": np.ones(n)})
    table = calibration_by_size(programs)
    rank = pd.Series(sizes).rank(method="first").to_numpy()
    edges = 1 + np.arange(4) * (n - 1) / 3 + 1e-9  # an edge on a rank keeps it below
    edges[0], edges[3] = 0, n + 1
    reference = pd.cut(rank, edges, labels=False)
    assert list(table["units"]) == list(np.bincount(reference, minlength=3))
    if n == 16:
        assert list(table["units"]) == [6, 5, 5]


def test_events_with_no_expected_risk_are_counted_not_fatal():
    # a cohort failure earlier than any reference event (E = 0) cannot enter a log-E
    # regression: it is left out and counted. REFERENCE LIBRARY statsmodels GLM (Poisson,
    # offset log E) on the other recipients gives the same estimate.
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(11)
    e = rng.uniform(0.05, 0.6, 300)
    o = rng.poisson(e).clip(max=1)
    lp = np.log(e) + rng.normal(0, 0.1, 300)
    table = calibration_regression(np.r_[1, o], np.r_[0.0, e], np.r_[0.0, lp])
    assert table["events_without_risk"].tolist() == [1, 1]
    assert table["recipients"].iloc[0] == 300
    glm = sm.GLM(o, np.ones((300, 1)), family=sm.families.Poisson(), offset=np.log(e)).fit()
    assert table.loc["in_the_large", "estimate"] == pytest.approx(np.exp(glm.params[0]), rel=1e-9)


def test_errors():
    with pytest.raises(InputError, match="groups must be between 2"):
        calibration_by_risk([1, 0], [0.5, 0.5], [0.1, 0.2], groups=5)
    with pytest.raises(InputError, match=r"lacks column\(s\) \['expected'\]"):
        calibration_by_size(pd.DataFrame({"program": [], "recipients": [], "observed": []}))
    fit = fit_cox([1.0, 2.0, 3.0, 4.0], [1, 1, 0, 1], [[0.0], [1.0], [0.0], [1.0]])
    with pytest.raises(
        InputError, match=r"horizon 9 lies outside the follow-up of these data \(0 to 4\)"
    ):
        calibration_by_horizon(
            fit, [1.0, 2.0, 3.0, 4.0], [1, 1, 0, 1], [[0.0], [1.0], [0.0], [1.0]], [9]
        )
