"""Bootstrap and delta-method uncertainty of E against lifelines refits, scipy and simulation."""

from __future__ import annotations

from functools import partial
from types import SimpleNamespace

import numpy as np
import pytest
from audit_helpers import step_expected
from oracles import lazy
from scipy import optimize, stats

from casemix.audit import (
    ProgramArrays,
    bootstrap_expected,
    delta_expected,
    mixture_interval,
)
from casemix.errors import ConvergenceError, InputError
from casemix.parallel import replicate_map
from casemix.stats.shrinkage import fixed_prior
from casemix.survival import fit_cox

CoxPHFitter = lazy("lifelines", "CoxPHFitter")

# docs/validation.md section 5, model B: reference = rossi fin = 0, cohort = fin = 1.
NAMES = ["age", "race", "wexp", "mar", "paro", "prio"]


def _program(frame):
    # a partition of the cohort into two "programs" by prior convictions
    return np.where(frame["prio"] > 2, "B", "A")


@pytest.fixture(scope="module")
def model_b(rossi):
    ref, coh = rossi[rossi["fin"] == 0], rossi[rossi["fin"] == 1]
    fit = fit_cox(ref["week"], ref["arrest"], ref[NAMES].to_numpy(float), names=NAMES)
    cohort = ProgramArrays.build(coh["week"], coh[NAMES].to_numpy(float), None, _program(coh))
    data = SimpleNamespace(
        time=ref["week"].to_numpy(float),
        event=ref["arrest"].to_numpy(),
        X=ref[NAMES].to_numpy(float),
        strata=None,
    )
    observed = np.bincount(cohort.code, coh["arrest"].to_numpy())
    return SimpleNamespace(ref=ref, coh=coh, fit=fit, cohort=cohort, data=data, observed=observed)


def test_full_fit_expected_matches_reference_value(model_b):
    # docs/validation.md section 5: cohort E = 74.7406 (step evaluation; hand Breslow and
    # lifelines baseline read as a step function).
    assert model_b.cohort.expected(model_b.fit).sum() == pytest.approx(74.7406, rel=1e-5)


def test_every_replicate_matches_a_lifelines_refit(model_b):
    seed, replicates = 11, 6
    result = bootstrap_expected(
        model_b.data, model_b.fit, model_b.cohort, model_b.observed, fixed_prior(2, 2),
        replicates=replicates, seed=seed, map_fn=map,
    )  # fmt: skip
    assert result.failed == 0
    children = np.random.SeedSequence(seed).spawn(replicates)
    coefs = []
    for b, child in enumerate(children):
        rows = np.random.default_rng(child).integers(0, len(model_b.ref), len(model_b.ref))
        sample = model_b.ref.iloc[rows][[*NAMES, "week", "arrest"]].reset_index(drop=True)
        # REFERENCE LIBRARY: lifelines CoxPHFitter on the same resample, E from its
        # baseline read as a step function at each cohort recipient's own time
        cph = CoxPHFitter().fit(sample, "week", "arrest")
        e = step_expected(cph, model_b.coh, NAMES)
        by_program = np.bincount(model_b.cohort.code, e)
        np.testing.assert_allclose(result.draws[b], by_program, rtol=1e-4)
        coefs.append(cph.params_[NAMES].to_numpy())
    se = np.std(coefs, axis=0, ddof=1)
    np.testing.assert_allclose(result.coefficients["se_bootstrap"], se, rtol=1e-3)


def test_mixture_interval_against_brute_force_draws(model_b):
    result = bootstrap_expected(
        model_b.data, model_b.fit, model_b.cohort, model_b.observed, fixed_prior(2, 2),
        replicates=40, seed=5, map_fn=map,
    )  # fmt: skip
    # brute force: draw HR from each replicate's posterior Gamma(a + O, b + E_b)
    # (REFERENCE LIBRARY scipy.stats.gamma, seeded) and take empirical quantiles.
    rng = np.random.default_rng(0)
    for j in range(2):
        shape = 2 + model_b.observed[j]
        rates = 2 + result.draws[:, j]
        draws = stats.gamma.rvs(shape, scale=1 / np.repeat(rates, 20_000), random_state=rng)
        lower, upper = np.quantile(draws, [0.025, 0.975])
        row = result.programs.iloc[j]
        assert row["hr_lower_boot"] == pytest.approx(lower, rel=0.01)
        assert row["hr_upper_boot"] == pytest.approx(upper, rel=0.01)
        np.testing.assert_allclose(
            row[["expected_lower", "expected_upper"]].to_numpy(float),
            np.quantile(result.draws[:, j], [0.025, 0.975]),
        )
        # the plain interval is the posterior with E fixed (REFERENCE LIBRARY scipy.stats.gamma)
        plain = stats.gamma(shape, scale=1 / (2 + row["expected"]))
        assert row["hr_lower"] == pytest.approx(plain.ppf(0.025))


def test_mixture_of_identical_components_is_the_component():
    # COMMON PRACTICE: a mixture of one law is that law (REFERENCE LIBRARY scipy.stats.gamma)
    lower, upper = mixture_interval(14, [8.0, 8.0, 8.0])
    # docs/validation.md section 7, O = 12, E = 6, a = b = 2: Gamma(14, 8) 2.5% 0.956741,
    # 97.5% 2.778799
    assert (lower, upper) == pytest.approx((0.956741, 2.778799), abs=1e-6)


def test_worker_processes_and_a_dask_cluster_give_the_serial_replicates(model_b):
    distributed = pytest.importorskip("distributed")
    args = (model_b.data, model_b.fit, model_b.cohort, model_b.observed, fixed_prior(2, 2))
    serial = bootstrap_expected(*args, replicates=6, seed=2, map_fn=map)
    pooled = bootstrap_expected(*args, replicates=6, seed=2)  # 2 local worker processes
    np.testing.assert_array_equal(serial.draws, pooled.draws)
    # in-process cluster (threads), enough to show the scheduler sees the same seeds
    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None
    ) as cluster:
        clustered = bootstrap_expected(
            *args, replicates=6, seed=2,
            map_fn=partial(replicate_map, scheduler=cluster.scheduler_address),
        )  # fmt: skip
    np.testing.assert_array_equal(serial.draws, clustered.draws)
    # a different seed gives different replicates, so the equalities above can fail
    other = bootstrap_expected(*args, replicates=6, seed=3, map_fn=map)
    assert not np.array_equal(serial.draws, other.draws)


def test_delta_method_gradient_and_simulation(model_b):
    fit, cohort = model_b.fit, model_b.cohort
    table = delta_expected(fit, cohort)
    h0 = fit.cumulative_hazard(cohort.time)  # baseline at x = center, held fixed

    def program_e(beta, j):
        mask = cohort.code == j
        return float(np.sum(h0[mask] * np.exp((cohort.X[mask] - fit.center) @ beta)))

    for j in range(2):
        # REFERENCE LIBRARY: scipy.optimize.approx_fprime for the gradient of E(beta)
        grad = optimize.approx_fprime(fit.coef, program_e, 1e-7, j)
        se = np.sqrt(grad @ fit.cov @ grad)
        assert table.loc[j, "expected_se"] == pytest.approx(se, rel=1e-4)
        # simulation with a known truth: beta ~ N(beta_hat, V) exactly (numpy, seeded)
        rng = np.random.default_rng(j)
        betas = rng.multivariate_normal(fit.coef, fit.cov, 20_000)
        sims = np.array([program_e(b, j) for b in betas[:4000]])
        assert np.std(sims) == pytest.approx(se, rel=0.1)
    lower = table["expected"] * np.exp(-1.959964 * table["expected_se"] / table["expected"])
    np.testing.assert_allclose(table["delta_lower"], lower, rtol=1e-6)


def test_errors(model_b):
    args = (model_b.data, model_b.fit, model_b.cohort, model_b.observed, fixed_prior(2, 2))
    with pytest.raises(InputError, match=r"replicates must be at least 2 \(200 is usual\), got 1"):
        bootstrap_expected(*args, replicates=1)
    with pytest.raises(ConvergenceError, match="only 0 of 3 bootstrap refits converged"):
        bootstrap_expected(*args, replicates=3, map_fn=lambda f, items: [None for _ in items])
