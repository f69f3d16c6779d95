"""The monitoring page (``monitoring.html``) and its section: per program, the two CUSUM charts
with their limits and signals, and the cumulative observed minus expected with its band.

Rendered from a :class:`casemix.monitoring.Monitoring` object with the report's shared
blocks (:mod:`casemix.report.page`) and figure style (:mod:`casemix.report.plots`). The
upper chart is drawn above zero and the lower chart mirrored below it, so one panel shows
both; each signal is marked on the day it happened.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.dates import AutoDateLocator, ConciseDateFormatter
from matplotlib.figure import Figure

from casemix._io import atomic_write_text
from casemix.report.page import (
    Markup,
    Section,
    anchor_for,
    facts_html,
    figure_svg,
    render_page,
    table_html,
)
from casemix.report.plots import INK, LIMIT_INK, new_figure, styled
from casemix.stats.verdict import verdict_colours

__all__ = [
    "monitoring_figure",
    "monitoring_html",
    "monitoring_section",
    "write_monitoring_page",
]

_UP = verdict_colours()["excess"]  # the report's colour for more events than expected
_DOWN = verdict_colours()["favorable"]  # and for fewer
_BAND = "#c9ced3"

_CAPTION = (
    "Left: the chart for a raised hazard (above zero) and for a lowered hazard (mirrored "
    "below zero) with their limits; a marker on each signal. Right: cumulative observed minus "
    "expected events with the band a program with hazard ratio 1 stays inside on any one day "
    "with probability 95%."
)

REFERENCES = (
    "Biswas P, Kalbfleisch JD. A risk-adjusted CUSUM in continuous time based on the Cox "
    "model. Statistics in Medicine 2008;27:3382-3406.",
    "Steiner SH, Cook RJ, Farewell VT, Treasure T. Monitoring surgical performance using "
    "risk-adjusted cumulative sum charts. Biostatistics 2000;1:441-452.",
)


@styled
def monitoring_figure(series: pd.DataFrame, state: pd.DataFrame, signals: pd.DataFrame,
                      *, title: str = "") -> Figure:
    """One program's charts: CUSUM (upper above zero, lower mirrored below) and O - E.

    Parameters
    ----------
    series : DataFrame
        The program's rows of ``Monitoring.series``.
    state : DataFrame
        Its two rows of ``Monitoring.state`` (charts ``upper`` and ``lower``).
    signals : DataFrame
        Its rows of ``Monitoring.signals``.
    title : str, default ""

    Returns
    -------
    matplotlib.figure.Figure
        Lines have ``gid`` ``cusum-upper``, ``cusum-lower``, ``limit-upper``, ``limit-lower``
        and ``o-minus-e``; signal markers ``signals-upper`` and ``signals-lower``.
    """
    dates = pd.to_datetime(series["date"]).to_numpy()
    limits = state.set_index("chart")["h"]
    fig = new_figure(8.4, 3.0)
    cusum, excess = fig.subplots(1, 2)
    for chart, sign, colour, word in (("upper", 1.0, _UP, "raised hazard"),
                                      ("lower", -1.0, _DOWN, "lowered hazard")):
        cusum.step(dates, sign * series[f"g_{chart}"].to_numpy(), where="post", color=colour,
                   lw=1.2, label=f"chart for a {word}", gid=f"cusum-{chart}")
        h = float(limits[chart])
        if np.isfinite(h):
            cusum.axhline(sign * h, color=LIMIT_INK, lw=0.9, ls="--", gid=f"limit-{chart}")
        mine = signals[signals["chart"] == chart]
        cusum.plot(pd.to_datetime(mine["date"]).to_numpy(), sign * mine["g"].to_numpy(),
                   ls="", marker="^" if sign > 0 else "v", ms=6, color=colour,
                   markeredgecolor=INK, markeredgewidth=0.5, gid=f"signals-{chart}",
                   label=f"signal ({word})" if len(mine) else None)
    cusum.axhline(0.0, color="#8a9299", lw=0.6)
    cusum.set_ylabel("CUSUM (dashed: limits)")
    cusum.legend(loc="upper left", bbox_to_anchor=(0.0, -0.16), ncols=2, fontsize=7)
    excess.fill_between(dates, series["band_lower"], series["band_upper"], step="post",
                        color=_BAND, alpha=0.6, lw=0, label="95% band if HR = 1 (pointwise)")
    excess.step(dates, series["o_minus_e"], where="post", color=INK, lw=1.2,
                label="observed - expected", gid="o-minus-e")
    excess.axhline(0.0, color="#8a9299", lw=0.6)
    excess.set_ylabel("Events: observed - expected")
    excess.legend(loc="upper left", bbox_to_anchor=(0.0, -0.16), ncols=2, fontsize=7)
    for ax in (cusum, excess):
        locator = AutoDateLocator(minticks=3, maxticks=7)
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(ConciseDateFormatter(locator))
        ax.grid(True, axis="y")
    if title:
        cusum.set_title(title, loc="left")
    return fig


def _glance(monitoring) -> pd.DataFrame:
    state = monitoring.state
    wide = state.pivot(index="program", columns="chart")
    frame = pd.DataFrame({
        "program": wide.index,
        "recipients": wide[("recipients", "upper")].to_numpy(),
        "observed": wide[("observed", "upper")].to_numpy(),
        "expected": wide[("expected", "upper")].to_numpy(),
    })
    for chart in ("upper", "lower"):
        frame[f"{chart}_g"] = wide[("g_now", chart)].to_numpy()
        frame[f"{chart}_h"] = wide[("h", chart)].to_numpy()
        dates = wide[("signal_dates", chart)].fillna("").to_numpy()
        frame[f"{chart}_signals"] = [d.replace("; ", ", ") or "none" for d in dates]
    return frame


def monitoring_section(monitoring) -> Section:
    """The monitoring as one report section: a table of every program, then its charts."""
    glance = table_html(
        _glance(monitoring),
        headers={"upper_g": "raised: CUSUM now", "upper_h": "raised: limit",
                 "upper_signals": "raised: signals", "lower_g": "lowered: CUSUM now",
                 "lower_h": "lowered: limit", "lower_signals": "lowered: signals",
                 "expected": "expected", "observed": "observed"},
        formats={"expected": "{:.1f}", "upper_g": "{:.2f}", "upper_h": "{:.2f}",
                 "lower_g": "{:.2f}", "lower_h": "{:.2f}"},
        caption="Since the start of monitoring: events observed and expected, each chart's "
                "value on the last day, its limit and the dates it signalled.",
        wide=True,
    )
    blocks = [Markup(glance)]
    for code, series in monitoring.series.groupby("program", sort=True):
        state = monitoring.state[monitoring.state["program"] == code]
        signals = monitoring.signals[monitoring.signals["program"] == code]
        fig = monitoring_figure(series, state, signals)
        upper = state.set_index("chart")
        facts = Markup("<p>{} recipients · observed {} · expected {:.1f} · signals: {} "
                       "(raised), {} (lowered)</p>").format(
            int(upper.loc["upper", "recipients"]), int(upper.loc["upper", "observed"]),
            float(upper.loc["upper", "expected"]), int(upper.loc["upper", "signals"]),
            int(upper.loc["lower", "signals"]))
        svg = Markup(figure_svg(fig, alt=f"Monitoring charts of program {code}"))
        anchor = anchor_for(code, prefix=f"monitor-{len(blocks)}")
        blocks.append(Markup('<div class="program" id="{}"><h3>{}</h3>{}<figure>{}'
                             "<figcaption>{}</figcaption></figure></div>").format(
            anchor, code, facts, svg, _CAPTION))
    return Section("Monitoring between evaluations", Markup("").join(blocks),
                   anchor="monitoring")


def _method_section(monitoring) -> Section:
    rules, run = monitoring.rules, monitoring.run
    limit = (f"fixed at {rules.h:g} for every program and chart" if rules.h is not None else
             f"simulated per program: {rules.replicates:,} histories with hazard ratio 1 and "
             f"the program's own recipients and follow-up, so that each chart signals at "
             f"least once over the period in {100 * rules.level:g}% of them (seed "
             f"{rules.seed})")
    facts = facts_html([
        ("outcome", run["outcome"]),
        ("horizon", f"{run['horizon_days']:g} days after each transplant"),
        ("period", f"{run['start']} to {run['cutoff']} (recipients transplanted in it)"),
        ("charts", f"hazard ratio {rules.rho_up:g} (raised) and {rules.rho_down:g} (lowered)"),
        ("control limits", limit),
        ("after a signal", "the chart starts again from zero" if rules.restart
         else "the chart runs on; a new signal each time it climbs back to its limit"),
        ("band", f"{run['band']}: Poisson quantiles of the day's expected events"),
    ])
    text = Markup(
        "<p>Each recipient adds expected events from the reference model day by day while "
        "followed, within the horizon. The chart for a raised hazard accumulates the "
        "log-likelihood ratio of hazard ratio {} against 1 and falls back to zero when the "
        "evidence runs the other way; the chart for a lowered hazard does the same for {}. "
        "The Monte Carlo error of each simulated limit (a 95% interval from the order "
        "statistics, and the standard error of the simulated false-signal share) is in "
        "monitoring_state.csv.</p>").format(f"{rules.rho_up:g}", f"{rules.rho_down:g}")
    return Section("Method", Markup("").join([facts, text]), anchor="method")


def monitoring_html(monitoring) -> str:
    """Render a :class:`~casemix.monitoring.Monitoring` as one self-contained HTML page."""
    references = Markup("<ul>{}</ul>").format(
        Markup("").join(Markup("<li>{}</li>").format(r) for r in REFERENCES))
    run = monitoring.run
    sections = [monitoring_section(monitoring), _method_section(monitoring),
                Section("References", references, anchor="references")]
    return render_page(
        "Monitoring between evaluations", sections, cautions=list(run["cautions"]),
        summary=f"{run['outcome'].replace('_', ' ')} within {run['horizon_days']:g} days, "
                f"{run['start']} to {run['cutoff']}",
        footer=f"casemix {run['casemix_version']}",
    )


def write_monitoring_page(monitoring, path: str | Path) -> Path:
    """Write :func:`monitoring_html` to ``path`` atomically and return the path."""
    return atomic_write_text(path, monitoring_html(monitoring))
