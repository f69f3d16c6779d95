"""Tests of the exclusion counts per reason (the form in which exclusions are published)."""

from __future__ import annotations

import pandas as pd

from casemix.report.public import exclusions_by_reason


def test_exclusions_are_counted_per_kind_most_frequent_first(evaluation_folder):
    exclusions = pd.read_csv(evaluation_folder / "exclusions.csv", dtype=str)
    reasons = exclusions_by_reason(exclusions)
    # the fixture excludes 4 records: 2 for a missing program, then 1 each (by reason)
    assert reasons.to_dict("list") == {
        "reason": ["missing program", "event before transplant", "transplant after cut-off"],
        "records": [2, 1, 1]}
    # the per-record reason texts hold dates; the counts use only the kinds
    assert not reasons.astype(str).apply(lambda c: c.str.contains("2021-01-02")).any().any()
