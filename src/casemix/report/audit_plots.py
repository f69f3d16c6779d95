"""The audit page's figures (matplotlib ``Figure`` objects, no pyplot global state).

* beta(t) per design column: scaled Schoenfeld residuals plus the coefficient, a least-squares
  spline smooth with its pointwise 95% band (``casemix.audit.ph.beta_smooth``) and the
  constant coefficient the model assumes. A flat smooth whose band holds the line means
  proportional hazards.
* calibration: observed against expected events by risk group, with exact 95% intervals of
  O, on log axes, one colour per population.
* bootstrap: the distribution of each program's E over the bootstrap refits, relative to E.
* prior sensitivity: each program's credible interval of the hazard ratio under each prior.

Colours are the Okabe-Ito palette.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.ticker import NullFormatter

from casemix.audit.ph import beta_smooth

__all__ = [
    "PLOT_POINTS",
    "bootstrap_figure",
    "calibration_figure",
    "prior_figure",
    "schoenfeld_figure",
]

# residuals drawn per panel at most (a seeded subsample beyond that keeps the SVG small)
PLOT_POINTS = 2000
_COLUMNS = 4
_BLUE, _ORANGE, _GREEN, _GREY = "#0072B2", "#D55E00", "#009E73", "#999999"
_POPULATION_COLOURS = {"reference": _BLUE, "cohort": _ORANGE}
_PRIOR_COLOURS = ("#000000", "#E69F00", "#56B4E9", "#009E73", "#0072B2", "#D55E00", "#CC79A7")


def schoenfeld_figure(schoenfeld, coef, names, *, seed: int = 0) -> Figure:
    """beta(t) against time, one panel per design column.

    Parameters
    ----------
    schoenfeld : DataFrame
        From :func:`casemix.audit.schoenfeld_residuals` (scaled, coefficient not added).
    coef : ndarray, shape (p,)
    names : sequence of str, length p
    seed : int, default 0
        Seed of the subsample of points drawn when there are more than ``PLOT_POINTS`` events
        (the smooth uses every event).
    """
    rows = math.ceil(len(names) / _COLUMNS)
    # fixed margins: a constrained layout costs seconds per render with many panels
    fig = Figure(figsize=(3.0 * min(len(names), _COLUMNS), 2.4 * rows))
    fig.subplots_adjust(
        left=0.07, right=0.98, bottom=0.1 / rows, top=1 - 0.08 / rows, hspace=0.55, wspace=0.3
    )
    time = schoenfeld["time"].to_numpy()
    keep = np.arange(time.size)
    if time.size > PLOT_POINTS:
        keep = np.sort(np.random.default_rng(seed).choice(time.size, PLOT_POINTS, replace=False))
    for j, name in enumerate(names):
        ax = fig.add_subplot(rows, min(len(names), _COLUMNS), j + 1)
        beta_t = schoenfeld[name].to_numpy() + coef[j]
        # rasterised points keep the SVG small and quick to write
        ax.scatter(time[keep], beta_t[keep], s=3, alpha=0.25, color=_GREY, linewidths=0,
                   rasterized=True)  # fmt: skip
        smooth = beta_smooth(time, beta_t)
        ax.fill_between(smooth["time"], smooth["lower"], smooth["upper"], color=_BLUE,
                        alpha=0.2, linewidth=0)  # fmt: skip
        ax.plot(smooth["time"], smooth["fit"], color=_BLUE, linewidth=1.5)
        ax.axhline(coef[j], color=_ORANGE, linewidth=1, linestyle="--")
        low, high = np.quantile(beta_t, [0.02, 0.98])
        low = min(low, smooth["lower"].min(), coef[j])
        high = max(high, smooth["upper"].max(), coef[j])
        ax.set_ylim(low, high)
        ax.set_title(name, fontsize=8)
        ax.tick_params(labelsize=7)
    fig.supxlabel("days since transplant", fontsize=8)
    fig.supylabel("beta(t)", fontsize=8)
    return fig


def calibration_figure(calibration: pd.DataFrame) -> Figure:
    """Observed against expected events by risk group, with exact 95% intervals of O.

    Parameters
    ----------
    calibration : DataFrame
        The audit's ``calibration_risk`` table (``population``, ``observed``, ``expected``,
        ``oe_lower``, ``oe_upper``).
    """
    fig = Figure(figsize=(4.8, 4.2))
    ax = fig.add_subplot()
    used = calibration[calibration["expected"] > 0]
    for population, part in used.groupby("population", sort=False):
        e = part["expected"].to_numpy()
        o = part["observed"].to_numpy(dtype=float)
        low, high = part["oe_lower"].to_numpy() * e, part["oe_upper"].to_numpy() * e
        ax.errorbar(e, np.maximum(o, 0.5), yerr=[np.maximum(o, 0.5) - np.maximum(low, 0.5),
                                                 np.maximum(high - np.maximum(o, 0.5), 0)],
                    fmt="o", ms=4, capsize=2, color=_POPULATION_COLOURS.get(population, _GREEN),
                    label=f"{population} (risk groups)")  # fmt: skip
    lo = max(0.5, float(used["expected"].min()) * 0.7)
    hi = float(max(used["expected"].max(), (used["oe_upper"] * used["expected"]).max())) * 1.3
    ax.plot([lo, hi], [lo, hi], color=_GREY, linewidth=1, linestyle="--", label="O = E")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("expected events E", fontsize=8)
    ax.set_ylabel("observed events O (95% exact interval)", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, frameon=False)
    fig.subplots_adjust(left=0.15, right=0.97, bottom=0.12, top=0.97)
    return fig


def bootstrap_figure(draws: pd.DataFrame, expected: pd.Series) -> Figure:
    """Each program's bootstrap E relative to its E, as a box per program.

    Parameters
    ----------
    draws : DataFrame
        The audit's ``bootstrap_draws`` table (``replicate``, ``program``, ``expected``).
    expected : Series
        E of each program (index: program).
    """
    programs = sorted(draws["program"].unique())
    values = [draws.loc[draws["program"] == p, "expected"].to_numpy() / expected[p]
              for p in programs]  # fmt: skip
    fig = Figure(figsize=(6.4, 0.28 * len(programs) + 1.0))
    ax = fig.add_subplot()
    ax.boxplot(values, orientation="horizontal", widths=0.6, flierprops={"markersize": 2},
               medianprops={"color": _ORANGE})  # fmt: skip
    ax.set_yticks(range(1, len(programs) + 1), programs)
    ax.invert_yaxis()
    ax.axvline(1.0, color=_GREY, linewidth=1, linestyle="--")
    ax.set_xlabel("bootstrap E / E (reference model refitted on resampled recipients)",
                  fontsize=8)  # fmt: skip
    ax.tick_params(labelsize=7)
    fig.subplots_adjust(left=0.12, right=0.97, bottom=0.8 / (0.28 * len(programs) + 1.0),
                        top=0.97)  # fmt: skip
    return fig


def prior_figure(sensitivity: pd.DataFrame) -> Figure:
    """Each program's credible interval of the hazard ratio under each prior compared.

    Parameters
    ----------
    sensitivity : DataFrame
        The audit's ``prior_sensitivity`` table (``program``, ``prior``, ``hr_mean``,
        ``hr_lower``, ``hr_upper``).
    """
    programs = list(dict.fromkeys(sensitivity["program"]))
    priors = list(dict.fromkeys(sensitivity["prior"]))
    fig = Figure(figsize=(6.4, 0.42 * len(programs) + 1.2))
    ax = fig.add_subplot()
    step = 0.7 / max(len(priors), 1)
    for k, prior in enumerate(priors):
        part = sensitivity[sensitivity["prior"] == prior].set_index("program").loc[programs]
        y = np.arange(len(programs)) + (k - (len(priors) - 1) / 2) * step
        mean = part["hr_mean"].to_numpy()
        ax.errorbar(mean, y, xerr=[mean - part["hr_lower"], part["hr_upper"] - mean], fmt="o",
                    ms=2.5, capsize=0, linewidth=1, color=_PRIOR_COLOURS[k % 7],
                    label=prior.replace("_", " "))  # fmt: skip
    ax.axvline(1.0, color=_GREY, linewidth=1, linestyle="--")
    ax.set_yticks(range(len(programs)), programs)
    ax.invert_yaxis()
    ax.set_xscale("log")
    low = float(sensitivity["hr_lower"].min())
    high = float(sensitivity["hr_upper"].max())
    ticks = [v for v in (0.1, 0.25, 0.5, 1.0, 2.0, 4.0, 8.0) if low / 1.5 <= v <= high * 1.5]
    ax.set_xticks(ticks, [f"{v:g}" for v in ticks])
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xlabel("hazard ratio, posterior mean and credible interval", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, frameon=False, ncol=min(len(priors), 4), loc="upper center",
              bbox_to_anchor=(0.5, -0.6 / (0.42 * len(programs) + 1.2)))  # fmt: skip
    fig.subplots_adjust(left=0.12, right=0.97, bottom=1.1 / (0.42 * len(programs) + 1.2),
                        top=0.98)  # fmt: skip
    return fig
