"""Tests of the exclusion counts per reason (the form in which exclusions are published)."""

from __future__ import annotations

import json
import shutil

import pandas as pd

from casemix.report.public import exclusions_by_reason
from casemix.report.release import write_public_release


def test_exclusions_are_counted_per_kind_most_frequent_first(evaluation_folder):
    exclusions = pd.read_csv(evaluation_folder / "exclusions.csv", dtype=str)
    reasons = exclusions_by_reason(exclusions)
    # the fixture excludes 4 records: 2 for a missing program, then 1 each (by reason)
    assert reasons.to_dict("list") == {
        "reason": ["missing program", "event before transplant", "transplant after cut-off"],
        "records": [2, 1, 1]}
    # the per-record reason texts hold dates; the counts use only the kinds
    assert not reasons.astype(str).apply(lambda c: c.str.contains("2021-01-02")).any().any()


def test_public_out_of_range_keeps_a_program_coded_na(evaluation_folder, tmp_path):
    folder = shutil.copytree(evaluation_folder, tmp_path / "copy")
    pd.DataFrame({"program": ["NA", "LV01"], "covariate": ["age", "age"],
                  "recipients": [3, 40]}).to_csv(folder / "out_of_range.csv", index=False)
    out = write_public_release(folder, 11)
    table = pd.read_csv(out / "out_of_range.csv", dtype=str, keep_default_na=False)
    assert table["program"].tolist() == ["NA", "LV01"]
    assert table["recipients"].tolist() == ["<11", "40"]


def test_corrections_are_published_as_counts_per_kind(corrections_folder):
    out = write_public_release(corrections_folder, 2)
    counts = pd.read_csv(out / "corrections_by_kind.csv", dtype=str)
    # hand-counted from the fixture's four lines (2, 1, 1 records per kind); a record's
    # recipient id is never published and no count of 1 is shown
    assert counts["correction"].tolist() == [
        "event_after_last_seen", "event_after_cutoff", "last_seen_after_cutoff"]
    assert counts["records"].iloc[0] == "2"
    assert set(counts["records"].iloc[1:]) <= {"<2", "withheld"}
    assert "C2" not in (out / "corrections_by_kind.csv").read_text()
    assert "corrections" not in json.loads((out / "run.json").read_text())["counts"]
