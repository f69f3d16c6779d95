"""Speed, memory and agreement of casemix's Cox fit against lifelines and statsmodels.

Generates seeded registry-like data (p = 20: 8 continuous and 12 binary covariates; integer-day
follow-up up to 1095 days, so many tied times; about 10% events) and, for each size, runs every
fit in a fresh Python process so that the peak resident memory of one fit is
not hidden by an earlier one (peak = ``VmHWM`` from /proc/self/status on Linux,
``ru_maxrss`` elsewhere):

* casemix ``fit_cox`` + ``CoxFit.expected_events`` on the same data (Efron and Breslow ties);
* lifelines ``CoxPHFitter`` (Efron, its only tie method), default settings;
* statsmodels ``PHReg`` (Efron and Breslow), default settings.

The library timings cover their ``fit`` only (no expected events), which favours them. The
floor is the time of one weighted cross-product X^T diag(w) X on the same data (one numpy
multiply and one BLAS matrix product, best of 7) times the number of Newton iterations the
casemix Efron fit took. Prints two markdown tables.

Usage::

    python benchmarks/cox_fit.py                      # n = 10^4, 10^5, 10^6, every library
    python benchmarks/cox_fit.py --sizes 10000,100000 # chosen sizes
    python benchmarks/cox_fit.py --skip-slow          # reference libraries only up to 10^5
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

SEED = 20240611
N_CONTINUOUS = 8
N_BINARY = 12
MAX_DAYS = 1095
SLOW_LIMIT = 100_000  # --skip-slow runs the reference libraries only up to this size
METHODS = (
    ("casemix", "efron"),
    ("casemix", "breslow"),
    ("lifelines", "efron"),
    ("statsmodels", "efron"),
    ("statsmodels", "breslow"),
)


# ------------------------------------------------------------------------------------------
# Data
# ------------------------------------------------------------------------------------------


def simulate(n: int, seed: int = SEED) -> dict[str, np.ndarray]:
    """Registry-like survival data with a known proportional-hazards truth.

    Parameters
    ----------
    n : int
        Number of recipients.
    seed : int, default SEED
        Seed of the numpy Generator; the same (n, seed) always gives the same data.

    Returns
    -------
    dict
        ``time`` (n,) integer days in [0, 1095] as float, ``event`` (n,) 0/1 int8 (about
        10% events), ``X`` (n, 20) float64: 8 continuous columns then 12 binary ones.
    """
    rng = np.random.default_rng(seed)
    means = np.array([52.0, 27.0, 3.0, 45.0, 14.0, 3.0, 60.0, 1.2])
    sds = np.array([13.0, 5.0, 2.5, 15.0, 7.0, 1.5, 20.0, 0.4])
    continuous = rng.normal(means, sds, size=(n, N_CONTINUOUS))
    prevalence = np.linspace(0.05, 0.5, N_BINARY)
    binary = (rng.random((n, N_BINARY)) < prevalence).astype(float)
    X = np.column_stack([continuous, binary])
    beta = np.r_[
        np.array([0.02, 0.015, 0.05, 0.01, 0.02, 0.08, -0.005, 0.3]),
        np.linspace(-0.4, 0.4, N_BINARY),
    ]
    risk = np.exp((X - X.mean(axis=0)) @ beta)
    failure = np.floor(rng.exponential(1.0 / (1.9e-4 * risk)))  # day 0 failures happen
    follow_up = rng.integers(1, MAX_DAYS + 1, n).astype(float)  # staggered entry, cut-off
    event = (failure <= follow_up).astype(np.int8)
    return {"time": np.minimum(failure, follow_up), "event": event, "X": X}


# ------------------------------------------------------------------------------------------
# Workers (one fit per fresh process)
# ------------------------------------------------------------------------------------------


def _peak_mib() -> float:
    """Peak resident memory of this process so far, in MiB.

    Linux's ``VmHWM`` belongs to the process image and starts afresh at exec; ``ru_maxrss``
    (the fallback elsewhere) would include the parent's peak at fork time on Linux.
    """
    status = Path("/proc/self/status")
    if status.exists():
        for line in status.read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024  # kB
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux


def _prepare_casemix(data, ties):
    from casemix.survival import fit_cox

    def run():
        fit = fit_cox(data["time"], data["event"], data["X"], ties=ties)
        expected = fit.expected_events(data["time"], data["X"])
        gap = float(expected.sum() - data["event"].sum())
        return fit.coef, {"n_iter": fit.n_iter, "sum_e_minus_o": gap}

    return run


def _prepare_lifelines(data, ties):
    import pandas as pd
    from lifelines import CoxPHFitter

    frame = pd.DataFrame(data["X"], columns=[f"x{j}" for j in range(data["X"].shape[1])])
    frame["time"] = data["time"]
    frame["event"] = data["event"]

    def run():
        return CoxPHFitter().fit(frame, "time", "event").params_.to_numpy(), {}

    return run


def _prepare_statsmodels(data, ties):
    from statsmodels.duration.hazard_regression import PHReg

    def run():
        model = PHReg(data["time"], data["X"], status=data["event"], ties=ties)
        return np.asarray(model.fit().params), {}

    return run


def _gram_seconds(X: np.ndarray, repeats: int = 7) -> float:
    """Best time of one weighted cross-product X^T diag(w) X with plain numpy.

    The best of several runs, because a shared machine's load inflates single timings.
    """
    w = np.random.default_rng(SEED).random(X.shape[0])
    best = np.inf
    for _ in range(repeats):
        start = time.perf_counter()
        (X * w[:, None]).T @ X
        best = min(best, time.perf_counter() - start)
    return best


PREPARE = {
    "casemix": _prepare_casemix,
    "lifelines": _prepare_lifelines,
    "statsmodels": _prepare_statsmodels,
}


def worker(library: str, ties: str, path: str, repeats: int) -> None:
    """Run one fit on the saved data and print one JSON line (seconds, memory, coef).

    Imports and input preparation (lifelines' data frame) happen before the memory baseline
    is read; the time is the best of ``repeats`` runs, the memory that of the first.
    """
    # one .npy per array: np.load reads each straight into its array (an .npz would pass
    # through a second buffer and inflate the peak memory measured below)
    data = {key: np.load(Path(path) / f"{key}.npy") for key in ("time", "event", "X")}
    run = PREPARE[library](data, ties)
    before = _peak_mib()
    seconds = np.inf
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the libraries' convergence chatter is not measured
        for _ in range(repeats):
            start = time.perf_counter()
            coef, extra = run()
            seconds = min(seconds, time.perf_counter() - start)
    result = {
        "seconds": seconds,
        "peak_mib": _peak_mib(),
        "fit_mib": _peak_mib() - before,
        "coef": np.asarray(coef, dtype=float).tolist(),
        **extra,
    }
    if library == "casemix" and ties == "efron":
        result["gram_seconds"] = _gram_seconds(data["X"])
    print(json.dumps(result))


# ------------------------------------------------------------------------------------------
# Driver
# ------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Run:
    """One timed fit."""

    n: int
    library: str
    ties: str
    seconds: float
    peak_mib: float
    fit_mib: float
    coef: np.ndarray
    extra: dict


def run_one(n: int, library: str, ties: str, path: Path, repeats: int) -> Run:
    """Run one fit in a fresh interpreter and collect its JSON line."""
    done = subprocess.run(
        [sys.executable, __file__, "--worker", library, ties, str(path), str(repeats)],
        capture_output=True,
        text=True,
        check=False,
    )
    if done.returncode != 0:
        raise SystemExit(f"{library} ({ties}) failed at n = {n}:\n{done.stderr}")
    out = json.loads(done.stdout.strip().splitlines()[-1])
    coef = np.asarray(out.pop("coef"))
    return Run(n, library, ties, out.pop("seconds"), out.pop("peak_mib"), out.pop("fit_mib"),
               coef, out)


def run_size(n: int, skip_slow: bool, repeats: int, folder: Path) -> list[Run]:
    """Simulate the data for size ``n`` once, then run every method on it."""
    path = folder / f"data_{n}"
    path.mkdir()
    for key, values in simulate(n).items():
        np.save(path / f"{key}.npy", values)
    runs = []
    for library, ties in METHODS:
        if skip_slow and library != "casemix" and n > SLOW_LIMIT:
            continue
        runs.append(run_one(n, library, ties, path, repeats))
        print(f"  n={n:>9,} {library:<11} {ties:<7} {runs[-1].seconds:8.2f} s", file=sys.stderr)
    return runs


def _fmt_ratio(value: float | None) -> str:
    return "" if value is None else f"{value:.1f}x"


def results_table(runs: list[Run]) -> str:
    """Markdown table: one row per (n, method)."""
    lines = [
        "| n | method | ties | seconds | peak RSS MiB | fit MiB | casemix speed-up "
        "| max abs coef diff (efron: vs lifelines; breslow: vs statsmodels) |",
        "| ---: | --- | --- | ---: | ---: | ---: | ---: | ---: |",
    ]
    for n in sorted({r.n for r in runs}):
        group = [r for r in runs if r.n == n]
        ours = {r.ties: r for r in group if r.library == "casemix"}
        reference = {
            "efron": next((r for r in group if r.library == "lifelines"), None),
            "breslow": next((r for r in group if r.library == "statsmodels"
                             and r.ties == "breslow"), None),
        }
        for r in group:
            speedup = None if r.library == "casemix" else r.seconds / ours[r.ties].seconds
            ref = reference[r.ties]
            diff = "" if ref is None or ref is r else f"{np.abs(r.coef - ref.coef).max():.1e}"
            lines.append(
                f"| {n:,} | {r.library} | {r.ties} | {r.seconds:.3f} | {r.peak_mib:.0f} "
                f"| {r.fit_mib:.0f} | {_fmt_ratio(speedup)} | {diff} |"
            )
    return "\n".join(lines)


def floor_table(runs: list[Run]) -> str:
    """Markdown table: the fit against one weighted cross-product per Newton iteration."""
    lines = [
        "| n | X^T diag(w) X seconds | Newton iterations | floor seconds "
        "| casemix efron seconds | ratio to floor | sum E - sum O |",
        "| ---: | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for r in runs:
        if r.library == "casemix" and r.ties == "efron":
            floor = r.extra["gram_seconds"] * r.extra["n_iter"]
            lines.append(
                f"| {r.n:,} | {r.extra['gram_seconds']:.4f} | {r.extra['n_iter']} "
                f"| {floor:.4f} | {r.seconds:.3f} | {r.seconds / floor:.1f}x "
                f"| {r.extra['sum_e_minus_o']:.1e} |"
            )
    return "\n".join(lines)


def _sizes(text: str) -> list[int]:
    return [int(float(part)) for part in text.split(",") if part.strip()]


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=_sizes, default=[10_000, 100_000, 1_000_000],
                        help="comma-separated sample sizes (default 1e4,1e5,1e6)")
    parser.add_argument("--skip-slow", action="store_true",
                        help=f"run lifelines and statsmodels only for n <= {SLOW_LIMIT:,}")
    parser.add_argument("--repeats", type=int, default=1,
                        help="time each fit this many times and keep the best (default 1)")
    parser.add_argument("--worker", nargs=4, metavar=("LIBRARY", "TIES", "DATA", "REPEATS"),
                        help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.worker:
        library, ties, path, repeats = args.worker
        worker(library, ties, path, int(repeats))
        return
    runs = []
    with tempfile.TemporaryDirectory(prefix="casemix-bench-") as folder:
        for n in args.sizes:
            runs.extend(run_size(n, args.skip_slow, args.repeats, Path(folder)))
    import lifelines
    import statsmodels

    print(
        f"p = {N_CONTINUOUS + N_BINARY} ({N_CONTINUOUS} continuous, {N_BINARY} binary), "
        f"integer days up to {MAX_DAYS}, seed {SEED}; {os.cpu_count()} CPUs, "
        f"Python {platform.python_version()}, numpy {np.__version__}, "
        f"lifelines {lifelines.__version__}, statsmodels {statsmodels.__version__}. "
        f"Best of {args.repeats} run(s). Each fit in a fresh process; peak RSS = VmHWM "
        "of that process (interpreter, "
        "libraries, data and fit), fit MiB = its growth during the fit (imports and input "
        "preparation excluded). casemix seconds include "
        "expected_events; library seconds are their fit only.\n"
    )
    print(results_table(runs))
    print()
    print(floor_table(runs))


if __name__ == "__main__":
    main()
