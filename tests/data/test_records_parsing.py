"""The fast reading path of read_records gives what pandas' own parsing gives.

read_records reads CSV files with Arrow's CSV reader and parses each distinct cell of a
column once. The outside reference is pandas' own parser and parsers:
``pandas.read_csv(dtype=str, skipinitialspace=True, keep_default_na=False,
na_filter=False)`` (the reader's pandas path, forced here) followed by the whole-column
``pandas.to_datetime`` / ``pandas.to_numeric`` / string stripping of every cell. Frames,
exclusion ledgers, corrections, warnings and emptied-cell counts must be identical, on the
demo extracts and on the bad-row fixtures of test_records.py.
"""

from __future__ import annotations

import datetime as dt
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
from test_records import GOOD, MESSY, SPEC, _minimal, _write_csv

from casemix import demo
from casemix.data import records as reader
from casemix.data.spec import load_spec, spec_from_dict

TODAY = "2026-01-15"


def _read(path: Path, spec, **kwargs) -> tuple[reader.Records, list[str]]:
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        records = reader.read_records(path, spec, today=TODAY, **kwargs)
    return records, [str(w.message) for w in caught]


def _assert_same(ours: reader.Records, theirs: reader.Records) -> None:
    pd.testing.assert_frame_equal(ours.frame, theirs.frame)
    for name in ("exclusions", "corrections", "warnings", "emptied"):
        pd.testing.assert_frame_equal(getattr(ours, name), getattr(theirs, name), obj=name)
    assert ours.n_read == theirs.n_read


def _compare_with_pandas(path: Path, spec, monkeypatch, **kwargs) -> reader.Records:
    fast, fast_warnings = _read(path, spec, **kwargs)
    with monkeypatch.context() as patch:
        patch.setattr(reader, "_read_csv_arrow", lambda *args: None)  # pandas' read_csv
        slow, slow_warnings = _read(path, spec, **kwargs)
    _assert_same(fast, slow)
    assert fast_warnings == slow_warnings
    return fast


@pytest.fixture(scope="module")
def demo_files(tmp_path_factory) -> dict[str, Path]:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return demo.write_demo(tmp_path_factory.mktemp("demo"))


@pytest.mark.parametrize("extract", ["reference", "cohort"])
def test_demo_extracts_read_as_pandas_reads_them(demo_files, extract, monkeypatch) -> None:
    spec = load_spec(demo_files["spec"])
    for cutoff in (None, "2022-12-31"):
        records = _compare_with_pandas(demo_files[extract], spec, monkeypatch, cutoff=cutoff)
        assert records.n_read == len(records.frame) + len(records.exclusions)
    assert len(records.exclusions) > 0  # the demo's planted record problems are exercised


def test_bad_row_fixtures_read_as_pandas_reads_them(tmp_path: Path, monkeypatch) -> None:
    messy = _compare_with_pandas(_write_csv(tmp_path / "messy.csv", MESSY), SPEC, monkeypatch)
    assert len(messy.exclusions) == 12 and len(messy.corrections) == 3
    lines = [GOOD.format(id="A1").replace(",27.1", ",NA"),
             GOOD.format(id="A2").replace(",27.1", ",-"),
             GOOD.format(id="A3").replace(",0,deceased", ", null ,deceased"),
             GOOD.format(id="A4").replace("LV01", "lv 01"),
             GOOD.format(id="A5").replace(",45,", ",\u00a045 ,"),  # no-break space
             GOOD.format(id="A6").replace(",50,", ",  50,"),  # spaces skipped as pandas does
             GOOD.format(id="A7").replace("LV01", '"LV01"'),  # quoted
             GOOD.format(id="A8").replace("2023-01-05", "2023-02-30"),  # no such day
             GOOD.format(id="A9").replace("2023-01-05", "1500-01-05"),  # outside datetime64
             GOOD.format(id="B1").replace("2023-01-05", "2023-01-05T23:59:00")]
    path = _minimal(tmp_path / "tokens.csv", lines)
    records = _compare_with_pandas(path, SPEC, monkeypatch)
    assert records.emptied["token"].tolist() == ["NA", "null"]
    _compare_with_pandas(path, spec_from_dict({**SPEC.to_dict(), "records": {
        "missing": ["", "-", "NA"], "normalise_programs": True}}), monkeypatch)
    semicolons = _minimal(tmp_path / "s.csv", [line.replace(",", ";").replace("27.1", "27,1")
                                                for line in lines[:6]], sep=";")
    _compare_with_pandas(semicolons, spec_from_dict({**SPEC.to_dict(), "records": {
        "delimiter": ";", "decimal": ","}}), monkeypatch)
    dated = _minimal(tmp_path / "d.csv", [GOOD.format(id="A1").replace("2023-01-05", "05/01/2023"),
                                          GOOD.format(id="A2")])
    _compare_with_pandas(dated, spec_from_dict({**SPEC.to_dict(), "records": {
        "date_format": "%d/%m/%Y"}}), monkeypatch)


def test_files_the_fast_reader_leaves_to_pandas(tmp_path: Path, monkeypatch) -> None:
    # A quote after skipped spaces opens a quoted field for pandas; a row with a missing
    # field is padded by pandas; both go to pandas' reader, and read exactly as it reads them.
    spaced = _minimal(tmp_path / "q.csv", [GOOD.format(id="A1").replace(",LV01,", ', "LV,01",'),
                                           GOOD.format(id="A2")])
    assert reader._read_csv_arrow(spaced, SPEC, reader._check_header(spaced, SPEC)) is None
    assert _compare_with_pandas(spaced, SPEC, monkeypatch).frame["program"].iloc[0] == "LV,01"
    short = _minimal(tmp_path / "short.csv", [GOOD.format(id="A1"), GOOD.format(id="A2")[:-5]])
    assert reader._read_csv_arrow(short, SPEC, reader._check_header(short, SPEC)) is None
    _compare_with_pandas(short, SPEC, monkeypatch)
    bom = tmp_path / "bom.csv"
    bom.write_bytes(b"\xef\xbb\xbf" + _minimal(tmp_path / "plain.csv", [GOOD.format(
        id="A1")]).read_bytes().replace(b"\n", b"\r\n"))
    assert reader._read_csv_arrow(bom, SPEC, reader._check_header(bom, SPEC)) is not None
    _compare_with_pandas(bom, SPEC, monkeypatch)


def test_each_distinct_cell_parsed_once_gives_the_whole_column_result(demo_files) -> None:
    spec = load_spec(demo_files["spec"])
    raw = pd.read_csv(demo_files["reference"], dtype=str, keep_default_na=False)
    raw.loc[::7, "bmi"] = None  # missing cells among filled ones
    raw.loc[3, "donor_age"] = "forty"
    def text(name: str) -> pa.ChunkedArray:
        return pa.chunked_array([pa.array(raw[name].to_numpy(object), pa.string(),
                                          from_pandas=True)])

    columns = {
        "text": text("donor_type"),
        "dates": text("transplant_date"),
        "date32": pa.chunked_array([pa.array([dt.date.fromisoformat(v) if v else None
                                              for v in raw["death_date"]], pa.date32())]),
        "timestamps": pa.chunked_array([pa.array(pd.to_datetime(raw["last_seen_date"]))]),
        "integers": pa.chunked_array([pa.array(raw["cpra"].astype(int))]),
        "numbers": text("bmi"),
        "bad numbers": text("donor_age"),
    }
    parsers = {
        "text": reader.clean_text,
        "dates": lambda s: reader._parse_dates(s, spec.date_format),
        "date32": lambda s: reader._parse_dates(s, spec.date_format),
        "timestamps": lambda s: reader._parse_dates(s, spec.date_format),
        "integers": lambda s: reader._numbers(s, False),
        "numbers": lambda s: reader._numbers(s, False),
        "bad numbers": lambda s: reader._numbers(s, False),
    }
    for name, column in columns.items():
        ours = reader._by_distinct(column, parsers[name])
        whole = parsers[name](column.to_pandas())  # the whole column at once, as before
        ours, whole = (ours, whole) if isinstance(whole, tuple) else ((ours,), (whole,))
        for a, b in zip(ours, whole, strict=True):
            np.testing.assert_array_equal(a, b.to_numpy(), err_msg=name)


def test_parquet_categories_read_as_the_same_text_columns(demo_files, tmp_path: Path) -> None:
    # Dictionary-encoded (categorical) Parquet columns are parsed from their dictionaries: a
    # category no record holds must not count (here one that differs from a code in use
    # only in letter case, which would raise the codes-differ-in-case warning), and missing
    # cells must stay missing.
    raw = pd.read_csv(demo_files["reference"], dtype=str, keep_default_na=False)
    raw = raw.replace("", None)
    raw.loc[::11, "donor_type"] = None
    plain, coded = tmp_path / "plain.parquet", tmp_path / "coded.parquet"
    raw.to_parquet(plain, index=False)
    programs = sorted(raw["program"].dropna().unique())
    categorical = raw.astype({"donor_type": "category"})
    categorical["program"] = pd.Categorical(
        raw["program"], categories=[*programs, programs[0].lower(), "never used"])
    categorical.to_parquet(coded, index=False)
    spec = load_spec(demo_files["spec"])
    theirs, their_warnings = _read(plain, spec)
    ours, our_warnings = _read(coded, spec)
    _assert_same(ours, theirs)
    assert our_warnings == their_warnings
    assert not any("letter case" in text for text in our_warnings)
