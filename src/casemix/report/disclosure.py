"""The disclosure rule of a public release: which figures are withheld or coarsened, and why.

This module works on numbers only (no HTML): it turns an evaluation into the tables
of a public release (:class:`PublicRelease`). The rule is written out for readers in
docs/disclosure.md; in short, with threshold N:

- a count from 1 to N - 1 is shown as ``"<N"`` (zeros and counts of N or more are shown);
- a program is *protected* when it has fewer than N recipients, 1 to N - 1 events, or 1 to
  N - 1 recipients without an event. Every figure of a protected program from which its
  counts can be worked out is withheld: O/E and its limits, the hazard ratio, its interval,
  median and P(HR > margin) (the prior is published), the exact p-values, observed and
  expected survival, E itself and the shrinkage weight, the events-to-change distances, the
  case-mix factors, its survival curve and its points in the funnel and caterpillar plots.
  Its verdict is shown only when every count a reader cannot rule out would give the same
  verdict at the program's E (so the verdict says nothing about the hidden count);
- curves of the other programs are coarsened: the Kaplan-Meier estimate is published only
  at the quarter points of the horizon, and a point only when at least N events happened
  since the last published point (each published step holds N events or more), so no step
  places a single event on its day and every published number at risk is at least N;
- a published total (records read, kept, excluded) must not narrow a hidden cell it adds up
  to to three values or fewer: a second exclusion reason is withheld when that protects
  the hidden one, otherwise the total is withheld; the same holds for the network's total
  O (run.json ``network``), and flag totals are withheld with a withheld verdict;
- figures of shown programs that depend on the shared prior, and the prior's summary, are
  published at the report's printed precision (:data:`PRIOR_DIGITS`, :data:`PRIOR_FIGURES`);
- across the releases of several analyses of one network, :func:`protect_releases` hides in
  every release a shared cell or total hidden in one.

The rule is written by hand because it is specific to the files of this package; the
feasibility arithmetic it needs (intervals of whole numbers) is short.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from casemix.errors import InputError, plural
from casemix.evaluation.evaluate import Evaluation
from casemix.report.plots import at_risk_times
from casemix.report.public import corrections_by_kind, exclusions_by_reason
from casemix.report.suppress import check_threshold, suppress_value, suppressed_text
from casemix.stats.shrinkage import Prior
from casemix.stats.verdict import assign_verdicts, rules_from_dict
from casemix.survival import kaplan_meier

__all__ = [
    "KEPT_COLUMNS",
    "MIN_SPREAD",
    "PRIOR_DIGITS",
    "PRIOR_FIGURES",
    "PUBLIC_FILES",
    "SHARED_CELLS",
    "WITHHELD",
    "PublicRelease",
    "coarse_curve",
    "feasible_range",
    "hidden_candidates",
    "make_release",
    "protect_releases",
    "protect_total",
    "protected_programs",
    "verdict_says_nothing",
]

WITHHELD = "withheld"
"""Text shown in place of a withheld figure that is not a small count."""

KEPT_COLUMNS = ("program", "recipients", "observed", "verdict")
"""programs.csv columns published for a protected program (counts as text, the verdict only
where it says nothing of the hidden count); every other column, present or added later, is
withheld, since each can give back O or n (E, O/E, the hazard ratio, probabilities, survival,
distances to another verdict, reachability, competing events, case mix)."""

PUBLIC_FILES = ("programs.csv", "followup.csv", "curves.csv", "casemix.csv",
                "coefficients.csv", "exclusions_by_reason.csv", "corrections_by_kind.csv",
                "out_of_range.csv")
"""The tables of a public release (run.json and report.html are written beside them)."""

PRIOR_DIGITS = {"hr_mean": 2, "hr_lower": 2, "hr_upper": 2, "hr_median": 2, "weight": 2,
                "p_above": 3, "p_below": 3}
"""Decimals of the figures of a shown program that depend on the prior, as published. The
prior is estimated from every program, hidden ones included, so at full precision these
figures carry (a little) information about the hidden counts; they are published at the
precision the report prints (docs/disclosure.md, "The shared prior")."""

PRIOR_FIGURES = 2
"""Significant figures of every number of the prior's entry in the public run.json (shape,
rate, mean, sd, the hyperposterior's summary, the numbers of its note)."""

MIN_SPREAD = 3
"""A hidden count is protected when the whole numbers a reader cannot rule out span at least
this much (max - min), so that no guess is sure to be within one of it."""


@dataclass(frozen=True, eq=False)
class PublicRelease:
    """The public tables of one evaluation, and the list of what they withhold.

    Attributes
    ----------
    threshold : int
        N: counts from 1 to N - 1 are hidden.
    programs : pandas.DataFrame
        programs.csv for the public: counts as text (``"<N"``, ``"withheld"`` or the
        count), withheld numbers missing, verdict ``"withheld"`` where it is; a last column
        ``protected`` (bool).
    tables : dict of str -> pandas.DataFrame
        Every file of :data:`PUBLIC_FILES`, ready to write (programs.csv included).
    run : dict
        The public run.json: input paths, the prior's log marginal likelihood and withheld
        totals left out; a ``disclosure`` entry states the rule and its threshold.
    withheld : pandas.DataFrame
        One row per withheld or coarsened figure: ``scope`` (a program code, or
        ``network``, ``exclusions``), ``figure``, ``reason``.
    """

    threshold: int
    programs: pd.DataFrame
    tables: dict
    run: dict
    withheld: pd.DataFrame


def _small(count: float, n: int) -> bool:
    return bool(1 <= count < n)


def protected_programs(programs: pd.DataFrame, n: int) -> pd.Series:
    """True for programs with fewer than n recipients, or 1 to n - 1 events or non-events.

    Parameters
    ----------
    programs : pandas.DataFrame
        Columns ``program``, ``recipients``, ``observed``.
    n : int
        The threshold.

    Returns
    -------
    pandas.Series of bool, indexed like ``programs``.
    """
    recipients, observed = programs["recipients"], programs["observed"]
    survivors = recipients - observed
    return ((recipients < n) | observed.between(1, n - 1) | survivors.between(1, n - 1)
            ).rename("protected")


def _observed_text(recipients: float, observed: float, n: int) -> str:
    if _small(recipients - observed, n) and not _small(observed, n) and recipients >= n:
        return WITHHELD  # few recipients without the event: the count is withheld, not "<N"
    return suppress_value(observed, n)


def hidden_candidates(text: str, recipients_text: str, n: int) -> np.ndarray:
    """The event counts a reader cannot rule out from a public observed cell.

    Parameters
    ----------
    text : str
        The public observed cell: a count, ``"<N"`` or ``"withheld"``.
    recipients_text : str
        The public recipients cell of the same program.
    n : int
        The threshold.

    Returns
    -------
    ndarray of int
        ``"<N"``: 1 to N - 1 (at most the recipients when they are shown); ``"withheld"``
        (few recipients without the event): N or more and at most recipients - 1, and
        more than recipients - N; a shown count: that count.
    """
    shown_n = recipients_text.isdigit()
    if text == suppressed_text(n):
        top = min(n - 1, int(recipients_text)) if shown_n else n - 1
        return np.arange(1, top + 1)
    if text == WITHHELD:
        total = int(recipients_text)
        return np.arange(max(n, total - n + 1), total)
    return np.array([int(text)])


def verdict_says_nothing(verdict: str, candidates: np.ndarray, expected: float,
                         prior: Prior, rules) -> bool:
    """True when every count a reader cannot rule out gives this same verdict at E.

    Parameters
    ----------
    verdict : str
        The program's verdict.
    candidates : ndarray of int
        The counts the public cell leaves open (:func:`hidden_candidates`).
    expected : float
        The program's E (withheld in the release: the check assumes the reader knows it).
    prior : Prior
        The published prior.
    rules : Rules
        The verdict rules.
    """
    if candidates.size == 0:
        return False
    verdicts = assign_verdicts(candidates, np.full(candidates.size, expected), prior, rules)
    return bool((verdicts["verdict"] == verdict).all())


def feasible_range(total: float, lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """Bounds of each hidden cell given the bounds of all of them and their known sum.

    Parameters
    ----------
    total : float
        The sum of the hidden cells (a published total minus the shown cells).
    lower, upper : ndarray of float, shape (k,)
        What a reader knows of each hidden cell on its own (``upper`` may be ``inf``).

    Returns
    -------
    ndarray of float, shape (k, 2)
        For each cell, the smallest and largest value consistent with the sum.
    """
    lower, upper = np.asarray(lower, float), np.asarray(upper, float)
    others = ~np.eye(lower.size, dtype=bool)  # row i: every cell but i
    low = np.maximum(lower, total - np.where(others, upper, 0.0).sum(axis=1))
    high = np.minimum(upper, total - np.where(others, lower, 0.0).sum(axis=1))
    return np.column_stack([low, high])


def _total_is_safe(total: float, values: np.ndarray, hidden: np.ndarray,
                   lower: np.ndarray, upper: np.ndarray) -> bool:
    # A total is safe when each hidden cell keeps a spread of at least MIN_SPREAD.
    if not hidden.any():
        return True
    rest = total - values[~hidden].sum()
    bounds = feasible_range(rest, lower[hidden], upper[hidden])
    return bool((bounds[:, 1] - bounds[:, 0] >= MIN_SPREAD).all())


def protect_total(values: np.ndarray, n: int, total: float) -> tuple[np.ndarray, bool]:
    """Complementary suppression of the cells of one published total.

    Parameters
    ----------
    values : ndarray of float, shape (k,)
        The cells (counts) that add up to ``total``; those from 1 to n - 1 are hidden.
    n : int
        The threshold.
    total : float
        Their published total.

    Returns
    -------
    extra : ndarray of bool, shape (k,)
        Cells to withhold as well: at most one, the smallest shown cell that keeps every
        hidden cell's range (given the total) at least ``MIN_SPREAD`` wide.
    total_shown : bool
        False when even that does not protect them: the total must be withheld.
    """
    small = (values >= 1) & (values < n)
    lower = np.where(small, 1.0, float(n))
    upper = np.where(small, n - 1.0, np.inf)
    extra = np.zeros(values.size, bool)
    if _total_is_safe(total, values, small, lower, upper):
        return extra, True
    if small.sum() == 1:
        # smallest shown cells first: the least information lost
        for i in np.argsort(np.where(small | (values == 0), np.inf, values), kind="stable"):
            if small[i] or values[i] == 0:
                break
            trial = extra.copy()
            trial[i] = True
            if _total_is_safe(total, values, small | trial, lower, upper):
                return trial, True
    return extra, False


def coarse_curve(time: np.ndarray, event: np.ndarray, n: int, horizon_days: float,
                 expected: pd.DataFrame, level: float = 0.95) -> pd.DataFrame:
    """The Kaplan-Meier curve of one program as published: grouped steps only.

    The estimate is evaluated at the quarter points of the horizon
    (:func:`~casemix.report.plots.at_risk_times`); a point is published when at least ``n``
    events fell since the last published one (the first interval includes day 0), and the
    events after the last such point are merged into the step at the horizon. The curve
    starts at survival 1 at day 0.

    Parameters
    ----------
    time, event : ndarray, shape (m,)
        The program's recipients (follow-up days, 0/1 events); at least ``n`` events.
    n : int
        The threshold.
    horizon_days : float
        The horizon.
    expected : pandas.DataFrame
        The program's rows of curves.csv (``time``, ``expected``) for the expected curve.
    level : float, default 0.95
        Level of the pointwise limits.

    Returns
    -------
    pandas.DataFrame
        ``time``, ``observed``, ``observed_lower``, ``observed_upper``, ``at_risk``,
        ``expected`` at the published times only.
    """
    time, event = np.asarray(time, float), np.asarray(event, float)
    km = kaplan_meier(time, event, level=level)
    grid = at_risk_times(horizon_days)
    # past the last follow-up time the estimate is unknown: the curve ends before that
    grid = grid[: max(1, int(np.sum(~np.isnan(km.at(grid)))))]
    # step k counts the events in (grid[k-1], grid[k]]; the first step includes day 0
    events = time[(event > 0) & (time <= grid[-1])]
    step = np.clip(np.searchsorted(grid, events, side="left"), 1, None)
    per_step = np.bincount(step, minlength=grid.size)[1:]
    shown, since = [], 0
    for k, count in enumerate(per_step, start=1):
        since += count
        if since >= n:
            shown.append(k)
            since = 0
    last = grid.size - 1
    if since > 0 and shown:
        shown[-1] = last  # the last events, fewer than n, join the step before them
    elif since == 0 and last > 0 and (not shown or shown[-1] != last):
        shown.append(last)  # no event since the last step: the curve stays flat
    # (fewer than n events in all: nothing is published beyond day 0)
    at = grid[shown]
    ordered = expected.sort_values("time", kind="stable")
    lookup = np.searchsorted(ordered["time"].to_numpy(float), np.r_[0.0, at], side="right") - 1
    return pd.DataFrame({
        "time": np.r_[0.0, at],
        "observed": np.r_[1.0, km.at(at)],
        "observed_lower": np.r_[1.0, km.lower_at(at)],
        "observed_upper": np.r_[1.0, km.upper_at(at)],
        "at_risk": np.r_[float(time.size), km.at_risk_at(at)],
        "expected": ordered["expected"].to_numpy(float)[np.maximum(lookup, 0)],
    })


def _count_texts(values: pd.Series, n: int) -> list[str | None]:
    return [suppress_value(v, n) for v in values]


def _public_programs(data: Evaluation, n: int, log: list) -> pd.DataFrame:
    programs = data.programs
    protected = protected_programs(programs, n)
    prior_facts = data.run["prior"]
    prior = Prior(shape=float(prior_facts["shape"]), rate=float(prior_facts["rate"]),
                  method=str(prior_facts.get("method", "fixed")))
    rules = rules_from_dict(data.run["rules"])
    out = programs.copy()
    out["recipients"] = _count_texts(programs["recipients"], n)
    out["observed"] = [_observed_text(r, o, n)
                       for r, o in zip(programs["recipients"], programs["observed"],
                                       strict=True)]
    derived = [c for c in out.columns if c not in KEPT_COLUMNS]
    flags = [c for c in derived if out[c].dtype == bool]
    out[flags] = out[flags].astype(object)  # true/false columns can then be left empty
    verdicts = out["verdict"].astype(object).to_numpy().copy()
    for i in np.flatnonzero(protected.to_numpy()):
        row = programs.iloc[i]
        code = row["program"]
        out.loc[out.index[i], derived] = np.nan
        why = (f"fewer than {plural(n, 'recipient')}" if row["recipients"] < n
               else f"1 to {n - 1} events or recipients without the event")
        log.append((code, "observed events, O/E, hazard ratio, intervals, probabilities, "
                          "survival, E, distances to another verdict, case mix",
                    why + ": each of these gives the counts back"))
        candidates = hidden_candidates(out["observed"].iloc[i], out["recipients"].iloc[i], n)
        if not verdict_says_nothing(row["verdict"], candidates, row["expected"], prior,
                                    rules):
            verdicts[i] = WITHHELD
            log.append((code, "verdict", "the verdict would narrow down the hidden count"))
    out["verdict"] = verdicts
    for column, digits in PRIOR_DIGITS.items():
        if column in out:
            out[column] = pd.to_numeric(out[column]).round(digits)
    out["protected"] = protected.to_numpy()
    return out


def _public_curves(data: Evaluation, shown: list[str], n: int, log: list
                   ) -> pd.DataFrame:
    horizon = float(data.run["horizon_days"])
    level = float(data.run.get("credible_level", 0.95))
    parts = []
    for code in shown:
        mine = data.recipients[data.recipients["program"] == code]
        curve = coarse_curve(mine["time"].to_numpy(float), mine["event"].to_numpy(float), n,
                             horizon, data.curves[data.curves["program"] == code], level)
        parts.append(curve.assign(program=code))
    log.append(("network", "survival curves and numbers at risk",
                f"shown at the quarter points of the horizon, a step only after {n} or more "
                "events; curves of protected programs withheld"))
    columns = ["program", "time", "observed", "observed_lower", "observed_upper", "at_risk",
               "expected"]
    if not parts:
        return pd.DataFrame(columns=columns)
    curves = pd.concat(parts, ignore_index=True)[columns]
    curves["at_risk"] = _count_texts(curves["at_risk"], n)
    return curves


def _public_exclusions(reasons: pd.DataFrame, excluded: float, n: int, log: list,
                       label: str = "reason", scope: str = "exclusions",
                       what: str = "records excluded for") -> tuple[pd.DataFrame, bool]:
    """Counts per kind with small ones hidden, and a second one where the total gives it back.

    Used for exclusions per reason and for corrections per kind (``label`` names the kind
    column); returns the table and whether the total may be shown.
    """
    values = reasons["records"].to_numpy(float)
    extra, total_shown = protect_total(values, n, excluded)
    text = _count_texts(reasons["records"], n)
    for i in np.flatnonzero(extra):
        text[i] = WITHHELD
        log.append((scope, f"{what} {reasons[label].iloc[i]}",
                    "withheld too, so that the total does not give back a hidden count"))
    return reasons.assign(records=text), total_shown


def _network_shown(data, programs: pd.DataFrame, n: int) -> bool:
    """True when the network's total O leaves every hidden count a spread of MIN_SPREAD."""
    observed = data.programs["observed"].to_numpy(float)
    hidden = programs["protected"].to_numpy(bool)
    ranges = [hidden_candidates(o, r, n) if h else np.array([v])
              for o, r, h, v in zip(programs["observed"], programs["recipients"], hidden,
                                    observed, strict=True)]
    lower = np.array([float(c.min()) if c.size else 0.0 for c in ranges])
    upper = np.array([float(c.max()) if c.size else np.inf for c in ranges])
    return _total_is_safe(float(observed.sum()), observed, hidden, lower, upper)


def _public_multiplicity(many: dict | None, programs: pd.DataFrame, data, log: list
                         ) -> dict | None:
    """run.json ``multiplicity`` with the sums that would give back a hidden figure withheld.

    The number of flags minus the flags shown gives a withheld verdict, so the entry is
    withheld whole then (the caution on expected false flags still says how many to expect);
    the posterior expected wrong flags sum 1 - P(HR > margin) over the flagged programs, a
    function of their O.
    """
    if not many:
        return many
    if (programs["verdict"] == WITHHELD).any():
        log.append(("network", "number of programs flagged and expected false flags",
                    "the flags minus the verdicts shown would give back a withheld verdict"))
        return None
    out = dict(many)
    flagged = data.programs["verdict"].isin(["excess", "favorable"]).to_numpy()
    if (flagged & programs["protected"].to_numpy(bool)).any():
        out["posterior_expected_wrong_flags"] = None
        log.append(("network", "posterior expected number of wrong flags",
                    "it sums a probability of a protected program, a function of its count"))
    return out


def _significant(value: float) -> float:
    return float(f"{value:.{PRIOR_FIGURES}g}")


def _coarse(value):
    """Every float in a run.json value (nested lists and objects) to PRIOR_FIGURES figures."""
    if isinstance(value, dict):
        return {k: _coarse(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_coarse(v) for v in value]
    if isinstance(value, float) and np.isfinite(value):
        return _significant(value)
    return value


def _coarse_prior(prior: dict) -> dict:
    """The prior's summary to PRIOR_FIGURES significant figures (shape, rate, mean, sd, the
    hyperposterior's summary and the numbers of the note); no components, no likelihood."""
    out = _coarse({k: v for k, v in prior.items() if k not in ("log_marginal", "components")})
    if isinstance(out.get("note"), str):
        out["note"] = re.sub(r"\d+\.\d+(?:e[-+]?\d+)?",
                             lambda m: f"{_significant(float(m[0])):g}", out["note"])
    return out


def _public_run(run: dict, n: int, kept_shown: bool, excluded_shown: bool,
                corrected_shown: bool, network_shown: bool, multiplicity: dict | None
                ) -> dict:
    public = {k: v for k, v in run.items() if k != "inputs"}
    if "multiplicity" in run:
        public["multiplicity"] = multiplicity
    network = run.get("network")
    if not network_shown and isinstance(network, dict):
        # the total O, and every figure it follows from (O/E with E, the exact limits and
        # test): null; a caution that quotes them is left out with them
        public["network"] = None
        quoted = f"{network['oe_lower']:.2f} to {network['oe_upper']:.2f}"
        public["cautions"] = [c for c in run.get("cautions", []) if quoted not in str(c)]
    inputs = run.get("inputs") or {}
    if isinstance(inputs, dict):
        public["inputs"] = {k: {"sha256": v.get("sha256")} for k, v in inputs.items()
                            if isinstance(v, dict)}
    # The marginal likelihood and the mixture's components are functions of every program's
    # counts, hidden ones included: only the prior's summary is published.
    public["prior"] = _coarse_prior(run["prior"])
    counts = dict(run["counts"])
    # Per kind and per reason they are in corrections_by_kind.csv and exclusions_by_reason.csv,
    # protected there.
    counts.pop("corrections", None)
    counts.pop("excluded_by_reason", None)
    if "corrected" in counts and not corrected_shown:
        counts["corrected"] = None
    counts["kept"] = counts.get("kept") if kept_shown else None
    counts["excluded"] = counts.get("excluded") if excluded_shown else None
    counts["read"] = counts.get("read") if kept_shown and excluded_shown else None
    public["counts"] = {k: (suppressed_text(n) if v is not None and _small(v, n) else v)
                        for k, v in counts.items()}
    public["disclosure"] = {
        "threshold": n,
        "rule": "docs/disclosure.md",
        "note": (f"Counts from 1 to {n - 1} are shown as {suppressed_text(n)}; every figure "
                 "that would give one back is withheld or coarsened; null means withheld."),
    }
    return public


def make_release(data: Evaluation, n: int) -> PublicRelease:
    """Apply the disclosure rule to an evaluation.

    Parameters
    ----------
    data : Evaluation
        The internal evaluation, in memory or read back with ``Evaluation.load`` (it is not
        changed).
    n : int
        The threshold N, at least 2.

    Returns
    -------
    PublicRelease
        The public tables hold no recipient-level row and no count from 1 to N - 1.
    """
    n = check_threshold(n)
    log: list[tuple[str, str, str]] = []
    programs = _public_programs(data, n, log)
    shown = programs.loc[~programs["protected"], "program"].tolist()
    small_n = data.programs["recipients"] < n
    kept = float(data.run["counts"].get("kept", data.programs["recipients"].sum()))
    kept_shown = _total_is_safe(
        kept, data.programs["recipients"].to_numpy(float), small_n.to_numpy(),
        np.ones(len(small_n)), np.full(len(small_n), n - 1.0))
    if not kept_shown:
        log.append(("network", "recipients kept and records read",
                    "the total minus the programs shown would give back a hidden count"))
    reasons, excluded_shown = _public_exclusions(
        exclusions_by_reason(data.exclusions), float(len(data.exclusions)), n, log)
    if not excluded_shown:
        log.append(("network", "records excluded and records read",
                    "the total minus the reasons shown would give back a hidden count"))
    network_shown = _network_shown(data, programs, n)
    if not network_shown:
        log.append(("network", "observed and expected events of the whole network, its O/E, "
                               "limits and exact test",
                    "the network's total minus the programs shown would give back a hidden "
                    "count"))
    corrected_shown = True
    if data.corrections is not None:
        kinds, corrected_shown = _public_exclusions(
            corrections_by_kind(data.corrections),
            float(data.corrections["row"].nunique()), n, log, label="correction",
            scope="corrections", what="records corrected for")
        if not corrected_shown:
            log.append(("network", "records kept with a correction",
                        "the total minus the kinds shown would give back a hidden count"))
    followup = data.followup[["program", "recipients", "completeness", "lost_to_followup"]]
    followup = followup.sort_values("program", kind="stable").reset_index(drop=True)
    tiny = followup["recipients"] < n
    followup = followup.assign(
        completeness=followup["completeness"].where(~tiny),
        recipients=_count_texts(followup["recipients"], n),
        lost_to_followup=_count_texts(followup["lost_to_followup"], n),
    )
    casemix = data.casemix[data.casemix["program"].isin(shown)].reset_index(drop=True)
    tables = {
        "programs.csv": programs.drop(columns="protected"),
        "followup.csv": followup,
        "curves.csv": _public_curves(data, shown, n, log),
        "casemix.csv": casemix,
        "coefficients.csv": data.coefficients,
        "exclusions_by_reason.csv": reasons,
    }
    if data.corrections is not None:
        tables["corrections_by_kind.csv"] = kinds
    if data.out_of_range is not None:  # folders of older evaluations do not have it
        ranges = data.out_of_range
        tables["out_of_range.csv"] = ranges.assign(
            recipients=_count_texts(ranges["recipients"], n))
    return PublicRelease(
        threshold=n,
        programs=programs,
        tables=tables,
        run=_public_run(data.run, n, kept_shown, excluded_shown, corrected_shown,
                        network_shown, _public_multiplicity(data.run.get("multiplicity"),
                                                            programs, data, log)),
        withheld=pd.DataFrame(log, columns=["scope", "figure", "reason"]),
    )


SHARED_CELLS = {
    "programs.csv": ("program", ("recipients",)),
    "followup.csv": ("program", ("recipients", "lost_to_followup")),
    "exclusions_by_reason.csv": ("reason", ("records",)),
    "corrections_by_kind.csv": ("correction", ("records",)),
}
"""Per table, its key column and the count columns that several analyses of one network
share (the same cohort gives the same recipients, exclusions and corrections)."""

_SHARED_TOTALS = ("read", "kept", "excluded", "corrected")


def _hidden_in(releases: Mapping[str, PublicRelease], name: str, key: str,
               column: str) -> dict:
    """Key -> the first analysis whose release hides the cell (any text but a count)."""
    out: dict = {}
    for analysis, release in releases.items():
        table = release.tables.get(name)
        if table is None or column not in table:
            continue
        for k, text in zip(table[key], table[column], strict=True):
            if text is not None and not str(text).isdigit():
                out.setdefault(k, analysis)
    return out


def _align(table: pd.DataFrame, key: str, column: str, hidden: dict, analysis: str,
           what: str, log: list) -> pd.DataFrame:
    # a count shown here is not the small count hidden there: it shows as "withheld"
    texts = table[column].astype(object).to_numpy().copy()
    for i, k in enumerate(table[key]):
        if k in hidden and str(texts[i]).isdigit():
            texts[i] = WITHHELD
            log.append((str(k), what, f"hidden in the analysis {hidden[k]} of the same "
                                      "network, which this one would give back"))
    return table.assign(**{column: texts})


def protect_releases(releases: Mapping[str, PublicRelease]) -> dict[str, PublicRelease]:
    """Complementary suppression across the public releases of several analyses.

    The analyses (outcomes, horizons) of one network share counts: the recipients of a
    program, the records excluded per reason and corrected per kind, the totals read, kept,
    excluded and corrected. Each release protects its own totals; but a cell one release
    withholds (a small count, or a second cell withheld so that a total does not give the
    first back) must not be shown by another. So every shared cell hidden in one release is
    hidden in all, and a shared total withheld in one is withheld in all. Hiding more cells
    of a total only widens what a reader can infer of each, so the totals each release kept
    stay safe.

    Parameters
    ----------
    releases : mapping of str -> PublicRelease
        The releases, by analysis name (from :func:`make_release`, one threshold).

    Returns
    -------
    dict of str -> PublicRelease
        The releases with the shared cells aligned; their ``withheld`` lists say which cells
        were hidden because another analysis hides them.

    Raises
    ------
    InputError
        When there is no release, or the releases use different thresholds.
    """
    if not releases:
        raise InputError("protect_releases needs at least one release.")
    thresholds = {name: r.threshold for name, r in releases.items()}
    if len(set(thresholds.values())) > 1:
        raise InputError(
            "the releases of one network must use one threshold; got "
            + ", ".join(f"{name}: {n}" for name, n in thresholds.items()) + ".")
    hidden = {(name, column): _hidden_in(releases, name, key, column)
              for name, (key, columns) in SHARED_CELLS.items() for column in columns}
    withheld_totals: dict[str, str] = {}
    for name, release in releases.items():
        for total in _SHARED_TOTALS:
            if total in release.run["counts"] and release.run["counts"][total] is None:
                withheld_totals.setdefault(total, name)
    out = {}
    for analysis, release in releases.items():
        log: list[tuple[str, str, str]] = []
        tables = dict(release.tables)
        for name, (key, columns) in SHARED_CELLS.items():
            for column in columns:
                if name in tables and column in tables[name]:
                    tables[name] = _align(tables[name], key, column, hidden[(name, column)],
                                          analysis, f"{column} in {name}", log)
        counts = dict(release.run["counts"])
        for total, where in withheld_totals.items():
            if counts.get(total) is not None:
                counts[total] = None
                log.append(("network", f"records {total}",
                            f"withheld in the analysis {where} of the same network"))
        programs = release.programs.assign(recipients=tables["programs.csv"]["recipients"]
                                           .to_numpy())
        out[analysis] = replace(
            release, programs=programs, tables=tables,
            run={**release.run, "counts": counts},
            withheld=pd.concat([release.withheld,
                                pd.DataFrame(log, columns=["scope", "figure", "reason"])],
                               ignore_index=True))
    return out
