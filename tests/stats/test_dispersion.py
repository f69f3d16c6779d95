"""Overdispersion (Spiegelhalter 2005) against a hand computation on an invented table."""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest
from scipy import stats

from casemix.audit import adjusted_funnel_limits, overdispersion
from casemix.errors import InputError

# Invented 8-program table (the same one REFERENCE_CHECKS.md section 7 uses for empirical Bayes).
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
    # hand computation printed to 6 digits: phi 4.009749, n phi 32.07800, tau^2 0.506139;
    # p from scipy.stats.chi2 with 7 df: 3.9286e-05.
    assert result.phi == pytest.approx(4.009749, abs=5e-7)
    assert result.tau2 == pytest.approx(0.506139, abs=5e-7)
    assert result.df == 7
    assert result.p_value == pytest.approx(stats.chi2.sf(8 * phi, 7), rel=1e-12)
    assert result.p_value == pytest.approx(3.9286e-05, abs=5e-9)


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
    with pytest.raises(InputError, match="unknown adjustment 'both'"):
        adjusted_funnel_limits([1.0], overdispersion(OBSERVED, EXPECTED), method="both")
