"""Speed of the audit: C-index and PH test at 10^6 rows, and the full audit on the demo network.

Run ``python benchmarks/audit.py`` (add ``--quick`` to skip the full audit). Prints the
seconds of the checks at 10^6 rows, then a table of ``casemix audit`` on the demo network
(B = 200) run as a whole process at 1 and 2 workers, on the machine as it is and with one
competing busy process (wall seconds, CPU seconds of the command and its worker processes,
peak memory of the main process). Nothing is asserted (benchmarks are scripts, never timed
tests). The data at 10^6 rows are simulated from a known Cox model (seeded); the demo network
is the invented Lorran Valley network of ``casemix.demo``.
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
from _process import busy_process, run_measured

from casemix.audit import concordance, ph_test
from casemix.data.records import read_records
from casemix.data.spec import load_spec
from casemix.demo import COHORT_CUTOFF, REFERENCE_CUTOFF, REFERENCE_WINDOW, write_demo
from casemix.model.reference import fit_reference
from casemix.survival import fit_cox

N_ROWS = 1_000_000
P = 5


def _timed(label: str, func):
    start = time.perf_counter()
    result = func()
    seconds = time.perf_counter() - start
    print(f"{label:<58} {seconds:8.2f} s", flush=True)
    return result


def large_data(seed: int = 0):
    """Exponential times with hazard exp(x . beta), follow-up cut at 1, times in days."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(N_ROWS, P))
    beta = np.linspace(-0.5, 0.5, P)
    t = rng.exponential(np.exp(-(X @ beta)))
    time_days = np.ceil(np.minimum(t, 1.0) * 365)  # whole days, so ties as in registries
    return time_days, (t <= 1.0).astype(int), X


def bench_large() -> None:
    time_days, event, X = large_data()
    fit = _timed(f"Cox fit, {N_ROWS:,} rows, p = {P} (for the checks)",
                 lambda: fit_cox(time_days, event, X))  # fmt: skip
    lp = fit.linear_predictor(X)
    _timed(f"Harrell's C, {N_ROWS:,} rows", lambda: concordance(time_days, event, lp))
    for transform in ("rank", "km"):
        _timed(f"PH test ({transform}), {N_ROWS:,} rows, {int(event.sum()):,} events",
               lambda t=transform: ph_test(fit, time_days, event, X, t))  # fmt: skip


def bench_demo(replicates: int = 200) -> None:
    with tempfile.TemporaryDirectory() as folder, warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the demo's planted record problems warn on purpose
        paths = write_demo(folder)
        spec = load_spec(paths["spec"])
        reference = read_records(paths["reference"], spec, cutoff=REFERENCE_CUTOFF)
        model = fit_reference(reference, spec, cutoff=REFERENCE_CUTOFF, window=REFERENCE_WINDOW)
        model.save(Path(folder) / "model.json")
        command = [
            sys.executable, "-m", "casemix.cli", "audit", paths["reference"],
            "--model", Path(folder) / "model.json", "--cohort", paths["cohort"],
            "--cutoff", COHORT_CUTOFF.isoformat(), "--bootstrap", replicates,
            "--out", Path(folder) / "audit",
        ]  # fmt: skip
        print(f"\n`casemix audit` on the demo network, B = {replicates}, one process each:\n")
        print("| machine | workers | wall s | CPU s | peak MiB |")
        print("| --- | ---: | ---: | ---: | ---: |")
        for machine in ("as it is", "+ 1 busy process"):
            for workers in (1, 2):
                if machine == "as it is":
                    m = run_measured([*command, "--workers", workers])
                else:
                    with busy_process():
                        m = run_measured([*command, "--workers", workers])
                print(f"| {machine} | {workers} | {m.wall:.1f} | {m.cpu:.1f} "
                      f"| {m.peak_mib:.0f} |", flush=True)  # fmt: skip


def main(argv: list[str]) -> None:
    print(f"casemix audit benchmark; {os.cpu_count()} CPUs")
    bench_large()
    if "--quick" not in argv:
        bench_demo()


if __name__ == "__main__":
    main(sys.argv[1:])
