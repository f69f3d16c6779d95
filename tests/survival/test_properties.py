"""Property tests of the Cox fit (hypothesis): invariances that hold for any data.

The data are simulated (numpy Generator seeded from the hypothesis draw, integer times so that
ties are common); each property is a mathematical identity of the Cox partial likelihood and
the Breslow estimator, and the last property compares with statsmodels PHReg.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from statsmodels.duration.hazard_regression import PHReg

from casemix.errors import ConvergenceError, InputError
from casemix.survival import fit_cox

# Few, deterministic examples so the file runs in seconds and every run is the same.
SETTINGS = settings(max_examples=25, deadline=None, derandomize=True, database=None)


def _simulate(seed: int, n: int, p: int, grid: int, stratified: bool, weighted: bool):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, p)) * rng.uniform(0.5, 3.0, p) + rng.normal(0, 5, p)
    X[:, 0] = rng.integers(0, 2, n)  # one binary covariate, as in registry data
    beta = rng.normal(0, 0.5, p)
    hazard = np.exp((X - X.mean(axis=0)) @ beta)
    failure = rng.exponential(1 / hazard)
    censor = rng.exponential(2.0, n)
    time = np.ceil(np.minimum(failure, censor) * grid / 2.0)  # integer times: many ties
    time[rng.random(n) < 0.05] = 0.0  # a few time-0 rows
    event = (failure <= censor).astype(int)
    strata = rng.choice(np.array(["a", "b"], dtype=object), n) if stratified else None
    weights = rng.uniform(0.5, 2.0, n) if weighted else None
    return time, event, X, strata, weights


data = st.builds(
    _simulate,
    seed=st.integers(0, 2**32 - 1),
    n=st.integers(20, 60),
    p=st.integers(1, 3),
    grid=st.sampled_from([3, 8, 1000]),
    stratified=st.booleans(),
    weighted=st.booleans(),
)
ties = st.sampled_from(["efron", "breslow"])


def _fit_or_reject(time, event, X, **kwargs):
    """Fit, discarding the rare simulated data set that is degenerate (no events in a
    stratum's risk sets, a covariate with a monotone likelihood)."""
    assume(event.sum() >= 3)
    try:
        return fit_cox(time, event, X, **kwargs)
    except (ConvergenceError, InputError):
        assume(False)
        raise  # not reached: assume(False) stops the example


@SETTINGS
@given(data=data, ties=ties, order_seed=st.integers(0, 2**32 - 1))
def test_row_order_does_not_matter(data, ties, order_seed):
    time, event, X, strata, weights = data
    fit = _fit_or_reject(time, event, X, ties=ties, strata=strata, weights=weights)
    perm = np.random.default_rng(order_seed).permutation(time.size)
    shuffled = fit_cox(
        time[perm], event[perm], X[perm], ties=ties,
        strata=None if strata is None else strata[perm],
        weights=None if weights is None else weights[perm],
    )
    np.testing.assert_allclose(shuffled.coef, fit.coef, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(shuffled.se, fit.se, rtol=1e-7)
    assert shuffled.loglik == pytest.approx(fit.loglik, abs=1e-9)
    for a, b in zip(shuffled.baselines, fit.baselines, strict=True):
        np.testing.assert_array_equal(a.times, b.times)
        np.testing.assert_allclose(a.cumhaz, b.cumhaz, rtol=1e-7)
    expected = fit.expected_events(time, X, strata)
    np.testing.assert_allclose(
        shuffled.expected_events(time[perm], X[perm], None if strata is None else strata[perm]),
        expected[perm],
        rtol=1e-7,
    )


@SETTINGS
@given(data=data, ties=ties, shift=st.floats(-1e3, 1e3, allow_nan=False))
def test_shifting_a_covariate_changes_nothing_but_the_centre(data, ties, shift):
    time, event, X, strata, weights = data
    fit = _fit_or_reject(time, event, X, ties=ties, strata=strata, weights=weights)
    moved = X.copy()
    moved[:, -1] += shift
    refit = fit_cox(time, event, moved, ties=ties, strata=strata, weights=weights)
    np.testing.assert_allclose(refit.coef, fit.coef, rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(refit.se, fit.se, rtol=1e-6)
    assert refit.loglik == pytest.approx(fit.loglik, abs=1e-8)
    assert refit.center[-1] == pytest.approx(fit.center[-1] + shift, rel=1e-12, abs=1e-9)
    np.testing.assert_allclose(
        refit.expected_events(time, moved, strata), fit.expected_events(time, X, strata),
        rtol=1e-6, atol=1e-12,
    )


@SETTINGS
@given(data=data, ties=ties, new_seed=st.integers(0, 2**32 - 1))
def test_expected_events_do_not_depend_on_centring(data, ties, new_seed):
    """H0(t | center) exp((x - center) b) = H0(t | 0) exp(x b), for any x and t."""
    time, event, X, strata, weights = data
    fit = _fit_or_reject(time, event, X, ties=ties, strata=strata, weights=weights)
    rng = np.random.default_rng(new_seed)
    new_X = X[rng.integers(0, time.size, 15)] + rng.normal(0, 1, (15, X.shape[1]))
    new_t = rng.uniform(0, min(b.last_time for b in fit.baselines), 15)
    new_s = None if strata is None else rng.choice(np.array(["a", "b"], dtype=object), 15)
    assume(new_s is None or set(new_s) <= set(fit.strata_levels))
    at_center = fit.expected_events(new_t, new_X, new_s)
    at_zero = fit.cumulative_hazard(new_t, new_s, at_zero=True) * np.exp(
        fit.linear_predictor(new_X)
    )
    np.testing.assert_allclose(at_center, at_zero, rtol=1e-9, atol=1e-300)
    # COMMON PRACTICE: the Breslow estimator makes sum (w) E equal sum (w) O on the fitting data
    w = np.ones(time.size) if weights is None else weights
    assert w @ fit.expected_events(time, X, strata) == pytest.approx(w @ event, rel=1e-9)


@SETTINGS
@given(data=data, ties=ties)
def test_agrees_with_statsmodels(data, ties):
    time, event, X, strata, _ = data
    fit = _fit_or_reject(time, event, X, ties=ties, strata=strata)
    codes = None if strata is None else (strata == "b").astype(int)
    model = PHReg(time, X, status=event, ties=ties, strata=codes)  # REFERENCE LIBRARY
    # the likelihood at our estimate equals the reference library's ...
    assert fit.loglik == pytest.approx(model.loglike(fit.coef), abs=1e-8)
    # ... and it is the optimum: the Newton decrement g' (-H)^-1 g of the reference library's
    # likelihood (squared distance to the optimum in standard-error units) is negligible
    g = model.score(fit.coef)
    assert g @ np.linalg.solve(-model.hessian(fit.coef), g) < 1e-10
    np.testing.assert_allclose(fit.cov, np.linalg.inv(-model.hessian(fit.coef)), rtol=1e-6)
