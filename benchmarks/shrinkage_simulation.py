"""Seeded simulation of the shrinkage step: plug-in empirical Bayes against the hierarchical prior.

Run from the repository root: ``python benchmarks/shrinkage_simulation.py [--networks N]``.
Invented networks of 30 programs with expected events E log-normal (median 12, log-scale sd
0.8, so most programs have 3 to 45 expected events) and O ~ Poisson(HR E); default rules
(P(HR > 1) or P(HR < 1) >= 0.975, E >= 1). Three scenarios, each with its own seed:

- null: every true HR = 1. False flags per network, share of networks with at least one,
  networks where plug-in EB hits its fallback, the expected false flags the rules predict
  (sum of each program's chance of a flag at HR = 1) and Benjamini-Hochberg at 5% on the exact
  one-sided p-values, for comparison.
- spread: true HR ~ Gamma(23.5, 23.5) (spread 0.21): coverage of the 95% credible interval,
  overall and by |log true HR| band.
- drift: every true HR = 0.8 (era drift): programs called favorable per network with the mean
  fixed at 1 and with a free mean, and how often the network's O/E test rejects 1.

"Before" is plug-in empirical Bayes with the mean fixed at 1 and its Gamma(2, 2) fallback (the
previous default); "after" is the hierarchical default. Each figure is printed with its Monte
Carlo standard error. About 3-5 minutes on one core (100 networks in the first two scenarios,
40 in the drift one).
"""

from __future__ import annotations

import argparse
import sys
import warnings

import numpy as np

from casemix.errors import PriorWarning
from casemix.stats.hierarchy import PriorSettings
from casemix.stats.multiplicity import fdr_table
from casemix.stats.poisson import network_oe
from casemix.stats.shrinkage import posterior
from casemix.stats.verdict import Rules, assign_verdicts

PROGRAMS = 30
BANDS = (0.0, 0.1, 0.2, 0.3, 0.4, np.inf)
BEFORE = PriorSettings(method="empirical_bayes")
AFTER = PriorSettings()


def _network(rng: np.random.Generator, truth) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    expected = rng.lognormal(np.log(12.0), 0.8, PROGRAMS)
    hr = truth(rng) if callable(truth) else np.full(PROGRAMS, float(truth))
    return rng.poisson(hr * expected), expected, hr


def _run(settings: PriorSettings, observed, expected):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PriorWarning)
        prior = settings.choose(observed, expected)
    rules = Rules(prior=settings)
    table = assign_verdicts(observed, expected, prior, rules)
    post = posterior(observed, expected, prior)
    return prior, table, post


def _mean_se(values) -> str:
    values = np.asarray(values, dtype=float)
    return f"{values.mean():.3f} (MC se {values.std(ddof=1) / np.sqrt(values.size):.3f})"


def _share_se(hits: int, n: int) -> str:
    p = hits / n
    return f"{p:.1%} (MC se {np.sqrt(p * (1 - p) / n):.1%})"


def null_scenario(networks: int) -> None:
    rng = np.random.default_rng(20261203)
    flags = {"before": [], "after": []}
    predicted = {"before": [], "after": []}
    fallback, bh = [], []
    for _ in range(networks):
        o, e, _ = _network(rng, 1.0)
        for label, settings in (("before", BEFORE), ("after", AFTER)):
            prior, table, _ = _run(settings, o, e)
            flags[label].append(int(table["verdict"].isin(["excess", "favorable"]).sum()))
            predicted[label].append(float(np.nansum(table["null_flag_probability"])))
            if label == "before":
                fallback.append(prior.method == "empirical_bayes_fallback")
        bh.append(int((fdr_table(np.arange(PROGRAMS), o, e)["fdr_flag"] != "none").sum()))
    fallback = np.array(fallback)
    print(f"\n## Null networks ({networks} x {PROGRAMS} programs, every true HR = 1)\n")
    print(f"plug-in EB fell back to Gamma(2, 2) in {fallback.sum()} of {networks} networks")
    print("\n| prior | false flags per network | networks with >= 1 flag | predicted (sum of "
          "P(flag at HR = 1)) |")
    print("| --- | --- | --- | --- |")
    for label in ("before", "after"):
        f = np.array(flags[label])
        print(f"| {label} | {_mean_se(f)} | {_share_se(int((f > 0).sum()), networks)} | "
              f"{_mean_se(predicted[label])} |")
    b = np.array(bh)
    print(f"| BH 5% (exact p) | {_mean_se(b)} | {_share_se(int((b > 0).sum()), networks)} | - |")
    f = np.array(flags["before"])
    if fallback.any():
        print(f"\nbefore, fallback networks: {f[fallback].sum()} of {f.sum()} false flags; "
              f"{_share_se(int((f[fallback] > 0).sum()), int(fallback.sum()))} of them with "
              "a flag")


def spread_scenario(networks: int) -> None:
    rng = np.random.default_rng(20261204)
    covered = {"before": [], "after": []}
    log_hr = []

    def truth(r):
        return r.gamma(23.5, 1 / 23.5, PROGRAMS)

    for _ in range(networks):
        o, e, hr = _network(rng, truth)
        log_hr.append(np.abs(np.log(hr)))
        for label, settings in (("before", BEFORE), ("after", AFTER)):
            _, _, post = _run(settings, o, e)
            covered[label].append((post["hr_lower"] <= hr) & (hr <= post["hr_upper"]))
    band_of = np.digitize(np.concatenate(log_hr), BANDS) - 1
    print(f"\n## Coverage of 95% intervals ({networks} x {PROGRAMS} programs, true HR ~ "
          "Gamma(23.5, 23.5))\n")
    print("| abs(log HR) band | programs | before | after |")
    print("| --- | --- | --- | --- |")
    for k in range(len(BANDS) - 1):
        rows = band_of == k
        cells = [_share_se(int(np.concatenate(covered[lab])[rows].sum()), int(rows.sum()))
                 for lab in ("before", "after")]
        hi = "+" if np.isinf(BANDS[k + 1]) else f"-{BANDS[k + 1]:g}"
        print(f"| {BANDS[k]:g}{hi} | {rows.sum()} | {cells[0]} | {cells[1]} |")
    n = band_of.size
    cells = [_share_se(int(np.concatenate(covered[lab]).sum()), n) for lab in ("before", "after")]
    print(f"| all | {n} | {cells[0]} | {cells[1]} |")


def drift_scenario(networks: int) -> None:
    rng = np.random.default_rng(20261205)
    favorable = {"fixed mean (after)": [], "free mean (after)": [], "fixed mean (before)": []}
    settings = {"fixed mean (after)": AFTER,
                "free mean (after)": PriorSettings(free_mean=True),
                "fixed mean (before)": BEFORE}
    rejects = 0
    for _ in range(networks):
        o, e, _ = _network(rng, 0.8)
        rejects += network_oe(o, e)["p_value"] < 0.05
        for label, chosen in settings.items():
            _, table, _ = _run(chosen, o, e)
            favorable[label].append(int((table["verdict"] == "favorable").sum()))
    print(f"\n## Era drift ({networks} x {PROGRAMS} programs, every true HR = 0.8)\n")
    print(f"network O/E test rejects 1 (p < 0.05) in {_share_se(rejects, networks)}")
    print("\n| prior | programs called favorable per network |")
    print("| --- | --- |")
    for label, values in favorable.items():
        print(f"| {label} | {_mean_se(values)} |")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--networks", type=int, default=100)
    parser.add_argument("--drift-networks", type=int, default=40,
                        help="networks in the drift scenario (the free mean is the slow part)")
    args = parser.parse_args(argv)
    null_scenario(args.networks)
    spread_scenario(args.networks)
    drift_scenario(args.drift_networks)
    return 0


if __name__ == "__main__":
    sys.exit(main())
