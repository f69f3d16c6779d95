"""Tests of the report's wording of what-if distances and of what a program can show."""

from __future__ import annotations

import numpy as np
import pandas as pd

from casemix.report.sections import reach_text, what_if_text

HELD = "At the same expected count (E = 14.2) and with the prior held fixed, "


def _row(verdict, expected=14.2, to_excess=np.nan, to_favorable=np.nan, more=np.nan,
         fewer=np.nan):
    return pd.Series({"verdict": verdict, "expected": expected, "events_to_excess": to_excess,
                      "events_to_favorable": to_favorable, "events_more_to_change": more,
                      "events_fewer_to_change": fewer})


def test_what_if_sentences():
    assert what_if_text(_row("consistent", to_excess=2, to_favorable=5, more=2, fewer=5)) == (
        HELD + "2 more events would make the verdict excess; 5 fewer would make it favorable.")
    assert what_if_text(_row("consistent", to_excess=1, more=1)).startswith(HELD + "1 more event ")
    # an excess program: the distance to leave excess comes first, the opposite one second
    assert what_if_text(_row("excess", to_excess=0, to_favorable=37, fewer=13)) == (
        HELD + "13 fewer events would make the verdict consistent, and 37 fewer would make it "
        "favorable.")
    assert what_if_text(_row("favorable", to_excess=40, to_favorable=0, more=9)) == (
        HELD + "9 more events would make the verdict consistent, and 40 more would make it "
        "excess.")
    assert "favorable is out of reach here: even no events at all" in what_if_text(
        _row("consistent", to_excess=3, more=3))
    assert what_if_text(_row("too_little_data", expected=0.4), min_expected=1.0) == (
        "Too few expected events for a verdict (E = 0.40, below the minimum of 1); what-if "
        "distances are not given.")


def test_reach_sentences():
    row = pd.Series({"verdict": "consistent", "detectable_hr_excess": 2.314,
                     "detectable_hr_favorable": np.nan, "favorable_reachable": False})
    nb = "\u00a0"
    assert reach_text(row) == f"excess{nb}if{nb}HR{nb}≥{nb}2.31; favorable{nb}out{nb}of{nb}reach"
    row = row.copy()
    row["favorable_reachable"], row["detectable_hr_favorable"] = True, 0.612
    assert reach_text(row).endswith(f"; favorable{nb}if{nb}HR{nb}≤{nb}0.61")


def test_the_report_counts_corrections_per_program(corrections_folder, evaluation_folder):
    from casemix.evaluation import Evaluation
    from casemix.report.sections import ReportOptions, data_quality_section

    data = Evaluation.load(corrections_folder)
    html = str(data_quality_section(data, ReportOptions()).html)
    # LV03: 3 corrections of 2 records (C2 twice, C3 once), hand-counted
    assert "<td>LV03</td><td class=\"num\">1</td><td class=\"num\">1</td><td class=\"num\">1" \
           "</td><td class=\"num\">2</td>" in html
    older = Evaluation.load(evaluation_folder)  # written before corrections.csv
    assert "Not recorded" in str(data_quality_section(older, ReportOptions()).html)
