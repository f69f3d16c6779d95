"""Tests of casemix.monitoring.limits: simulated control limits, their Monte Carlo error,
the chance of a false signal, and how fast a raised or lowered hazard is detected.

The histories that test the limits are drawn here by a separate simulator (daily tables of
each recipient's cumulative hazard, optionally raised from a calendar day) with other seeds,
and followed with the daily CUSUM; the baseline is a Cox fit of the rossi data shipped in
lifelines.datasets (weeks read as days). Every number has its Monte Carlo error beside it.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from casemix.monitoring import (
    control_limit,
    cusum_path,
    expected_by_day,
    observed_by_day,
    program_seed,
    simulate_maxima,
)
from casemix.survival import fit_cox

HORIZON = 52
DAYS = 1100
LEVEL = 0.05


@pytest.fixture(scope="module")
def baseline(rossi):
    names = ["fin", "age", "prio"]
    cox = fit_cox(rossi["week"], rossi["arrest"], rossi[names].to_numpy(float), names=names)
    return cox, rossi[names].to_numpy(float), cox.baselines[0].at(np.arange(HORIZON + 1.0))


def _design(baseline, n, scale, seed):
    """An invented program: n recipients, transplants over three years, kidney-like risk."""
    cox, X, _ = baseline
    rng = np.random.default_rng(seed)
    rows = rng.choice(X.shape[0], size=n)
    entry = np.sort(rng.integers(0, DAYS - 60, size=n))
    censor = np.minimum(HORIZON, DAYS - entry)
    return entry, censor, scale * cox.relative_risk(X[rows])


def _histories(design, hazard, count, seed, change_day=None, factor=1.0):
    """Follow ``count`` histories by day; the hazard is multiplied by ``factor`` on calendar
    days >= change_day. Returns (observed, expected) by day, each (count, DAYS + 1)."""
    entry, censor, risk = design
    jumps = np.diff(hazard, prepend=0.0)
    calendar = entry[:, None] + np.arange(HORIZON + 1)[None, :]
    boost = np.where(change_day is not None and calendar >= (change_day or 0), factor, 1.0)
    own = risk[:, None] * np.cumsum(jumps[None, :] * boost, axis=1)  # (n, HORIZON + 1)
    rng = np.random.default_rng(seed)
    observed, expected = np.empty((count, DAYS + 1)), np.empty((count, DAYS + 1))
    stratum = np.zeros(entry.size, np.intp)
    for h in range(count):
        target = rng.exponential(size=entry.size)
        first = (own >= target[:, None]).argmax(axis=1)
        event = (own[np.arange(entry.size), censor] >= target) & (first <= censor)
        stop = np.where(event, first, censor)
        observed[h] = observed_by_day(entry, stop, event, DAYS)
        expected[h] = expected_by_day(entry, stop, risk, stratum, hazard[None, :], DAYS)
    return observed, expected


def _limit(design, hazard, seed_code, replicates=1000):
    entry, censor, risk = design
    rng = np.random.default_rng(program_seed(16, seed_code))
    maxima = simulate_maxima(entry, censor, risk, np.zeros(entry.size, np.intp),
                             hazard[None, :], DAYS, (2.0, 0.5), replicates, rng)
    return [control_limit(m, LEVEL) for m in maxima]


def test_control_limit_from_known_maxima():
    values = np.arange(1000.0)[::-1]
    limit = control_limit(values, 0.05)
    # 50 of 1000 values (950..999) may reach h: it lies between 949 and 950
    assert limit.h == 949.5
    assert limit.signal_probability == 0.05
    # Reference library: scipy.stats.binom standard deviation of the count, over R.
    assert limit.signal_probability_se == pytest.approx(stats.binom.std(1000, 0.05) / 1000)
    # distribution-free 95% interval from order statistics around the 95th percentile
    assert limit.h_lower < limit.h < limit.h_upper
    assert control_limit(np.zeros(500), 0.05).h == np.inf  # no history ever leaves 0


def test_limits_are_seeded_per_program(baseline):
    design = _design(baseline, 80, 0.2, 1)
    hazard = baseline[2]
    again = _limit(design, hazard, "A01", 200)
    assert [c.h for c in again] == [c.h for c in _limit(design, hazard, "A01", 200)]
    assert [c.h for c in again] != [c.h for c in _limit(design, hazard, "A02", 200)]


def test_null_share_signalling_matches_the_level(baseline):
    """Eight invented programs at hazard ratio 1: each chart's limit from 1000 simulated
    histories, then 1500 fresh histories per program from the separate simulator.

    Monte Carlo error of the pooled share: about 0.0069 / sqrt(8) = 0.0024 from estimating
    each h, plus sqrt(0.05 * 0.95 / 12000) = 0.0020 binomial: SD about 0.003, so 0.05 +- 0.015
    is five SDs."""
    hazard = baseline[2]
    hits = np.zeros(2)
    total = 0
    sizes = [(60, 0.3), (120, 0.2), (200, 0.15), (300, 0.1), (90, 0.5), (150, 0.25),
             (250, 0.2), (400, 0.08)]
    for k, (n, scale) in enumerate(sizes):
        design = _design(baseline, n, scale, 100 + k)
        limits = _limit(design, hazard, f"N{k:02d}")
        observed, expected = _histories(design, hazard, 1500, 200 + k)
        for h in range(observed.shape[0]):
            for c, rho in enumerate((2.0, 0.5)):
                g, _ = cusum_path(observed[h], expected[h], rho)
                hits[c] += g.max() >= limits[c].h
        total += observed.shape[0]
    share = hits / total
    assert np.all(np.abs(share - LEVEL) < 0.015), share


def _delays(baseline, factor, chart, seed):
    design = _design(baseline, 600, 0.4, 7)
    hazard = baseline[2]
    limits = _limit(design, hazard, "D01")
    change = 400
    observed, expected = _histories(design, hazard, 300, seed, change, factor)
    rho = 2.0 if chart == "upper" else 0.5
    h = limits[0 if chart == "upper" else 1].h
    delays = []
    for k in range(observed.shape[0]):
        _, hits = cusum_path(observed[k], expected[k], rho, h)
        after = hits[hits >= change]
        delays.append(after[0] - change if after.size else np.inf)
    return np.array(delays), limits


@pytest.mark.parametrize(("factor", "chart", "other"), [(2.0, "upper", "lower"),
                                                       (0.5, "lower", "upper")])
def test_a_change_from_a_date_is_signalled_by_its_chart(baseline, factor, chart, other):
    """A program of 600 recipients (about 24 expected events a year at hazard ratio 1) whose
    hazard doubles (or halves) from day 400; 300 histories with a fixed seed (31).

    That run (this code) gave: doubling, upper chart: median delay 137 days, 90.7% detected
    within a year (binomial SE 1.7%; seeds 32 and 33 gave 144.5 and 134.5 days, 92.0% and
    94.7%); halving, lower chart: median 317.5 days, 63.7% within a year (SE 2.8%; seeds 32,
    33: 326.5 and 324.5 days, 62.7% and 61.0%). The bounds sit about three to four SEs and a
    few weeks beyond them. Halving is detected more slowly: fewer events carry less
    information. Without a change (factor 1) the same test fails (checked below)."""
    delays, _ = _delays(baseline, factor, chart, 31)
    within_year = np.mean(delays <= 365)
    median = np.median(delays)
    bounds = {"upper": (165, 0.85), "lower": (360, 0.55)}[chart]
    assert median <= bounds[0] and within_year >= bounds[1], (median, within_year)
    # the other chart hardly ever signals after the change (at most its false-signal level)
    other_delays, _ = _delays(baseline, factor, other, 31)
    assert np.mean(np.isfinite(other_delays)) <= LEVEL + 0.04


def test_without_a_change_the_detection_bounds_fail(baseline):
    delays, _ = _delays(baseline, 1.0, "upper", 31)
    assert np.mean(delays <= 365) < 0.1  # false signals only, far below the 0.85 above
