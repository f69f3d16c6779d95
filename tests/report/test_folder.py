"""Tests of reading and checking an evaluation folder."""

from __future__ import annotations

import shutil

import pandas as pd
import pytest

from casemix.errors import InputError
from casemix.report.folder import read_evaluation_folder


@pytest.fixture
def folder(evaluation_folder, tmp_path):
    """A private copy of the shared folder that a test may break."""
    return shutil.copytree(evaluation_folder, tmp_path / "copy")


def _edit(folder, name, change):
    path = folder / name
    frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    change(frame).to_csv(path, index=False)


def test_reads_every_table_and_sorts_programs(evaluation_folder):
    data = read_evaluation_folder(evaluation_folder)
    assert data.programs["program"].tolist() == sorted(data.programs["program"])
    assert data.programs["observed"].dtype == float
    assert set(data.curves["program"]) == set(data.programs["program"])
    assert data.run["horizon_days"] == 365


def test_program_codes_are_kept_as_written(folder):
    _edit(folder, "programs.csv",
          lambda f: f.assign(program=["NA", "007", *f["program"].iloc[2:]]))
    codes = read_evaluation_folder(folder).programs["program"].tolist()
    assert "NA" in codes and "007" in codes
    curves = read_evaluation_folder(folder).curves  # other tables keep the code too
    assert curves["time"].dtype == float


def test_an_empty_program_code_is_a_clear_error(folder):
    _edit(folder, "programs.csv", lambda f: f.assign(program=["", *f["program"].iloc[1:]]))
    with pytest.raises(InputError, match=r"programs\.csv: column 'program' is empty on lines 2"):
        read_evaluation_folder(folder)


def test_missing_numbers_are_still_missing(folder):
    _edit(folder, "programs.csv",
          lambda f: f.assign(events_to_favorable=["", "NA", *f["events_to_favorable"][2:]]))
    values = read_evaluation_folder(folder).programs["events_to_favorable"]
    assert values.isna().sum() >= 2 and values.dtype == float


def test_missing_file(folder):
    (folder / "curves.csv").unlink()
    with pytest.raises(InputError, match=r"curves\.csv: file not found.*casemix evaluate"):
        read_evaluation_folder(folder)


def test_missing_column(folder):
    _edit(folder, "casemix.csv", lambda f: f.drop(columns=["factor"]))
    with pytest.raises(InputError, match=r"casemix\.csv: missing 1 column factor"):
        read_evaluation_folder(folder)


def test_text_in_a_numeric_column_names_the_lines(folder):
    _edit(folder, "programs.csv", lambda f: f.assign(expected=["many", *f["expected"][1:]]))
    with pytest.raises(InputError, match=r"programs\.csv: column 'expected' .* lines 2;"):
        read_evaluation_folder(folder)


def test_repeated_program_and_unknown_verdict(folder):
    _edit(folder, "programs.csv", lambda f: f.assign(verdict=["excess", "great",
                                                              *f["verdict"][2:]]))
    _edit(folder, "programs.csv", lambda f: f.assign(program=["LV01", "LV01",
                                                              *f["program"][2:]]))
    with pytest.raises(InputError, match=r"program codes repeat on lines 2, 3"):
        read_evaluation_folder(folder)
    _edit(folder, "programs.csv", lambda f: f.assign(program=["LV01", "LV02",
                                                              *f["program"][2:]]))
    with pytest.raises(InputError, match=r"'verdict' has unknown values on lines 3; allowed"):
        read_evaluation_folder(folder)


def test_run_json_problems(folder):
    (folder / "run.json").write_text('{"outcome": "death"}', encoding="utf-8")
    with pytest.raises(InputError, match=r"run\.json: missing 6 keys horizon_days, cutoff"):
        read_evaluation_folder(folder)
    (folder / "run.json").write_text("{", encoding="utf-8")
    with pytest.raises(InputError, match=r"run\.json: not valid JSON"):
        read_evaluation_folder(folder)


def test_not_a_folder(tmp_path):
    with pytest.raises(InputError, match=r"not a folder"):
        read_evaluation_folder(tmp_path / "nothing")
