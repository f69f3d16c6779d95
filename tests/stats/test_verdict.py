"""Verdicts, what-if distances and rules files, checked against scipy.stats.gamma."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from casemix.errors import RulesError
from casemix.stats.hierarchy import HyperDensity, PriorSettings
from casemix.stats.shrinkage import Prior, fixed_prior, posterior
from casemix.stats.verdict import (
    VERDICT_COLUMNS,
    VERDICTS,
    Rules,
    assign_verdicts,
    load_rules,
    rules_from_dict,
    verdict_colours,
)

PRIOR = fixed_prior(2.0, 2.0)


def _p_above(observed, expected, margin=1.0, a=2.0, b=2.0):
    # REFERENCE LIBRARY: scipy.stats.gamma tail of the posterior Gamma(a + O, b + E).
    return stats.gamma.sf(margin, a + np.asarray(observed), scale=1 / (b + np.asarray(expected)))


def _p_below(observed, expected, margin=1.0, a=2.0, b=2.0):
    return stats.gamma.cdf(margin, a + np.asarray(observed), scale=1 / (b + np.asarray(expected)))


def test_reference_rows_get_the_expected_verdicts():
    # docs/validation.md section 7 (scipy.stats.gamma, a = b = 2): (12, 6.0) has
    # P(HR>1) 0.965819 < 0.975 -> consistent although the exact Poisson p is 0.020;
    # (40, 41.3) P(HR<1) 0.598665 -> consistent; (0, 1.5) P(HR<1) 0.864112 -> consistent;
    # rossi model B cohort (48, 74.7406) P(HR<1) 0.999529 -> favorable.
    table = assign_verdicts([12, 40, 0, 48], [6.0, 41.3, 1.5, 74.7406], PRIOR)
    assert list(table.verdict) == ["consistent", "consistent", "consistent", "favorable"]


def test_excess_boundary_against_scipy():
    # Smallest O at E = 6 with P(HR > 1) >= 0.975 under Gamma(2 + O, 8), found with scipy:
    counts = np.arange(0, 60)
    first = int(np.argmax(_p_above(counts, 6.0) >= 0.975))
    assert _p_above(first - 1, 6.0) < 0.975 <= _p_above(first, 6.0)
    table = assign_verdicts([first - 1, first], [6.0, 6.0], PRIOR)
    assert list(table.verdict) == ["consistent", "excess"]
    assert list(table.events_to_excess) == [1, 0]


def test_favorable_boundary_against_scipy():
    # Largest O at E = 20 with P(HR < 1) >= 0.975 under Gamma(2 + O, 22), found with scipy:
    counts = np.arange(0, 60)
    last = int(np.flatnonzero(_p_below(counts, 20.0) >= 0.975).max())
    assert _p_below(last + 1, 20.0) < 0.975 <= _p_below(last, 20.0)
    table = assign_verdicts([last, last + 1], [20.0, 20.0], PRIOR)
    assert list(table.verdict) == ["favorable", "consistent"]
    assert list(table.events_to_favorable) == [0, 1]


def test_verdicts_match_scipy_on_many_programs():
    rng = np.random.default_rng(31)
    expected = rng.uniform(0.2, 60.0, size=300)
    observed = rng.poisson(expected * rng.choice([0.5, 1.0, 1.8], size=300))
    rules = Rules(probability=0.9, upper_margin=1.25, lower_margin=0.8, min_expected=2.0)
    table = assign_verdicts(observed, expected, PRIOR, rules)
    above = _p_above(observed, expected, 1.25) >= 0.9
    below = _p_below(observed, expected, 0.8) >= 0.9
    wanted = np.where(above, "excess", np.where(below, "favorable", "consistent"))
    wanted = np.where(expected < 2.0, "too_little_data", wanted)
    assert list(table.verdict) == list(wanted)
    assert set(table.verdict) == set(VERDICTS)  # every verdict occurs, so all were tested


def test_too_little_data_and_min_expected_zero():
    table = assign_verdicts([9, 0], [0.99, 0.0], PRIOR)
    assert list(table.verdict) == ["too_little_data", "too_little_data"]
    assert table.events_to_excess.isna().all()
    assert table.events_to_favorable.isna().all()
    # With min_expected = 0, E = 0 is judged on the posterior Gamma(2 + O, 2) (scipy).
    table = assign_verdicts([9], [0.0], PRIOR, Rules(min_expected=0.0))
    assert _p_above(9, 0.0) >= 0.975
    assert table.verdict[0] == "excess"


def test_what_if_distances_against_scipy():
    # events_to_excess = k: P(HR>um) at O + k reaches the probability, at O + k - 1 it does not.
    # events_to_favorable = j: P(HR<lm) at O - j reaches it, at O - j + 1 it does not; NA when
    # not even O = 0 reaches it. Posterior tails from scipy.stats.gamma, computed here.
    rng = np.random.default_rng(5)
    expected = rng.uniform(1.0, 120.0, size=400)
    observed = rng.poisson(expected * rng.uniform(0.3, 2.5, size=400))
    prior = fixed_prior(1.7, 2.3)
    rules = Rules(upper_margin=1.2, lower_margin=0.9)
    table = assign_verdicts(observed, expected, prior, rules)
    a, b = 1.7, 2.3
    k = table.events_to_excess.to_numpy(dtype=float)
    assert np.all(_p_above(observed + k, expected, 1.2, a, b) >= 0.975)
    below_k = _p_above(observed + k - 1, expected, 1.2, a, b) < 0.975
    assert np.all(below_k | (k == 0))
    j = table.events_to_favorable.to_numpy(dtype=float, na_value=np.nan)
    reachable = _p_below(0, expected, 0.9, a, b) >= 0.975
    assert np.array_equal(np.isnan(j), ~reachable)
    o, e, j = observed[reachable], expected[reachable], j[reachable]
    assert np.all(j <= o)
    assert np.all(_p_below(o - j, e, 0.9, a, b) >= 0.975)
    assert np.all((_p_below(o - j + 1, e, 0.9, a, b) < 0.975) | (j == 0))
    # Distance 0 exactly when the verdict is already reached.
    assert np.array_equal(k == 0, table.verdict.to_numpy() == "excess")
    assert np.array_equal(
        table.events_to_favorable.fillna(-1).to_numpy() == 0,
        table.verdict.to_numpy() == "favorable",
    )


def test_distances_for_a_small_program():
    # O = 0 at E = 1.5 under Gamma(2, 3.5): P(HR<1) 0.864112 (docs/validation.md section 7)
    # cannot reach 0.975 with fewer events, so the favorable distance is NA.
    row = assign_verdicts([0], [1.5], PRIOR).iloc[0]
    assert row.verdict == "consistent"
    assert pd.isna(row.events_to_favorable)
    k = int(row.events_to_excess)
    assert _p_above(k, 1.5) >= 0.975 > _p_above(k - 1, 1.5)


def test_result_frame_keeps_index_and_dtypes():
    observed = pd.Series([4, 30, 1], index=["LV02", "LV07", "LV11"])
    table = assign_verdicts(observed, [3.0, 12.0, 0.4], PRIOR)
    assert list(table.index) == ["LV02", "LV07", "LV11"]
    assert list(table.columns) == list(VERDICT_COLUMNS)
    assert str(table.events_to_excess.dtype) == "Int64"
    assert table.verdict["LV07"] == "excess"
    assert table.verdict["LV11"] == "too_little_data"


def test_distances_leave_the_current_verdict_before_reaching_the_opposite():
    # An excess program (O = 40, E = 20) under Gamma(2, 2): the fewer events that make it
    # consistent come long before the ones that make it favorable. Posterior tails from
    # scipy.stats.gamma: Gamma(2 + O, 22).
    row = assign_verdicts([40], [20.0], PRIOR).iloc[0]
    assert row.verdict == "excess"
    d = int(row.events_fewer_to_change)
    assert _p_above(40 - d, 20.0) < 0.975 <= _p_above(40 - d + 1, 20.0)
    j = int(row.events_to_favorable)
    assert _p_below(40 - j, 20.0) >= 0.975 > _p_below(40 - j + 1, 20.0)
    assert d < j
    assert pd.isna(row.events_more_to_change)
    # and a favorable one (O = 5, E = 20): more events to become consistent, then excess
    row = assign_verdicts([5], [20.0], PRIOR).iloc[0]
    assert row.verdict == "favorable"
    k = int(row.events_more_to_change)
    assert _p_below(5 + k, 20.0) < 0.975 <= _p_below(5 + k - 1, 20.0)
    assert k < int(row.events_to_excess)
    assert pd.isna(row.events_fewer_to_change)


def test_favorable_is_out_of_reach_below_a_computed_expected_count():
    # Under Gamma(2, 2) even O = 0 is favorable only when P(HR < 1 | Gamma(2, 2 + E)) >= 0.975:
    # scipy.optimize.brentq on scipy.stats.gamma.cdf gives that E (about 8.1).
    from scipy import optimize

    edge = optimize.brentq(lambda e: _p_below(0, e) - 0.975, 1.0, 50.0)
    table = assign_verdicts([0, 0], [edge - 0.01, edge + 0.01], PRIOR)
    assert table.favorable_reachable.tolist() == [False, True]
    assert table.excess_reachable.tolist() == [True, True]
    assert table.verdict.tolist() == ["consistent", "favorable"]
    assert np.isnan(table.detectable_hr_favorable[0])


def test_smallest_detectable_hazard_ratios_against_scipy_poisson():
    # At the reported hazard ratio, O ~ Poisson(HR E) reaches the excess threshold (or stays
    # at or below the favorable one) with probability 0.8: scipy.stats.poisson.
    expected = np.array([1.5, 4.0, 12.0, 40.0, 150.0])
    table = assign_verdicts(np.zeros(5), expected, PRIOR)
    for e, row in zip(expected, table.itertuples(), strict=True):
        k = int(row.events_to_excess)  # O = 0, so this is the excess threshold itself
        assert stats.poisson.sf(k - 1, row.detectable_hr_excess * e) == pytest.approx(0.8)
        assert _p_above(k, e) >= 0.975 > _p_above(k - 1, e)
        if row.favorable_reachable:
            j = _favorable_up_to(e)
            assert stats.poisson.cdf(j, row.detectable_hr_favorable * e) == pytest.approx(0.8)
        # chance of any flag when the true HR is 1
        flag = stats.poisson.sf(k - 1, e) + (
            stats.poisson.cdf(_favorable_up_to(e), e) if row.favorable_reachable else 0.0)
        assert row.null_flag_probability == pytest.approx(flag, rel=1e-10)


def _favorable_up_to(e, a=2.0, b=2.0):
    j = -1
    while _p_below(j + 1, e, a=a, b=b) >= 0.975:
        j += 1
    return j


def test_distances_under_a_mixture_prior_agree_with_its_posterior():
    # A two-component mixture prior: the distances must match posterior() at the moved counts.
    prior = Prior(shape=3.0, rate=3.0, method="hierarchical",
                  components=((2.0, 2.0, 0.3), (20.0, 20.0, 0.7)))
    observed, expected = np.array([3, 14, 30]), np.array([6.0, 7.0, 15.0])
    table = assign_verdicts(observed, expected, prior)
    for o, e, row in zip(observed, expected, table.itertuples(), strict=True):
        k = int(row.events_to_excess)
        assert posterior([o + k], [e], prior).p_above[0] >= 0.975
        if k:
            assert posterior([o + k - 1], [e], prior).p_above[0] < 0.975


def test_bayesian_fdr_rule_flags_the_largest_set_with_a_small_expected_share_of_errors():
    # Invented programs under Gamma(2, 2); each program's chance of a wrong flag from
    # scipy.stats.gamma, sorted by hand: the largest k with mean of the k smallest <= 0.05.
    observed = np.array([40, 5, 30, 18, 9, 3, 25, 12])
    expected = np.array([20.0, 20.0, 18.0, 12.0, 6.0, 2.0, 25.0, 30.0])
    p_above, p_below = _p_above(observed, expected), _p_below(observed, expected)
    wrong = 1 - np.maximum(p_above, p_below)
    order = np.argsort(wrong)
    k = max(i + 1 for i in range(8) if wrong[order[: i + 1]].mean() <= 0.05)
    table = assign_verdicts(observed, expected, PRIOR, Rules(bayesian_fdr=0.05))
    flagged = np.zeros(8, dtype=bool)
    flagged[order[:k]] = True
    assert np.array_equal(table.verdict.isin(["excess", "favorable"]).to_numpy(), flagged)
    assert k > (assign_verdicts(observed, expected, PRIOR).verdict != "consistent").sum()
    # the distances use the probability the rule amounts to: the surest program left out
    # needs exactly events_to_excess more to pass the lowest flagged probability
    cut = np.maximum(p_above, p_below)[order[k - 1]]
    for i in np.flatnonzero(~flagged & (p_above > p_below)):
        n = int(table.events_to_excess[i])
        assert _p_above(observed[i] + n, expected[i]) >= cut > _p_above(observed[i] + n - 1,
                                                                          expected[i])


# ---------------------------------------------------------------- rules


def test_default_rules_and_round_trip():
    # Defaults from DESIGN.md ("rules"): P(HR>1) >= 0.975, P(HR<1) >= 0.975, E < 1.
    rules = Rules()
    assert rules.to_dict() == {
        "probability": 0.975,
        "upper_margin": 1.0,
        "lower_margin": 1.0,
        "min_expected": 1.0,
        "credible_level": 0.95,
        "power": 0.8,
        "bayesian_fdr": 0.0,
    }
    custom = rules_from_dict({"upper_margin": 1.25, "min_expected": 2})
    assert rules_from_dict(custom.to_dict()) == custom
    assert custom.min_expected == 2.0
    assert custom.probability == 0.975


def test_load_rules_reads_the_verdict_table(tmp_path):
    path = tmp_path / "rules.toml"
    path.write_text("[verdict]\nprobability = 0.95\nupper_margin = 1.25\nlower_margin = 0.8\n")
    assert load_rules(path) == Rules(probability=0.95, upper_margin=1.25, lower_margin=0.8)
    path.write_text("[verdict]\n")
    assert load_rules(path) == Rules()


def test_load_rules_reads_the_prior_table(tmp_path):
    path = tmp_path / "rules.toml"
    path.write_text(
        '[verdict]\npower = 0.9\n[prior]\nmethod = "hierarchical"\nfree_mean = true\n'
        '[prior.hyperprior]\nspread = {distribution = "halfnorm", scale = 0.5}\n'
    )
    rules = load_rules(path)
    assert rules.power == 0.9
    assert rules.prior.free_mean and rules.prior.method == "hierarchical"
    assert rules.prior.hyperprior.first == HyperDensity("spread", "halfnorm", (("scale", 0.5),))
    assert load_rules_default(tmp_path).prior == PriorSettings()
    path.write_text('[verdict]\n[prior]\nmethod = "guess"\n')
    with pytest.raises(RulesError, match=r"rules\.toml: \[prior\] method must be one of hier"):
        load_rules(path)
    path.write_text("[verdict]\n[prior]\nshape_ = 2\n")
    with pytest.raises(RulesError, match=r"unknown key\(s\) in \[prior\]: shape_"):
        load_rules(path)


def load_rules_default(folder):
    path = folder / "plain.toml"
    path.write_text("[verdict]\n")
    return load_rules(path)


@pytest.mark.parametrize(
    ("body", "message"),
    [
        (
            "[verdict]\nprobabilty = 0.9\n",
            r"rules\.toml: unknown key\(s\) in \[verdict\]: probabilty \(closest: "
            r"'probability'\)\. Allowed keys: .* \(see docs/rules\.md\)",
        ),
        ("[verdcit]\n", r"unknown top-level key\(s\) verdcit \(closest: 'verdict'\)"),
        (
            "[verdict]\nprobability = 0.5\n",
            r"rules\.toml: \[verdict\] probability must be a number",
        ),
        ("[verdict]\nprobability = 1.0\n", r"\[verdict\] probability must be .*between 0.5 and 1"),
        ('[verdict]\nprobability = "high"\n', r"\[verdict\] probability must be .*got 'high'"),
        ("[verdict]\nupper_margin = 0\n", r"\[verdict\] upper_margin must be a hazard ratio > 0"),
        ("[verdict]\nlower_margin = -1.0\n", r"\[verdict\] lower_margin must be a hazard ratio"),
        (
            "[verdict]\nupper_margin = 0.9\n",
            r"lower_margin \(1\.0\) is above upper_margin \(0\.9\)",
        ),
        (
            "[verdict]\nmin_expected = -2\n",
            r"\[verdict\] min_expected must be a number of expected",
        ),
        ("[verdict]\ncredible_level = 95\n", r"\[verdict\] credible_level must be .*got 95"),
        ("[verdict]\nmin_expected = true\n", r"\[verdict\] min_expected must be .*got True"),
        ("[verdict]\nprobability = nan\n", r"\[verdict\] probability must be .*got nan"),
        ("probability = 0.9\n",
         r"unknown top-level key\(s\) probability; only \[verdict\], \[prior\]"),
        ("[verdict]\n[other]\n", r"unknown top-level key\(s\) other"),
        ("", r"rules\.toml has no \[verdict\] table; add a line \[verdict\]"),
        ("[verdict\n", r"rules\.toml is not valid TOML"),
        ("verdict = 3\n", r"rules\.toml: \[verdict\] must be a table"),
    ],
)
def test_load_rules_errors_name_file_and_key(tmp_path, body, message):
    path = tmp_path / "rules.toml"
    path.write_text(body)
    with pytest.raises(RulesError, match=message):
        load_rules(path)


def test_load_rules_missing_file(tmp_path):
    with pytest.raises(RulesError, match=r"cannot read rules file .*absent\.toml"):
        load_rules(tmp_path / "absent.toml")


def test_rules_constructor_validates():
    with pytest.raises(RulesError, match=r"Rules: \[verdict\] probability must be"):
        Rules(probability=0.4)


def test_rules_from_dict_names_its_source():
    with pytest.raises(RulesError, match=r"command line: \[verdict\] upper_margin must be"):
        rules_from_dict({"upper_margin": "1.25"}, source="command line")


# ---------------------------------------------------------------- colours


def test_verdict_colours_are_okabe_ito():
    # Okabe & Ito (2008) colour-blind-safe palette (from memory), plus the grey commonly used
    # with it (common practice).
    palette = {"#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7"}
    palette.add("#999999")
    colours = verdict_colours()
    assert list(colours) == list(VERDICTS)
    assert set(colours.values()) <= palette
    assert len(set(colours.values())) == len(VERDICTS)
    colours["excess"] = "#000000"
    assert verdict_colours()["excess"] == "#D55E00"
