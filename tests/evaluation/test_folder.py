"""Tests of reading and checking an evaluation folder: Evaluation.load and its contract."""

from __future__ import annotations

import json
import shutil

import pandas as pd
import pytest

from casemix.errors import InputError, RulesError
from casemix.evaluation import Evaluation


@pytest.fixture
def folder(evaluation_folder, tmp_path):
    """A private copy of the shared folder that a test may break."""
    return shutil.copytree(evaluation_folder, tmp_path / "copy")


def _edit(folder, name, change):
    path = folder / name
    frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    change(frame).to_csv(path, index=False)


def test_reads_every_table_and_sorts_programs(evaluation_folder):
    data = Evaluation.load(evaluation_folder)
    assert data.programs["program"].tolist() == sorted(data.programs["program"])
    assert data.programs["observed"].dtype == float
    assert set(data.curves["program"]) == set(data.programs["program"])
    assert data.run["horizon_days"] == 365


def test_program_codes_are_kept_as_written(folder):
    _edit(folder, "programs.csv",
          lambda f: f.assign(program=["NA", "007", *f["program"].iloc[2:]]))
    codes = Evaluation.load(folder).programs["program"].tolist()
    assert "NA" in codes and "007" in codes
    curves = Evaluation.load(folder).curves  # other tables keep the code too
    assert curves["time"].dtype == float


def test_an_empty_program_code_is_a_clear_error(folder):
    _edit(folder, "programs.csv", lambda f: f.assign(program=["", *f["program"].iloc[1:]]))
    with pytest.raises(InputError, match=r"programs\.csv: column 'program' is empty on lines 2"):
        Evaluation.load(folder)


def test_missing_numbers_are_still_missing(folder):
    _edit(folder, "programs.csv",
          lambda f: f.assign(events_to_favorable=["", "NA", *f["events_to_favorable"][2:]]))
    values = Evaluation.load(folder).programs["events_to_favorable"]
    assert values.isna().sum() >= 2 and values.dtype == float


def test_missing_file(folder):
    (folder / "curves.csv").unlink()
    with pytest.raises(InputError, match=r"curves\.csv: file not found.*casemix evaluate"):
        Evaluation.load(folder)


def test_missing_column(folder):
    _edit(folder, "casemix.csv", lambda f: f.drop(columns=["factor"]))
    with pytest.raises(InputError, match=r"casemix\.csv: missing 1 column factor"):
        Evaluation.load(folder)


def test_text_in_a_numeric_column_names_the_lines(folder):
    _edit(folder, "programs.csv", lambda f: f.assign(expected=["many", *f["expected"][1:]]))
    with pytest.raises(InputError, match=r"programs\.csv: column 'expected' .* lines 2;"):
        Evaluation.load(folder)


def test_repeated_program_and_unknown_verdict(folder):
    _edit(folder, "programs.csv", lambda f: f.assign(verdict=["excess", "great",
                                                              *f["verdict"][2:]]))
    _edit(folder, "programs.csv", lambda f: f.assign(program=["LV01", "LV01",
                                                              *f["program"][2:]]))
    with pytest.raises(InputError, match=r"program codes repeat on lines 2, 3"):
        Evaluation.load(folder)
    _edit(folder, "programs.csv", lambda f: f.assign(program=["LV01", "LV02",
                                                              *f["program"][2:]]))
    with pytest.raises(InputError, match=r"'verdict' has unknown values on lines 3; allowed"):
        Evaluation.load(folder)


def test_run_json_problems(folder):
    (folder / "run.json").write_text('{"outcome": "death"}', encoding="utf-8")
    with pytest.raises(InputError, match=r"run\.json: missing 6 keys horizon_days, cutoff"):
        Evaluation.load(folder)
    (folder / "run.json").write_text("{", encoding="utf-8")
    with pytest.raises(InputError, match=r"run\.json: not valid JSON"):
        Evaluation.load(folder)


def test_not_a_folder(tmp_path):
    with pytest.raises(InputError, match=r"not a folder"):
        Evaluation.load(tmp_path / "nothing")


def _edit_run(folder, change):
    path = folder / "run.json"
    run = json.loads(path.read_text(encoding="utf-8"))
    change(run)
    path.write_text(json.dumps(run), encoding="utf-8")


def test_prior_and_rules_come_from_run_json(folder):
    data = Evaluation.load(folder)
    assert (data.prior.shape, data.prior.rate, data.prior.method) == (2.0, 2.0, "fixed")
    assert data.rules.probability == 0.975 and data.rules.credible_level == 0.95
    assert data.corrections is None and data.out_of_range is None  # an older folder's files
    # a hierarchical prior written without its mixture components cannot be rebuilt
    _edit_run(folder, lambda run: run["prior"].update(method="hierarchical"))
    assert Evaluation.load(folder).prior is None


def test_a_bad_prior_or_rules_in_run_json_names_the_file(folder):
    _edit_run(folder, lambda run: run["prior"].update(shape=-1.0))
    with pytest.raises(InputError, match=r"run\.json: the prior cannot be rebuilt \(prior shape "
                                         r"must be a finite number > 0"):
        Evaluation.load(folder)
    _edit_run(folder, lambda run: run["prior"].update(shape=2.0))
    _edit_run(folder, lambda run: run["rules"].update(probablity=0.9))
    with pytest.raises(RulesError, match=r"run\.json: unknown key\(s\) in \[verdict\]: "
                                         r"probablity"):
        Evaluation.load(folder)
