"""Seeded simulation of a study plan with a known truth: two outcomes at three horizons.

Run from the repository root::

    python benchmarks/plan_simulation.py [--replicates N] [--workers W] [--raise F]

Every replicate invents a network of 30 programs and runs the six analyses of a plan
(graft failure including death, and death; at 30, 365 and 1095 days) through today's public
stages, exactly as a single run does: the extracts are written as Parquet files and read with
``read_records``, each reference model is fitted with ``fit_reference`` (outcome, horizon,
reference window) and each analysis is evaluated with ``evaluate`` (its cohort window, the
default rules and the default hierarchical prior). Results are compared with the truth
known from the generator.

The generator (hand-written with numpy; no library simulates this design):

* **Hazards.** Graft loss with the patient alive and death are two independent latent event
  times with Weibull proportional hazards, H_G(t) = 0.045 (t / 365)^0.35 and
  H_D(t) = 0.04 (t / 365)^0.75 at the reference recipient, both times exp(lp) with
  lp = 0.025 (age - 52) + 0.4 diabetes + 0.015 (donor age - 45), and both times the program's
  multiplier. Graft failure (the outcome ``graft_failure``) is the earlier of the two, with
  hazard the sum, so it is proportional in the covariates too; ``death`` is the death time
  (graft loss does not change the death hazard). Event dates are the transplant date plus
  the event time rounded up to whole days, so an event counts at a horizon of h days exactly
  when its time is at most h.
* **Reference population.** 8,000 recipients transplanted 2015-2019, followed to the
  reference cut-off 2022-12-31 (every one could reach 3 years), program multiplier 1: the
  reference hazard above is the truth the reference model estimates.
* **Network.** 30 programs (``S01`` .. ``S30``) transplanting at a log-normal rate (median 45
  a year, log-scale sd 0.6; ``S01`` at 110 a year) over 2019-2025, uniform entry dates,
  administrative censoring at the cut-off 2025-12-31 (no other loss to follow-up). Case mix
  differs between programs (mean recipient and donor age, share with diabetes).
* **Program effects.** Scenario ``spread``: the multiplier u of S02 .. S30 is drawn from
  Gamma(25, 25) (mean 1, spread 0.2) per replicate; scenario ``null``: u = 1. In both, the
  planted program S01 has u = 1 for the first 365 days after the transplant and u = 2.5 after
  (both hazards; ``--raise`` sets the factor), so it is truly average at 30 and 365 days and
  bad at 1095 days.
* **Cohort windows** (transplant dates, inclusive): 30 days 2023-06-16 to 2025-12-16, 365 days
  2022-07-01 to 2025-07-01, 1095 days 2020-01-01 to 2024-07-01: each window ends half a
  horizon before the cut-off, so every recipient could be followed at least half the horizon,
  and partial follow-up counts as in a single run.

**The truth per analysis.** A program's true hazard ratio for an analysis is what its
Poisson O/E targets: the ratio of its expected observed events to its expected
reference-model events, over its own cohort recipients with their covariates and potential
follow-up c_i = min(horizon, cut-off - transplant date):

    theta = sum_i P(T_i <= c_i) / sum_i integral_0^c_i S_i(t) dR_i(t)

where R_i is recipient i's true reference cumulative hazard and S_i his or her true survival
for the outcome (E[number of events] and E[cumulative reference hazard at the follow-up
time], by the compensator of the counting process). The multiplier m is constant on
[0, 365) (m = u) and on [365, inf) (m = u x factor), where S_i' = -m R_i' S_i, so each piece
integrates in closed form, (S_i(start) - S_i(end)) / m; the test checks this against
scipy.integrate.quad. For a
program with a constant multiplier theta = u exactly. The reference model's expected events
come from its own fit (estimated on the reference population): its estimation error is
part of what the simulation measures, as in practice.

Printed (markdown): coverage of the 95% credible intervals per analysis and by band of
expected events, with Monte Carlo standard errors taken between replicates (programs of one
network share their prior, so their coverages are not independent); for S01 its true hazard
ratio and how often it is called ``excess`` at each analysis; false flags among the 29
programs at HR 1 of the null scenario. About 2.5 s per replicate on a quiet core.
"""

from __future__ import annotations

import argparse
import datetime as dt
import itertools
import sys
import tempfile
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd

from casemix.data.records import read_records
from casemix.data.spec import Spec, spec_from_dict
from casemix.evaluation.evaluate import evaluate
from casemix.model.reference import fit_reference
from casemix.parallel import replicate_map
from casemix.stats.shrinkage import posterior
from casemix.stats.verdict import Rules

__all__ = [
    "ANALYSES",
    "BANDS",
    "CHANGE_DAY",
    "CUTOFF",
    "HAZARDS",
    "PLANTED",
    "PROGRAMS",
    "RAISE",
    "REFERENCE_CUTOFF",
    "REFERENCE_WINDOW",
    "SCENARIOS",
    "Analysis",
    "Hazards",
    "Network",
    "Scenario",
    "coverage_table",
    "false_flag_table",
    "generate",
    "planted_table",
    "relative_risk",
    "run_replicate",
    "simulate",
    "simulation_spec",
    "true_hazard_ratios",
]

CUTOFF = dt.date(2025, 12, 31)
EXTRACT_START = dt.date(2019, 1, 1)
REFERENCE_WINDOW = (dt.date(2015, 1, 1), dt.date(2019, 12, 31))
REFERENCE_CUTOFF = dt.date(2022, 12, 31)
REFERENCE_SIZE = 8000
PROGRAMS = tuple(f"S{k:02d}" for k in range(1, 31))
PLANTED = "S01"
PLANTED_RATE = 110.0
CHANGE_DAY = 365.0
RAISE = 2.5
"""Default factor on the planted program's hazards from ``CHANGE_DAY`` on."""
BANDS = (0.0, 2.0, 5.0, 15.0, 40.0, np.inf)
"""Bands of a program's expected events in an analysis (lower bound inclusive)."""


@dataclass(frozen=True)
class Analysis:
    """One analysis of the plan: outcome, horizon and inclusive cohort window."""

    name: str
    outcome: str
    horizon_days: int
    window: tuple[dt.date, dt.date]


def _window(horizon_days: int, start: dt.date) -> tuple[dt.date, dt.date]:
    return start, CUTOFF - dt.timedelta(days=-(-horizon_days // 2))


ANALYSES = tuple(
    Analysis(f"{label}_{h}d", outcome, h, _window(h, start))
    for outcome, label in (("graft_failure", "graft"), ("death", "death"))
    for h, start in ((30, dt.date(2023, 6, 16)), (365, dt.date(2022, 7, 1)),
                     (1095, dt.date(2020, 1, 1)))
)


@dataclass(frozen=True)
class Hazards:
    """Weibull cumulative hazards H(t) = scale (t / 365)^shape of the reference recipient."""

    graft_scale: float = 0.045
    graft_shape: float = 0.35
    death_scale: float = 0.04
    death_shape: float = 0.75

    def cumulative(self, t, outcome: str) -> np.ndarray:
        """Reference cumulative hazard of ``outcome`` ("graft_failure" or "death") at t days."""
        t = np.asarray(t, dtype=float) / 365.0
        death = self.death_scale * t**self.death_shape
        if outcome == "death":
            return death
        return death + self.graft_scale * t**self.graft_shape

    def draw(self, rng: np.random.Generator, risk: np.ndarray, u: np.ndarray,
             raise_: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Latent graft-loss and death times (days) under hazard multipliers u, u * raise_."""
        times = []
        for scale, shape in ((self.graft_scale, self.graft_shape),
                             (self.death_scale, self.death_shape)):
            target = rng.exponential(size=risk.size) / (risk * u)  # in reference H units
            before = scale * (CHANGE_DAY / 365.0) ** shape
            h0 = np.where(target <= before, target, before + (target - before) / raise_)
            times.append(365.0 * (h0 / scale) ** (1.0 / shape))
        return times[0], times[1]


HAZARDS = Hazards()
BETA = {"recipient_age": 0.025, "diabetes": 0.4, "donor_age": 0.015}
CENTRE = {"recipient_age": 52.0, "diabetes": 0.0, "donor_age": 45.0}


def simulation_spec() -> Spec:
    """The spec of the simulated extracts (columns, the two outcomes, three covariates)."""
    return spec_from_dict({
        "columns": {"recipient": "recipient_id", "program": "program",
                    "transplant_date": "transplant_date", "last_seen": "last_seen_date",
                    "death": "death_date"},
        "outcomes": {"graft_failure": {"dates": ["graft_loss_date", "death_date"]},
                     "death": {"dates": ["death_date"]}},
        "covariates": {
            "recipient_age": {"kind": "numeric", "lower": 18, "upper": 80},
            "diabetes": {"kind": "binary"},
            "donor_age": {"kind": "numeric", "lower": 5, "upper": 80},
        },
    })


@dataclass(frozen=True)
class Network:
    """One replicate's invented data.

    Attributes
    ----------
    reference, cohort : DataFrame
        The two extracts, columns of :func:`simulation_spec`.
    truth : DataFrame
        Per cohort recipient: ``recipient_id``, ``program``, ``entry_days`` (cut-off minus
        transplant date), ``transplant_date``, ``risk`` (exp(lp)), ``u`` and ``raise_`` (the
        multiplier before and the factor on it after ``CHANGE_DAY``).
    """

    reference: pd.DataFrame
    cohort: pd.DataFrame
    truth: pd.DataFrame


def _recipients(rng: np.random.Generator, programs: np.ndarray, start: dt.date,
                end: dt.date, shifts: pd.DataFrame) -> pd.DataFrame:
    """Transplant dates uniform over [start, end] and covariates with each program's mix."""
    n = programs.size
    span = (end - start).days
    days = rng.integers(0, span + 1, n)
    shift = shifts.loc[programs]
    age = np.clip(rng.normal(52.0 + shift["age"].to_numpy(), 13.0), 18, 80).round(1)
    donor = np.clip(rng.normal(45.0 + shift["donor"].to_numpy(), 15.0), 5, 80).round(1)
    diabetes = (rng.random(n) < shift["diabetes"].to_numpy()).astype(float)
    return pd.DataFrame({
        "program": programs,
        "transplant_date": np.datetime64(start, "D") + days.astype("timedelta64[D]"),
        "recipient_age": age, "diabetes": diabetes, "donor_age": donor,
    })


def relative_risk(frame: pd.DataFrame) -> np.ndarray:
    """exp(lp) of each recipient under the true covariate effects ``BETA``."""
    return np.exp(sum(BETA[k] * (frame[k].to_numpy() - CENTRE[k]) for k in BETA))


def _outcomes(rng: np.random.Generator, frame: pd.DataFrame, cutoff: dt.date, u: np.ndarray,
              raise_: np.ndarray) -> pd.DataFrame:
    """Add graft-loss, death and last-seen dates, as far as they are known at the cut-off."""
    graft, death = HAZARDS.draw(rng, relative_risk(frame), u, raise_)
    tx = frame["transplant_date"].to_numpy().astype("datetime64[D]")
    cut = np.datetime64(cutoff, "D")
    death_day = tx + np.ceil(death).astype("timedelta64[D]")
    loss_day = tx + np.ceil(graft).astype("timedelta64[D]")
    dead = death_day <= cut
    lost = (graft < death) & (loss_day <= cut)
    out = frame.copy()
    out["graft_loss_date"] = pd.to_datetime(np.where(lost, loss_day, np.datetime64("NaT")))
    out["death_date"] = pd.to_datetime(np.where(dead, death_day, np.datetime64("NaT")))
    out["last_seen_date"] = pd.to_datetime(np.where(dead, death_day, cut))
    out["transplant_date"] = pd.to_datetime(tx)
    return out


def generate(rng: np.random.Generator, *, spread: float, raise_: float = RAISE) -> Network:
    """Draw one network: the reference extract, the cohort extract and the cohort's truth.

    Parameters
    ----------
    rng : numpy.random.Generator
    spread : float
        Coefficient of variation of the gamma multipliers of the programs other than
        :data:`PLANTED` (0: every one at 1).
    raise_ : float
        Factor on the planted program's hazards from day ``CHANGE_DAY`` after the transplant.
    """
    programs = np.array(PROGRAMS)
    shifts = pd.DataFrame({"age": rng.normal(0.0, 5.0, programs.size),
                           "donor": rng.normal(0.0, 5.0, programs.size),
                           "diabetes": rng.uniform(0.2, 0.4, programs.size)}, index=programs)
    years = (CUTOFF - EXTRACT_START).days / 365.25
    rate = rng.lognormal(np.log(45.0), 0.6, programs.size)
    rate[programs == PLANTED] = PLANTED_RATE
    if spread > 0:
        shape = 1.0 / spread**2
        u = rng.gamma(shape, 1.0 / shape, programs.size)
    else:
        u = np.ones(programs.size)
    u[programs == PLANTED] = 1.0
    factor = np.where(programs == PLANTED, raise_, 1.0)
    sizes = rng.poisson(rate * years)
    cohort = _recipients(rng, np.repeat(programs, sizes), EXTRACT_START, CUTOFF, shifts)
    index = pd.Index(programs).get_indexer(cohort["program"])
    cohort = _outcomes(rng, cohort, CUTOFF, u[index], factor[index])
    cohort.insert(0, "recipient_id", [f"C{k:06d}" for k in range(len(cohort))])
    reference_programs = np.array(programs)[rng.integers(0, programs.size, REFERENCE_SIZE)]
    reference = _recipients(rng, reference_programs, *REFERENCE_WINDOW,
                            shifts.assign(age=0.0, donor=0.0, diabetes=0.3))
    ones = np.ones(REFERENCE_SIZE)
    reference = _outcomes(rng, reference, REFERENCE_CUTOFF, ones, ones)
    reference.insert(0, "recipient_id", [f"R{k:06d}" for k in range(len(reference))])
    truth = pd.DataFrame({
        "recipient_id": cohort["recipient_id"],
        "program": cohort["program"],
        "transplant_date": cohort["transplant_date"],
        "entry_days": (pd.Timestamp(CUTOFF) - cohort["transplant_date"]).dt.days.to_numpy(),
        "risk": relative_risk(cohort),
        "u": u[index],
        "raise_": factor[index],
    })
    return Network(reference=reference, cohort=cohort, truth=truth)


def true_hazard_ratios(truth: pd.DataFrame, analysis: Analysis) -> pd.Series:
    """Each program's true hazard ratio for an analysis (what its O/E targets; module doc).

    Returns
    -------
    Series
        Indexed by program (sorted), over the recipients inside the analysis' window.
    """
    start, end = (pd.Timestamp(d) for d in analysis.window)
    inside = truth[truth["transplant_date"].between(start, end)]
    c = np.minimum(float(analysis.horizon_days), inside["entry_days"].to_numpy(dtype=float))
    risk, u, rho = (inside[k].to_numpy() for k in ("risk", "u", "raise_"))
    ref_change = risk * HAZARDS.cumulative(np.minimum(c, CHANGE_DAY), analysis.outcome)
    ref_end = risk * HAZARDS.cumulative(c, analysis.outcome)
    s_change = np.exp(-u * ref_change)
    s_end = s_change * np.exp(-u * rho * (ref_end - ref_change))
    observed = 1.0 - s_end
    expected = (1.0 - s_change) / u + (s_change - s_end) / (u * rho)
    sums = pd.DataFrame({"program": inside["program"].to_numpy(), "o": observed,
                         "e": expected}).groupby("program", sort=True).sum()
    return sums["o"] / sums["e"]


@dataclass(frozen=True)
class Scenario:
    """A simulation scenario: name, spread of the programs' multipliers, seed, planted factor."""

    name: str
    spread: float
    seed: int
    raise_: float = RAISE


SCENARIOS = (Scenario("spread", 0.2, 20261215), Scenario("null", 0.0, 20261216))


@dataclass(frozen=True)
class _Replicate:
    """Picklable replicate task: one scenario with the rules to evaluate under."""

    scenario: Scenario
    rules: Rules
    known_reference: bool

    def __call__(self, seed: np.random.SeedSequence) -> pd.DataFrame:
        return run_replicate(np.random.default_rng(seed), self.scenario, rules=self.rules,
                             known_reference=self.known_reference)


def run_replicate(rng: np.random.Generator, scenario: Scenario, *, rules: Rules | None = None,
                  known_reference: bool = True) -> pd.DataFrame:
    """Draw one network and run every analysis of the plan through the public stages.

    Parameters
    ----------
    rng : numpy.random.Generator
    scenario : Scenario
    rules : Rules, optional
        Default: the default rules (95% intervals, hierarchical prior with the mean at 1).
    known_reference : bool, default True
        Also shrink with E from the true reference hazard (columns ``known_lower``,
        ``known_upper``; NaN when False). Uses no random numbers.

    Returns
    -------
    DataFrame
        One row per analysis and program: ``analysis``, ``program``, ``expected``,
        ``observed``, ``hr_lower``, ``hr_upper``, ``verdict``, ``true_hr``, ``known_lower``,
        ``known_upper``.
    """
    rules = rules or Rules()
    network = generate(rng, spread=scenario.spread, raise_=scenario.raise_)
    spec = simulation_spec()
    tx = network.cohort["transplant_date"]
    rows, models = [], {}
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "reference.parquet"
        network.reference.to_parquet(path, index=False)
        reference = read_records(path, spec, cutoff=REFERENCE_CUTOFF)
        for analysis in ANALYSES:
            key = (analysis.outcome, analysis.horizon_days)
            if key not in models:
                models[key] = fit_reference(reference, spec, analysis.outcome,
                                            analysis.horizon_days, cutoff=REFERENCE_CUTOFF,
                                            window=REFERENCE_WINDOW)
            # one extract per window, as a registry would send it (a shared extract would
            # only add the window's exclusions and their warning)
            start, end = (pd.Timestamp(d) for d in analysis.window)
            path = Path(tmp) / f"cohort_{analysis.horizon_days}.parquet"
            if not path.exists():
                network.cohort[tx.between(start, end)].to_parquet(path, index=False)
            cohort = read_records(path, spec, cutoff=CUTOFF)
            result = evaluate(cohort, models[key], rules, cutoff=CUTOFF, window=analysis.window)
            table = result.programs.set_index("program")
            truth = true_hazard_ratios(network.truth, analysis)
            if known_reference:
                known = _known_reference(result, network.truth, analysis, rules)
            else:
                known = pd.DataFrame({"hr_lower": np.nan, "hr_upper": np.nan}, index=table.index)
            rows.append(pd.DataFrame({
                "analysis": analysis.name,
                "program": table.index.to_numpy(),
                "expected": table["expected"].to_numpy(),
                "observed": table["observed"].to_numpy(),
                "hr_lower": table["hr_lower"].to_numpy(),
                "hr_upper": table["hr_upper"].to_numpy(),
                "verdict": table["verdict"].astype(str).to_numpy(),
                "true_hr": truth.reindex(table.index).to_numpy(),
                "known_lower": known["hr_lower"].to_numpy(),
                "known_upper": known["hr_upper"].to_numpy(),
            }))
    return pd.concat(rows, ignore_index=True)


def _known_reference(result, truth: pd.DataFrame, analysis: Analysis,
                     rules: Rules) -> pd.DataFrame:
    """The same shrinkage with each recipient's E from the true reference hazard.

    E_i = exp(lp_i) H(t_i) at the recipient's follow-up time in the evaluation (instead of the
    fitted model's); the prior is chosen and summarised exactly as ``evaluate`` does. The
    difference from the pipeline's coverage is the part due to the reference fit's own
    estimation error. Rows in the order of ``result.programs``.
    """
    people = result.recipients
    risk = people["recipient"].map(truth.set_index("recipient_id")["risk"]).to_numpy()
    e = risk * HAZARDS.cumulative(people["time"].to_numpy(float), analysis.outcome)
    sums = pd.Series(e).groupby(people["program"].to_numpy()).sum()
    observed = result.programs["observed"].to_numpy()
    expected = sums.reindex(result.programs["program"]).to_numpy()
    prior = rules.prior.choose(observed, expected)
    return posterior(observed, expected, prior, level=rules.credible_level)


def simulate(scenario: Scenario, replicates: int, *, rules: Rules | None = None,
             known_reference: bool = True, workers: int = 1) -> pd.DataFrame:
    """Run ``replicates`` seeded replicates of a scenario (column ``replicate`` added).

    ``workers`` > 1 runs them through :func:`casemix.parallel.replicate_map`; the result does
    not depend on it (one seed per replicate, spawned from the scenario's seed).
    """
    task = _Replicate(scenario, rules or Rules(), known_reference)
    seeds = np.random.SeedSequence(scenario.seed).spawn(replicates)
    if workers > 1:
        results = replicate_map(task, seeds, workers=workers)
    else:
        results = map(task, seeds)
    return pd.concat([r.assign(replicate=k) for k, r in enumerate(results)], ignore_index=True)


def _share(hits: np.ndarray, sizes: np.ndarray) -> tuple[float, float]:
    """Pooled share sum(hits) / sum(sizes) and its between-replicate standard error."""
    total = sizes.sum()
    p = hits.sum() / total
    r = sizes.size
    if r < 2:
        return float(p), float("nan")
    se = np.sqrt(r / (r - 1) * np.sum((hits - p * sizes) ** 2)) / total
    return float(p), float(se)


def coverage_table(results: pd.DataFrame) -> pd.DataFrame:
    """Coverage of the intervals per analysis and band of expected events (and ``all``).

    Returns
    -------
    DataFrame
        ``analysis``, ``band``, ``intervals``, ``coverage``, ``mc_se`` (between replicates),
        and ``known``, ``known_se``: the same with E from the true reference hazard.
    """
    truth = results["true_hr"]
    frame = results.assign(
        covered=(results["hr_lower"] <= truth) & (truth <= results["hr_upper"]),
        known=(results["known_lower"] <= truth) & (truth <= results["known_upper"]),
        band=pd.cut(results["expected"], BANDS, right=False, labels=_band_labels()),
    )
    replicates = range(results["replicate"].max() + 1)
    rows = []
    for analysis in ANALYSES:
        part = frame[frame["analysis"] == analysis.name]
        groups = [(str(b), part[part["band"] == b]) for b in _band_labels()] + [("all", part)]
        for band, rows_of in groups:
            if rows_of.empty:
                continue
            per = rows_of.groupby("replicate")[["covered", "known"]].sum()
            per = per.reindex(replicates, fill_value=0)
            size = rows_of.groupby("replicate").size().reindex(replicates, fill_value=0)
            p, se = _share(per["covered"].to_numpy(float), size.to_numpy(float))
            pk, sek = _share(per["known"].to_numpy(float), size.to_numpy(float))
            if rows_of["known_lower"].isna().all():
                pk = sek = np.nan
            rows.append({"analysis": analysis.name, "band": band, "intervals": len(rows_of),
                         "coverage": p, "mc_se": se, "known": pk, "known_se": sek})
    return pd.DataFrame(rows)


def _band_labels() -> list[str]:
    return [f"E >= {low:g}" if np.isinf(high) else f"{low:g} <= E < {high:g}"
            for low, high in itertools.pairwise(BANDS)]


def planted_table(results: pd.DataFrame) -> pd.DataFrame:
    """The planted program per analysis: mean E, O and true HR, and its verdict rates.

    Returns
    -------
    DataFrame
        ``analysis``, ``replicates``, ``expected``, ``observed``, ``true_hr``, ``excess``,
        ``excess_se``, ``not_flagged`` (share neither excess nor favorable), ``not_flagged_se``.
    """
    rows = []
    for analysis in ANALYSES:
        part = results[(results["analysis"] == analysis.name) & (results["program"] == PLANTED)]
        n = len(part)
        excess = float((part["verdict"] == "excess").mean())
        calm = float((~part["verdict"].isin(["excess", "favorable"])).mean())
        rows.append({"analysis": analysis.name, "replicates": n,
                     "expected": part["expected"].mean(), "observed": part["observed"].mean(),
                     "true_hr": part["true_hr"].mean(), "excess": excess,
                     "excess_se": np.sqrt(excess * (1 - excess) / n), "not_flagged": calm,
                     "not_flagged_se": np.sqrt(calm * (1 - calm) / n)})
    return pd.DataFrame(rows)


def false_flag_table(results: pd.DataFrame) -> pd.DataFrame:
    """Flags (excess or favorable) among programs other than the planted one, per analysis.

    Meant for the null scenario, where all of them have a true hazard ratio of 1.

    Returns
    -------
    DataFrame
        ``analysis``, ``programs``, ``flags_per_network``, ``flags_se``, ``share_flagged``,
        ``share_se`` (between replicates), ``networks_with_flag``, ``networks_se``.
    """
    rows = []
    replicates = results["replicate"].max() + 1
    for analysis in ANALYSES:
        part = results[(results["analysis"] == analysis.name) & (results["program"] != PLANTED)]
        flagged = part["verdict"].isin(["excess", "favorable"])
        per = flagged.groupby(part["replicate"]).agg(["sum", "size"])
        per = per.reindex(range(replicates), fill_value=0)
        count = per["sum"].to_numpy(float)
        share, share_se = _share(count, per["size"].to_numpy(float))
        anyflag = float((count > 0).mean())
        rows.append({"analysis": analysis.name, "programs": len(part),
                     "flags_per_network": count.mean(),
                     "flags_se": count.std(ddof=1) / np.sqrt(replicates),
                     "share_flagged": share, "share_se": share_se,
                     "networks_with_flag": anyflag,
                     "networks_se": np.sqrt(anyflag * (1 - anyflag) / replicates)})
    return pd.DataFrame(rows)


def _pct(p: float, se: float) -> str:
    return f"{p:.1%} (MC se {se:.1%})"


def _print_coverage(results: pd.DataFrame, scenario: Scenario, replicates: int) -> None:
    print(f"\n## Coverage of the 95% credible intervals, scenario {scenario.name} "
          f"({replicates} networks x {len(PROGRAMS)} programs)\n")
    print("| analysis | band of expected events | intervals | coverage | with the true "
          "reference hazard |")
    print("| --- | --- | --- | --- | --- |")
    for row in coverage_table(results).itertuples(index=False):
        cells = [row.band, _pct(row.coverage, row.mc_se), _pct(row.known, row.known_se)]
        if row.band == "all":
            cells = [f"**{c}**" for c in cells]
        print(f"| {row.analysis} | {cells[0]} | {row.intervals} | {cells[1]} | {cells[2]} |")


def _print_planted(results: pd.DataFrame, scenario: Scenario) -> None:
    print(f"\n## Planted program {PLANTED} (HR 1 before day {CHANGE_DAY:g}, "
          f"{scenario.raise_:g} after), "
          f"scenario {scenario.name}\n")
    print("| analysis | mean E | mean O | true HR | called excess | not flagged |")
    print("| --- | --- | --- | --- | --- | --- |")
    for row in planted_table(results).itertuples(index=False):
        print(f"| {row.analysis} | {row.expected:.1f} | {row.observed:.1f} | "
              f"{row.true_hr:.3f} | {_pct(row.excess, row.excess_se)} | "
              f"{_pct(row.not_flagged, row.not_flagged_se)} |")


def _print_false_flags(results: pd.DataFrame, scenario: Scenario) -> None:
    print(f"\n## False flags among the {len(PROGRAMS) - 1} programs at HR 1, scenario "
          f"{scenario.name}\n")
    print("| analysis | programs x networks | flags per network | share of programs flagged "
          "| networks with >= 1 flag |")
    print("| --- | --- | --- | --- | --- |")
    for row in false_flag_table(results).itertuples(index=False):
        print(f"| {row.analysis} | {row.programs} | {row.flags_per_network:.3f} (MC se "
              f"{row.flags_se:.3f}) | {_pct(row.share_flagged, row.share_se)} | "
              f"{_pct(row.networks_with_flag, row.networks_se)} |")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=200,
                        help="networks per scenario (default 200)")
    parser.add_argument("--raise", dest="raise_", type=float, default=RAISE,
                        help=f"planted program's hazard factor after day {CHANGE_DAY:g} "
                        f"(default {RAISE:g})")
    parser.add_argument("--workers", type=int, default=1,
                        help="worker processes (casemix.parallel; same results for any number)")
    args = parser.parse_args(argv)
    print("| analysis | outcome | horizon (days) | cohort window |")
    print("| --- | --- | --- | --- |")
    for a in ANALYSES:
        print(f"| {a.name} | {a.outcome} | {a.horizon_days} | {a.window[0]} to {a.window[1]} |")
    for scenario in SCENARIOS:
        scenario = replace(scenario, raise_=args.raise_)
        results = simulate(scenario, args.replicates, workers=args.workers)
        if scenario.spread > 0:
            _print_coverage(results, scenario, args.replicates)
        else:
            _print_false_flags(results, scenario)
            _print_coverage(results, scenario, args.replicates)
        _print_planted(results, scenario)
    return 0


if __name__ == "__main__":
    sys.exit(main())
