"""Tests of the public copies of an evaluation's tables."""

from __future__ import annotations

import shutil

import pandas as pd

from casemix.report import write_public_tables


def test_public_tables_hide_small_counts_and_leave_out_records(evaluation_folder, tmp_path):
    out = write_public_tables(evaluation_folder, tmp_path / "public", 11)
    assert sorted(p.name for p in out.iterdir()) == [
        "casemix.csv", "coefficients.csv", "curves.csv", "exclusions_by_reason.csv",
        "followup.csv", "programs.csv"]  # no recipient-level file
    programs = pd.read_csv(out / "programs.csv", dtype=str)
    source = pd.read_csv(evaluation_folder / "programs.csv", dtype=str)
    small = programs.loc[programs["program"] == "LV05"].iloc[0]  # 8 recipients in the fixture
    assert source.loc[source["program"] == "LV05", "recipients"].item() == "8"
    assert small["recipients"] == "<11"
    large = programs.loc[programs["program"] == "LV03"].iloc[0]
    assert large["recipients"] == "320"
    reasons = pd.read_csv(out / "exclusions_by_reason.csv", dtype=str)
    # the fixture excludes 4 records: 2 for a missing program, then 1 each (by reason)
    assert reasons.to_dict("list") == {
        "reason": ["missing program", "event before transplant", "transplant after cut-off"],
        "records": ["<11", "<11", "<11"]}
    curves = pd.read_csv(out / "curves.csv", dtype=str)
    assert "<11" in set(curves["at_risk"])


def test_public_exclusion_counts_carry_no_record_values(evaluation_folder, tmp_path):
    # The per-record reason texts hold dates; the public counts use only the kinds.
    out = write_public_tables(evaluation_folder, tmp_path / "public", 2)
    text = (out / "exclusions_by_reason.csv").read_text()
    assert "2021-01-02" not in text and "2025-08-31" not in text


def test_public_out_of_range_keeps_a_program_coded_na(evaluation_folder, tmp_path):
    folder = shutil.copytree(evaluation_folder, tmp_path / "copy")
    pd.DataFrame({"program": ["NA", "LV01"], "covariate": ["age", "age"],
                  "recipients": [3, 40]}).to_csv(folder / "out_of_range.csv", index=False)
    out = write_public_tables(folder, tmp_path / "public", 11)
    table = pd.read_csv(out / "out_of_range.csv", dtype=str, keep_default_na=False)
    assert table["program"].tolist() == ["NA", "LV01"]
    assert table["recipients"].tolist() == ["<11", "40"]


def test_corrections_are_published_as_counts_per_kind(corrections_folder, tmp_path):
    out = write_public_tables(corrections_folder, tmp_path / "public", 2)
    counts = pd.read_csv(out / "corrections_by_kind.csv", dtype=str)
    # hand-counted from the four lines above; a record's recipient id is never published
    assert counts.to_dict("list") == {
        "correction": ["event_after_last_seen", "event_after_cutoff", "last_seen_after_cutoff"],
        "records": ["2", "<2", "<2"]}
    assert "C2" not in (out / "corrections_by_kind.csv").read_text()

