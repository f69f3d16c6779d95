"""Overdispersion (Spiegelhalter 2005) against a hand computation on an invented table."""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest
from scipy import stats

from casemix.audit import adjusted_funnel_limits, overdispersion
from casemix.errors import InputError

# Invented 8-program table (the same one docs/validation.md section 7 uses for empirical Bayes).
OBSERVED = [2, 9, 15, 1, 22, 4, 30, 0]
EXPECTED = [5.1, 4.2, 8.3, 3.7, 12.5, 6.0, 18.2, 2.4]


def _hand(observed, expected):
    """Hand computation in plain Python (math and statistics modules, no numpy)."""
    z = [(o - e) / math.sqrt(e) for o, e in zip(observed, expected, strict=True)]
    cuts = statistics.quantiles(z, n=10, method="inclusive")  # 10% and 90% are cuts[0], cuts[-1]
    zw = [min(max(v, cuts[0]), cuts[-1]) for v in z]
    n = len(z)
    phi = sum(v * v for v in zw) / n
    w_sum, w2_sum = sum(expected), sum(e * e for e in expected)
    tau2 = max(0.0, (n * phi - (n - 1)) / (w_sum - w2_sum / w_sum))
    return z, zw, phi, tau2


def test_invented_table_matches_hand_computation():
    z, zw, phi, tau2 = _hand(OBSERVED, EXPECTED)
    result = overdispersion(OBSERVED, EXPECTED)
    np.testing.assert_allclose(result.z, z, rtol=1e-12)
    np.testing.assert_allclose(result.z_winsorised, zw, rtol=1e-12)
    assert result.phi == pytest.approx(phi, rel=1e-12)
    assert result.tau2 == pytest.approx(tau2, rel=1e-12)
    # hand computation printed to 6 digits: phi 4.009749, n phi 32.07800, tau^2 0.506139
    assert result.phi == pytest.approx(4.009749, abs=5e-7)
    assert result.tau2 == pytest.approx(0.506139, abs=5e-7)
    assert result.df == 7
    # far beyond Poisson chance: hardly any of the 2000 simulated null data sets reaches it
    # (the chi-squared(7) tail, scipy.stats.chi2, is 3.9e-5)
    assert result.p_value < 0.005 and result.simulations == 2000
    k = result.p_value * 2001 - 1  # p = (1 + k) / (1 + B) with k null statistics >= T
    assert k == pytest.approx(round(k), abs=1e-9)


def _size(n_programs, datasets, p_of, seed):
    rng = np.random.default_rng(seed)
    e = rng.uniform(3, 60, n_programs)
    hits = sum(p_of(rng.poisson(e), e, i) < 0.05 for i in range(datasets))
    return hits / datasets


def test_size_is_nominal_under_the_null():
    # simulation with a known truth: no overdispersion, O ~ Poisson(E). 300 data sets: the
    # Monte Carlo SE of a 5% rejection rate is sqrt(0.05 * 0.95 / 300) = 0.0126.
    def simulated(o, e, i):
        return overdispersion(o, e, simulations=400, seed=i).p_value

    def chi2_n_minus_1(o, e, i):  # the earlier reference distribution, ignoring winsorising
        return stats.chi2.sf(overdispersion(o, e, simulations=100).statistic, e.size - 1)

    for n in (16, 30):
        assert 0.05 - 0.03 < _size(n, 300, simulated, seed=n) < 0.05 + 0.035, n
        # the chi-squared(n - 1) p-value is far too cautious (about 0.2-0.8% in
        # docs/dispersion.md): the check above would fail with it
        assert _size(n, 300, chi2_n_minus_1, seed=n) < 0.02, n


def test_without_winsorising_large_counts_follow_chi_squared_n():
    # COMMON PRACTICE: with E large the raw z-scores are nearly N(0, 1), so n phi ~ chi2(n)
    # (REFERENCE LIBRARY scipy.stats.chi2); Monte Carlo SE of p with 4000 draws <= 0.008
    rng = np.random.default_rng(3)
    e = np.full(10, 2000.0)
    for _ in range(3):
        result = overdispersion(rng.poisson(e * 1.02), e, winsor=0.0, simulations=4000, seed=1)
        assert result.p_value == pytest.approx(stats.chi2.sf(result.statistic, 10), abs=0.025)


def test_poisson_data_without_spread_give_phi_near_one():
    # simulation with a known truth: O ~ Poisson(E) exactly, so phi is near 1 (COMMON PRACTICE:
    # E[z^2] = 1; winsorising pulls it below 1) and tau^2 is usually 0.
    rng = np.random.default_rng(7)
    e = rng.uniform(5, 50, 400)
    result = overdispersion(rng.poisson(e), e)
    assert 0.6 < result.phi < 1.1
    assert result.tau2 < 0.005


def test_adjusted_limits():
    result = overdispersion(OBSERVED, EXPECTED)
    zq = stats.norm.isf(0.025)  # REFERENCE LIBRARY scipy.stats.norm: 1.959964
    lower, upper = adjusted_funnel_limits([4.0, 25.0], result)
    np.testing.assert_allclose(upper, 1 + zq * np.sqrt(result.phi / np.array([4.0, 25.0])))
    np.testing.assert_allclose(
        lower, np.maximum(0, 1 - zq * np.sqrt(result.phi / np.array([4.0, 25.0])))
    )
    lower, upper = adjusted_funnel_limits([25.0], result, method="additive", level=0.998)
    half = stats.norm.isf(0.001) * math.sqrt(1 / 25 + result.tau2)
    assert upper[0] == pytest.approx(1 + half) and lower[0] == max(0.0, 1 - half)


def test_errors():
    with pytest.raises(InputError, match="needs at least 3 programs"):
        overdispersion([1, 2], [1.0, 2.0])
    with pytest.raises(InputError, match=r"positions \[1\] have E = 0"):
        overdispersion([1, 0, 3], [1.0, 0.0, 2.0])
    with pytest.raises(InputError, match="simulations must be a whole number of at least 100"):
        overdispersion(OBSERVED, EXPECTED, simulations=10)
    with pytest.raises(InputError, match="unknown adjustment 'both'"):
        adjusted_funnel_limits([1.0], overdispersion(OBSERVED, EXPECTED), method="both")


def test_raw_p_value_is_the_test_without_winsorising():
    # the raw-z p-value uses the same simulated data sets as the winsorised one
    kept = overdispersion(OBSERVED, EXPECTED)
    plain = overdispersion(OBSERVED, EXPECTED, winsor=0.0)
    assert kept.p_value_raw == plain.p_value == plain.p_value_raw
