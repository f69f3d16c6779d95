"""Monitoring between evaluations: per program, CUSUM charts and observed minus expected by day.

``monitor(records, model, start, cutoff)`` follows every recipient transplanted from ``start``
to the cut-off, in calendar time, against the reference model: observed events N(t), expected
events A(t) (:mod:`casemix.monitoring.cusum`), an upper and a lower risk-adjusted CUSUM with
control limits simulated per program (:mod:`casemix.monitoring.limits`) or fixed, and the
cumulative observed minus expected with a pointwise exact Poisson 95% band: on each day, a
program with hazard ratio 1 and that day's A(t) lies inside it with probability at least 95%
(Poisson quantiles of A(t); A(t) taken as known). It is not a band for the whole path.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

import casemix
from casemix._io import sha256_file, write_csv, write_json
from casemix.data.cohort import DAY_ZERO_TIME, build_cohort
from casemix.data.records import Records, read_records, to_timestamp
from casemix.errors import InputError
from casemix.model.reference import ReferenceModel
from casemix.monitoring.cusum import cusum_path, expected_by_day, observed_by_day
from casemix.monitoring.limits import control_limit, program_seed, simulate_maxima
from casemix.monitoring.rules import MonitoringRules, load_monitoring_rules

__all__ = ["BAND", "CAUTIONS", "CHARTS", "Monitoring", "monitor"]

CHARTS = ("upper", "lower")
BAND = "pointwise exact Poisson 95%"

CAUTIONS = (
    "A signal is a prompt to look closer at a program's recent recipients and data, not a "
    "finding about the quality of care.",
    "Each chart's limit keeps the chance of a false signal over the period near the chosen "
    "level for a program whose hazard ratio is 1; across many programs some false signals "
    "are expected.",
    "Expected events come from a model of the reference population: case-mix factors that "
    "the model does not contain are not adjusted for, and events reported late make recent "
    "weeks look better than they are.",
    "Small programs are uncertain: their charts move in large steps and rarely reach a limit.",
    "Decisions about programs belong to clinical review under the applicable rules and "
    "licensed practice, not to this output alone.",
)

STATE_COLUMNS = [
    "program", "chart", "rho", "recipients", "observed", "expected", "g_now", "h",
    "h_source", "h_lower", "h_upper", "signal_probability", "signal_probability_se",
    "signalled", "signals", "first_signal", "last_signal", "signal_dates",
]
SERIES_COLUMNS = [
    "program", "date", "day", "observed", "expected", "o_minus_e", "band_lower",
    "band_upper", "g_upper", "g_lower",
]
SIGNAL_COLUMNS = ["program", "chart", "date", "g", "h", "observed", "expected"]


@dataclass(frozen=True, eq=False)
class Monitoring:
    """The monitoring of every program over one period.

    Attributes
    ----------
    state : DataFrame
        One row per program and chart (columns ``STATE_COLUMNS``): G on the last day, the
        limit and its Monte Carlo error, whether and when it signalled, O and E since the start.
    signals : DataFrame
        One row per signal: ``program``, ``chart``, ``date``, ``g``, ``h``, and ``observed``
        and ``expected`` since the start (or since the chart's last restart) to that day.
    series : DataFrame
        One row per program and day: N, A, O - E with its band, G of both charts.
    rules : MonitoringRules
    run : dict
        Inputs' fingerprints, dates, rules, versions and cautions (monitoring.json).
    """

    state: pd.DataFrame
    signals: pd.DataFrame
    series: pd.DataFrame
    rules: MonitoringRules
    run: dict[str, Any]

    def save(self, folder: str | Path) -> Path:
        """Write monitoring_state.csv, monitoring_signals.csv, monitoring_series.csv and
        monitoring.json into ``folder`` (created if missing), each atomically."""
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        write_csv(folder / "monitoring_state.csv", self.state)
        write_csv(folder / "monitoring_signals.csv", self.signals)
        write_csv(folder / "monitoring_series.csv", self.series)
        write_json(folder / "monitoring.json", self.run)
        return folder


@dataclass(frozen=True, eq=False)
class _Program:
    """One program's recipients in calendar days from the start (internal)."""

    code: str
    entry: np.ndarray
    stop: np.ndarray
    event: np.ndarray
    censor: np.ndarray
    risk: np.ndarray
    stratum: np.ndarray


def monitor(
    records: Records | str | Path,
    model: ReferenceModel | str | Path,
    start,
    cutoff=None,
    rules: MonitoringRules | str | Path | None = None,
) -> Monitoring:
    """Monitor every program from ``start`` to ``cutoff`` against a reference model.

    Parameters
    ----------
    records : Records or path
        The recipients' records (a path is read with the model's spec and ``cutoff``).
    model : ReferenceModel or path
        Its outcome is monitored; its horizon is the longest follow-up that counts.
    start : date-like
        First day of monitoring: recipients transplanted from this day on are followed.
    cutoff : date-like, optional
        Last day (data complete to it); default the records' cut-off.
    rules : MonitoringRules or path of a rules file, optional
        The ``[monitoring]`` settings (defaults when absent).

    Returns
    -------
    Monitoring

    Raises
    ------
    InputError
        A start after the cut-off, a horizon longer than the model's, a model whose
        baseline does not reach the horizon, follow-up not in whole days, no recipients.
    RulesError
        Invalid monitoring rules.
    """
    model_path = None
    if not isinstance(model, ReferenceModel):
        model_path = Path(model)
        model = ReferenceModel.load(model_path)
    if not isinstance(rules, MonitoringRules):
        rules = load_monitoring_rules(rules)
    if not isinstance(records, Records):
        records = read_records(records, model.spec, cutoff=cutoff)
    first = to_timestamp(start, "monitoring start")
    last = to_timestamp(cutoff, "cut-off") or records.cutoff
    if first is None or last is None:
        raise InputError("monitoring needs a start date and a cut-off (for example --from "
                         "2022-01-01 --cutoff 2025-06-30).")
    if first > last:
        raise InputError(
            f"the monitoring start {first:%Y-%m-%d} is after the cut-off {last:%Y-%m-%d}; "
            "give a start on or before the cut-off."
        )
    horizon = _horizon(rules, model)
    cohort = build_cohort(records, model.outcome, horizon, last, window=(first, last))
    if cohort.frame.empty:
        raise InputError(
            f"no recipient of {records.source} was transplanted between {first:%Y-%m-%d} and "
            f"{last:%Y-%m-%d}; check the dates and the exclusions."
        )
    hazard = _hazard_table(model, horizon)
    days = int((last - first).days)
    dates = pd.date_range(first, last, freq="D").strftime("%Y-%m-%d").to_numpy(dtype=object)
    state, signals, series = [], [], []
    for program in _programs(cohort, model, first, last, horizon):
        rows = _program_rows(program, hazard, days, dates, rules)
        state += rows[0]
        signals += rows[1]
        series.append(rows[2])
    return Monitoring(
        state=pd.DataFrame(state, columns=STATE_COLUMNS),
        signals=pd.DataFrame(signals, columns=SIGNAL_COLUMNS),
        series=pd.concat(series, ignore_index=True)[SERIES_COLUMNS],
        rules=rules,
        run=_run_facts(records, cohort, model, model_path, rules, first, last, horizon),
    )


def _horizon(rules: MonitoringRules, model: ReferenceModel) -> float:
    horizon = float(model.horizon_days if rules.horizon_days is None else rules.horizon_days)
    if horizon > model.horizon_days:
        raise InputError(
            f"monitoring needs follow-up to {horizon:g} days but the reference model's horizon "
            f"is {model.horizon_days} days: its baseline hazard is unknown beyond; fit a model "
            "with a longer horizon or lower horizon_days in [monitoring]."
        )
    return horizon


def _hazard_table(model: ReferenceModel, horizon: float) -> np.ndarray:
    """Baseline cumulative hazard at whole days 0..horizon, one row per stratum."""
    top = int(np.floor(horizon))
    short = [b.last_time for b in model.fit.baselines if b.last_time < top]
    if short:
        raise InputError(
            f"the reference model's baseline hazard is known only to day {min(short):g} (the "
            f"longest follow-up of its fitting data) but monitoring needs day {top}; fit the "
            "model on data followed to the horizon or lower horizon_days in [monitoring]."
        )
    # Day 0 holds what happens on the day of the transplant: the cohort puts those ends at
    # DAY_ZERO_TIME (half a day), so the hazard of day 0 is read there.
    grid = np.arange(top + 1, dtype=float)
    grid[0] = DAY_ZERO_TIME
    return np.vstack([b.at(grid) for b in model.fit.baselines])


def _programs(cohort, model: ReferenceModel, first, last, horizon: float):
    spec = model.spec
    frame = cohort.frame
    time = frame["time"].to_numpy(dtype=float)
    time = np.where(time == DAY_ZERO_TIME, 0.0, time)  # an end on the transplant day: day 0
    if not np.array_equal(time, np.rint(time)):
        raise InputError("follow-up times must be whole days for monitoring in calendar time.")
    X, strata = model.matrices(cohort)
    risk = model.fit.relative_risk(X)
    stratum = model.fit.stratum_codes(strata, len(frame))
    transplant = frame[spec.columns.transplant_date]
    entry = ((transplant - first).dt.days).to_numpy(dtype=np.intp)
    stop = time.astype(np.intp)
    event = frame["event"].to_numpy(dtype=np.intp)
    potential = np.minimum(int(np.floor(horizon)), ((last - transplant).dt.days).to_numpy())
    censor = np.where(event == 1, potential, stop).astype(np.intp)
    codes = frame[spec.columns.program].astype(str).to_numpy()
    for code in sorted(set(codes)):
        mine = codes == code
        yield _Program(code, entry[mine], stop[mine], event[mine], censor[mine], risk[mine],
                       stratum[mine])


def _limits(program: _Program, hazard, days, rules: MonitoringRules) -> list[dict]:
    """Per chart: h, where it came from, its interval and the simulated false-signal share."""
    rhos = (rules.rho_up, rules.rho_down)
    if rules.replicates == 0:
        return [dict(h=rules.h, h_source="fixed", h_lower=np.nan, h_upper=np.nan,
                     signal_probability=np.nan, signal_probability_se=np.nan) for _ in rhos]
    rng = np.random.default_rng(program_seed(rules.seed, program.code))
    maxima = simulate_maxima(program.entry, program.censor, program.risk, program.stratum,
                             hazard, days, rhos, rules.replicates, rng)
    out = []
    for chart in maxima:
        if rules.h is None:
            limit = control_limit(chart, rules.level)
            out.append(dict(h=limit.h, h_source="simulated", h_lower=limit.h_lower,
                            h_upper=limit.h_upper, signal_probability=limit.signal_probability,
                            signal_probability_se=limit.signal_probability_se))
        else:
            share = float(np.mean(chart >= rules.h))
            out.append(dict(h=rules.h, h_source="fixed", h_lower=np.nan, h_upper=np.nan,
                            signal_probability=share,
                            signal_probability_se=float(np.sqrt(share * (1 - share)
                                                                / chart.size))))
    return out


def _program_rows(program: _Program, hazard, days: int, dates, rules: MonitoringRules):
    expected = expected_by_day(program.entry, program.stop, program.risk, program.stratum,
                               hazard, days)
    observed = observed_by_day(program.entry, program.stop, program.event, days)
    limits = _limits(program, hazard, days, rules)
    state, signals, paths = [], [], {}
    for chart, rho, limit in zip(CHARTS, (rules.rho_up, rules.rho_down), limits, strict=True):
        g, hits = cusum_path(observed, expected, rho, limit["h"], restart=rules.restart)
        paths[chart] = g
        since = _restart_points(hits, rules.restart)
        for position, origin in zip(hits, since, strict=True):
            signals.append([program.code, chart, dates[position],
                            g[position], limit["h"],
                            observed[position] - (observed[origin] if origin >= 0 else 0.0),
                            expected[position] - (expected[origin] if origin >= 0 else 0.0)])
        hit_dates = [dates[p] for p in hits]
        state.append({
            "program": program.code, "chart": chart, "rho": rho,
            "recipients": int(program.entry.size), "observed": int(observed[-1]),
            "expected": float(expected[-1]), "g_now": float(g[-1]), **limit,
            "signalled": bool(hits.size), "signals": int(hits.size),
            "first_signal": hit_dates[0] if hit_dates else None,
            "last_signal": hit_dates[-1] if hit_dates else None,
            "signal_dates": "; ".join(hit_dates),
        })
    series = pd.DataFrame({
        "program": program.code,
        "date": dates,
        "day": np.arange(days + 1),
        "observed": observed.astype(np.int64),
        "expected": expected,
        "o_minus_e": observed - expected,
        "band_lower": stats.poisson.ppf(0.025, expected) - expected,
        "band_upper": stats.poisson.ppf(0.975, expected) - expected,
        "g_upper": paths["upper"],
        "g_lower": paths["lower"],
    })
    return state, signals, series


def _restart_points(hits: np.ndarray, restart: bool) -> list[int]:
    """Grid position each signal's stretch started after (-1: the start of monitoring)."""
    if not restart:
        return [-1] * hits.size
    return [-1, *hits[:-1].tolist()] if hits.size else []


def _run_facts(records, cohort, model, model_path, rules, first, last, horizon) -> dict:
    inputs = {"records": {"path": str(records.source), "sha256": sha256_file(records.source)}}
    if model_path is not None:
        inputs["model"] = {"path": str(model_path), "sha256": sha256_file(model_path)}
    return {
        "casemix_version": casemix.__version__,
        "outcome": model.outcome,
        "horizon_days": horizon,
        "start": first.date().isoformat(),
        "cutoff": last.date().isoformat(),
        "inputs": inputs,
        "model_fingerprint": model.fingerprint,
        "rules": rules.to_dict(),
        "band": BAND,
        "counts": {"read": int(cohort.n_read), "kept": len(cohort.frame),
                   "excluded": len(cohort.exclusions)},
        "cautions": list(CAUTIONS),
    }
