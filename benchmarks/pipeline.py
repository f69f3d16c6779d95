"""End to end at national scale: casemix's commands against a short by-hand script.

Builds a seeded registry-sized extract (the demo network's reference extract resampled with
replacement to ``--rows`` recipients, each of its 16 programs split into 10, so about 160
programs; written as CSV and as Parquet with typed date columns) and a cohort extract (the
demo cohort resampled to a quarter as many rows), then times as whole processes (wall
seconds, CPU seconds, peak resident memory):

* ``casemix check`` on the CSV and on the Parquet file;
* ``casemix fit`` (graft failure at 365 days) on both;
* ``casemix evaluate`` of the cohort (Parquet) with the Parquet-fitted model, report off;
* optionally ``casemix audit`` of that model with the cohort (``--audit-bootstrap B``);
* by hand: ``pandas.read_parquet``, ``to_datetime``, the follow-up and the event in pandas,
  lifelines ``CoxPHFitter`` on the same covariates (numeric as they are, categories as
  indicators, missing values filled with the median, donor age linear), no validation.

Prints one markdown table; writes nothing outside a temporary folder (``--keep DIR`` keeps
the files there instead).

Usage::

    python benchmarks/pipeline.py                  # 10^6 rows
    python benchmarks/pipeline.py --rows 100000    # smaller
    python benchmarks/pipeline.py --audit-bootstrap 50 --workers 2
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import sys
import tempfile
import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd
from _process import Measured, run_measured

from casemix.demo import COHORT_CUTOFF, COHORT_WINDOW, REFERENCE_CUTOFF, write_demo

SEED = 20260611
SPLIT = 10  # each demo program becomes this many programs
DATES = ("transplant_date", "last_seen_date", "graft_loss_date", "retransplant_date",
         "death_date")  # fmt: skip
HORIZON = 365

BY_HAND = r"""
import sys
import numpy as np
import pandas as pd
from lifelines import CoxPHFitter

frame = pd.read_parquet(sys.argv[1])
cutoff = pd.Timestamp(sys.argv[2])
for column in ["transplant_date", "last_seen_date", "graft_loss_date", "retransplant_date",
               "death_date"]:
    frame[column] = pd.to_datetime(frame[column])
failure = frame[["graft_loss_date", "retransplant_date", "death_date"]].min(axis=1)
end = frame["last_seen_date"].clip(upper=cutoff)
days_to_failure = (failure - frame["transplant_date"]).dt.days
days_seen = (end - frame["transplant_date"]).dt.days
event = days_to_failure.notna() & (days_to_failure <= days_seen) & (days_to_failure <= 365)
time = np.minimum(np.where(event, days_to_failure, days_seen), 365)
numeric = ["recipient_age", "bmi", "diabetes", "dialysis_years", "previous_transplant", "cpra",
           "donor_age", "cold_ischaemia_hours", "hla_mismatches"]
design = frame[numeric].astype(float)
design = design.fillna(design.median())
design["male"] = (frame["recipient_sex"] == "male").astype(float)
design["living_donor"] = (frame["donor_type"] == "living").astype(float)
design["time"] = time
design["event"] = event.astype(int)
design = design[design["time"] >= 0]
CoxPHFitter().fit(design, "time", "event")
"""


def build_extracts(rows: int, folder: Path) -> dict[str, Path]:
    """Write the resampled reference (CSV, Parquet) and cohort (Parquet) extracts."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        demo = write_demo(folder / "demo")
    rng = np.random.default_rng(SEED)
    paths = {"spec": demo["spec"], "rules": demo["rules"]}
    for name, n in (("reference", rows), ("cohort", max(rows // 4, 1000))):
        source = pd.read_csv(demo[name], dtype=str, keep_default_na=False)
        frame = source.iloc[rng.integers(0, len(source), n)].reset_index(drop=True)
        prefix = "R" if name == "reference" else "C"
        frame["recipient_id"] = [f"{prefix}{i:07d}" for i in range(n)]
        split = rng.integers(0, SPLIT, n)
        frame["program"] = frame["program"].where(
            frame["program"] == "", frame["program"] + "-" + pd.Series(split).astype(str)
        )
        csv = folder / f"{name}.csv"
        frame.to_csv(csv, index=False)
        typed = pd.read_csv(csv, parse_dates=list(DATES))  # what a registry export would type
        typed.to_parquet(folder / f"{name}.parquet", index=False)
        paths[f"{name}_csv"], paths[f"{name}_parquet"] = csv, folder / f"{name}.parquet"
    return paths


def run_all(paths: dict[str, Path], folder: Path, bootstrap: int, workers: int) -> dict:
    """Time every command; return {label: Measured}."""
    casemix = [sys.executable, "-m", "casemix.cli"]
    spec, ref_cut = paths["spec"], REFERENCE_CUTOFF.isoformat()
    runs = {}
    for kind in ("csv", "parquet"):
        data = paths[f"reference_{kind}"]
        runs[f"`casemix check` ({kind})"] = run_measured(
            [*casemix, "check", data, "--spec", spec, "--cutoff", ref_cut]
        )
        runs[f"`casemix fit` ({kind}, graft failure at {HORIZON} days)"] = run_measured(
            [*casemix, "fit", data, "--spec", spec, "--outcome", "graft_failure",
             "--horizon", HORIZON, "--cutoff", ref_cut, "--out", folder / f"model_{kind}.json"]
        )  # fmt: skip
    model = folder / "model_parquet.json"
    cohort = paths["cohort_parquet"]
    runs["`casemix evaluate` (parquet cohort, no report)"] = run_measured(
        [*casemix, "evaluate", cohort, "--model", model, "--rules", paths["rules"],
         "--cutoff", COHORT_CUTOFF.isoformat(), "--from", COHORT_WINDOW[0].isoformat(),
         "--to", COHORT_WINDOW[1].isoformat(), "--no-report", "--out", folder / "results"]
    )  # fmt: skip
    runs["by hand: read_parquet + to_datetime + follow-up + lifelines CoxPHFitter"] = (
        run_measured([sys.executable, "-c", BY_HAND, paths["reference_parquet"], ref_cut])
    )
    if bootstrap:
        runs[f"`casemix audit` (B = {bootstrap}, {workers} workers)"] = run_measured(
            [*casemix, "audit", paths["reference_parquet"], "--model", model,
             "--cohort", cohort, "--cutoff", COHORT_CUTOFF.isoformat(),
             "--from", COHORT_WINDOW[0].isoformat(), "--to", COHORT_WINDOW[1].isoformat(),
             "--bootstrap", bootstrap, "--workers", workers, "--out", folder / "audit"]
        )  # fmt: skip
    return runs


def table(runs: dict[str, Measured]) -> str:
    """Markdown table with the ratio of each run to the by-hand script."""
    by_hand = next(m for label, m in runs.items() if label.startswith("by hand"))
    lines = [
        "| what | wall s | CPU s | peak MiB | wall / by hand | peak / by hand |",
        "| --- | ---: | ---: | ---: | ---: | ---: |",
    ]
    for label, m in runs.items():
        lines.append(
            f"| {label} | {m.wall:.1f} | {m.cpu:.1f} | {m.peak_mib:.0f} "
            f"| {m.wall / by_hand.wall:.2f} | {m.peak_mib / by_hand.peak_mib:.2f} |"
        )
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=lambda s: int(float(s)), default=1_000_000,
                        help="reference recipients (default 1e6)")  # fmt: skip
    parser.add_argument("--audit-bootstrap", type=int, default=0,
                        help="also time casemix audit with this many replicates (default 0: no)")
    parser.add_argument("--workers", type=int, default=2, help="audit workers (default 2)")
    parser.add_argument("--keep", type=Path, help="write the files here and keep them")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="casemix-pipeline-") as scratch:
        folder = args.keep or Path(scratch)
        folder.mkdir(parents=True, exist_ok=True)
        # Built in a process of its own: a command started from a parent that holds the
        # building's memory reports the parent's resident size as its own peak (ru_maxrss
        # counts the forked copy's pages before exec).
        with ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("spawn")) as pool:
            paths = pool.submit(build_extracts, args.rows, folder).result()
        sizes = {kind: paths[f"reference_{kind}"].stat().st_size / 2**20
                 for kind in ("csv", "parquet")}  # fmt: skip
        runs = run_all(paths, folder, args.audit_bootstrap, args.workers)
    print(
        f"{args.rows:,} reference recipients (demo reference resampled, seed {SEED}, "
        f"{16 * SPLIT} programs; CSV {sizes['csv']:.1f} MiB, Parquet {sizes['parquet']:.1f} "
        f"MiB); cohort {max(args.rows // 4, 1000):,}; {os.cpu_count()} CPUs. Each row is one "
        "process; CPU s = user + system of it and its exited children.\n"
    )
    print(table(runs))


if __name__ == "__main__":
    main()
