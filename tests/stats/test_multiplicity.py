"""Benjamini-Hochberg q-values against statsmodels multipletests."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from casemix.audit import bh_q_values, fdr_table
from casemix.errors import InputError


@pytest.mark.parametrize("seed", range(4))
def test_q_values_match_statsmodels(seed):
    rng = np.random.default_rng(seed)
    p = np.r_[rng.uniform(size=40), rng.uniform(0, 0.01, 5), [0.02, 0.02, 1.0]]
    # REFERENCE LIBRARY: statsmodels multipletests(method="fdr_bh"), adjusted p-values.
    np.testing.assert_allclose(bh_q_values(p), multipletests(p, method="fdr_bh")[1], rtol=1e-12)


def test_fdr_table_uses_exact_one_sided_p_values():
    # docs/validation.md section 6 pairs; REFERENCE LIBRARY scipy.stats.poisson:
    # P(Y >= O | E) = 0.020092, 0.350369, 1, 0.601008, 0.996981.
    o = [12, 3, 0, 40, 2]
    e = [6.0, 2.1, 1.5, 41.3, 8.0]
    table = fdr_table(["e", "d", "c", "b", "a"], o, e, alpha=0.1)
    assert list(table["program"]) == ["a", "b", "c", "d", "e"]
    by_name = table.set_index("program")
    np.testing.assert_allclose(
        by_name.loc[["e", "d", "c", "b", "a"], "p_more"],
        [0.020092, 0.350369, 1, 0.601008, 0.996981],
        atol=1e-6,
    )
    np.testing.assert_allclose(
        by_name["p_fewer"], stats.poisson.cdf(by_name["observed"], by_name["expected"])
    )
    np.testing.assert_allclose(
        by_name["q_fewer"], multipletests(by_name["p_fewer"], method="fdr_bh")[1], rtol=1e-12
    )
    # 5 * 0.013754 = 0.0688 <= 0.1 for 'a'; 'e' has q_more = 5 * 0.020092 = 0.100 > 0.1
    assert by_name.loc["a", "fdr_flag"] == "fewer_events"
    assert by_name.loc["e", "fdr_flag"] == "none"


def test_bad_p_values():
    with pytest.raises(InputError, match="between 0 and 1 with no missing values"):
        bh_q_values([0.1, np.nan])
