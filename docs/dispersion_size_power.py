"""Size and power of the overdispersion test (the numbers in docs/dispersion.md).

Run: PYTHONPATH=src python docs/dispersion_size_power.py  (seeded; about a minute)

Invented settings: the expected counts of 16 programs like the demo network's, and of 30
programs with E drawn uniformly from 3 to 60. Under "no spread" every O ~ Poisson(E); under
spread the programs' true hazard ratios are Gamma(k, k) with standard deviation sd = 1/sqrt(k)
and O ~ Poisson(HR E). Each cell is the share of data sets with p < 0.05.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from casemix.stats.dispersion import overdispersion

DEMO_E = [52.4, 32.2, 59.4, 48.4, 22.8, 25.1, 17.6, 33.6, 4.3, 26.9, 15.1, 19.5, 11.9, 6.8,
          7.3, 8.2]  # fmt: skip
DATASETS, SIMULATIONS, ALPHA = 1000, 500, 0.05


def rejection_rates(e: np.ndarray, sd: float, rng: np.random.Generator) -> tuple[float, float]:
    """Share of data sets rejected by the simulated test and by the chi-squared(n - 1) one."""
    simulated = chi2 = 0
    for i in range(DATASETS):
        hr = np.ones(e.size) if sd == 0 else rng.gamma(1 / sd**2, sd**2, e.size)
        result = overdispersion(rng.poisson(hr * e), e, simulations=SIMULATIONS, seed=i)
        simulated += result.p_value < ALPHA
        chi2 += stats.chi2.sf(result.statistic, e.size - 1) < ALPHA
    return simulated / DATASETS, chi2 / DATASETS


def main() -> None:
    rng = np.random.default_rng(20261203)
    settings = {"16 programs (demo-like E)": np.array(DEMO_E),
                "30 programs (E from 3 to 60)": rng.uniform(3, 60, 30)}  # fmt: skip
    print("| programs | true sd of HR | simulated test | chi-squared(n - 1) |")
    print("| --- | --- | --- | --- |")
    for label, e in settings.items():
        for sd in (0.0, 0.1, 0.25, 0.4):
            sim, chi = rejection_rates(e, sd, rng)
            print(f"| {label} | {sd:g} | {sim:.3f} | {chi:.3f} |")
    print(f"{DATASETS} data sets per row; Monte Carlo SE of a rate r is sqrt(r(1-r)/{DATASETS})")


if __name__ == "__main__":
    main()
