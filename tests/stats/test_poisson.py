"""Exact Poisson limits, p-values and funnel limits against docs/validation.md and scipy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from casemix.errors import InputError
from casemix.stats.poisson import (
    as_observed_expected,
    exact_p_values,
    funnel_limits,
    garwood_interval,
    oe_interval,
)

COUNTS = [0, 1, 2, 3, 5, 10, 20, 50, 100]

# docs/validation.md section 6, "Garwood 95%": PUBLISHED (from memory; verified) Garwood 1936
# and the usual exact Poisson limit tables (Breslow & Day 1987 vol. II; Geigy), matched with
# scipy.stats.chi2 and scipy.stats.gamma.
GARWOOD_95 = [
    (0.0, 3.6889),
    (0.0253, 5.5716),
    (0.2422, 7.2247),
    (0.6187, 8.7673),
    (1.6235, 11.6683),
    (4.7954, 18.3904),
    (12.2165, 30.8884),
    (37.1110, 65.9188),
    (81.3640, 121.6268),
]
# docs/validation.md section 6, "Garwood 99%": REFERENCE LIBRARY scipy.stats.chi2.
GARWOOD_99 = [
    (0.0, 5.2983),
    (0.0050, 7.4301),
    (0.1035, 9.2738),
    (0.3379, 10.9775),
    (1.0779, 14.1498),
    (3.7169, 21.3978),
    (10.3533, 34.6680),
    (33.6638, 71.2661),
    (76.1205, 128.7606),
]

# docs/validation.md section 6, "SMR = O/E with exact CI" and "exact one-sided p".
PAIRS_O = [12, 3, 0, 40, 2]
PAIRS_E = [6.0, 2.1, 1.5, 41.3, 8.0]


@pytest.mark.parametrize(("level", "table"), [(0.95, GARWOOD_95), (0.99, GARWOOD_99)])
def test_garwood_matches_published_table(level, table):
    lower, upper = garwood_interval(COUNTS, level)
    expected = np.array(table)
    np.testing.assert_allclose(lower, expected[:, 0], atol=5e-5)
    np.testing.assert_allclose(upper, expected[:, 1], atol=5e-5)


def test_garwood_matches_scipy_gamma_quantiles():
    # REFERENCE LIBRARY: scipy.stats.gamma, lower = gamma.ppf(a/2, O), upper = gamma.ppf(1-a/2,
    # O+1), which is the same interval written with the gamma distribution (section 6).
    counts = np.array([1, 4, 7, 33, 250])
    lower, upper = garwood_interval(counts, 0.9)
    np.testing.assert_allclose(lower, stats.gamma.ppf(0.05, counts), rtol=1e-9)
    np.testing.assert_allclose(upper, stats.gamma.ppf(0.95, counts + 1), rtol=1e-9)


def test_garwood_zero_count_closed_form():
    # docs/validation.md section 6, "O = 0 special cases": COMMON PRACTICE, upper = -ln 0.025.
    lower, upper = garwood_interval(0, 0.95)
    assert lower == 0.0
    assert upper == pytest.approx(-np.log(0.025), abs=1e-9)


def test_garwood_keeps_shape():
    lower, upper = garwood_interval(np.array([[1, 2], [3, 4]]))
    assert lower.shape == upper.shape == (2, 2)


def test_oe_interval_matches_reference_smr_rows():
    # docs/validation.md section 6, "SMR = O/E with exact CI": REFERENCE LIBRARY scipy.stats.chi2.
    lower, upper = oe_interval(PAIRS_O, PAIRS_E)
    np.testing.assert_allclose(lower, [1.0334, 0.2946, 0.0, 0.6919, 0.0303], atol=5e-5)
    np.testing.assert_allclose(upper, [3.4936, 4.1749, 2.4593, 1.3189, 0.9031], atol=5e-5)


def test_oe_interval_rossi_groups():
    # docs/validation.md section 5: rossi fin groups under model A (lifelines + hand Breslow),
    # fin=0: O 66, E 55.7993, Garwood 0.9148 to 1.5048; fin=1: O 48, E 58.2007, 0.6081 to
    # 1.0935; model B evaluation cohort: O 48, E 74.7406, 0.47352 to 0.85149.
    lower, upper = oe_interval([66, 48, 48], [55.7993, 58.2007, 74.7406])
    np.testing.assert_allclose(lower, [0.9148, 0.6081, 0.47352], atol=5e-5)
    np.testing.assert_allclose(upper, [1.5048, 1.0935, 0.85149], atol=5e-5)


def test_oe_interval_zero_expected_is_undefined():
    lower, upper = oe_interval([0, 2], [0.0, 4.0])
    assert np.isnan(lower[0])
    assert np.isnan(upper[0])
    # REFERENCE LIBRARY: scipy.stats.chi2 for the defined element.
    assert upper[1] == pytest.approx(stats.chi2.ppf(0.975, 6) / 2 / 4.0, rel=1e-9)


def test_exact_p_values_match_reference():
    # docs/validation.md section 6, "exact one-sided p": REFERENCE LIBRARY scipy.stats.poisson.
    p_more, p_fewer = exact_p_values(PAIRS_O, PAIRS_E)
    np.testing.assert_allclose(p_more, [0.020092, 0.350369, 1.0, 0.601008, 0.996981], atol=1e-6)
    np.testing.assert_allclose(
        p_fewer, [0.991173, 0.838643, 0.223130, 0.460651, 0.013754], atol=1e-6
    )


def test_exact_p_values_against_scipy_on_many_pairs():
    # REFERENCE LIBRARY: scipy.stats.poisson sf/cdf, computed here.
    rng = np.random.default_rng(20240604)
    expected = rng.uniform(0.2, 80.0, size=200)
    observed = rng.poisson(expected)
    p_more, p_fewer = exact_p_values(observed, expected)
    np.testing.assert_allclose(p_more, 1.0 - stats.poisson.cdf(observed - 1, expected), rtol=1e-9)
    np.testing.assert_allclose(p_fewer, stats.poisson.cdf(observed, expected), rtol=1e-9)


def test_exact_p_values_zero_expected():
    # With E = 0 the count is 0 surely: P(Y >= 0) = 1, P(Y >= 1) = 0, P(Y <= O) = 1.
    p_more, p_fewer = exact_p_values([0, 1], [0.0, 0.0])
    np.testing.assert_array_equal(p_more, [1.0, 0.0])
    np.testing.assert_array_equal(p_fewer, [1.0, 1.0])


@pytest.mark.parametrize(
    ("level", "lower_ref", "upper_ref"),
    [
        # docs/validation.md section 8, "95% limits": PUBLISHED method (Spiegelhalter 2005,
        # from memory), numbers from scipy.stats.poisson; E=1 raw lower -0.9320 clipped to 0.
        (0.95, [0.0, 0.1084, 0.5603, 0.8037], [2.9019, 1.8753, 1.4373, 1.1958]),
        # Same section, "99.8% limits"; E=1 and E=5 raw lower limits negative, clipped to 0.
        (0.998, [0.0, 0.0, 0.3585, 0.7007], [4.8676, 2.5543, 1.7357, 1.3180]),
    ],
)
def test_funnel_limits_match_reference(level, lower_ref, upper_ref):
    lower, upper = funnel_limits([1.0, 5.0, 20.0, 100.0], level, method="interpolated")
    np.testing.assert_allclose(lower, lower_ref, atol=5e-5)
    np.testing.assert_allclose(upper, upper_ref, atol=5e-5)


def test_funnel_limits_interpolate_scipy_cdf_on_a_grid():
    # REFERENCE LIBRARY: scipy.stats.poisson. At the limit L the interpolated CDF
    # F(r-1) + (E*L - (r-1)) * P(O = r) must equal p, for every grid point.
    grid = np.geomspace(0.5, 500.0, 301)
    _, upper = funnel_limits(grid, 0.95, method="interpolated")
    count = upper * grid
    r = np.ceil(count)
    interpolated = stats.poisson.cdf(r - 1, grid) + (count - (r - 1)) * stats.poisson.pmf(r, grid)
    np.testing.assert_allclose(interpolated, 0.975, rtol=1e-9)


def test_funnel_limits_are_continuous_in_e():
    # The interpolated quantile E * limit moves continuously with E, whereas the plain
    # scipy.stats.poisson.ppf quantile jumps by whole events (docs/validation.md section 8,
    # "uninterpolated quantile limits").
    grid = np.arange(1.0, 30.0, 1e-3)
    lower, upper = funnel_limits(grid, 0.95, method="interpolated")
    assert np.max(np.abs(np.diff(upper * grid))) < 0.01
    assert np.max(np.abs(np.diff(lower[lower > 0] * grid[lower > 0]))) < 0.01
    assert np.max(np.diff(stats.poisson.ppf(0.975, grid))) == 1.0


def test_exact_funnel_limits_keep_the_exceedance_probability_at_every_e():
    # REFERENCE LIBRARY: scipy.stats.poisson. Under HR = 1, P(O/E > upper) <= 2.5% and
    # P(O/E < lower) <= 2.5% at every E, and the limits are tight (one count less inside
    # would break it). docs/validation.md section 8, "uninterpolated quantile limits": at
    # E = 1, 5, 20, 100 the 95% limits are 0/3, 0.2/2.0, 0.60/1.45, 0.81/1.20.
    grid = np.geomspace(0.2, 400.0, 2001)
    for level in (0.95, 0.998):
        tail = (1 - level) / 2
        lower, upper = funnel_limits(grid, level)
        assert np.all(stats.poisson.sf(np.round(upper * grid), grid) <= tail)
        assert np.all(stats.poisson.sf(np.round(upper * grid) - 1, grid) > tail)
        below = np.round(lower * grid) - 1  # largest count strictly below the lower line
        assert np.all(stats.poisson.cdf(below, grid) <= tail)
    lower, upper = funnel_limits([1.0, 5.0, 20.0, 100.0])
    np.testing.assert_allclose(upper, [3.0, 2.0, 1.45, 1.20])
    np.testing.assert_allclose(lower, [0.0, 0.2, 0.60, 0.81])


def test_interpolated_funnel_limits_exceed_their_nominal_tail_at_small_e():
    # Why the exact limits are the default: at E = 0.5 and 1 the interpolated 95% upper limit
    # is exceeded with probability 9% and 8% (scipy.stats.poisson), not 2.5%.
    _, upper = funnel_limits([0.5, 1.0], 0.95, method="interpolated")
    exceed = stats.poisson.sf(np.floor(upper * [0.5, 1.0]), [0.5, 1.0])
    np.testing.assert_allclose(exceed, [0.0902, 0.0803], atol=5e-4)


def test_funnel_normal_approximation_agrees_for_large_e():
    # docs/validation.md section 8, "normal approximation": COMMON PRACTICE 1 +- 1.959964/sqrt(E).
    # At E = 10 000 the Poisson limits are within 0.001 of the normal ones.
    lower, upper = funnel_limits([10_000.0], 0.95)
    assert lower[0] == pytest.approx(1 - 1.959964 / 100, abs=1e-3)
    assert upper[0] == pytest.approx(1 + 1.959964 / 100, abs=1e-3)


def test_negative_count_is_refused():
    with pytest.raises(InputError, match=r"observed must be whole numbers.*element\(s\) 1 "):
        garwood_interval([3, -1, 2])


def test_fractional_count_is_refused():
    with pytest.raises(InputError, match=r"not rates or proportions"):
        oe_interval([2.5], [3.0])


def test_missing_expected_is_refused():
    with pytest.raises(
        InputError, match=r"expected has missing or infinite values.*element\(s\) 0"
    ):
        exact_p_values([1, 2], [np.nan, 2.0])


def test_negative_expected_is_refused():
    with pytest.raises(InputError, match=r"expected must be >= 0.*element\(s\) 2 "):
        as_observed_expected([1, 1, 1], [1.0, 2.0, -0.5])


def test_non_numeric_is_refused():
    with pytest.raises(InputError, match=r"observed must be numbers"):
        garwood_interval(["a", "b"])


def test_mismatched_lengths_are_refused():
    with pytest.raises(InputError, match=r"same length, one value per program"):
        oe_interval([1, 2, 3], [1.0, 2.0])


def test_funnel_needs_positive_expected():
    with pytest.raises(InputError, match=r"expected must be > 0.*element\(s\) 0 "):
        funnel_limits([0.0, 1.0])


@pytest.mark.parametrize("level", [0.0, 1.0, 95, "0.95"])
def test_bad_level_is_refused(level):
    with pytest.raises(InputError, match=r"level must be a number strictly between 0 and 1"):
        garwood_interval([1], level)
