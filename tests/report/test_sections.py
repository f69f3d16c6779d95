"""Tests of the report's wording of what-if distances."""

from __future__ import annotations

import numpy as np
import pandas as pd

from casemix.report.sections import what_if_text


def _row(verdict, expected=14.2, to_excess=np.nan, to_favorable=np.nan):
    return pd.Series({"verdict": verdict, "expected": expected, "events_to_excess": to_excess,
                      "events_to_favorable": to_favorable})


def test_what_if_sentences():
    assert what_if_text(_row("consistent", to_excess=2, to_favorable=5)) == (
        "2 more events at the current expected count (E = 14.2) would make the verdict "
        "excess; 5 fewer would make it favorable.")
    assert what_if_text(_row("consistent", to_excess=1, to_favorable=np.nan)).startswith(
        "1 more event at")
    assert what_if_text(_row("excess", to_excess=0, to_favorable=9)) == (
        "The verdict is excess now; 9 fewer would make it favorable.")
    assert what_if_text(_row("favorable", to_excess=12, to_favorable=0)).endswith(
        "it is favorable now.")
    assert "even no events at all would not make it favorable" in what_if_text(
        _row("consistent", to_excess=3))
    assert what_if_text(_row("too_little_data", expected=0.4), min_expected=1.0) == (
        "Too few expected events for a verdict (E = 0.40, below the minimum of 1); what-if "
        "distances are not given.")


def test_the_report_counts_corrections_per_program(corrections_folder, evaluation_folder):
    from casemix.report.folder import read_evaluation_folder
    from casemix.report.sections import ReportOptions, data_quality_section

    data = read_evaluation_folder(corrections_folder)
    html = str(data_quality_section(data, ReportOptions()).html)
    # LV03: 3 corrections of 2 records (C2 twice, C3 once), hand-counted
    assert "<td>LV03</td><td class=\"num\">1</td><td class=\"num\">1</td><td class=\"num\">1" \
           "</td><td class=\"num\">2</td>" in html
    older = read_evaluation_folder(evaluation_folder)  # written before corrections.csv
    assert "Not recorded" in str(data_quality_section(older, ReportOptions()).html)
