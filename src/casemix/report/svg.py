"""Light figures of the study report, written directly as small inline SVG.

The study report draws a Kaplan-Meier and a case-mix figure for every program and analysis:
1,500 of each for 250 programs and 6 analyses. Through matplotlib (:mod:`casemix.report.plots`)
one program's pair takes about 0.55 s and 146 kB of SVG (text drawn as paths; measured on the
demo, load average 1.8 on 2 cores), so 250 x 6 would take over 13 minutes and each program
page would weigh close to 1 MB. Written directly, a figure is a few kilobytes of plain SVG
elements (text stays text, so it is searchable and prints sharply) and takes about a
millisecond. The drawing is simple on purpose: axes, step lines, bands, bars and points in
the report's colours (:data:`casemix.report.plots.INK`, the verdict colours of
:func:`casemix.stats.verdict.verdict_colours`); the funnel limits are the exact Poisson
limits of :func:`casemix.stats.poisson.funnel_limits`, as in the single report.

Every text that comes from data is escaped; the figures hold no ids and no scripts, so any
number of them can share one page.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from markupsafe import Markup, escape

from casemix.report.plots import (
    EXPECTED_INK,
    FUNNEL_LEVELS,
    INK,
    LIMIT_INK,
    VERDICT_WORDS,
    at_risk_times,
)
from casemix.stats.poisson import funnel_limits
from casemix.stats.verdict import verdict_colours

__all__ = ["casemix_svg", "caterpillar_svg", "funnel_svg", "survival_svg"]

_BAND = "#c9ced3"
_BAR = "#5b6770"
_GRID = "#e3e6e8"
_AXIS = "#8a9299"
_FONT = 'font-family="system-ui, -apple-system, Segoe UI, Roboto, Arial, sans-serif"'


def _n(value: float) -> str:
    """A coordinate with one decimal, without a trailing ``.0``."""
    text = f"{value:.1f}"
    return text[:-2] if text.endswith(".0") else text


def _text(x: float, y: float, content: object, *, anchor: str = "start", size: float = 11,
          fill: str = INK, weight: str = "") -> str:
    bold = f' font-weight="{weight}"' if weight else ""
    return (f'<text x="{_n(x)}" y="{_n(y)}" font-size="{size:g}" fill="{fill}" '
            f'text-anchor="{anchor}"{bold}>{escape(str(content))}</text>')


def _line(x1: float, y1: float, x2: float, y2: float, colour: str, width: float = 1,
          dash: str = "") -> str:
    extra = f' stroke-dasharray="{dash}"' if dash else ""
    return (f'<line x1="{_n(x1)}" y1="{_n(y1)}" x2="{_n(x2)}" y2="{_n(y2)}" '
            f'stroke="{colour}" stroke-width="{width:g}"{extra}/>')


def _path(points: Sequence[tuple[float, float]]) -> str:
    return "M" + "L".join(f"{_n(x)} {_n(y)}" for x, y in points)


def _svg(width: int, height: int, body: Sequence[str], alt: str) -> str:
    return str(Markup(
        '<svg class="figure lite" xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {w} {h}" '
        'width="{w}" height="{h}" role="img" aria-label="{alt}" {font}>{body}</svg>'
    ).format(w=width, h=height, alt=alt, font=Markup(_FONT), body=Markup("".join(body))))


def _legend(x: float, y: float, items: Sequence[tuple[str, str]]) -> list[str]:
    """Verdict chips with their words, in one row from (x, y)."""
    out = []
    for colour, word in items:
        out.append(f'<rect x="{_n(x)}" y="{_n(y - 8)}" width="9" height="9" fill="{colour}" '
                   f'stroke="{INK}" stroke-width="0.5"/>')
        out.append(_text(x + 13, y, word, size=10))
        x += 22 + 6.2 * len(word)
    return out


def _verdict_items(verdicts: Sequence[str]) -> list[tuple[str, str]]:
    palette = verdict_colours()
    present = set(verdicts)
    return [(palette[v], VERDICT_WORDS[v]) for v in VERDICT_WORDS if v in present]


def _steps(times: np.ndarray, values: np.ndarray, x, y) -> list[tuple[float, float]]:
    """Right-continuous step points in pixels, keeping only the corners."""
    if not len(times):
        return []
    px = x(np.asarray(times, float))
    py = np.round(y(np.asarray(values, float)), 1)
    change = np.flatnonzero(py[1:] != py[:-1]) + 1
    points = [(float(px[0]), float(py[0]))]
    for i in change:
        points += [(float(px[i]), float(py[i - 1])), (float(px[i]), float(py[i]))]
    points.append((float(px[-1]), float(py[-1])))
    return points


def survival_svg(curve: pd.DataFrame, *, horizon_days: float, at_risk: Sequence[str],
                 alt: str = "") -> str:
    """Observed Kaplan-Meier survival with its band against the expected curve.

    Parameters
    ----------
    curve : pandas.DataFrame
        One program's rows of curves.csv (``time``, ``observed``, ``observed_lower``,
        ``observed_upper``, ``expected``); a start at day 0 with survival 1 is added when
        missing. Both curves are right-continuous steps, as in
        :func:`casemix.report.plots.survival_figure`.
    horizon_days : float
        End of the time axis.
    at_risk : sequence of str
        Numbers at risk (text, so that suppressed counts can show) at
        :func:`~casemix.report.plots.at_risk_times` of the horizon.
    alt : str, default ""
        Text alternative.

    Returns
    -------
    str
        ``<svg>`` fragment.
    """
    data = curve.sort_values("time", kind="stable")
    times = data["time"].to_numpy(float)
    columns = ("observed", "observed_lower", "observed_upper", "expected")
    values = {c: data[c].to_numpy(float) for c in columns}
    if not len(times) or times[0] > 0:
        times = np.r_[0.0, times]
        values = {c: np.r_[1.0, v] for c, v in values.items()}
    lowest = float(np.nanmin(np.r_[values["observed_lower"], values["expected"], 1.0]))
    bottom = max(0.0, np.floor((lowest - 0.02) * 20) / 20)
    width, height, left, right, top, plot_bottom = 460, 306, 46, 12, 30, 228
    span = plot_bottom - top

    def x(t):
        return left + (width - left - right) * np.minimum(t, horizon_days) / horizon_days

    def y(s):
        return plot_bottom - span * (s - bottom) / (1.005 - bottom)

    body = []
    step = 0.05 if bottom >= 0.8 else 0.1 if bottom >= 0.5 else 0.25
    for tick in np.arange(1.0, bottom - 1e-9, -step):
        body.append(_line(left, y(tick), width - right, y(tick), _GRID))
        body.append(_text(left - 4, y(tick) + 3.5, f"{tick:.2f}", anchor="end", size=10))
    inside = times <= horizon_days
    t, v = times[inside], {c: s[inside] for c, s in values.items()}
    ok = ~(np.isnan(v["observed_lower"]) | np.isnan(v["observed_upper"]))
    if ok.any():
        upper = _steps(t[ok], v["observed_upper"][ok], x, y)
        lower = _steps(t[ok], v["observed_lower"][ok], x, y)
        body.append(f'<path d="{_path(upper + lower[::-1])}Z" fill="{_BAND}" '
                    'fill-opacity="0.7" stroke="none"/>')
    body.append(f'<path d="{_path(_steps(t, v["expected"], x, y))}" fill="none" '
                f'stroke="{EXPECTED_INK}" stroke-width="1.6" stroke-dasharray="5 3"/>')
    body.append(f'<path d="{_path(_steps(t, v["observed"], x, y))}" fill="none" '
                f'stroke="{INK}" stroke-width="1.6"/>')
    body.append(_line(left, plot_bottom, width - right, plot_bottom, _AXIS))
    body.append(_line(left, top, left, plot_bottom, _AXIS))
    ticks = at_risk_times(horizon_days)
    for tick, count in zip(ticks, at_risk, strict=True):
        body.append(_line(x(tick), plot_bottom, x(tick), plot_bottom + 4, _AXIS))
        body.append(_text(x(tick), plot_bottom + 15, f"{tick:g}", anchor="middle", size=10))
        body.append(_text(x(tick), plot_bottom + 56, count, anchor="middle", size=10))
    body.append(_text((left + width - right) / 2, plot_bottom + 28, "Days since transplant",
                      anchor="middle", size=10, fill=LIMIT_INK))
    body.append(_text(left, plot_bottom + 43, "Number at risk", size=10, fill=LIMIT_INK))
    # the legend above the plot, where it cannot hide a curve
    body.append(_line(6, 8, 26, 8, INK, 1.6))
    body.append(_text(30, 11.5, "observed (Kaplan-Meier)", size=10))
    body.append(f'<rect x="166" y="4" width="20" height="8" fill="{_BAND}"/>')
    body.append(_text(190, 11.5, "95% interval", size=10))
    body.append(_line(264, 8, 284, 8, EXPECTED_INK, 1.6, "5 3"))
    body.append(_text(288, 11.5, "expected for these recipients", size=10))
    return _svg(width, height, body, alt)


def _ratio_ticks(low: float, high: float) -> list[float]:
    candidates = (0.1, 0.25, 0.5, 0.67, 0.8, 0.9, 1.0, 1.1, 1.25, 1.5, 2.0, 4.0, 10.0)
    inside = [c for c in candidates if low <= c <= high]
    spaced: list[float] = []
    for c in inside:  # at least 0.12 apart on the log axis, 1 always kept
        if not spaced or np.log(c) - np.log(spaced[-1]) >= 0.12 * np.log(high / low):
            spaced.append(c)
    if 1.0 not in spaced:
        spaced = sorted({*spaced, 1.0})
    return spaced


def casemix_svg(groups: pd.DataFrame, *, alt: str = "") -> str:
    """Horizontal bars of case-mix factors on a log scale, from 1 (no effect).

    Parameters
    ----------
    groups : pandas.DataFrame
        One program's rows of casemix.csv (``group``, ``contribution``); the ``total`` row
        is drawn last in a darker shade, the others by the size of their contribution (ties
        by name), as in :func:`casemix.report.plots.casemix_figure`.
    alt : str, default ""
        Text alternative.

    Returns
    -------
    str
        ``<svg>`` fragment; each bar ends at its factor, written beside it (×1.08).
    """
    total = groups[groups["group"] == "total"]
    parts = groups[groups["group"] != "total"]
    order = np.lexsort((parts["group"].to_numpy(), -parts["contribution"].abs().to_numpy()))
    rows = pd.concat([parts.iloc[order], total], ignore_index=True)
    contribution = rows["contribution"].to_numpy(float)
    span = max(float(np.nanmax(np.abs(contribution), initial=0.0)), np.log(1.1)) * 1.35
    width, left, right, row_height, top = 460, 150, 16, 20, 6
    height = top + row_height * len(rows) + 38
    bottom = top + row_height * len(rows)

    def x(log_factor: float) -> float:
        return left + (width - left - right) * (log_factor + span) / (2 * span)

    body = []
    for tick in _ratio_ticks(np.exp(-span), np.exp(span)):
        body.append(_line(x(np.log(tick)), top, x(np.log(tick)), bottom, _GRID))
        body.append(_text(x(np.log(tick)), bottom + 14, f"{tick:g}", anchor="middle", size=10))
    for i, (group, c) in enumerate(zip(rows["group"], contribution, strict=True)):
        y = top + row_height * i
        is_total = group == "total"
        label = "all groups together" if is_total else str(group).replace("_", " ")
        body.append(_text(left - 6, y + 14, label, anchor="end", size=10,
                          weight="600" if is_total else ""))
        if np.isnan(c):
            continue
        x0, x1 = sorted((x(0.0), x(c)))
        body.append(f'<rect x="{_n(x0)}" y="{_n(y + 4)}" width="{_n(max(x1 - x0, 0.5))}" '
                    f'height="12" fill="{"#2a3238" if is_total else _BAR}"/>')
        end = x(c) + (4 if c >= 0 else -4)
        body.append(_text(end, y + 14, f"×{np.exp(c):.2f}", anchor="start" if c >= 0 else "end",
                          size=10))
    body.append(_line(x(0.0), top, x(0.0), bottom, INK))
    body.append(_text((left + width - right) / 2, bottom + 30,
                      "Factor on expected events (log scale; 1 = no effect)", anchor="middle",
                      size=10, fill=LIMIT_INK))
    return _svg(width, height, body, alt)


def funnel_svg(programs: pd.DataFrame, *, levels: Sequence[float] = FUNNEL_LEVELS,
               log_expected: bool = False, max_labels: int = 40, alt: str = "") -> str:
    """Funnel plot of O/E against E with the exact (stepped) Poisson limits.

    Parameters
    ----------
    programs : pandas.DataFrame
        ``program``, ``expected``, ``oe_ratio``, ``verdict``; rows with E = 0 are not drawn
        (the caller says so).
    levels : sequence of float, default (0.95, 0.998)
        Coverage of the limits (:func:`casemix.stats.poisson.funnel_limits`).
    log_expected : bool, default False
        Logarithmic E axis.
    max_labels : int, default 40
        Label every point when there are at most this many programs, else only the points
        outside the widest limits. Every point carries its code and values as a tooltip.
    alt : str, default ""
        Text alternative.

    Returns
    -------
    str
        ``<svg>`` fragment.
    """
    data = programs[programs["expected"] > 0]
    expected = data["expected"].to_numpy(float)
    ratio = data["oe_ratio"].to_numpy(float)
    width, height, left, right, top, bottom = 640, 360, 48, 150, 12, 318
    low = max(float(expected.min(initial=1.0)) * 0.8, 0.5)
    high = max(float(expected.max(initial=1.0)) * 1.15, low * 2)
    top_ratio = max(1.6, 1.15 * float(np.nanmax(ratio, initial=1.0)))

    def x(e):
        e = np.asarray(e, float)
        if log_expected:
            return left + (width - left - right) * np.log(e / low) / np.log(high / low)
        return left + (width - left - right) * e / high

    def y(r):
        return bottom - (bottom - top) * np.minimum(np.asarray(r, float), top_ratio) / top_ratio

    body = []
    for tick in np.linspace(0, top_ratio, 5):
        body.append(_line(left, float(y(tick)), width - right, float(y(tick)), _GRID))
        body.append(_text(left - 4, float(y(tick)) + 3.5, f"{tick:.1f}", anchor="end",
                          size=10))
    grid = (np.geomspace(low, high, 240) if log_expected
            else np.linspace(low, high, 240))
    grid = np.unique(np.r_[grid, expected])
    dashes = ("5 3", "", "2 2", "6 2 2 2")
    legend_y = top + 10
    for level, dash in zip(levels, dashes, strict=False):
        lower, upper = funnel_limits(grid, level)
        for limit in (lower, upper):  # drawn as steps, cut at the top of the plot
            points = _steps(grid, np.minimum(limit, top_ratio), x, y)
            body.append(f'<path d="{_path(points)}" fill="none" stroke="{LIMIT_INK}" '
                        'stroke-width="0.9"' + (f' stroke-dasharray="{dash}"' if dash else "")
                        + "/>")
        body.append(_line(width - right + 12, legend_y, width - right + 32, legend_y, LIMIT_INK,
                          0.9, dash))
        body.append(_text(width - right + 36, legend_y + 3.5, f"{level * 100:g}% limits",
                          size=10))
        legend_y += 16
    body.append(_line(left, float(y(1.0)), width - right, float(y(1.0)), INK))
    body.append(_text(width - right + 36, legend_y + 3.5, "O/E = 1", size=10))
    body.append(_line(width - right + 12, legend_y, width - right + 32, legend_y, INK))
    palette = verdict_colours()
    widest_lower, widest_upper = funnel_limits(expected, max(levels))
    outside = (ratio < widest_lower) | (ratio > widest_upper)
    label_all = len(data) <= max_labels
    px, py = x(expected), y(ratio)
    for code, e, r, verdict, cx, cy, out in zip(data["program"], expected, ratio, data["verdict"],
                                                px, py, outside, strict=True):
        body.append(str(Markup(
            '<circle cx="{}" cy="{}" r="4" fill="{}" stroke="{}" stroke-width="0.5">'
            "<title>{}: E {:.1f}, O/E {:.2f}, {}</title></circle>").format(
            _n(cx), _n(cy), palette[verdict], INK, code, e, r, VERDICT_WORDS[verdict])))
        if label_all or out:
            body.append(_text(cx + 5, cy - 4, code, size=9))
    body.append(_line(left, bottom, width - right, bottom, _AXIS))
    body.append(_line(left, top, left, bottom, _AXIS))
    ticks = (np.geomspace(low, high, 5) if log_expected else np.linspace(0, high, 6))
    for tick in ticks:
        body.append(_text(float(x(max(tick, 1e-9) if log_expected else tick)), bottom + 14,
                          f"{tick:.3g}", anchor="middle", size=10))
    body.append(_text((left + width - right) / 2, bottom + 32,
                      "Expected events (E)" + (" (log scale)" if log_expected else ""),
                      anchor="middle", size=10, fill=LIMIT_INK))
    body.append(_text(12, (top + bottom) / 2, "O/E", anchor="middle", size=10, fill=LIMIT_INK))
    y_legend = legend_y + 24
    for colour, word in _verdict_items(list(data["verdict"])):
        body.extend(_legend(width - right + 12, y_legend, [(colour, word)]))
        y_legend += 16
    return _svg(width, height, body, alt)


def caterpillar_svg(programs: pd.DataFrame, *, credible_level: float = 0.95,
                    max_ratio: float = 3.0, alt: str = "") -> str:
    """Hazard ratios with credible intervals beside raw O/E with exact intervals.

    Parameters
    ----------
    programs : pandas.DataFrame
        ``program``, ``verdict``, ``hr_mean``, ``hr_lower``, ``hr_upper``, ``oe_ratio``,
        ``oe_lower``, ``oe_upper``; sorted by the hazard ratio (ties by code), smallest at
        the top, as in :func:`casemix.report.plots.caterpillar_figure`.
    credible_level : float, default 0.95
        For the panel title.
    max_ratio : float, default 3.0
        The shared ratio axis ends at the largest upper limit or here, whichever is smaller;
        an interval running past the edge ends in an arrow head.
    alt : str, default ""
        Text alternative.

    Returns
    -------
    str
        ``<svg>`` fragment with one row per program.
    """
    data = programs.sort_values(["hr_mean", "program"], kind="stable")
    edge = min(float(np.nanmax(np.r_[data["hr_upper"], data["oe_upper"], 1.5])), max_ratio)
    edge *= 1.04
    row = 11 if len(data) > 60 else 16
    width, label, gap, top = 640, 70, 24, 36
    panel = (width - label - gap - 10) / 2
    height = top + row * len(data) + 52
    palette = verdict_colours()
    body = [
        _text(label, 13, "After shrinkage", size=11, weight="600"),
        _text(label, 27, f"hazard ratio, {credible_level:.0%} credible", size=10,
              fill=LIMIT_INK),
        _text(label + panel + gap, 13, "Raw", size=11, weight="600"),
        _text(label + panel + gap, 27, "O/E, exact 95%", size=10, fill=LIMIT_INK),
    ]
    bottom = top + row * len(data)
    for k, (centre, lower, upper) in enumerate((("hr_mean", "hr_lower", "hr_upper"),
                                               ("oe_ratio", "oe_lower", "oe_upper"))):
        x0 = label + k * (panel + gap)

        def x(r, x0=x0):
            return x0 + panel * min(max(float(r), 0.0), edge) / edge

        for tick in (0.5, 1.0, 1.5, 2.0, 3.0):
            if tick <= edge:
                body.append(_line(x(tick), top - 4, x(tick), bottom, _GRID if tick != 1.0
                                  else INK, 1 if tick == 1.0 else 0.8))
                body.append(_text(x(tick), bottom + 13, f"{tick:g}", anchor="middle", size=10))
        for i, r in enumerate(data[[centre, lower, upper, "verdict"]].itertuples(index=False)):
            cy = top + row * i + row / 2
            if pd.isna(r[0]):
                continue
            hi = x(r[2])
            body.append(_line(x(r[1]), cy, hi, cy, LIMIT_INK, 1.2))
            if r[2] > edge:
                body.append(f'<path d="M{_n(hi)} {_n(cy - 3)}L{_n(hi + 5)} {_n(cy)}L{_n(hi)} '
                            f'{_n(cy + 3)}Z" fill="{LIMIT_INK}"/>')
            body.append(f'<circle cx="{_n(x(r[0]))}" cy="{_n(cy)}" r="{3 if row < 16 else 4}" '
                        f'fill="{palette[r[3]]}" stroke="{INK}" stroke-width="0.5"/>')
        body.append(_text(x0 + panel / 2, bottom + 27, "Hazard ratio" if k == 0 else "O/E",
                          anchor="middle", size=10, fill=LIMIT_INK))
    for i, code in enumerate(data["program"]):
        body.append(_text(label - 6, top + row * i + row / 2 + 3.5, code, anchor="end",
                          size=9 if row < 16 else 10))
    legend = _verdict_items(list(data["verdict"]))
    body.extend(_legend(label, bottom + 46, legend))
    return _svg(width, height, body, alt)
