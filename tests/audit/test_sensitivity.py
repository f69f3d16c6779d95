"""Prior sensitivity against the gamma-Poisson posteriors of docs/validation.md section 7."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from casemix.audit import prior_sensitivity, verdict_changes
from casemix.stats.shrinkage import fixed_prior

# docs/validation.md section 7: the invented 8-unit table used for empirical Bayes.
PROGRAMS = pd.DataFrame(
    {
        "program": [f"P{i}" for i in range(1, 9)],
        "observed": [2, 9, 15, 1, 22, 4, 30, 0],
        "expected": [5.1, 4.2, 8.3, 3.7, 12.5, 6.0, 18.2, 2.4],
    }
)


def test_posteriors_and_verdicts_under_each_prior():
    table, notes = prior_sensitivity(PROGRAMS, fixed_prior(2.481020, 2.481020))
    assert notes == []
    assert list(dict.fromkeys(table["prior"])) == [
        "as_evaluated", "gamma_0.5", "gamma_1", "gamma_2", "gamma_5", "eb_free_mean",
        "eb_plug_in", "hier_spread_0.1", "hier_spread_0.25", "hier_spread_0.5", "hier_spread_1",
        "hier_free_mean",
    ]  # fmt: skip
    # plug-in EB with the mean fixed: docs/validation.md section 7, a = b = 2.481020
    plug_in = table[table["prior"] == "eb_plug_in"].iloc[0]
    assert (plug_in["shape"], plug_in["rate"]) == pytest.approx((2.481020, 2.481020), rel=1e-5)
    # a wider hyperprior on the spread shrinks less: the largest O/E program's HR rises
    hier = table[(table["program"] == "P2") & table["prior"].str.startswith("hier_spread")]
    assert np.all(np.diff(hier["hr_mean"].to_numpy()) > 0)
    evaluated = table[table["prior"] == "as_evaluated"].set_index("program")
    # docs/validation.md section 7, EB posteriors with a = b = 2.481020 (scipy.stats.gamma):
    # (2, 5.1) mean 0.59108, 2.5% 0.17677, 97.5% 1.25094; (30, 18.2) 1.57057, 1.07760, 2.15494
    np.testing.assert_allclose(
        evaluated.loc["P1", ["hr_mean", "hr_lower", "hr_upper"]].to_numpy(float),
        [0.59108, 0.17677, 1.25094], atol=2e-5,
    )  # fmt: skip
    np.testing.assert_allclose(
        evaluated.loc["P7", ["hr_mean", "hr_lower", "hr_upper"]].to_numpy(float),
        [1.57057, 1.07760, 2.15494], atol=2e-5,
    )  # fmt: skip
    free = table[table["prior"] == "eb_free_mean"].iloc[0]
    # docs/validation.md section 7, free-mean EB: a = 3.02518, b = 2.57234 (rel 1e-4)
    assert (free["shape"], free["rate"]) == pytest.approx((3.02518, 2.57234), rel=1e-4)
    # verdict rule (design default): excess when P(HR > 1) >= 0.975 under Gamma(a+O, b+E)
    for row in table[~table["prior"].str.startswith("hier")].itertuples():
        p_above = stats.gamma.sf(1, row.shape + row.observed, scale=1 / (row.rate + row.expected))
        excess = p_above >= 0.975
        favorable = (
            stats.gamma.cdf(1, row.shape + row.observed, scale=1 / (row.rate + row.expected))
            >= 0.975
        )
        expected = "excess" if excess else "favorable" if favorable else "consistent"
        assert row.verdict == expected, (row.program, row.prior)


def test_changes_are_listed():
    # O = 3, E = 2.1 is excess under no prior; O = 12, E = 6 has P(HR > 1) = 0.965819 under
    # Gamma(2, 2) (docs/validation.md section 7) but above 0.975 under the vaguer Gamma(0.5, 0.5)
    programs = pd.DataFrame(
        {"program": ["X", "Y", "Z"], "observed": [12, 3, 40], "expected": [6.0, 2.1, 41.3]}
    )
    assert stats.gamma.sf(1, 12.5, scale=1 / 6.5) >= 0.975  # REFERENCE LIBRARY scipy
    table, _ = prior_sensitivity(programs, fixed_prior(2, 2))
    wide = verdict_changes(table).set_index("program")
    assert wide.loc["X", "as_evaluated"] == "consistent"
    assert wide.loc["X", "gamma_0.5"] == "excess"
    assert bool(wide.loc["X", "changes"]) and not bool(wide.loc["Y", "changes"])
    changed = table[(table["program"] == "X") & table["changed"]]["prior"].tolist()
    assert "gamma_0.5" in changed and "gamma_2" not in changed
