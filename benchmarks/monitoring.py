"""Speed of monitoring: 250 programs, 100,000 recipients, 1,000 simulated histories each.

Run ``python benchmarks/monitoring.py`` (``--programs``, ``--recipients``, ``--replicates``
to change the size). Prints a markdown table of wall-clock seconds; nothing is asserted
(benchmarks are scripts, never timed tests).

**Data.** The invented Lorran Valley demo cohort (``casemix.demo``, seed 2026) resampled
with a fixed seed into ``--programs`` programs of uneven sizes (log-normal, about 40 to 1,500
recipients at the default size) transplanted over three years, 2022-01-01 to 2024-12-31,
each recipient keeping the intervals from transplant to his or her recorded dates; cut-off
2025-06-30. The model is the bundled ``models/lorran_valley_graft_failure_365.json``.

**What is timed.** ``casemix.monitoring.monitor`` from the records file to the finished
tables (reading and validating the records, follow-up, expected events by day, simulated
limits of both charts for every program, the charts and their series), in one process
(wall-clock and CPU seconds of that process; on a shared machine the CPU seconds are the
steadier figure).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from casemix import demo
from casemix.monitoring import MonitoringRules, monitor

ROOT = Path(__file__).resolve().parents[1]
MODEL = ROOT / "models" / "lorran_valley_graft_failure_365.json"
DATES = list(demo.COLUMNS[2:7])


def network(programs: int, recipients: int, seed: int = 16) -> pd.DataFrame:
    """Demo cohort rows resampled into ``programs`` programs (see the module docstring)."""
    rng = np.random.default_rng(seed)
    source = demo.generate().cohort
    planted = demo.generate().planted["recipient_id"]
    source = source[~source["recipient_id"].isin(planted)].reset_index(drop=True)
    weights = rng.lognormal(0.0, 0.8, programs)
    sizes = np.maximum(np.round(weights / weights.sum() * recipients).astype(int), 1)
    sizes[-1] += recipients - sizes.sum()
    rows = source.iloc[rng.integers(0, len(source), sizes.sum())].reset_index(drop=True)
    start, end = (pd.Timestamp(d) for d in demo.COHORT_WINDOW)
    days = rng.integers(0, (end - start).days + 1, len(rows))
    new_tx = start + pd.to_timedelta(days, unit="D")
    shift = new_tx - rows["transplant_date"]
    for column in DATES:
        rows[column] = rows[column] + shift
    cutoff = pd.Timestamp(demo.COHORT_CUTOFF)
    late = rows["last_seen_date"] > cutoff
    rows.loc[late, "last_seen_date"] = cutoff
    for column in DATES[2:]:
        rows.loc[rows[column] > cutoff, column] = pd.NaT
    rows["program"] = np.repeat([f"P{i:03d}" for i in range(programs)], sizes)
    rows["recipient_id"] = [f"B{i:07d}" for i in range(len(rows))]
    return rows


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--programs", type=int, default=250)
    parser.add_argument("--recipients", type=int, default=100_000)
    parser.add_argument("--replicates", type=int, default=1000)
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as scratch:
        path = Path(scratch) / "records.csv"
        frame = network(args.programs, args.recipients)
        frame.to_csv(path, index=False, date_format="%Y-%m-%d")
        rules = MonitoringRules(replicates=args.replicates)
        begin, cpu = time.perf_counter(), time.process_time()
        result = monitor(path, MODEL, "2022-01-01", demo.COHORT_CUTOFF, rules)
        seconds, cpu = time.perf_counter() - begin, time.process_time() - cpu
    state = result.state
    print("| programs | recipients | events | replicates | charts signalled | wall seconds "
          "| CPU seconds |")
    print("| ---: | ---: | ---: | ---: | ---: | ---: | ---: |")
    events = int(state.loc[state["chart"] == "upper", "observed"].sum())
    print(f"| {state['program'].nunique()} | {len(frame):,} | {events:,} | {args.replicates:,} "
          f"| {int(state['signalled'].sum())} of {len(state)} | {seconds:.1f} | {cpu:.1f} |")


if __name__ == "__main__":
    main()
