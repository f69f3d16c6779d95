"""The evaluation API: evaluate(...) -> Evaluation and the evaluation folder.

Reference values: docs/validation.md sections 5 and 7 (rossi groups as programs), scipy.stats
(gamma posteriors) and lifelines (coefficients) computed in the test, and simulations with a
known truth (seeded, invented cohorts whose outcomes are drawn from a rossi reference model
times a known hazard ratio per program).
"""

from __future__ import annotations

import hashlib
import json
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rossi_records as rr
from scipy import stats

import casemix
from casemix import (
    Evaluation,
    Rules,
    build_cohort,
    evaluate,
    fit_reference,
    fixed_prior,
    load_spec,
    read_records,
)
from casemix.errors import InputError, PriorWarning
from casemix.evaluation.evaluate import PROGRAM_COLUMNS
from casemix.evaluation.folder import TABLES

# DESIGN.md, "programs.csv columns, in this order".
DESIGN_COLUMNS = [
    "program", "recipients", "observed", "expected", "oe_ratio", "hr_mean", "hr_lower",
    "hr_upper", "p_above", "p_below", "verdict", "observed_survival", "expected_survival",
]  # fmt: skip
# DEVELOPERS.md, "Evaluation folder", plus out_of_range.csv (Evaluation.out_of_range) and
# corrections.csv (DESIGN.md, "outputs").
FOLDER_FILES = [
    "casemix.csv", "coefficients.csv", "corrections.csv", "curves.csv", "exclusions.csv",
    "followup.csv",
    "out_of_range.csv", "programs.csv", "recipients.csv", "run.json",
]  # fmt: skip


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("evaluate")


@pytest.fixture(scope="module")
def rossi():
    return rr.rossi()


@pytest.fixture(scope="module")
def spec_a(folder):
    return load_spec(rr.write_spec(folder / "a.toml", rr.MODEL_A))


@pytest.fixture(scope="module")
def model_a(folder, rossi, spec_a):
    """Model A of docs/validation.md section 5 (all of rossi), saved as JSON."""
    path = rr.write_extract(folder / "ref.csv", rossi, rr.by(rossi, "fin"))
    records = read_records(path, spec_a)
    model = fit_reference(records, spec_a, rr.OUTCOME, rr.HORIZON_DAYS, rr.ROSSI_CUTOFF)
    return model, model.save(folder / "model_a.json")


@pytest.fixture(scope="module")
def by_race(folder, rossi):
    """rossi by race as the evaluation cohort, with one recipient whose age is missing."""
    frame = rossi.astype({"age": float})
    frame.loc[frame.index[3], "age"] = np.nan
    return rr.write_extract(folder / "by_race.csv", frame, rr.by(rossi, "race"))


@pytest.fixture(scope="module")
def evaluation(by_race, model_a):
    _, path = model_a
    return evaluate(by_race, path, prior=fixed_prior(2.0, 2.0), cutoff=rr.ROSSI_CUTOFF)


def test_programs_table_has_the_design_columns_in_order(evaluation):
    assert isinstance(evaluation, Evaluation)
    assert list(evaluation.programs.columns[:13]) == DESIGN_COLUMNS
    assert list(evaluation.programs.columns) == PROGRAM_COLUMNS
    assert evaluation.programs["program"].tolist() == ["race0", "race1"]


def test_programs_follow_the_reference_values(evaluation, rossi):
    programs = evaluation.programs.set_index("program")
    # docs/validation.md section 5, model A by race: O 12 / 102, E 15.2347 / 98.7653 on
    # all 432; here R0004 (race 1, not arrested, no age) is excluded, so race 1 loses his E
    # (lifelines, baseline step-read at his week 52).
    cph = rr.lifelines_fit(rossi, rr.MODEL_A)
    own = rr.lifelines_expected(cph, rossi, rossi)[3]
    assert programs["recipients"].tolist() == [53, 378]
    assert programs["observed"].tolist() == [12, 102]
    np.testing.assert_allclose(programs["expected"], [15.2347, 98.7653 - own], rtol=1e-5)


def test_posteriors_equal_scipy_gamma(evaluation):
    programs = evaluation.programs
    o, e = programs["observed"].to_numpy(), programs["expected"].to_numpy()
    # Conjugate gamma-Poisson (docs/validation.md section 7, COMMON PRACTICE):
    # posterior Gamma(a + O, rate b + E), scipy.stats.gamma with scale = 1 / rate.
    post = stats.gamma(2.0 + o, scale=1.0 / (2.0 + e))
    np.testing.assert_allclose(programs["hr_mean"], post.mean(), rtol=1e-12)
    np.testing.assert_allclose(programs["hr_median"], post.median(), rtol=1e-9)
    np.testing.assert_allclose(programs["hr_lower"], post.ppf(0.025), rtol=1e-9)
    np.testing.assert_allclose(programs["hr_upper"], post.ppf(0.975), rtol=1e-9)
    np.testing.assert_allclose(programs["p_above"], post.sf(1.0), rtol=1e-9)
    np.testing.assert_allclose(programs["p_below"], post.cdf(1.0), rtol=1e-9)
    np.testing.assert_allclose(programs["weight"], e / (2.0 + e), rtol=1e-12)


def test_model_b_cohort_posterior_and_verdict(folder, rossi):
    reference, cohort = rossi[rossi["fin"] == 0], rossi[rossi["fin"] == 1]
    spec = load_spec(rr.write_spec(folder / "b.toml", rr.MODEL_B))
    ref_path = rr.write_extract(folder / "b_ref.csv", reference, rr.by(reference, "fin"))
    model = fit_reference(
        read_records(ref_path, spec), spec, rr.OUTCOME, rr.HORIZON_DAYS, rr.ROSSI_CUTOFF
    )
    cohort_path = rr.write_extract(folder / "b_cohort.csv", cohort, rr.by(cohort, "fin"))
    row = evaluate(cohort_path, model, prior=fixed_prior(2, 2), cutoff=rr.ROSSI_CUTOFF)
    row = row.programs.iloc[0]
    # docs/validation.md section 7, "rossi model B cohort": O 48, E 74.7406, a = b = 2 ->
    # Gamma(50, 76.7406): mean 0.651546; 2.5% 0.48359; 97.5% 0.84415; P(HR<1) 0.999529.
    assert (row.observed, row.expected) == (48, pytest.approx(74.7406, rel=1e-5))
    np.testing.assert_allclose(
        [row.hr_mean, row.hr_lower, row.hr_upper, row.p_below],
        [0.651546, 0.48359, 0.84415, 0.999529],
        atol=1e-5,
    )
    assert row.verdict == "favorable" and row.events_to_favorable == 0
    # Fewest extra events at the same E that make P(HR > 1) >= 0.975, by scipy search.
    rate = 2 + row.expected
    extra = next(k for k in range(200) if stats.gamma.sf(1, 50 + k, scale=1 / rate) >= 0.975)
    assert row.events_to_excess == extra


def test_rules_file_sets_level_and_margins(folder, by_race, model_a):
    model, _ = model_a
    rules = folder / "rules.toml"
    rules.write_text(
        "[verdict]\ncredible_level = 0.9\nupper_margin = 1.25\nlower_margin = 0.8\n",
        encoding="utf-8",
    )
    result = evaluate(by_race, model, rules, prior=fixed_prior(3.0, 2.5), cutoff=rr.ROSSI_CUTOFF)
    programs = result.programs
    o, e = programs["observed"].to_numpy(), programs["expected"].to_numpy()
    post = stats.gamma(3.0 + o, scale=1.0 / (2.5 + e))  # scipy.stats.gamma
    np.testing.assert_allclose(programs["hr_lower"], post.ppf(0.05), rtol=1e-9)
    np.testing.assert_allclose(programs["hr_upper"], post.ppf(0.95), rtol=1e-9)
    np.testing.assert_allclose(programs["p_above"], post.sf(1.25), rtol=1e-9)
    np.testing.assert_allclose(programs["p_below"], post.cdf(0.8), rtol=1e-9)
    assert result.run["credible_level"] == 0.9
    assert result.rules == Rules(credible_level=0.9, upper_margin=1.25, lower_margin=0.8)


def test_run_facts(evaluation, by_race, model_a):
    model, path = model_a
    run = evaluation.run
    prior = run["prior"]
    assert (prior["shape"], prior["rate"], prior["method"]) == (2.0, 2.0, "fixed")
    assert {"mean", "free_mean", "at_boundary", "note"} <= set(prior)
    assert run["credible_level"] == 0.95
    assert run["casemix_version"] == casemix.__version__
    assert (run["outcome"], run["horizon_days"], run["cutoff"]) == ("arrest", 364, "2021-06-30")
    # Input fingerprints: sha256 of the files' bytes (hashlib).
    assert run["inputs"]["records"]["sha256"] == hashlib.sha256(by_race.read_bytes()).hexdigest()
    assert run["inputs"]["model"]["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert run["model"]["fingerprint"] == model.fingerprint
    assert run["counts"] == {"read": 432, "kept": 431, "excluded": 1, "corrected": 0,
                             "corrections": {}, "excluded_by_reason": {"missing age": 1}}
    json.dumps(run, allow_nan=False)  # plain JSON, no NaN


def test_exclusions_are_listed_not_dropped(evaluation):
    excluded = evaluation.exclusions
    assert excluded["recipient"].tolist() == ["R0004"] and excluded["row"].tolist() == [4]
    assert "age" in excluded["reason"].iloc[0]
    assert evaluation.programs["recipients"].sum() + len(excluded) == 432


def test_recipients_and_casemix_tables_agree_with_programs(evaluation):
    recipients = evaluation.recipients
    assert list(recipients.columns) == [
        "recipient", "program", "time", "event", "expected", "lp", "stratum"
    ]  # fmt: skip
    sums = recipients.groupby("program")[["event", "expected"]].sum()
    programs = evaluation.programs.set_index("program")
    np.testing.assert_array_equal(sums["event"], programs["observed"])
    np.testing.assert_allclose(sums["expected"], programs["expected"], rtol=1e-12)
    totals = evaluation.casemix[evaluation.casemix["group"] == "total"].set_index("program")
    np.testing.assert_allclose(
        programs["casemix_factor"], totals["expected"] / totals["expected_average"], rtol=1e-12
    )


def test_coefficient_table_matches_lifelines(evaluation, rossi):
    table = evaluation.coefficients.set_index("term")
    # lifelines CoxPHFitter summary (Wald 95% limits on the hazard-ratio scale), computed here.
    summary = rr.lifelines_fit(rossi, rr.MODEL_A).summary
    np.testing.assert_allclose(table["hr"], summary["exp(coef)"], rtol=1e-4)
    np.testing.assert_allclose(table["hr_lower"], summary["exp(coef) lower 95%"], rtol=1e-4)
    np.testing.assert_allclose(table["hr_upper"], summary["exp(coef) upper 95%"], rtol=1e-4)
    np.testing.assert_allclose(table["p_value"], summary["p"], atol=1e-4)


def test_save_writes_every_file_atomically(evaluation, tmp_path):
    out = evaluation.save(tmp_path / "out")
    assert sorted(p.name for p in out.iterdir()) == FOLDER_FILES  # no temporary file left
    programs = pd.read_csv(out / "programs.csv")
    assert list(programs.columns[:13]) == DESIGN_COLUMNS
    np.testing.assert_allclose(programs["expected"], evaluation.programs["expected"], rtol=1e-9)
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    assert run["prior"]["method"] == "fixed" and run["credible_level"] == 0.95
    # Saving again gives the same bytes (no clock time, stable order).
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    evaluation.save(out)
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


def test_load_gives_back_the_saved_evaluation(evaluation, by_race, model_a, tmp_path):
    _, path = model_a
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PriorWarning)  # three programs: a wide hyperposterior
        mixture = evaluate(by_race, path, cutoff=rr.ROSSI_CUTOFF)  # hierarchical by default
    assert mixture.prior.components  # a mixture prior, rebuilt from run.json's components
    for saved in (evaluation, mixture):
        back = Evaluation.load(saved.save(tmp_path / saved.prior.method))
        assert back.prior == saved.prior and back.run == saved.run
        assert back.rules.to_dict() == saved.rules.to_dict()
        for table in TABLES:
            ours, theirs = getattr(saved, table.attribute), getattr(back, table.attribute)
            if table.attribute == "recipients":  # no stratum (None) is written as ""
                ours = ours.assign(stratum=ours["stratum"].fillna(""))
            pd.testing.assert_frame_equal(theirs, ours, check_dtype=False, obj=table.name)


def test_a_failed_save_leaves_no_temporary_file(evaluation, tmp_path, monkeypatch):
    out = evaluation.save(tmp_path / "out")
    old = (out / "programs.csv").read_bytes()

    def fail(*args):
        raise OSError("disk full")

    monkeypatch.setattr("casemix._io.os.replace", fail)
    with pytest.raises(OSError, match="disk full"):
        evaluation.save(out)
    assert sorted(p.name for p in out.iterdir()) == FOLDER_FILES
    assert (out / "programs.csv").read_bytes() == old


def test_a_folder_of_other_files_is_refused(evaluation, tmp_path):
    other = tmp_path / "mine"
    other.mkdir()
    (other / "notes.txt").write_text("my notes")
    with pytest.raises(InputError, match=r"output folder '.*mine' is not empty \(notes.txt\) "
                       r"and is not a casemix folder"):
        evaluation.save(other)
    assert sorted(p.name for p in other.iterdir()) == ["notes.txt"]


def test_saving_again_replaces_the_folder_as_a_whole(evaluation, tmp_path):
    out = evaluation.save(tmp_path / "out")
    (out / "report.html").write_text("a graft-failure report of an earlier run")
    (out / "public").mkdir()
    (out / "public" / "programs.csv").write_text("stale")
    (out / "cohort.csv").write_text("an input kept beside the results")
    (out / "notes.txt").write_text("the user's own file in a casemix folder")
    evaluation.save(out)
    names = sorted(p.name for p in out.iterdir())
    assert names == sorted([*FOLDER_FILES, "cohort.csv", "notes.txt"])  # stale ones gone
    assert (out / "cohort.csv").read_text() == "an input kept beside the results"
    assert not list(tmp_path.glob(".out.*"))  # no temporary folder left behind


def test_empty_cohort_is_an_error(by_race, model_a):
    model, _ = model_a
    empty = r"no recipient of .*by_race\.csv is left in the evaluation cohort"
    with pytest.raises(InputError, match=empty):
        evaluate(by_race, model, prior=fixed_prior(2, 2), cutoff=rr.ROSSI_CUTOFF,
                 window=("2021-01-01", None))  # fmt: skip


def test_default_prior_with_two_programs_needs_no_fallback(by_race, model_a):
    # The hierarchical default integrates over the spread: two programs are enough (the
    # hyperprior carries the rest), where plug-in empirical Bayes has to fall back.
    model, _ = model_a
    with warnings.catch_warnings():
        warnings.simplefilter("error", PriorWarning)
        result = evaluate(by_race, model, cutoff=rr.ROSSI_CUTOFF)
    assert result.run["prior"]["method"] == "hierarchical"
    assert result.run["prior"]["centre"] == "the reference (prior mean fixed at 1)"
    with pytest.warns(PriorWarning, match="at least 3 are needed"):
        result = evaluate(by_race, model, cutoff=rr.ROSSI_CUTOFF, prior_method="empirical_bayes")
    prior = result.run["prior"]
    assert prior["method"] == "empirical_bayes_fallback"
    assert (prior["shape"], prior["rate"]) == (2.0, 2.0)  # the documented default fallback
    assert "at least 3" in prior["note"]


# --------------------------------------------------------------- simulation, known truth

SIM_PROGRAMS = 200
SIM_PRIOR_SHAPE = 8.0  # true HRs ~ Gamma(8, rate 8): mean 1, sd 0.35 (invented)


@pytest.fixture(scope="module")
def generator(rossi):
    """Outcome generator from lifelines' model A fit (step baseline at the means)."""
    cph = rr.lifelines_fit(rossi, rr.MODEL_A)
    baseline = cph.baseline_cumulative_hazard_.iloc[:, 0]
    mean = rossi[list(rr.MODEL_A)].to_numpy(float).mean(axis=0)
    return baseline.index.to_numpy(float), baseline.to_numpy(), mean, cph.params_.to_numpy()


def _simulate(path: Path, rossi, generator, seed: int, true_hr=None) -> np.ndarray:
    """Write an invented cohort of SIM_PROGRAMS programs; return the true HR per program.

    Covariates are resampled from rossi rows; recipient i of program j fails at the first
    baseline event time where HR_j exp(lp_i) H0(t) reaches an Exp(1) draw (so the true
    cumulative hazard is HR_j times the reference's); transplants are spread over 100-800
    days before the cut-off, so recent recipients have partial follow-up.
    """
    weeks, cumhaz, mean, beta = generator
    rng = np.random.default_rng(seed)
    sizes = rng.integers(15, 81, SIM_PROGRAMS)
    if true_hr is None:
        true_hr = rng.gamma(SIM_PRIOR_SHAPE, 1 / SIM_PRIOR_SHAPE, SIM_PROGRAMS)
    true_hr = np.broadcast_to(np.asarray(true_hr, dtype=float), (SIM_PROGRAMS,))
    program = np.repeat(np.arange(SIM_PROGRAMS), sizes)
    rows = rossi.iloc[rng.integers(0, len(rossi), program.size)]
    risk = np.exp((rows[list(rr.MODEL_A)].to_numpy(float) - mean) @ beta) * true_hr[program]
    k = np.searchsorted(cumhaz, rng.exponential(size=program.size) / risk, side="left")
    event_day = np.where(k < cumhaz.size, 7 * weeks[np.minimum(k, cumhaz.size - 1)], np.inf)
    cutoff = pd.Timestamp(rr.ROSSI_CUTOFF)
    tx = cutoff - pd.to_timedelta(rng.integers(100, 800, program.size), unit="D")
    potential = np.minimum(rr.HORIZON_DAYS, (cutoff - tx).days.to_numpy())
    event = event_day <= potential
    end = (tx + pd.to_timedelta(np.where(event, event_day, potential), unit="D")).strftime(
        "%Y-%m-%d"
    )
    table = pd.DataFrame(
        {
            "recipient_id": [f"S{i:06d}" for i in range(program.size)],
            "program": [f"P{j:03d}" for j in program],
            "transplant_date": tx.strftime("%Y-%m-%d"),
            "last_seen_date": end,
            "arrest_date": np.where(event, end, ""),
            **{name: rows[name].to_numpy() for name in rr.MODEL_A},
        }
    )
    table.to_csv(path, index=False)
    return np.asarray(true_hr)


def _evaluate_quietly(path, model, spec):
    """evaluate() with the default (hierarchical) prior; warnings of other priors silenced."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PriorWarning)
        return evaluate(read_records(path, spec), model, cutoff=rr.ROSSI_CUTOFF)


def test_simulated_cohort_runs_through_the_pipeline(tmp_path, rossi, generator, model_a, spec_a):
    model, _ = model_a
    true_hr = _simulate(tmp_path / "sim.csv", rossi, generator, seed=7)
    records = read_records(tmp_path / "sim.csv", spec_a)
    cohort = build_cohort(records, rr.OUTCOME, rr.HORIZON_DAYS, rr.ROSSI_CUTOFF)
    assert len(records.exclusions) == 0 and (cohort.frame["time"] < rr.HORIZON_DAYS).any()
    result = _evaluate_quietly(tmp_path / "sim.csv", model, spec_a)
    assert len(result.programs) == SIM_PROGRAMS
    # The hierarchical prior finds a spread of hazard ratios near the true sd of 0.35 (loose).
    assert result.prior.method == "hierarchical"
    assert 0.2 < result.prior.hyperprior["posterior_spread_median"] < 0.5
    # O/E tracks the truth: correlation of log O/E with log HR over programs.
    oe = result.programs["oe_ratio"].to_numpy()
    assert np.corrcoef(np.log(oe + 0.5 / result.programs["expected"]), np.log(true_hr))[0, 1] > 0.6


def test_credible_intervals_cover_the_true_hazard_ratios(
    tmp_path, rossi, generator, model_a, spec_a
):
    model, _ = model_a
    covered = []
    for seed in range(6):
        true_hr = _simulate(tmp_path / "sim.csv", rossi, generator, seed=seed)
        programs = _evaluate_quietly(tmp_path / "sim.csv", model, spec_a).programs
        covered.append((programs["hr_lower"] <= true_hr) & (true_hr <= programs["hr_upper"]))
    share = float(np.concatenate(covered).mean())
    # 6 seeds x 200 programs = 1200: Monte-Carlo sd sqrt(0.95 * 0.05 / 1200) = 0.0063, so
    # 93-97% is the nominal 95% +- 3.2 sd (programs within a seed share the EB prior, which
    # widens the true spread somewhat).
    assert 0.93 <= share <= 0.97, share


def test_no_program_stands_out_when_every_true_hr_is_one(
    tmp_path, rossi, generator, model_a, spec_a
):
    model, _ = model_a
    flagged = []
    for seed in range(100, 104):
        _simulate(tmp_path / "null.csv", rossi, generator, seed=seed, true_hr=1.0)
        verdicts = _evaluate_quietly(tmp_path / "null.csv", model, spec_a).programs["verdict"]
        flagged.append(verdicts.isin(["excess", "favorable"]).to_numpy())
    share = float(np.concatenate(flagged).mean())
    # Nominal: P(HR > 1) >= 0.975 or P(HR < 1) >= 0.975, 2.5% each side = 5%. 4 seeds x 200
    # programs = 800: Monte-Carlo sd sqrt(0.05 * 0.95 / 800) = 0.0077; margin 2 sd.
    assert share <= 0.05 + 2 * 0.0077, share


def test_era_drift_is_reported_with_the_centre_and_a_caution(
    tmp_path, rossi, generator, model_a, spec_a
):
    # Every program's true HR is 0.8 (invented era drift): the network's O/E is tested against
    # 1 (exact Poisson test: scipy.stats.poisson; Garwood limits: scipy.stats.chi2) and the
    # cautions recommend the free mean, which calls more programs favorable.
    model, _ = model_a
    _simulate(tmp_path / "drift.csv", rossi, generator, seed=8, true_hr=0.8)
    result = _evaluate_quietly(tmp_path / "drift.csv", model, spec_a)
    network = result.run["network"]
    o, e = result.programs["observed"].sum(), result.programs["expected"].sum()
    assert network["oe"] == pytest.approx(o / e)
    assert network["oe_upper"] == pytest.approx(stats.chi2.ppf(0.975, 2 * o + 2) / 2 / e)
    p = 2 * min(stats.poisson.sf(o - 1, e), stats.poisson.cdf(o, e))
    assert network["p_value"] == pytest.approx(min(p, 1.0)) and network["p_value"] < 0.05
    assert network["centre"] == "the reference (prior mean fixed at 1)"
    assert any("free mean" in c for c in result.run["cautions"])
    assert result.run["multiplicity"]["expected_false_flags"] == pytest.approx(
        result.programs["null_flag_probability"].sum())
    free = evaluate(read_records(tmp_path / "drift.csv", spec_a), model, cutoff=rr.ROSSI_CUTOFF,
                    free_mean=True)
    assert free.run["network"]["centre"].startswith("the network's estimated mean")
    assert not any("free mean" in c for c in free.run["cautions"])
    favorable = (free.programs["verdict"] == "favorable").sum()
    assert favorable > (result.programs["verdict"] == "favorable").sum()
