"""Tests of casemix.report.monitoring: the monitoring charts and page.

What is drawn is read back from the matplotlib artists and compared with the tables they come
from (monitoring_series.csv and monitoring_signals.csv); the page is checked for its parts.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from matplotlib.dates import date2num

from casemix import demo
from casemix.monitoring import MonitoringRules, monitor
from casemix.report.monitoring import monitoring_figure, monitoring_html, write_monitoring_page

MODEL = Path(__file__).resolve().parents[2] / "models" / "lorran_valley_graft_failure_365.json"


@pytest.fixture(scope="module")
def watch(tmp_path_factory):
    folder = tmp_path_factory.mktemp("watch")
    paths = demo.write_demo(folder)
    frame = pd.read_csv(paths["cohort"], dtype=str, keep_default_na=False)
    few = folder / "few.csv"
    frame[frame["program"].isin(["LV02", "LV04", "LV09"])].to_csv(few, index=False)
    return monitor(few, MODEL, "2022-01-01", demo.COHORT_CUTOFF, MonitoringRules(replicates=200))


def _line(fig, gid):
    found = [a for ax in fig.axes for a in ax.get_lines() if a.get_gid() == gid]
    assert len(found) == 1, gid
    return found[0]


def test_figure_draws_the_tables(watch):
    code = "LV04"
    series = watch.series[watch.series["program"] == code]
    state = watch.state[watch.state["program"] == code]
    signals = watch.signals[watch.signals["program"] == code]
    fig = monitoring_figure(series, state, signals)
    np.testing.assert_allclose(_line(fig, "cusum-upper").get_ydata(), series["g_upper"])
    np.testing.assert_allclose(_line(fig, "cusum-lower").get_ydata(), -series["g_lower"])
    h = state.set_index("chart")["h"]
    assert _line(fig, "limit-upper").get_ydata()[0] == pytest.approx(h["upper"])
    assert _line(fig, "limit-lower").get_ydata()[0] == pytest.approx(-h["lower"])
    marks = _line(fig, "signals-lower")
    lower = signals[signals["chart"] == "lower"]
    assert len(lower) >= 1  # generator truth: LV04's hazard ratio is 0.6
    np.testing.assert_allclose(date2num(marks.get_xdata()),
                               date2num(pd.to_datetime(lower["date"]).to_numpy()))
    np.testing.assert_allclose(marks.get_ydata(), -lower["g"])
    np.testing.assert_allclose(_line(fig, "o-minus-e").get_ydata(), series["o_minus_e"])
    legend = [t.get_text() for ax in fig.axes for t in ax.get_legend().get_texts()]
    assert "signal (lowered hazard)" in legend and "signal (raised hazard)" not in legend


def test_page_has_every_program_the_cautions_and_the_references(watch, tmp_path):
    path = write_monitoring_page(watch, tmp_path / "monitoring.html")
    html = path.read_text(encoding="utf-8")
    assert html == monitoring_html(watch)  # same object, same page
    for code in ("LV02", "LV04", "LV09"):
        assert f"<h3>{code}</h3>" in html
    assert "A signal is a prompt to look closer" in html
    assert "licensed practice" in html
    assert "Statistics in Medicine 2008;27:3382-3406" in html
    assert "<script" not in html
    assert html.count("<svg ") == 3
