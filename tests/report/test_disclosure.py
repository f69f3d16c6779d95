"""Tests of the disclosure rule's pieces: protected programs, totals, verdicts, curves."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from casemix.errors import InputError
from casemix.report.disclosure import (
    MIN_SPREAD,
    WITHHELD,
    PublicRelease,
    coarse_curve,
    feasible_range,
    hidden_candidates,
    protect_releases,
    protect_total,
    protected_programs,
    verdict_says_nothing,
)
from casemix.stats.shrinkage import fixed_prior
from casemix.stats.verdict import Rules

N = 11  # common practice in health statistics: no cell from 1 to 10 is published


def test_protected_programs_are_those_with_a_small_count():
    programs = pd.DataFrame({"program": list("abcdef"),
                             "recipients": [8, 80, 80, 80, 80, 20],
                             "observed": [0, 0, 3, 11, 75, 20]})
    # a: 8 recipients; c: 3 events; e: 5 without the event; f: 0 without the event (shown)
    assert protected_programs(programs, N).tolist() == [True, False, True, False, True, False]


def test_hidden_candidates_follow_the_public_cell():
    assert hidden_candidates("<11", "62", N).tolist() == list(range(1, 11))
    assert hidden_candidates("<11", "<11", N).tolist() == list(range(1, 11))
    assert hidden_candidates("<11", "6", N).tolist() == list(range(1, 7))
    # 25 recipients, few of them without the event: 15 to 24 events are possible
    assert hidden_candidates("withheld", "25", N).tolist() == list(range(15, 25))
    assert hidden_candidates("12", "40", N).tolist() == [12]


def _brute_force(total, lower, upper):
    # every tuple of whole numbers within the bounds that adds up to the total
    ranges = [range(int(lo), int(min(hi, total)) + 1) for lo, hi in zip(lower, upper,
                                                                         strict=True)]
    tuples = np.array([t for t in itertools.product(*ranges) if sum(t) == total])
    return np.column_stack([tuples.min(axis=0), tuples.max(axis=0)])


@pytest.mark.parametrize(("total", "lower", "upper"), [
    (11, [1, 1, 1, 1, 1], [10, 10, 10, 10, 10]),
    (3, [1, 1], [10, 10]),
    (15, [1, 11], [10, np.inf]),
    (19, [1, 1, 0], [10, 10, 30]),
])
def test_feasible_range_matches_enumeration(total, lower, upper):
    expected = _brute_force(total, lower, upper)  # independent: enumerate every tuple
    assert np.array_equal(feasible_range(total, np.array(lower), np.array(upper)), expected)


def test_a_single_hidden_cell_gets_a_complementary_one():
    # 3 hidden; 60 - 30 - 15 - 12 = 3 gives it back; hiding 12 leaves 1..4 (spread 3)
    extra, shown = protect_total(np.array([30.0, 3.0, 15.0, 12.0]), N, 60.0)
    assert extra.tolist() == [False, False, False, True] and shown
    bounds = _brute_force(15, [1, 11], [10, 15])
    assert bounds[0, 1] - bounds[0, 0] >= MIN_SPREAD
    # two hidden cells adding up to 3: each is 1 or 2, and hiding a third does not help
    extra, shown = protect_total(np.array([2.0, 1.0, 0.0]), N, 3.0)
    assert not extra.any() and not shown
    # five hidden cells adding up to 11: each is 1 to 7, safe as they are
    extra, shown = protect_total(np.full(5, 2.0) + np.r_[1, 0, 0, 0, 0], N, 11.0)
    assert not extra.any() and shown


def test_the_verdict_is_shown_only_when_it_says_nothing_about_the_count():
    prior, rules = fixed_prior(2.0, 2.0), Rules()
    candidates = np.arange(1, N)

    def favorable(o, e):  # scipy.stats.gamma: P(HR < 1) of the posterior Gamma(2 + O, 2 + E)
        return stats.gamma.cdf(1.0, 2.0 + o, scale=1.0 / (2.0 + e)) >= 0.975

    # E = 30: every count from 1 to 10 is favorable, so "favorable" says nothing
    assert all(favorable(o, 30.0) for o in candidates)
    assert verdict_says_nothing("favorable", candidates, 30.0, prior, rules)
    # E = 8: only the lowest counts are favorable, so the verdict would narrow them down
    assert favorable(1, 8.0) and not favorable(10, 8.0)
    assert not verdict_says_nothing("favorable", candidates, 8.0, prior, rules)
    assert not verdict_says_nothing("consistent", candidates, 8.0, prior, rules)
    # below the minimum E every count gives "too little data"
    assert verdict_says_nothing("too_little_data", candidates, 0.5, prior, rules)


def test_coarse_curve_publishes_grouped_steps_of_the_kaplan_meier_estimate():
    lifelines = pytest.importorskip("lifelines")
    rng = np.random.default_rng(7)
    time = np.ceil(np.minimum.reduce([rng.exponential(900, 300), rng.uniform(100, 600, 300),
                                      np.full(300, 365.0)]))
    event = (time < 365) & (rng.uniform(size=300) < 0.5)
    expected = pd.DataFrame({"time": np.arange(366.0),
                             "expected": np.exp(-np.arange(366) / 2e3)})
    curve = coarse_curve(time, event.astype(float), N, 365, expected)
    assert set(curve["time"]) <= {0.0, 91.0, 182.0, 274.0, 365.0}
    assert curve["time"].iloc[-1] == 365.0
    bounds = curve["time"].to_numpy()
    steps = [int((((time > a) | (a == 0)) & (time <= b) & event).sum())
             for a, b in itertools.pairwise(bounds)]
    assert min(steps) >= N or steps == [0]  # every published step holds N events or more
    # the published values are the Kaplan-Meier estimate at those times (lifelines 0.x)
    km = lifelines.KaplanMeierFitter().fit(time, event)
    reference = km.survival_function_at_times(bounds[1:]).to_numpy()
    np.testing.assert_allclose(curve["observed"].to_numpy()[1:], reference, rtol=1e-12)
    at_risk = [(time >= t).sum() for t in bounds[1:]]
    assert curve["at_risk"].to_numpy()[1:].tolist() == at_risk
    assert curve["observed"].iloc[0] == 1.0 and curve["at_risk"].iloc[0] == 300


def test_coarse_curve_merges_a_last_small_group_into_the_horizon():
    # 12 events by day 91, then 3 more before day 365: the 3 must not show as a step of
    # their own, so the published steps are day 0 and day 365 only
    time = np.r_[np.full(12, 30.0), np.full(3, 200.0), np.full(85, 365.0)]
    event = np.r_[np.ones(15), np.zeros(85)]
    expected = pd.DataFrame({"time": np.arange(366.0), "expected": np.ones(366)})
    curve = coarse_curve(time, event, N, 365, expected)
    assert curve["time"].tolist() == [0.0, 365.0]
    assert curve["observed"].iloc[-1] == pytest.approx(85 / 100)  # 15 events among 100


def test_coarse_curve_publishes_nothing_from_fewer_than_n_events():
    # follow-up ends at day 200, so the estimate stops there: only 5 events can be placed
    time = np.r_[np.full(5, 30.0), np.full(95, 200.0)]
    event = np.r_[np.ones(5), np.zeros(95)]
    expected = pd.DataFrame({"time": np.arange(366.0), "expected": np.ones(366)})
    curve = coarse_curve(time, event, N, 365, expected)
    assert curve["time"].tolist() == [0.0]


def _release(reasons: list[str], recipients: list[str], excluded, n: int = N) -> PublicRelease:
    programs = pd.DataFrame({"program": ["a", "b"], "recipients": recipients,
                             "observed": ["12", "30"], "verdict": ["consistent"] * 2})
    tables = {
        "programs.csv": programs,
        "followup.csv": pd.DataFrame({"program": ["a", "b"], "recipients": recipients,
                                      "lost_to_followup": ["0", "0"]}),
        "exclusions_by_reason.csv": pd.DataFrame({"reason": ["x", "y", "z"],
                                                  "records": reasons}),
    }
    return PublicRelease(threshold=n, programs=programs.assign(protected=False),
                         tables=tables, run={"counts": {"excluded": excluded, "kept": 200}},
                         withheld=pd.DataFrame(columns=["scope", "figure", "reason"]))


def test_a_cell_hidden_in_one_analysis_is_hidden_in_every_other():
    # excluded per reason: x = 4, y = 25, z = 40 (69 in all), the same in both analyses.
    # The first release shows the total and withholds y to protect x; the second withholds
    # its total, so needed no second cell, and shows y.
    first = _release(["<11", WITHHELD, "40"], ["80", "62"], 69)
    second = _release(["<11", "25", "40"], ["80", "<11"], None)
    # together, as published: x = 69 - 25 - 40
    assert feasible_range(69 - 40 - 25, [1.0], [N - 1.0]).tolist() == [[4.0, 4.0]]
    out = protect_releases({"graft failure": first, "death": second})
    assert out["death"].tables["exclusions_by_reason.csv"]["records"].tolist() == [
        "<11", WITHHELD, "40"]
    # x now keeps the range the first release alone leaves it (x + y = 29, y >= N)
    bounds = feasible_range(69 - 40, np.array([1.0, N]), np.array([N - 1.0, np.inf]))
    assert bounds[0].tolist() == [1.0, N - 1.0]
    # a recipients cell hidden in one analysis is hidden in the other, in every table
    assert out["graft failure"].tables["programs.csv"]["recipients"].tolist() == [
        "80", WITHHELD]
    assert out["graft failure"].programs["recipients"].tolist() == ["80", WITHHELD]
    assert out["graft failure"].tables["followup.csv"]["recipients"].tolist() == [
        "80", WITHHELD]
    # a total withheld in one is withheld in all, and each release says why
    assert out["graft failure"].run["counts"] == {"excluded": None, "kept": 200}
    reasons = out["graft failure"].withheld["reason"]
    assert reasons.str.contains("analysis death").sum() == 3  # two cells, one total
    assert out["death"].withheld["reason"].str.contains("analysis graft failure").sum() == 1
    # the inputs are not changed
    assert second.tables["exclusions_by_reason.csv"]["records"].tolist()[1] == "25"


def test_releases_with_different_thresholds_are_refused():
    with pytest.raises(InputError, match="one threshold"):
        protect_releases({"a": _release(["0"] * 3, ["80", "62"], 0),
                          "b": _release(["0"] * 3, ["80", "62"], 0, n=6)})
    with pytest.raises(InputError, match="at least one"):
        protect_releases({})
