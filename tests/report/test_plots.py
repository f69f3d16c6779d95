"""Tests of the report's figures: what is drawn equals outside reference values."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from oracles import lifelines
from scipy import stats

from casemix.report.plots import (
    VERDICT_WORDS,
    casemix_figure,
    caterpillar_figure,
    funnel_figure,
    numbers_at_risk,
    survival_figure,
)
from casemix.stats.verdict import verdict_colours

# docs/validation.md section 8: PUBLISHED method (Spiegelhalter 2005, from memory), numbers
# REFERENCE LIBRARY scipy.stats.poisson ppf/cdf; tolerance abs 5e-5.
# docs/validation.md section 8, "uninterpolated quantile limits" (scipy.stats.poisson.ppf):
# the exact limits the funnel draws.
FUNNEL_REFERENCE = {
    0.95: {1: (0.0, 3.0), 5: (0.2, 2.0), 20: (0.60, 1.45), 100: (0.81, 1.20)},
    0.998: {1: (0.0, 5.0), 5: (0.0, 2.6), 20: (0.40, 1.75), 100: (0.71, 1.32)},
}


def _scipy_limit(p: float, e: float) -> float:
    # The same exact quantile computed here with scipy.stats.poisson.ppf, over E.
    return stats.poisson.ppf(p, e) / e


def _programs(expected, ratio, verdicts):
    n = len(expected)
    return pd.DataFrame({"program": [f"LV{i + 1:02d}" for i in range(n)],
                         "expected": expected, "oe_ratio": ratio, "verdict": verdicts})


def _line(ax, gid):
    (line,) = [x for x in ax.get_lines() if x.get_gid() == gid]
    return line.get_xdata(), line.get_ydata()


@pytest.mark.parametrize("log_expected", [False, True])
def test_funnel_limits_drawn_equal_reference_values(log_expected):
    programs = _programs([1.0, 5.0, 20.0, 100.0], [0.0, 1.4, 0.7, 1.02],
                         ["too_little_data", "consistent", "consistent", "consistent"])
    ax = funnel_figure(programs, log_expected=log_expected).axes[0]
    for level, table in FUNNEL_REFERENCE.items():
        lx, ly = _line(ax, f"limit-{level}-lower")
        ux, uy = _line(ax, f"limit-{level}-upper")
        for e, (lower, upper) in table.items():
            assert ly[lx == e][0] == pytest.approx(lower, abs=5e-5)
            assert uy[ux == e][0] == pytest.approx(upper, abs=5e-5)
            tail = (1 - level) / 2
            assert ly[lx == e][0] == pytest.approx(_scipy_limit(tail, e), rel=1e-9, abs=1e-12)
            assert uy[ux == e][0] == pytest.approx(_scipy_limit(1 - tail, e), rel=1e-9)


def test_funnel_labels_programs_and_skips_zero_expected():
    programs = _programs([0.0, 5.0, 20.0], [np.nan, 1.4, 0.7],
                         ["too_little_data", "consistent", "favorable"])
    ax = funnel_figure(programs).axes[0]
    assert sorted(t.get_text() for t in ax.texts) == ["LV02", "LV03"]
    legend = [t.get_text() for t in ax.figure.legends[0].get_texts()]
    assert "consistent" in legend and "favorable" in legend and "excess" not in legend


def test_numbers_at_risk_match_the_published_6mp_table():
    # docs/validation.md 1.1: 6-MP arm at risk at 6, 7, 10, 13, 16, 22, 23 weeks is 21, 17,
    # 15, 12, 11, 7, 6 (REFERENCE LIBRARY: lifelines event_table; a subject censored at an
    # event time is still at risk then).
    leukemia = lifelines("lifelines.datasets").load_leukemia()
    time = leukemia.loc[leukemia["Rx"] == 0, "t"].to_numpy(float)
    at = [6, 7, 10, 13, 16, 22, 23]
    assert numbers_at_risk(time, at).tolist() == [21, 17, 15, 12, 11, 7, 6]


def test_survival_figure_draws_the_kaplan_meier_curve_given():
    # The curve comes from lifelines KaplanMeierFitter on the 6-MP arm; docs/validation.md
    # 1.1 (Klein & Moeschberger Table 4.1A, from memory; verified) gives S(23) = 0.448179.
    leukemia = lifelines("lifelines.datasets").load_leukemia()
    arm = leukemia[leukemia["Rx"] == 0]
    km = lifelines().KaplanMeierFitter().fit(arm["t"], arm["status"])
    ci = km.confidence_interval_survival_function_
    curve = pd.DataFrame({"time": km.survival_function_.index.to_numpy(float),
                          "observed": km.survival_function_.iloc[:, 0].to_numpy(),
                          "observed_lower": ci.iloc[:, 0].to_numpy(),
                          "observed_upper": ci.iloc[:, 1].to_numpy()})
    curve["expected"] = np.exp(-0.02 * curve["time"])
    fig = survival_figure(curve, horizon_days=35, at_risk=["21", "<11", "<11", "<11", "<11"])
    ax, row = fig.axes
    x, y = _line(ax, "observed")
    assert y[x == 23][0] == pytest.approx(0.448179, abs=5e-7)
    assert y[x == 6][0] == pytest.approx(0.857143, abs=5e-7)
    assert [t.get_text() for t in row.texts] == [
        "Number at risk", "21", "<11", "<11", "<11", "<11"]


def test_caterpillar_sorts_by_hazard_ratio_and_marks_clipped_intervals():
    programs = pd.DataFrame({
        "program": ["LV01", "LV02", "LV03"], "verdict": ["consistent", "excess", "favorable"],
        "hr_mean": [1.0, 1.8, 0.5], "hr_lower": [0.7, 1.2, 0.3], "hr_upper": [1.4, 2.6, 0.8],
        "oe_ratio": [1.0, 2.2, 0.4], "oe_lower": [0.6, 1.3, 0.2], "oe_upper": [1.6, 9.0, 0.8],
    })
    fig = caterpillar_figure(programs)
    left, right = fig.axes[:2]
    ticks = sorted(zip(left.get_yticks(), left.get_yticklabels(), strict=True), reverse=True,
                   key=lambda pair: pair[0])
    assert [label.get_text() for _, label in ticks] == ["LV03", "LV01", "LV02"]  # top down
    (clipped,) = [x for x in right.get_lines() if x.get_gid() == "clipped-oe"]
    assert len(clipped.get_xdata()) == 1 and clipped.get_xdata()[0] == 3.0


def test_casemix_bars_span_from_one_to_the_factor_on_a_log_axis():
    groups = pd.DataFrame({"group": ["donor age", "diabetes", "total"],
                           "contribution": [0.2, -0.1, 0.1],
                           "factor": np.exp([0.2, -0.1, 0.1])})
    ax = casemix_figure(groups).axes[0]
    assert ax.get_xscale() == "log"
    ends = sorted(p.get_x() + p.get_width() for p in ax.patches)
    assert ends == pytest.approx(sorted(np.exp([0.2, -0.1, 0.1])))
    assert [t.get_text() for t in ax.get_yticklabels()][-1] == "all groups together"


def test_verdict_colours_have_a_distinct_colour_for_every_verdict():
    palette = verdict_colours()
    assert set(palette) == set(VERDICT_WORDS)
    assert len(set(palette.values())) == 4
    # Okabe-Ito hues fixed by the design (DESIGN.md, Names): blue, grey, vermillion.
    assert (palette["favorable"], palette["consistent"], palette["excess"]) == (
        "#0072B2", "#999999", "#D55E00")
