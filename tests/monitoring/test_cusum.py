"""Tests of casemix.monitoring.cusum: the log-likelihood ratio, the CUSUM path, A(t) and N(t).

Outside references: scipy.stats.poisson (log-likelihood ratio), the Poisson / survival-time
CUSUM weights of docs/validation.md section 9, and brute-force daily grids computed here
from the definition with the Cox fit's own step function (CoxFit.expected_events).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from casemix.monitoring import (
    cusum_path,
    expected_by_day,
    log_likelihood_ratio,
    observed_by_day,
    simulate_maxima,
)
from casemix.survival import fit_cox

DAYS = 420
HORIZON = 52  # rossi follow-up is 52 weeks; its weeks are read as days here


@pytest.mark.parametrize("rho", [2.0, 0.5, 1.3])
def test_llr_is_the_poisson_log_likelihood_ratio(rho):
    observed = np.array([0, 1, 3, 7, 12, 40])
    expected = np.array([0.2, 0.9, 2.5, 9.1, 6.0, 38.4])
    # Reference library: scipy.stats.poisson, log Pois(N; rho A) - log Pois(N; A).
    reference = stats.poisson.logpmf(observed, rho * expected) - stats.poisson.logpmf(
        observed, expected
    )
    np.testing.assert_allclose(log_likelihood_ratio(observed, expected, rho), reference,
                               rtol=1e-12)


def test_path_matches_the_reference_survival_time_weights():
    # docs/validation.md section 9, Poisson / survival-time weights (COMMON PRACTICE; scipy
    # Poisson log-likelihood ratio): Lambda = 0.2, 0.5, 0.05, 1.0, 0.3, d = 0, 1, 0, 1, 0.
    expected = np.cumsum([0.2, 0.5, 0.05, 1.0, 0.3])
    observed = np.cumsum([0, 1, 0, 1, 0])
    up, _ = cusum_path(observed, expected, 2.0)
    np.testing.assert_allclose(up, [0, 0.193147, 0.143147, 0, 0], atol=1e-6)
    down, _ = cusum_path(observed, expected, 0.5)
    np.testing.assert_allclose(down, [0.1, 0, 0.025, 0, 0.15], atol=1e-6)


def _brute_cusum(observed, expected, rho):
    """G(t) = max over s <= t of L(t) - L(s), s also before the first day (L = 0): O(m^2)."""
    llr = np.concatenate([[0.0], log_likelihood_ratio(observed, expected, rho)])
    return np.array([llr[t] - llr[: t + 1].min() for t in range(1, llr.size)])


def test_restart_and_run_on_signals():
    observed = np.cumsum([0, 1, 1, 0, 1, 1, 1, 0, 0, 0])
    expected = np.cumsum(np.full(10, 0.1))
    g, hits = cusum_path(observed, expected, 2.0, h=1.0)
    # by hand: L steps by log 2 - 0.1 on event days and -0.1 otherwise
    step = np.log(2.0) - 0.1
    # day 0 (L = -0.1) is the running minimum, so G = 2 (log 2 - 0.1) >= 1 on day 2; after
    # the restart the same two steps from day 3's minimum reach it again on day 5
    assert hits.tolist() == [2, 5]
    assert g[2] == pytest.approx(2 * step)
    assert g[3] == pytest.approx(0.0)  # the day after a restart starts from zero (0 - 0.1)
    assert g[5] == pytest.approx(2 * step)
    g_on, hits_on = cusum_path(observed, expected, 2.0, h=1.0, restart=False)
    np.testing.assert_allclose(g_on, _brute_cusum(observed, expected, 2.0), atol=1e-12)
    assert hits_on.tolist() == [2]  # stays above h from day 2 to day 7: one signal
    # deliberately wrong: a restart that did not reset would not give the reset value
    assert not np.allclose(g, g_on)


@pytest.fixture(scope="module")
def program(rossi):
    """An invented program: rossi covariate rows, transplants spread over a year."""
    rng = np.random.default_rng(16)
    rows = rng.choice(len(rossi), size=120, replace=False)
    entry = rng.integers(0, DAYS - 30, size=rows.size)
    potential = np.minimum(HORIZON, DAYS - entry)
    return {"rows": rows, "entry": entry, "potential": potential, "rng": rng}


@pytest.fixture(scope="module", params=["plain", "stratified"])
def fit(request, rossi):
    names = ["fin", "age", "prio"]
    strata = rossi["wexp"].to_numpy() if request.param == "stratified" else None
    return fit_cox(rossi["week"], rossi["arrest"], rossi[names].to_numpy(float), names=names,
                   strata=strata), names, strata


def _table(cox, top):
    return np.vstack([b.at(np.arange(top + 1.0)) for b in cox.baselines])


def test_expected_and_observed_by_day_equal_a_daily_grid(program, fit, rossi):
    cox, names, strata = fit
    X = rossi[names].to_numpy(float)[program["rows"]]
    s = None if strata is None else strata[program["rows"]]
    rng = np.random.default_rng(3)
    stop = np.minimum(program["potential"], rng.integers(0, HORIZON + 1, X.shape[0]))
    event = rng.random(X.shape[0]) < 0.3
    code = cox.stratum_codes(s, X.shape[0])
    got = expected_by_day(program["entry"], stop, cox.relative_risk(X), code,
                          _table(cox, HORIZON), DAYS)
    n_got = observed_by_day(program["entry"], stop, event, DAYS)
    # brute force: every day, every recipient, through CoxFit's own step function
    brute, n_brute = np.zeros(DAYS + 1), np.zeros(DAYS + 1)
    for day in range(DAYS + 1):
        since = day - program["entry"]
        at_risk = since >= 0
        u = np.minimum(since, stop)[at_risk]
        brute[day] = cox.expected_events(u, X[at_risk],
                                         None if s is None else s[at_risk]).sum()
        n_brute[day] = (event & (program["entry"] + stop <= day)).sum()
    np.testing.assert_allclose(got, brute, rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(n_got, n_brute)
    # on the last day A is the sum of each recipient's expected events at his or her time
    total = cox.expected_events(stop, X, s).sum()
    assert got[-1] == pytest.approx(total, rel=1e-12)


def test_event_driven_maxima_equal_the_daily_grid(program, fit, rossi):
    """simulate_maxima (event-driven) against a brute-force daily CUSUM of the same draws."""
    cox, names, strata = fit
    X = rossi[names].to_numpy(float)[program["rows"]]
    s = None if strata is None else strata[program["rows"]]
    code = cox.stratum_codes(s, X.shape[0])
    risk = cox.relative_risk(X) * 3.0  # more events per history: a harder test
    entry, censor = program["entry"], program["potential"]
    hazard = _table(cox, HORIZON)
    replicates = 40
    got = simulate_maxima(entry, censor, risk, code, hazard, DAYS, (2.0, 0.5), replicates,
                          np.random.default_rng(99), hr=1.0)
    # The same uniforms (one block of (replicates, n) draws), inverted by a search over days.
    draw = np.random.default_rng(99).random((replicates, entry.size))
    for r in range(replicates):
        e_draw = -np.log1p(-draw[r])
        stop, event = censor.copy(), np.zeros(entry.size, bool)
        for i in range(entry.size):
            grid = risk[i] * hazard[code[i], : censor[i] + 1]
            hit = np.flatnonzero(grid >= e_draw[i])
            if hit.size:
                stop[i], event[i] = hit[0], True
        brute_a = np.zeros(DAYS + 1)
        for day in range(DAYS + 1):
            since = day - entry
            at_risk = since >= 0
            u = np.minimum(since, stop)[at_risk]
            brute_a[day] = (risk[at_risk] * hazard[code[at_risk], u]).sum()
        brute_n = np.array([(event & (entry + stop <= d)).sum() for d in range(DAYS + 1)])
        for c, rho in enumerate((2.0, 0.5)):
            assert got[c, r] == pytest.approx(
                _brute_cusum(brute_n, brute_a, rho).max(initial=0.0), abs=1e-9
            ), (r, rho)
    assert (got[0] > 0).mean() > 0.5  # the histories do have events
