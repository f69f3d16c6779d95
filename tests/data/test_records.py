"""Tests of read_records: every validation rule on messy files, and nothing dropped silently.

The record checks are bookkeeping, not computation: expected values are worked by hand from
the rows written in each test (the row, the rule it breaks, and the reason text).
"""

from __future__ import annotations

import datetime as dt
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from casemix import read_records
from casemix.data.records import format_rows, to_timestamp
from casemix.data.spec import spec_from_dict
from casemix.errors import InputError

HEADER = [
    "recipient_id",
    "program",
    "transplant_date",
    "last_seen_date",
    "graft_loss_date",
    "retransplant_date",
    "death_date",
    "recipient_age",
    "diabetes",
    "donor_type",
    "donor_age",
    "bmi",
]
SPEC = spec_from_dict(
    {
        "columns": {
            "recipient": "recipient_id",
            "program": "program",
            "transplant_date": "transplant_date",
            "last_seen": "last_seen_date",
        },
        "outcomes": {
            "graft_failure": {"dates": ["graft_loss_date", "retransplant_date", "death_date"]},
            "death": {"dates": ["death_date"]},
        },
        "covariates": {
            "recipient_age": {"kind": "numeric", "lower": 18, "upper": 90},
            "diabetes": {"kind": "binary", "missing": "indicator"},
            "donor_type": {"kind": "categorical", "reference": "deceased"},
            "donor_age": {"kind": "spline"},
            "bmi": {"kind": "numeric", "missing": "median"},
        },
        "analysis": {"cutoff": "2025-06-30", "horizon_days": 365},
    }
)

# One line per data row: (recipient, program, transplant, last seen, graft loss, retransplant,
# death, age, diabetes, donor type, donor age, bmi) and what the records stage must do with it.
MESSY = [
    ("R01", "LV01", "2023-01-05", "2024-02-01", "", "", "", "45", "0", "deceased", "50", "27.1"),
    (
        "R02",
        "LV02",
        "2023-02-05",
        "2024-03-01",
        "2023-09-01",
        "",
        "",
        "61",
        "1",
        "living",
        "38",
        "31",
    ),
    ("R03", "LV01", "2023-13-45", "2024-03-01", "", "", "", "50", "0", "deceased", "44", "22"),
    (
        "R04",
        "LV01",
        "2023-01-10",
        "2024-03-01",
        "",
        "",
        "2022-12-01",
        "50",
        "0",
        "deceased",
        "44",
        "22",
    ),
    ("R05", "LV02", "2023-01-10", "2022-11-30", "", "", "", "50", "0", "deceased", "44", "22"),
    ("R06", "", "2023-01-10", "2024-03-01", "", "", "", "50", "0", "deceased", "44", "22"),
    ("R07", "LV01", "2023-01-10", "2024-03-01", "", "", "", "120", "0", "deceased", "44", "22"),
    ("R08", "LV01", "2023-01-10", "2024-03-01", "", "", "", "", "0", "deceased", "44", "22"),
    ("R09", "LV02", "2025-07-02", "2025-07-20", "", "", "", "50", "0", "deceased", "44", "22"),
    (
        "R10",
        "LV01",
        "2023-03-01",
        "2023-06-01",
        "",
        "",
        "2023-08-15",
        "70",
        "0",
        "deceased",
        "60",
        "25",
    ),
    ("R11", "LV02", "2024-11-01", "2025-09-01", "", "", "", "33", "0", "living", "41", "24"),
    ("", "LV02", "2023-01-10", "2024-03-01", "", "", "", "50", "0", "deceased", "44", "22"),
    ("R13", "LV01", "2023-01-10", "2024-03-01", "", "", "", "abc", "0", "deceased", "44", "22"),
    ("R14", "LV01", "2023-01-10", "2024-03-01", "", "", "", "50", "maybe", "deceased", "44", "22"),
    ("R15", "", "2023-01-10", "2024-03-01", "", "", "", "10", "0", "deceased", "44", "22"),
    ("R16", "LV01", "2023-04-01", "2024-03-01", "", "", "", "52", "", "deceased", "57", ""),
    (
        "R17",
        " LV02 ",
        "2023-05-01T14:30:00",
        "2024-03-01",
        "",
        "",
        "",
        "48",
        "YES",
        "living",
        "35",
        "29",
    ),
    ("R18", "LV01", "2023-01-10", "", "", "", "", "50", "0", "deceased", "44", "22"),
    (
        "R19",
        "LV02",
        "2024-09-01",
        "2025-05-01",
        "",
        "",
        "2025-08-01",
        "58",
        "1",
        "deceased",
        "66",
        "26",
    ),
]
KEPT_ROWS = [1, 2, 10, 11, 16, 17, 19]  # 1-based data rows
EXCLUDED = {  # row -> reason, worked by hand from MESSY
    3: "transplant_date '2023-13-45' is not a date (expected YYYY-MM-DD)",
    4: "death_date 2022-12-01 is before the transplant date 2023-01-10",
    5: "last_seen_date 2022-11-30 is before the transplant date 2023-01-10",
    6: "program (column 'program') is missing",
    7: "recipient_age 120 is outside the plausible range 18 to 90",
    8: "recipient_age is missing and its missing policy is \"exclude\"",
    9: "transplanted 2025-07-02, after the cut-off 2025-06-30",
    12: "recipient id (column 'recipient_id') is missing",
    13: "recipient_age 'abc' is not a number",
    14: "diabetes 'maybe' is not binary",
    15: "program (column 'program') is missing; recipient_age 10 is outside the plausible "
    "range 18 to 90",
    18: "last-seen date (column 'last_seen_date') is missing",
}


def _write_csv(path: Path, rows: list[tuple], header: list[str] = HEADER) -> Path:
    lines = [",".join(header)] + [",".join(row) for row in rows]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture
def messy(tmp_path: Path):
    return read_records(_write_csv(tmp_path / "messy.csv", MESSY), SPEC)


def test_every_row_is_kept_or_excluded_with_its_reason(messy) -> None:
    assert messy.n_read == len(MESSY) == len(messy.frame) + len(messy.exclusions)
    assert list(messy.frame.index) == [r - 1 for r in KEPT_ROWS]  # 0-based file positions
    assert list(messy.exclusions.columns) == ["row", "recipient", "reason", "program", "kind"]
    assert dict(zip(messy.exclusions["row"], messy.exclusions["reason"], strict=True)) == EXCLUDED
    recipients = messy.exclusions.set_index("row")["recipient"]
    assert recipients[3] == "R03" and pd.isna(recipients[12])
    programs = messy.exclusions.set_index("row")["program"]
    assert programs[3] == "LV01" and pd.isna(programs[6])


def test_kept_rows_are_coerced(messy) -> None:
    frame = messy.frame
    assert frame["transplant_date"].dtype.kind == "M"
    assert frame.loc[16, "transplant_date"] == pd.Timestamp("2023-05-01")  # time of day dropped
    assert frame.loc[16, "program"] == "LV02"  # stripped
    assert frame["diabetes"].tolist()[:2] == [0.0, 1.0]
    assert frame.loc[16, "diabetes"] == 1.0  # "YES"
    assert np.isnan(frame.loc[15, "diabetes"]) and np.isnan(frame.loc[15, "bmi"])  # kept
    assert frame["recipient_age"].dtype == np.float64
    assert frame.loc[1, "donor_type"] == "living"


def test_corrections_are_listed_and_counted(messy) -> None:
    frame = messy.frame
    # R10: death 2023-08-15 after last seen 2023-06-01 -> follow-up extended to the death.
    assert frame.loc[9, "last_seen_date"] == pd.Timestamp("2023-08-15")
    # R11: last seen 2025-09-01 after the cut-off -> truncated to 2025-06-30.
    assert frame.loc[10, "last_seen_date"] == pd.Timestamp("2025-06-30")
    # R19: death 2025-08-01 after the cut-off 2025-06-30: outside the complete period, so it
    # does not lengthen follow-up past the last real contact (last seen 2025-05-01 stays).
    assert frame.loc[18, "last_seen_date"] == pd.Timestamp("2025-05-01")
    assert messy.corrections.to_dict("list") == {
        "row": [10, 11, 19],
        "recipient": ["R10", "R11", "R19"],
        "program": ["LV01", "LV02", "LV02"],
        "kind": ["event_after_last_seen", "last_seen_after_cutoff", "event_after_cutoff"],
    }
    assert messy.warnings.to_dict("list") == {
        "program": ["LV01", "LV02", "LV02"],
        "kind": ["event_after_last_seen", "event_after_cutoff", "last_seen_after_cutoff"],
        "count": [1, 1, 1],
    }
    assert messy.cutoff == pd.Timestamp("2025-06-30")


def test_cutoff_argument_overrides_the_spec(tmp_path: Path) -> None:
    path = _write_csv(tmp_path / "m.csv", MESSY)
    later = read_records(path, SPEC, cutoff=dt.date(2025, 12, 31))
    assert 9 not in set(later.exclusions["row"])  # R09 transplanted 2025-07-02 is now inside
    assert later.frame.loc[10, "last_seen_date"] == pd.Timestamp("2025-09-01")
    none = read_records(path, spec_from_dict({**SPEC.to_dict(), "analysis": {}}))
    assert none.cutoff is None and "last_seen_after_cutoff" not in set(none.warnings["kind"])


def test_spec_may_be_a_path(tmp_path: Path) -> None:
    spec_path = tmp_path / "spec.toml"
    spec_path.write_text(
        '[columns]\nrecipient = "recipient_id"\nprogram = "program"\n'
        'transplant_date = "transplant_date"\nlast_seen = "last_seen_date"\n'
        '[outcomes.death]\ndates = ["death_date"]\n',
        encoding="utf-8",
    )
    records = read_records(_write_csv(tmp_path / "m.csv", MESSY[:2]), spec_path)
    assert records.spec.path == spec_path and len(records.frame) == 2


def test_parquet_reads_like_csv(tmp_path: Path) -> None:
    csv = read_records(_write_csv(tmp_path / "m.csv", MESSY), SPEC)
    raw = pd.read_csv(tmp_path / "m.csv", dtype=str)
    typed = raw.copy()
    typed["transplant_date"] = pd.to_datetime(
        raw["transplant_date"], format="ISO8601", errors="coerce"
    )
    typed["death_date"] = [  # datetime.date objects, as pyarrow date32 columns come back
        dt.date.fromisoformat(v) if isinstance(v, str) else None for v in raw["death_date"]
    ]
    typed["donor_age"] = pd.to_numeric(raw["donor_age"])
    # Row 3's unreadable transplant date becomes NaT in a typed column: a missing date.
    typed.to_parquet(tmp_path / "m.parquet")
    pq = read_records(tmp_path / "m.parquet", SPEC)
    pd.testing.assert_frame_equal(pq.frame, csv.frame, check_dtype=False)
    expected = {**EXCLUDED, 3: "transplant date (column 'transplant_date') is missing"}
    assert dict(zip(pq.exclusions["row"], pq.exclusions["reason"], strict=True)) == expected


def test_explicit_date_format(tmp_path: Path) -> None:
    spec = spec_from_dict({**SPEC.to_dict(), "records": {"date_format": "%d/%m/%Y"}})
    rows = [
        ("A1", "LV01", "05/01/2023", "01/02/2024", "", "", "", "45", "0", "deceased", "50", "27"),
        ("A2", "LV01", "2023-01-06", "01/02/2024", "", "", "", "45", "0", "deceased", "50", "27"),
    ]
    records = read_records(_write_csv(tmp_path / "d.csv", rows), spec)
    assert records.frame.loc[0, "transplant_date"] == pd.Timestamp("2023-01-05")
    assert records.exclusions["reason"].tolist() == [
        "transplant_date '2023-01-06' is not a date (expected %d/%m/%Y)"
    ]


# --- fatal problems -----------------------------------------------------------------------


def test_missing_column_suggests_the_closest(tmp_path: Path) -> None:
    header = ["programme" if h == "program" else h for h in HEADER]
    path = _write_csv(tmp_path / "m.csv", MESSY[:2], header)
    with pytest.raises(
        InputError,
        match=r"records file '.*m.csv' lacks 1 column named in the spec: 'program' "
        r"\(closest: 'programme'\)\. Rename the column in the file or change the spec",
    ):
        read_records(path, SPEC)


def test_unreadable_files(tmp_path: Path) -> None:
    with pytest.raises(InputError, match=r"records file '.*absent.csv' does not exist"):
        read_records(tmp_path / "absent.csv", SPEC)
    (tmp_path / "x.xlsx").write_bytes(b"PK")
    with pytest.raises(InputError, match=r"has suffix '.xlsx'; casemix reads .csv and .parquet"):
        read_records(tmp_path / "x.xlsx", SPEC)
    (tmp_path / "empty.csv").write_text("", encoding="utf-8")
    with pytest.raises(InputError, match=r"'.*empty.csv' is empty; it needs a header row"):
        read_records(tmp_path / "empty.csv", SPEC)
    _write_csv(tmp_path / "header.csv", [])
    with pytest.raises(InputError, match=r"'.*header.csv' has no data rows \(only a header\)"):
        read_records(tmp_path / "header.csv", SPEC)
    (tmp_path / "broken.parquet").write_bytes(b"not parquet at all")
    with pytest.raises(InputError, match=r"'.*broken.parquet' cannot be read \(.*\); save it"):
        read_records(tmp_path / "broken.parquet", SPEC)
    (tmp_path / "latin.csv").write_bytes(",".join(HEADER).encode() + b"\n\xff\xfe,\n")
    with pytest.raises(InputError, match=r"'.*latin.csv' cannot be read .* as UTF-8 CSV"):
        read_records(tmp_path / "latin.csv", SPEC)


def test_dates_in_another_format_are_fatal(tmp_path: Path) -> None:
    rows = [
        (
            f"D{i}",
            "LV01",
            f"0{i}/01/2023",
            "2024-02-01",
            "",
            "",
            "",
            "45",
            "0",
            "deceased",
            "50",
            "27",
        )
        for i in range(1, 5)
    ]
    with pytest.raises(
        InputError,
        match=r"column 'transplant_date' is not a date in 4 of 4 filled rows \(for example "
        r"'01/01/2023'.*set date_format in the \[records\] table",
    ):
        read_records(_write_csv(tmp_path / "m.csv", rows), SPEC)


def test_numbers_as_text_are_fatal(tmp_path: Path) -> None:
    rows = [(*row[:7], "forty", *row[8:]) for row in MESSY[:3]] + list(MESSY[3:4])
    with pytest.raises(
        InputError,
        match=r"column 'recipient_age' \(covariate recipient_age\) is not a number in 3 of 4 "
        r"filled rows \(for example 'forty'\); use numbers",
    ):
        read_records(_write_csv(tmp_path / "m.csv", rows), SPEC)


def test_duplicate_ids_are_fatal_and_shown(tmp_path: Path) -> None:
    rows = [MESSY[0], MESSY[1], MESSY[0], MESSY[1], (" R01", *MESSY[0][1:])]
    with pytest.raises(
        InputError,
        match=r"2 recipient ids occur more than once in column 'recipient_id' \('R01' in rows "
        r"1, 3, 5; 'R02' in rows 2, 4\)\. Each transplant needs its own id",
    ):
        read_records(_write_csv(tmp_path / "m.csv", rows), SPEC)


def test_one_duplicate_id_is_counted_in_the_singular(tmp_path: Path) -> None:
    rows = [MESSY[0], MESSY[1], MESSY[0]]
    with pytest.raises(InputError, match=r"1 recipient id occurs more than once in column "):
        read_records(_write_csv(tmp_path / "m.csv", rows), SPEC)


def test_helpers() -> None:
    assert format_rows([0]) == "row 1"
    assert format_rows(range(7)) == "rows 1, 2, 3, 4, 5 and 2 more"
    assert to_timestamp("2025-06-30T10:00", "cut-off") == pd.Timestamp("2025-06-30")
    with pytest.raises(InputError, match=r"cut-off '30/06/2025' is not a date; give it as"):
        to_timestamp("30/06/2025", "cut-off")


# --- property: nothing dropped silently, on random messy files ----------------------------

_CELL = {
    "transplant_date": st.sampled_from(["2023-01-05", "2024-06-30", "2025-07-10", "", "bad"]),
    "last_seen_date": st.sampled_from(["2023-01-01", "2024-01-05", "2025-08-01", "", "x"]),
    "death_date": st.sampled_from(["", "", "2023-01-04", "2024-03-03", "31/12/2024"]),
    "program": st.sampled_from(["LV01", "LV02", " LV03", ""]),
    "recipient_age": st.sampled_from(["45", "17", "91", "", "n/a", "60.5"]),
    "diabetes": st.sampled_from(["0", "1", "", "yes", "2"]),
}


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.fixed_dictionaries(_CELL), min_size=1, max_size=25))
def test_rows_read_equal_kept_plus_excluded(cells: list[dict]) -> None:
    rows = [
        (
            f"P{i}",
            c["program"],
            c["transplant_date"],
            c["last_seen_date"],
            "",
            "",
            c["death_date"],
            c["recipient_age"],
            c["diabetes"],
            "deceased",
            "50",
            "25",
        )
        for i, c in enumerate(cells)
    ]
    with tempfile.TemporaryDirectory() as folder:
        try:
            records = read_records(_write_csv(Path(folder) / "p.csv", rows), SPEC)
        except InputError as exc:  # a mostly-unreadable column: refused as a whole, loudly
            assert "is not" in str(exc) and "filled rows" in str(exc)
            return
    excluded = set(records.exclusions["row"] - 1)
    assert records.n_read == len(rows) == len(records.frame) + len(records.exclusions)
    assert excluded.isdisjoint(records.frame.index)
    assert excluded | set(records.frame.index) == set(range(len(rows)))
    assert records.exclusions["reason"].str.len().min() > 0 if excluded else True


# --- every record accounted for (issue: an analyst's own extract) -------------------------


def _minimal(path: Path, lines: list[str], sep: str = ",") -> Path:
    header = ["recipient_id", "program", "transplant_date", "last_seen_date", "graft_loss_date",
              "retransplant_date", "death_date", "recipient_age", "diabetes", "donor_type",
              "donor_age", "bmi"]
    path.write_text(sep.join(header) + "\n" + "\n".join(lines) + "\n", encoding="utf-8")
    return path


GOOD = "{id},LV01,2023-01-05,2024-02-01,,,,45,0,deceased,50,27.1"


def test_a_date_after_today_excludes_the_record_with_its_own_reason(tmp_path: Path) -> None:
    # Death dated 2031 with last contact on day 133: without a cut-off it would have
    # stretched follow-up to 2031; with one it would have made a one-year survivor.
    lines = [GOOD.format(id="A1"), "A2,LV01,2023-01-05,2023-05-18,,,2031-02-03,45,0,deceased,50,27"]
    records = read_records(_minimal(tmp_path / "f.csv", lines), SPEC, today="2026-01-15")
    assert records.exclusions["kind"].tolist() == ["date after today"]
    assert records.exclusions["reason"].iloc[0] == (
        "death_date 2031-02-03 is after today (2026-01-15); a date that cannot be true makes "
        "the whole record doubtful")
    assert records.n_read == len(records.frame) + len(records.exclusions) == 2
    # The same record checked as of a later day is kept, and its event after the cut-off
    # does not lengthen follow-up (last seen stays at the real contact).
    later = read_records(tmp_path / "f.csv", SPEC, today="2032-01-01")
    assert later.frame.loc[1, "last_seen_date"] == pd.Timestamp("2023-05-18")
    assert later.corrections["kind"].tolist() == ["event_after_cutoff"]


def test_an_event_after_the_cut_off_does_not_make_a_survivor(tmp_path: Path) -> None:
    from casemix import build_cohort

    lines = ["A2,LV01,2024-01-05,2024-05-17,,,2025-09-03,45,0,deceased,50,27"]
    records = read_records(_minimal(tmp_path / "f.csv", lines), SPEC, today="2026-01-15")
    cohort = build_cohort(records, "death", 365, "2025-06-30")
    # Follow-up ends at the last contact, day 133 (date(2024, 5, 17) - date(2024, 1, 5)),
    # not at the horizon: the death after the cut-off says nothing the data are complete for.
    assert cohort.frame[["time", "event"]].values.tolist() == [[133.0, 0]]
    earlier = build_cohort(records, "death", 365, "2025-01-31")  # cohort cut-off before it too
    assert earlier.frame[["time", "event"]].values.tolist() == [[133.0, 0]]


def test_a_stray_quote_that_merges_lines_is_refused_with_its_line(tmp_path: Path) -> None:
    lines = [GOOD.format(id=f"A{i}") for i in range(1, 9)]
    lines[2] = lines[2].replace(",LV01,", ',"LV01,')  # the quote opens on file line 4
    lines[6] = lines[6].replace(",LV01,", ',LV"01,')  # and closes on line 8
    path = _minimal(tmp_path / "q.csv", lines)
    # Without the check the reader merged lines 4-8 into one record: 4 records, no error.
    with pytest.raises(InputError, match=r"data row 3, starts on line 4 and its column "
                       r"'program' runs over 5 lines: a double quote \(\"\) in or near line 4.*"
                       r"\(4 records parsed from 8 data lines\)"):
        read_records(path, SPEC)
    lines[6] = GOOD.format(id="A7")  # a quote never closed
    with pytest.raises(InputError, match=r"a double quote \(\"\) on line 4 \(data row 3\) "
                       r"opens a field that is never closed"):
        read_records(_minimal(tmp_path / "q.csv", lines), SPEC)


def test_a_header_naming_a_column_twice_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "h.csv"
    path.write_text(",".join([*HEADER, "program"]) + "\n" + GOOD.format(id="A1") + ",LV09\n")
    with pytest.raises(InputError, match=r"the header names 'program' more than once"):
        read_records(path, SPEC)


def test_program_codes_equal_up_to_case_warn_and_may_be_normalised(tmp_path: Path) -> None:
    from casemix.errors import DataWarning

    lines = [GOOD.format(id="A1"), GOOD.format(id="A2").replace("LV01", "lv01"),
             GOOD.format(id="A3").replace("LV01", "LV 01"), GOOD.format(id="A4")]
    path = _minimal(tmp_path / "p.csv", lines)
    with pytest.warns(DataWarning, match=r"1 program code differ.*'LV 01' and 'LV01' and "
                      r"'lv01'.*normalise_programs = true"):
        records = read_records(path, SPEC)
    assert sorted(records.frame["program"].unique()) == ["LV 01", "LV01", "lv01"]
    spec = spec_from_dict({**SPEC.to_dict(), "records": {"normalise_programs": True}})
    merged = read_records(path, spec)
    assert merged.frame["program"].unique().tolist() == ["LV01"]


def test_missing_value_tokens_are_explicit_counted_and_configurable(tmp_path: Path) -> None:
    lines = [GOOD.format(id="A1").replace(",27.1", ",NA"), GOOD.format(id="A2").replace(
        ",27.1", ",-"), GOOD.format(id="A3").replace(",0,deceased", ",null,deceased")]
    path = _minimal(tmp_path / "m.csv", lines)
    records = read_records(path, SPEC)
    assert records.emptied.to_dict("list") == {
        "token": ["NA", "null"], "column": ["bmi", "diabetes"], "cells": [1, 1]}
    assert records.exclusions["reason"].tolist() == ["bmi '-' is not a number"]
    spec = spec_from_dict({**SPEC.to_dict(), "records": {"missing": ["", "-", "NA"]}})
    custom = read_records(path, spec)
    assert custom.emptied["token"].tolist() == ["-", "NA"]
    assert custom.exclusions["reason"].tolist() == ["diabetes 'null' is not binary"]


def test_semicolons_are_detected_and_delimiter_and_decimal_comma_are_read(tmp_path: Path):
    lines = ["A1;LV01;2023-01-05;2024-02-01;;;;45;0;deceased;50;27,5"]
    path = _minimal(tmp_path / "s.csv", lines, sep=";")
    with pytest.raises(InputError, match=r"separated by ';'.*Set delimiter = \";\" in the "
                       r"\[records\] table"):
        read_records(path, SPEC)
    spec = spec_from_dict({**SPEC.to_dict(), "records": {"delimiter": ";", "decimal": ","}})
    records = read_records(path, spec)
    assert records.frame["bmi"].tolist() == [27.5]
    assert spec_from_dict(spec.to_dict()) == spec


def test_messages_name_the_file_column_and_the_covariate_in_brackets(tmp_path: Path) -> None:
    spec = spec_from_dict({**SPEC.to_dict(), "covariates": [
        {"name": "age", "column": "recipient_age", "kind": "numeric", "lower": 18}]})
    lines = [GOOD.format(id="A1").replace(",45,", ",12,"),
             GOOD.format(id="A2").replace(",45,", ",,")]
    records = read_records(_minimal(tmp_path / "c.csv", lines), spec)
    assert records.exclusions["reason"].tolist() == [
        "recipient_age (age) 12 is outside the plausible range 18 to inf",
        "recipient_age (age) is missing and its missing policy is \"exclude\""]


def test_records_have_a_short_repr(messy) -> None:
    text = repr(messy)
    assert text.startswith("<Records '") and text.endswith(
        ": 19 read, 7 kept, 12 excluded, 3 corrections; cut-off 2025-06-30>")
