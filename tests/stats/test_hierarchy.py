"""Hierarchical gamma-Poisson prior by quadrature: the BUGS "Pumps" example, scipy.integrate."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, special, stats

from casemix.errors import InputError
from casemix.stats.hierarchy import (
    HyperDensity,
    Hyperprior,
    hierarchical_prior,
    hyperprior_from_dict,
)
from casemix.stats.shrinkage import empirical_bayes_prior, mixture_quantile, posterior

# Pumps: Gaver & O'Muircheartaigh (1987), Technometrics 29:1-15, as used in the BUGS
# Examples Volume 1 (Spiegelhalter, Thomas, Best & Gilks): failures and thousand hours of
# operation, rounded as in the BUGS data file (from memory).
PUMP_O = [5, 1, 5, 14, 3, 19, 1, 1, 4, 22]
PUMP_T = [94.3, 15.7, 62.9, 126, 5.24, 31.4, 1.05, 1.05, 2.1, 10.5]
PUMP_HYPER = Hyperprior(
    HyperDensity("shape", "expon", (("scale", 1.0),)),  # alpha ~ Exponential(1)
    HyperDensity("rate", "gamma", (("a", 0.1), ("scale", 1.0))),  # beta ~ Gamma(0.1, 1)
)
# Four programs without extra-Poisson spread (docs/validation.md section 7, "EB boundary").
FOUR_O = [0, 3, 12, 40]
FOUR_E = [1.5, 2.1, 6.0, 41.3]


def _log_lik(o, e, a, b):
    """Negative-binomial log likelihood: scipy.stats.nbinom.logpmf(o, a, b / (b + e)) summed,
    written as sum_j<o log(a + j) (exact for whole o, and free of the cancellation of
    gammaln(a + o) - gammaln(a) at huge a) and vectorised over arrays a, b."""
    a, b = np.asarray(a, float)[..., None], np.asarray(b, float)[..., None]
    o, e = np.asarray(o), np.asarray(e, float)
    rising = sum(np.where(j < o, np.log(a + j), 0.0) for j in range(int(o.max())))
    terms = rising - special.gammaln(o + 1) - a * np.log1p(e / b) + o * np.log(e / (b + e))
    return terms.sum(axis=-1)


def test_pumps_reproduces_the_published_posterior_means():
    # BUGS Examples Vol. 1, "Pumps" (from memory): posterior means alpha 0.70, beta 0.93,
    # theta 0.060, 0.102, 0.089, 0.116, 0.60, 0.61, 0.89, 0.89, 1.59, 1.99 (a Gibbs sampler's
    # output; its Monte Carlo error is about 0.005 on alpha and beta and under 1% on the
    # rates, so the tolerances are 0.01 and 1.5%).
    prior = hierarchical_prior(PUMP_O, PUMP_T, free_mean=True, hyperprior=PUMP_HYPER)
    assert prior.method == "hierarchical"
    assert prior.hyperprior["posterior_shape_mean"] == pytest.approx(0.70, abs=0.01)
    assert prior.hyperprior["posterior_rate_mean"] == pytest.approx(0.93, abs=0.01)
    means = posterior(PUMP_O, PUMP_T, prior)["hr_mean"].to_numpy()
    published = [0.060, 0.102, 0.089, 0.116, 0.60, 0.61, 0.89, 0.89, 1.59, 1.99]
    np.testing.assert_allclose(means, published, rtol=0.015)


def _brute_force_pumps():
    """E[alpha], E[beta], E[theta_10], P(theta_10 > 2): scipy.integrate.simpson over a dense
    2-D grid on log alpha x log beta (801 x 801 points), a brute-force integration."""
    log_a = np.linspace(np.log(1e-3), np.log(20.0), 801)
    log_b = np.linspace(np.log(1e-4), np.log(40.0), 801)
    a, b = np.meshgrid(np.exp(log_a), np.exp(log_b), indexing="ij")
    log_density = (stats.expon.logpdf(a) + stats.gamma.logpdf(b, 0.1) + np.log(a * b)
                   + _log_lik(PUMP_O, PUMP_T, a, b))
    density = np.exp(log_density - log_density.max())

    def moment(values):
        return integrate.simpson(integrate.simpson(values * density, x=log_b), x=log_a)

    z = moment(1.0)
    return (moment(a) / z, moment(b) / z, moment((a + 22) / (b + 10.5)) / z,
            moment(stats.gamma.sf(2.0, a + 22, scale=1 / (b + 10.5))) / z)


def test_pumps_quadrature_matches_brute_force_integration():
    # REFERENCE LIBRARY: scipy.integrate.dblquad of the same hyperposterior.
    alpha, beta, theta, tail = _brute_force_pumps()
    prior = hierarchical_prior(PUMP_O, PUMP_T, free_mean=True, hyperprior=PUMP_HYPER)
    row = posterior(PUMP_O, PUMP_T, prior, upper_margin=2.0).iloc[9]
    assert prior.hyperprior["posterior_shape_mean"] == pytest.approx(alpha, rel=1e-5)
    assert prior.hyperprior["posterior_rate_mean"] == pytest.approx(beta, rel=1e-5)
    a, b, w = prior.arrays()
    assert prior.mean == pytest.approx(prior.shape / prior.rate, rel=1e-12)
    assert prior.sd == pytest.approx(np.sqrt(prior.shape) / prior.rate, rel=1e-9)
    assert row.hr_mean == pytest.approx(theta, rel=1e-6)
    assert row.p_above == pytest.approx(tail, abs=1e-6)
    # the interval: the mixture CDF at the reported limits is 2.5% and 97.5%
    a, b, w = prior.arrays()
    cdf = [w @ stats.gamma.cdf(x, a + 22, scale=1 / (b + 10.5)) for x in (row.hr_lower,
                                                                          row.hr_upper)]
    np.testing.assert_allclose(cdf, [0.025, 0.975], atol=1e-9)


def _brute_force_fixed_mean(o, e, hyper_scale=0.25):
    def density(log_tau):
        a = np.exp(-2 * log_tau)
        return np.exp(stats.halfcauchy.logpdf(np.exp(log_tau), scale=hyper_scale) + log_tau
                      + _log_lik(o, e, a, a) - _log_lik(o, e, 1e8, 1e8))

    def moment(f):
        return sum(integrate.quad(lambda t: f(np.exp(-2 * t)) * density(t), np.log(low),
                                  np.log(high), epsabs=0, epsrel=1e-10, limit=200)[0]
                   for low, high in ((1e-7, 1e-2), (1e-2, 1.0), (1.0, 100.0)))

    z = moment(lambda a: 1.0)
    return [moment(lambda a, i=i: (a + o[i]) / (a + e[i])) / z for i in range(4)]


@pytest.mark.parametrize("seed", [None, 3])
def test_fixed_mean_quadrature_matches_scipy_quad(seed):
    # REFERENCE LIBRARY: scipy.integrate.quad over log tau (down to 1e-7). seed None: the four
    # programs with no extra-Poisson spread, where plug-in EB runs to the boundary; seed 3:
    # 30 invented programs with true spread 0.2.
    if seed is None:
        o, e = np.array(FOUR_O), np.array(FOUR_E)
    else:
        rng = np.random.default_rng(seed)
        e = rng.uniform(2, 40, 30)
        o = rng.poisson(rng.gamma(25, 1 / 25, 30) * e)
    means = posterior(o, e, hierarchical_prior(o, e))["hr_mean"].to_numpy()[:4]
    np.testing.assert_allclose(means, _brute_force_fixed_mean(o, e), rtol=1e-6)


def test_no_spread_needs_no_fallback_and_shrinks_towards_one():
    # Where plug-in EB falls back to the nearly flat Gamma(2, 2), the hierarchical prior
    # keeps the data's message (little spread): every posterior is pulled hard towards 1.
    prior = hierarchical_prior(FOUR_O, FOUR_E)
    assert prior.method == "hierarchical" and not prior.at_boundary
    assert prior.hyperprior["posterior_spread_median"] < 0.25
    table = posterior(FOUR_O, FOUR_E, prior)
    with pytest.warns(Warning):
        fallback = posterior(FOUR_O, FOUR_E, empirical_bayes_prior(FOUR_O, FOUR_E))
    assert np.all(np.abs(np.log(table.hr_mean)) < np.abs(np.log(fallback.hr_mean)))


def test_mixture_quantile_matches_scipy_for_one_component():
    # REFERENCE LIBRARY: scipy.stats.gamma.ppf
    assert mixture_quantile(0.975, [5.0], [4.1]) == pytest.approx(
        stats.gamma.ppf(0.975, 5.0, scale=1 / 4.1), rel=1e-12)


def test_hyperprior_from_dict_and_errors():
    hyper = hyperprior_from_dict({"shape": {"distribution": "expon", "scale": 1.0}})
    assert hyper.first.parameter == "shape" and hyper.second.parameter == "mean"
    assert hyperprior_from_dict(hyper.to_dict()) == hyper
    with pytest.raises(InputError, match=r"rules: give only one of spread or shape"):
        hyperprior_from_dict({"spread": {"distribution": "halfnorm", "scale": 1},
                              "shape": {"distribution": "expon", "scale": 1}})
    with pytest.raises(InputError, match=r"needs exactly the parameters a, scale"):
        hyperprior_from_dict({"rate": {"distribution": "gamma", "scale": 1}})
    with pytest.raises(InputError, match=r"distribution must be one of halfcauchy"):
        hyperprior_from_dict({"spread": {"distribution": "uniform", "scale": 1}})
    with pytest.raises(InputError, match=r"scale must be a finite number > 0"):
        hyperprior_from_dict({"spread": {"distribution": "halfcauchy", "scale": -1}})
