"""Tests of ``casemix.survival.kaplan_meier`` against published tables and lifelines.

Reference values: docs/validation.md section 1, or lifelines ``KaplanMeierFitter`` computed in
the test on the datasets shipped in ``lifelines.datasets``.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from oracles import lazy

from casemix.errors import InputError
from casemix.survival import KaplanMeier, kaplan_meier

KaplanMeierFitter = lazy("lifelines", "KaplanMeierFitter")
load_leukemia = lazy("lifelines.datasets", "load_leukemia")
load_lung = lazy("lifelines.datasets", "load_lung")
load_rossi = lazy("lifelines.datasets", "load_rossi")

EVENT_WEEKS = np.array([6.0, 7.0, 10.0, 13.0, 16.0, 22.0, 23.0])


def _arm(rx: int):
    frame = load_leukemia()
    arm = frame[frame["Rx"] == rx]
    return arm["t"].to_numpy(dtype=float), arm["status"].to_numpy(dtype=int)


@pytest.fixture(scope="module")
def six_mp() -> KaplanMeier:
    time, event = _arm(0)  # Rx = 0 is the 6-MP arm (docs/validation.md section 1)
    return kaplan_meier(time, event)


def _lifelines(time, event, weights=None, alpha=0.05) -> KaplanMeierFitter:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # lifelines' note about non-integer weights
        return KaplanMeierFitter(alpha=alpha).fit(time, event, weights=weights)


def test_six_mp_data_as_published():
    # Freireich et al. 1963 / Gehan 1965 as listed in docs/validation.md section 1: 21
    # subjects, 9 remissions ended
    time, event = _arm(0)
    assert time.size == 21 and event.sum() == 9


def test_six_mp_table(six_mp):
    # distinct observed times of the 6-MP arm (events and censorings, docs/validation.md 1)
    np.testing.assert_array_equal(
        six_mp.times, [6, 7, 9, 10, 11, 13, 16, 17, 19, 20, 22, 23, 25, 32, 34, 35]
    )
    rows = np.searchsorted(six_mp.times, EVENT_WEEKS)
    # REFERENCE LIBRARY: lifelines event_table, statsmodels summary (docs/validation.md 1.1):
    # a subject censored at an event time (6+) is still at risk at that time
    np.testing.assert_array_equal(six_mp.at_risk[rows], [21, 17, 15, 12, 11, 7, 6])
    np.testing.assert_array_equal(six_mp.events[rows], [3, 1, 1, 1, 1, 1, 1])
    assert six_mp.censored[0] == 1  # the 6+
    assert six_mp.censored.sum() == 12
    assert six_mp.level == 0.95


def test_six_mp_survival(six_mp):
    # PUBLISHED (from memory; verified): Klein & Moeschberger, Survival Analysis, 2nd ed.,
    # Example 4.1 / Table 4.1A (0.857, 0.807, 0.753, 0.690, 0.627, 0.538, 0.448); values to 6
    # decimals from lifelines / statsmodels / sksurv, identical (docs/validation.md 1.1)
    expected = [0.857143, 0.806723, 0.752941, 0.690196, 0.627451, 0.537815, 0.448179]
    np.testing.assert_allclose(six_mp.at(EVENT_WEEKS), expected, rtol=0, atol=5e-7)
    # closed form: product of (1 - d/n) -> 18/21 * 16/17 * 14/15 * 11/12 * 10/11 * 6/7 * 5/6
    assert six_mp.at(23.0)[0] == pytest.approx(
        18 / 21 * 16 / 17 * 14 / 15 * 11 / 12 * 10 / 11 * 6 / 7 * 5 / 6, rel=1e-12
    )
    # flat 0.448179 to 35, the last observed time
    np.testing.assert_allclose(six_mp.at([25.0, 34.9, 35.0]), 0.448179, atol=5e-7)


def test_six_mp_greenwood(six_mp):
    # PUBLISHED (from memory; verified): Klein & Moeschberger Table 4.1A (0.0764, 0.0869, ...);
    # 6 decimals from statsmodels SurvfuncRight surv_prob_se (docs/validation.md 1.1)
    expected = [0.076360, 0.086935, 0.096350, 0.106815, 0.114054, 0.128234, 0.134591]
    rows = np.searchsorted(six_mp.times, EVENT_WEEKS)
    np.testing.assert_allclose(six_mp.se[rows], expected, rtol=1e-5, atol=5e-7)


def test_six_mp_loglog_limits(six_mp):
    # REFERENCE LIBRARY: lifelines confidence_interval_, sksurv conf_type="log-log", by hand
    # (docs/validation.md 1.1)
    lower = [0.6197, 0.5631, 0.5032, 0.4316, 0.3675, 0.2678, 0.1881]
    upper = [0.9516, 0.9228, 0.8894, 0.8491, 0.8049, 0.7468, 0.6801]
    rows = np.searchsorted(six_mp.times, EVENT_WEEKS)
    np.testing.assert_allclose(six_mp.lower[rows], lower, rtol=0, atol=5e-5)
    np.testing.assert_allclose(six_mp.upper[rows], upper, rtol=0, atol=5e-5)


@pytest.mark.parametrize("level", [0.95, 0.90, 0.99])
def test_limits_match_lifelines(level):
    time, event = _arm(0)
    ref = _lifelines(time, event, alpha=1 - level)  # REFERENCE LIBRARY: lifelines
    km = kaplan_meier(time, event, level=level)
    band = ref.confidence_interval_.loc[km.times].to_numpy()
    np.testing.assert_allclose(km.survival, ref.survival_function_.loc[km.times].iloc[:, 0],
                               rtol=1e-12)
    np.testing.assert_allclose(km.lower, band[:, 0], rtol=1e-9)
    np.testing.assert_allclose(km.upper, band[:, 1], rtol=1e-9)
    assert km.level == level


def test_step_conventions(six_mp):
    # right-continuous step read (docs/validation.md 1.1): 1 before the first time, the drop at
    # a time included, held between times, undefined (NaN) past the last observed time (35)
    values = six_mp.at([0.0, 5.999, 6.0, 6.5, 35.0, 35.001, 100.0])
    np.testing.assert_allclose(values[:5], [1.0, 1.0, 0.857143, 0.857143, 0.448179], atol=5e-7)
    assert np.isnan(values[5:]).all()


def test_placebo_arm():
    # REFERENCE LIBRARY: statsmodels SurvfuncRight (docs/validation.md 1.1, placebo); with no
    # censoring S(t) is the fraction still in remission and Greenwood's SE the binomial SE
    time, event = _arm(1)
    km = kaplan_meier(time, event)
    weeks = [1, 2, 3, 4, 5, 8, 11, 12, 15, 17, 22]
    surv = [0.904762, 0.809524, 0.761905, 0.666667, 0.571429, 0.380952, 0.285714, 0.190476,
            0.142857, 0.095238, 0.047619]
    se = [0.064056, 0.085689, 0.092943, 0.102869, 0.107990, 0.105971, 0.098581, 0.085689,
          0.076360, 0.064056, 0.046471]
    np.testing.assert_allclose(km.at(weeks), surv, rtol=1e-6, atol=5e-7)
    rows = np.searchsorted(km.times, weeks)
    np.testing.assert_allclose(km.se[rows], se, rtol=1e-6, atol=5e-7)
    # closed form: binomial SE sqrt(S (1 - S) / 21) at every time
    s = km.survival[rows]
    np.testing.assert_allclose(km.se[rows], np.sqrt(s * (1 - s) / 21), rtol=1e-10)
    # all 21 remissions end by week 23, so S(23) = 0 (docs/validation.md 1.1; SE undefined there)
    assert km.at(23.0)[0] == 0.0
    assert km.lower[-1] == 0.0 and km.upper[-1] == 0.0
    assert not np.isfinite(km.se[-1]) or km.se[-1] == 0.0


def test_lung_fixed_times():
    # REFERENCE LIBRARY: statsmodels SurvfuncRight (docs/validation.md 1.3): S(180) = 0.721671
    # (SE 0.029812); S(365) = 0.409242 (SE 0.035824); S(730) = 0.115693 (SE 0.028298).
    # lifelines 0.30.3 ships status as 0/1 (165 deaths of 228), checked here.
    frame = load_lung()
    assert sorted(frame["status"].unique()) == [0, 1] and frame["status"].sum() == 165
    km = kaplan_meier(frame["time"].to_numpy(dtype=float), frame["status"].to_numpy(dtype=int))
    days = [180.0, 365.0, 730.0]
    np.testing.assert_allclose(km.at(days), [0.721671, 0.409242, 0.115693], rtol=1e-6,
                               atol=5e-7)
    rows = np.searchsorted(km.times, days, side="right") - 1
    np.testing.assert_allclose(km.se[rows], [0.029812, 0.035824, 0.028298], rtol=1e-5,
                               atol=5e-7)


def test_rossi_closed_form():
    # REFERENCE LIBRARY: lifelines; closed form (docs/validation.md 1.3): no censoring before
    # week 52, so S(52) = 1 - 114/432 and S(26) = 0.875
    frame = load_rossi()
    km = kaplan_meier(frame["week"].to_numpy(dtype=float), frame["arrest"].to_numpy(dtype=int))
    assert km.at(52.0)[0] == pytest.approx(1 - 114 / 432, rel=1e-12)
    assert km.at(26.0)[0] == pytest.approx(0.875, rel=1e-12)
    assert km.times[-1] == 52.0 and km.censored[-1] == 432 - 114


def test_weighted_matches_lifelines():
    frame = load_lung()
    time = frame["time"].to_numpy(dtype=float)
    event = frame["status"].to_numpy(dtype=int)
    weights = np.random.default_rng(11).uniform(0.2, 3.0, time.size)
    ref = _lifelines(time, event, weights=weights)  # REFERENCE LIBRARY: lifelines, weights
    km = kaplan_meier(time, event, weights=weights)
    np.testing.assert_allclose(km.survival, ref.survival_function_.loc[km.times].iloc[:, 0],
                               rtol=1e-10)
    table = ref.event_table.loc[km.times]
    np.testing.assert_allclose(km.at_risk, table["at_risk"], rtol=1e-12)
    np.testing.assert_allclose(km.events, table["observed"], rtol=1e-12)


def test_integer_weights_equal_repeated_rows():
    time, event = _arm(0)
    counts = np.random.default_rng(3).integers(1, 4, time.size)
    rows = np.repeat(np.arange(time.size), counts)
    ref = _lifelines(time[rows], event[rows])  # REFERENCE LIBRARY: lifelines, repeated rows
    km = kaplan_meier(time, event, weights=counts.astype(float))
    np.testing.assert_allclose(km.survival, ref.survival_function_.loc[km.times].iloc[:, 0],
                               rtol=1e-12)
    band = ref.confidence_interval_.loc[km.times].to_numpy()
    np.testing.assert_allclose(km.lower, band[:, 0], rtol=1e-9)


def test_time_zero_events():
    # REFERENCE LIBRARY: lifelines KaplanMeierFitter with failures at time 0 (computed here):
    # the curve drops at 0 itself
    frame = load_rossi()
    time = np.where(frame["week"] <= 2, 0.0, frame["week"].to_numpy(dtype=float))
    event = frame["arrest"].to_numpy(dtype=int)
    ref = _lifelines(time, event)
    km = kaplan_meier(time, event)
    assert km.times[0] == 0.0 and km.events[0] == 2
    assert km.at(0.0)[0] == pytest.approx(ref.survival_function_.loc[0.0].iloc[0], rel=1e-12)
    assert km.at(0.0)[0] == pytest.approx(430 / 432, rel=1e-12)  # closed form


def _all(*patterns: str) -> str:
    return "(?is)" + "".join(f"(?=.*{p})" for p in patterns)


@pytest.mark.parametrize(
    ("time", "event", "kwargs", "pattern"),
    [
        ([1.0, np.nan, 3.0], [1, 0, 1], {}, _all("time", r"\b1\b", "nan")),
        ([1.0, -2.0, 3.0], [1, 0, 1], {}, _all("time", "negative")),
        ([1.0, 2.0, 3.0], [1, 2, 1], {}, _all("event", "0", "1")),
        ([1.0, 2.0, 3.0], [1, 0], {}, _all("event", r"\b2\b", r"\b3\b")),
        ([1.0, 2.0, 3.0], [1, 0, 1], {"level": 1.5}, _all("level", "1.5")),
        ([1.0, 2.0, 3.0], [1, 0, 1], {"weights": [1.0, -1.0, 1.0]}, "weight"),
        ([], [], {}, "(?i)no rows"),
    ],
    ids=["nan-time", "negative-time", "event-values", "lengths", "level", "weights", "empty"],
)
def test_errors(time, event, kwargs, pattern):
    with pytest.raises(InputError, match=pattern):
        kaplan_meier(np.asarray(time, dtype=float), np.asarray(event), **kwargs)
