"""The report's figures (matplotlib), one function per figure.

Figures are made with :class:`matplotlib.figure.Figure` directly, not through pyplot, so no
global figure state is kept and no interactive backend is touched; they render with the Agg
and SVG canvases. Every verdict colour appears with its word in a legend.
"""

from __future__ import annotations

import functools
import itertools
from collections.abc import Sequence

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.ticker import FixedLocator, MaxNLocator, NullLocator

from casemix.stats.poisson import funnel_limits
from casemix.stats.verdict import verdict_colours

__all__ = [
    "EXPECTED_INK",
    "FUNNEL_LEVELS",
    "INK",
    "LIMIT_INK",
    "VERDICT_WORDS",
    "at_risk_times",
    "casemix_figure",
    "caterpillar_figure",
    "funnel_figure",
    "new_figure",
    "numbers_at_risk",
    "styled",
    "survival_figure",
]

VERDICT_WORDS = {
    "favorable": "favorable",
    "consistent": "consistent",
    "excess": "excess",
    "too_little_data": "too little data",
}
"""The verdict words as shown to readers."""

FUNNEL_LEVELS = (0.95, 0.998)
"""Coverage of the funnel-plot limits drawn (two and three standard errors, roughly)."""

INK = "#1d2125"
"""Colour of text, points and axes in the report's figures."""
LIMIT_INK = "#4d555c"
"""Colour of limit lines (funnel limits, control limits)."""
EXPECTED_INK = "#009E73"
"""Colour of the expected curve (Okabe-Ito bluish green: not one of the verdict colours)."""
_BAR = "#5b6770"
_STYLE = {
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.labelsize": 8.5,
    "axes.edgecolor": "#8a9299",
    "axes.labelcolor": INK,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "xtick.color": "#4d555c",
    "ytick.color": "#4d555c",
    "legend.frameon": False,
    "legend.fontsize": 8,
    "grid.color": "#e3e6e8",
    "grid.linewidth": 0.6,
}


def new_figure(width: float, height: float) -> Figure:
    """A new figure of the report's size (inches), laid out to fit its labels."""
    return Figure(figsize=(width, height), layout="constrained")


def styled(function):
    """Run a figure-drawing function under the report's rc style (fonts, colours, spines)."""

    @functools.wraps(function)
    def wrapper(*args, **kwargs):
        with matplotlib.rc_context(_STYLE):
            return function(*args, **kwargs)

    return wrapper


def _verdict_handles(verdicts: Sequence[str], palette: dict[str, str]) -> tuple[list, list]:
    present = [v for v in VERDICT_WORDS if v in set(verdicts)]
    handles = [
        matplotlib.lines.Line2D([], [], ls="", marker="o", ms=6, color=palette[v],
                                markeredgecolor=INK, markeredgewidth=0.5)
        for v in present
    ]
    return handles, [VERDICT_WORDS[v] for v in present]


def _funnel_grid(expected: np.ndarray, log_expected: bool) -> np.ndarray:
    low = max(expected.min() * 0.8, 0.5)
    high = expected.max() * 1.15
    grid = np.geomspace(low, high, 1200) if log_expected else np.linspace(low, high, 1200)
    # The programs' own E are on the grid, so the drawn limit at a program is exact.
    return np.unique(np.concatenate([grid, expected]))


@styled
def funnel_figure(
    programs: pd.DataFrame,
    *,
    levels: Sequence[float] = FUNNEL_LEVELS,
    log_expected: bool = False,
    max_labels: int = 40,
) -> Figure:
    """Funnel plot of O/E against E with exact (stepped) Poisson limits.

    Parameters
    ----------
    programs : pandas.DataFrame
        Columns ``program``, ``expected``, ``oe_ratio``, ``verdict``; rows with E = 0 are
        not drawn (the caller says so).
    levels : sequence of float, default (0.95, 0.998)
        Coverage of the limits (:func:`casemix.stats.poisson.funnel_limits`); the lines have
        ``gid`` ``"limit-<level>-lower"`` and ``"limit-<level>-upper"``.
    log_expected : bool, default False
        Logarithmic E axis (useful when program sizes span orders of magnitude).
    max_labels : int, default 40
        Label every point with its program code when there are at most this many programs;
        otherwise label only the points outside the widest limits.

    Returns
    -------
    matplotlib.figure.Figure
    """
    data = programs[programs["expected"] > 0]
    expected = data["expected"].to_numpy(float)
    ratio = data["oe_ratio"].to_numpy(float)
    palette = verdict_colours()
    fig = new_figure(6.4, 4.1)
    ax = fig.add_subplot()
    grid = _funnel_grid(expected, log_expected)
    for level, style in zip(levels, itertools.cycle(("--", "-", ":", "-."))):
        lower, upper = funnel_limits(grid, level)
        name = f"{level * 100:g}% limits"
        ax.plot(grid, upper, style, color=LIMIT_INK, lw=0.9, label=name, gid=f"limit-{level}-upper")
        ax.plot(grid, lower, style, color=LIMIT_INK, lw=0.9, gid=f"limit-{level}-lower")
    ax.axhline(1.0, color=INK, lw=0.8, label="O/E = 1 (as expected)")
    colours = [palette[v] for v in data["verdict"]]
    ax.scatter(expected, ratio, s=30, c=colours, edgecolors=INK, linewidths=0.5, zorder=3)
    widest_lower, widest_upper = funnel_limits(expected, max(levels))
    outside = (ratio < widest_lower) | (ratio > widest_upper)
    label_all = len(data) <= max_labels
    for code, x, y, out in zip(data["program"], expected, ratio, outside, strict=True):
        if label_all or out:
            ax.annotate(code, (x, y), xytext=(4, 3), textcoords="offset points", fontsize=7,
                        color=INK)
    if log_expected:
        ax.set_xscale("log")
        ax.set_xlim(grid[0], grid[-1])
    else:
        ax.set_xlim(0, grid[-1])
    top = max(1.6, 1.15 * float(np.nanmax(ratio, initial=1.0)))
    ax.set_ylim(0, top)
    ax.set_xlabel("Expected events (E)")
    ax.set_ylabel("Observed / expected (O/E)")
    ax.grid(True, axis="y")
    lines, names = ax.get_legend_handles_labels()
    markers, words = _verdict_handles(list(data["verdict"]), palette)
    fig.legend(lines + markers, names + words, loc="outside right upper")
    return fig


def _interval_panel(ax, y, centre, lower, upper, colours, right_edge: float, name: str) -> None:
    clipped = np.asarray(upper, float) > right_edge
    ax.hlines(y, lower, np.minimum(upper, right_edge), color=LIMIT_INK, lw=1.2)
    ax.plot(np.full(clipped.sum(), right_edge), y[clipped], ls="", marker=">", ms=4,
            color=LIMIT_INK, gid=f"clipped-{name}")
    ax.scatter(centre, y, s=26, c=colours, edgecolors=INK, linewidths=0.5, zorder=3)
    ax.axvline(1.0, color=INK, lw=0.8)
    ax.grid(True, axis="x")


@styled
def caterpillar_figure(
    programs: pd.DataFrame, *, credible_level: float = 0.95, max_ratio: float = 3.0
) -> Figure:
    """Posterior hazard ratios with credible intervals next to raw O/E with exact intervals.

    Parameters
    ----------
    programs : pandas.DataFrame
        Columns ``program``, ``verdict``, ``hr_mean``, ``hr_lower``, ``hr_upper``,
        ``oe_ratio``, ``oe_lower``, ``oe_upper``. Programs are sorted by posterior mean
        (ties by code), smallest at the top.
    credible_level : float, default 0.95
        Only for the panel title.
    max_ratio : float, default 3.0
        The shared ratio axis ends at the largest upper limit or at this value, whichever
        is smaller; intervals running past the edge end in an arrow head.

    Returns
    -------
    matplotlib.figure.Figure
        Two panels with a shared axis of program codes and a shared ratio scale.
    """
    data = programs.sort_values(["hr_mean", "program"], kind="stable")
    palette = verdict_colours()
    colours = [palette[v] for v in data["verdict"]]
    y = np.arange(len(data))[::-1]
    edge = min(float(np.nanmax(np.r_[data["hr_upper"], data["oe_upper"], 1.5])), max_ratio)
    fig = new_figure(6.4, 1.5 + 0.2 * len(data))
    left, right = fig.subplots(1, 2, sharey=True, sharex=True)
    _interval_panel(left, y, data["hr_mean"], data["hr_lower"], data["hr_upper"], colours, edge,
                    "hr")
    _interval_panel(right, y, data["oe_ratio"], data["oe_lower"], data["oe_upper"], colours,
                    edge, "oe")
    left.set_yticks(y, labels=list(data["program"]))
    left.set_title(f"After shrinkage\n(hazard ratio, {credible_level:.0%} credible)", loc="left")
    right.set_title("Raw\n(O/E, exact 95%)", loc="left")
    left.set_xlabel("Hazard ratio")
    right.set_xlabel("O/E")
    left.set_xlim(0, edge * 1.04)
    left.set_ylim(-0.7, len(data) - 0.3)
    markers, words = _verdict_handles(list(data["verdict"]), palette)
    fig.legend(markers, words, loc="outside lower center", ncols=4)
    return fig


def numbers_at_risk(time: np.ndarray, at: Sequence[float]) -> np.ndarray:
    """Number of recipients still followed (time >= t) at each time ``t`` of ``at``.

    Parameters
    ----------
    time : ndarray of float, shape (n,)
        Follow-up time of each recipient (event or censoring).
    at : sequence of float, shape (k,)
        Times to count at.

    Returns
    -------
    ndarray of int, shape (k,)
        A recipient whose follow-up ends at t (event or censored) is still at risk at t.
    """
    ordered = np.sort(np.asarray(time, dtype=float))
    return (ordered.size - np.searchsorted(ordered, np.asarray(at, float), side="left")).astype(
        int
    )


def at_risk_times(horizon_days: float, steps: int = 4) -> np.ndarray:
    """Times for the numbers-at-risk row: ``steps + 1`` whole days from 0 to the horizon."""
    return np.round(np.linspace(0.0, float(horizon_days), steps + 1))


def _with_origin(curve: pd.DataFrame) -> pd.DataFrame:
    curve = curve.sort_values("time", kind="stable")
    if len(curve) and curve["time"].iloc[0] <= 0:
        return curve
    origin = pd.DataFrame({"time": [0.0], "observed": [1.0], "observed_lower": [1.0],
                           "observed_upper": [1.0], "expected": [1.0]})
    return pd.concat([origin, curve[list(origin.columns)]], ignore_index=True)


@styled
def survival_figure(
    curve: pd.DataFrame,
    *,
    horizon_days: float,
    at_risk: Sequence[str],
    title: str = "",
) -> Figure:
    """Observed Kaplan-Meier curve against expected survival, with numbers at risk below.

    Parameters
    ----------
    curve : pandas.DataFrame
        One program's rows of curves.csv: ``time``, ``observed``, ``observed_lower``,
        ``observed_upper``, ``expected``; a start at time 0 with survival 1 is added when
        missing. Both curves are drawn as right-continuous steps.
    horizon_days : float
        End of the time axis.
    at_risk : sequence of str, length 5
        Numbers at risk (as text, so suppressed counts can show as ``"<11"``) at
        :func:`at_risk_times` of the horizon.
    title : str, default ""
        Panel title.

    Returns
    -------
    matplotlib.figure.Figure
    """
    data = _with_origin(curve)
    fig = new_figure(4.6, 3.7)
    ax, row = fig.subplots(2, 1, sharex=True, height_ratios=[6, 1])
    ax.fill_between(data["time"], data["observed_lower"], data["observed_upper"], step="post",
                    color="#c9ced3", alpha=0.6, lw=0, label="95% interval (observed)")
    ax.step(data["time"], data["observed"], where="post", color=INK, lw=1.4,
            label="observed (Kaplan-Meier)", gid="observed")
    ax.step(data["time"], data["expected"], where="post", color=EXPECTED_INK, lw=1.4, ls="--",
            label="expected for these recipients", gid="expected")
    lowest = np.nanmin(np.r_[data["observed_lower"], data["expected"], 1.0])
    ax.set_ylim(max(0.0, np.floor((lowest - 0.02) * 20) / 20), 1.005)
    ax.set_xlim(0, horizon_days)
    ax.yaxis.set_major_locator(MaxNLocator(nbins=5, steps=[1, 2, 5, 10]))
    ax.set_ylabel("Surviving without the outcome")
    ax.grid(True, axis="y")
    ax.legend(loc="lower left")
    if title:
        ax.set_title(title, loc="left")
    times = at_risk_times(horizon_days)
    ax.xaxis.set_major_locator(FixedLocator(times))
    ax.tick_params(labelbottom=True)
    ax.set_xlabel("Days since transplant")
    row.axis("off")
    row.set_ylim(0, 1)
    row.text(0.0, 0.95, "Number at risk", transform=row.transAxes, fontsize=7.5, color=LIMIT_INK,
             va="top")
    for t, text in zip(times, at_risk, strict=True):
        row.text(t, 0.2, text, ha="center", va="center", fontsize=7.5, color=INK)
    return fig


_TICK_SETS = (
    (0.8, 0.9, 1.0, 1.1, 1.25),
    (0.5, 0.67, 0.8, 1.0, 1.25, 1.5, 2.0),
    (0.25, 0.5, 1.0, 2.0, 4.0),
    (0.1, 0.25, 0.5, 1.0, 2.0, 4.0, 10.0),
)


def _ratio_ticks(span: float) -> list[float]:
    # The finest set of round factors whose ticks are not crowded on an axis of +-span (log).
    for ticks in _TICK_SETS:
        spacing = np.diff(np.log(ticks)).min()
        inside = [t for t in ticks if abs(np.log(t)) <= span]
        if spacing >= span / 5 and len(inside) >= 3:
            return inside
    return [float(np.exp(-span)), 1.0, float(np.exp(span))]


@styled
def casemix_figure(groups: pd.DataFrame, *, title: str = "") -> Figure:
    """Horizontal bars of case-mix contributions on the log scale, one per covariate group.

    Parameters
    ----------
    groups : pandas.DataFrame
        One program's rows of casemix.csv: ``group``, ``contribution`` (log scale),
        ``factor``. The ``total`` row, when present, is drawn last in a darker shade; the
        others are sorted by the size of their contribution.
    title : str, default ""
        Panel title.

    Returns
    -------
    matplotlib.figure.Figure
        Bars start at 1 (no effect) and end at the group's factor.
    """
    total = groups[groups["group"] == "total"]
    parts = groups[groups["group"] != "total"]
    order = np.lexsort((parts["group"].to_numpy(), -parts["contribution"].abs().to_numpy()))
    rows = pd.concat([parts.iloc[order], total], ignore_index=True)
    labels = [("all groups together" if g == "total" else g.replace("_", " "))
              for g in rows["group"]]
    colours = ["#2a3238" if g == "total" else _BAR for g in rows["group"]]
    fig = new_figure(4.6, 0.9 + 0.24 * len(rows))
    ax = fig.add_subplot()
    y = np.arange(len(rows))[::-1]
    factor = np.exp(rows["contribution"].to_numpy(float))
    ax.barh(y, factor - 1.0, left=1.0, height=0.62, color=colours)
    for yy, f in zip(y, factor, strict=True):
        ax.annotate(f"×{f:.2f}", (f, yy), xytext=(3 if f >= 1 else -3, 0),
                    textcoords="offset points", ha="left" if f >= 1 else "right",
                    va="center", fontsize=7, color=INK)
    ax.set_xscale("log")
    # Room on both sides for the factor labels at the bar ends.
    span = max(float(np.nanmax(np.abs(rows["contribution"]), initial=0.0)), np.log(1.1)) * 1.35
    ax.set_xlim(np.exp(-span), np.exp(span))
    ticks = _ratio_ticks(span)
    ax.xaxis.set_major_locator(FixedLocator(ticks))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.set_xticklabels([f"{t:g}" for t in ticks])
    ax.axvline(1.0, color=INK, lw=0.8)
    ax.set_yticks(y, labels=labels)
    ax.set_xlabel("Factor on expected events (log scale; 1 = no effect)")
    ax.grid(True, axis="x")
    if title:
        ax.set_title(title, loc="left")
    return fig
