"""Read and validate a registry extract (CSV or Parquet) into :class:`Records`.

Problems with the whole file (missing column, unreadable file, no rows, a column of the wrong
type in most rows, duplicate recipient ids) raise :class:`~casemix.errors.InputError`. Problems
with one record exclude that record with a reason (``Records.exclusions``); corrections that
keep a record (follow-up extended to an event recorded after last-seen, an event after the
cut-off set aside, last-seen truncated at the cut-off) are listed per record in
``Records.corrections`` and counted per program in ``Records.warnings``. Nothing is dropped
silently: ``n_read == len(frame) + len(exclusions)``, the number of records parsed from a CSV
file is checked against its lines, and every cell a missing-value token emptied is counted
(``Records.emptied``).

Row numbers: ``Records.frame`` keeps the 0-based position of each record in the file as its
index; ``row`` in ``exclusions`` and ``corrections`` and the row numbers in messages are
1-based *data* row numbers (the first record under the header is row 1, which a spreadsheet
shows on line 2). Reading is done with Arrow (its CSV reader, every column as text, with
pandas' ``read_csv`` for the files it refuses or could read otherwise; Parquet columns as
stored, typed) and Arrow compute functions (stripping, missing-value tokens, duplicate
ids); cells are parsed with pandas (``to_datetime``, ``to_numeric``), each distinct cell of
a text or date column once, the result taken back to its rows. Only the bookkeeping is
written here.
"""

from __future__ import annotations

import csv
import datetime as dt
import mmap
import re
import warnings
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from casemix.data.spec import Covariate, Spec, closest, load_spec
from casemix.errors import DataWarning, InputError, plural

__all__ = [
    "WARNING_KINDS",
    "Records",
    "clean_text",
    "count_by_kind",
    "format_rows",
    "is_text_column",
    "nanoseconds",
    "read_records",
    "to_timestamp",
]

#: Kinds of correction that keep a record, as they appear in ``Records.warnings``.
WARNING_KINDS = ("event_after_last_seen", "event_after_cutoff", "last_seen_after_cutoff")

_CSV_SUFFIXES = (".csv", ".txt")
_PARQUET_SUFFIXES = (".parquet", ".pq")
_BINARY_TEXT = {
    "1": 1.0, "0": 0.0, "1.0": 1.0, "0.0": 0.0, "true": 1.0, "false": 0.0,
    "yes": 1.0, "no": 0.0, "y": 1.0, "n": 0.0, "t": 1.0, "f": 0.0,
}  # fmt: skip
# A column is of the wrong type (fatal) when more than this share of its filled cells, and at
# least _WRONG_TYPE_MIN cells, fail; otherwise the failing records are excluded one by one
# (sparse event-date columns often have a single filled cell).
_WRONG_TYPE_SHARE = 0.5
_WRONG_TYPE_MIN = 3
_SHOW = 5  # how many examples a message shows
_DISTINCT_FROM = 1000  # clean_text works per distinct value on longer columns of text


@dataclass(frozen=True, repr=False, eq=False)
class Records:
    """A validated extract.

    Attributes
    ----------
    frame : pandas.DataFrame
        The kept records, every column of the file under its own name; the spec's date
        columns as ``datetime64`` (whole days), numeric, spline and binary covariates as
        float (binary 0.0/1.0), ids, programs, categorical covariates and strata as text.
        Index: 0-based position of the record in the file.
    exclusions : pandas.DataFrame
        One row per excluded record: ``row`` (1-based data row, header not counted),
        ``recipient`` (id, or missing), ``reason`` (all reasons, joined by ``"; "``),
        ``program`` (or missing), sorted by row.
    warnings : pandas.DataFrame
        ``program``, ``kind`` (one of :data:`WARNING_KINDS`), ``count``: kept records that
        were corrected, counted per program.
    corrections : pandas.DataFrame
        ``row``, ``recipient``, ``program``, ``kind``: one line per correction.
    n_read : int
        Records read from the file; always ``len(frame) + len(exclusions)``.
    source : pathlib.Path
        The file read.
    spec : Spec
        The spec used.
    cutoff : pandas.Timestamp or None
        The cut-off applied (transplants after it excluded, last-seen truncated to it).
    today : pandas.Timestamp or None
        The day the records were checked against (a date after it excludes the record).
    emptied : pandas.DataFrame
        ``token``, ``column``, ``cells``: how many cells of each column each missing-value
        token emptied (CSV files only; tokens that emptied nothing are not listed).
    """

    frame: pd.DataFrame
    exclusions: pd.DataFrame
    warnings: pd.DataFrame
    corrections: pd.DataFrame
    n_read: int
    source: Path
    spec: Spec
    cutoff: pd.Timestamp | None = None
    today: pd.Timestamp | None = None
    emptied: pd.DataFrame | None = None

    def __repr__(self) -> str:
        cut = "none" if self.cutoff is None else f"{self.cutoff:%Y-%m-%d}"
        return (
            f"<Records '{self.source}': {self.n_read} read, {len(self.frame)} kept, "
            f"{len(self.exclusions)} excluded, {len(self.corrections)} corrections; "
            f"cut-off {cut}>"
        )


def format_rows(index: Iterable[object], limit: int = _SHOW) -> str:
    """Return ``"rows 3, 8, 12 and 4 more"`` from 0-based record positions (shown 1-based).

    Parameters
    ----------
    index : iterable
        Record positions (a Records frame index); non-integer labels are shown as given.
    limit : int, default 5
        How many to show.
    """
    labels = [str(i + 1) if isinstance(i, (int, np.integer)) else str(i) for i in index]
    shown = ", ".join(labels[:limit])
    more = f" and {len(labels) - limit} more" if len(labels) > limit else ""
    return f"{'row' if len(labels) == 1 else 'rows'} {shown}{more}"


def to_timestamp(value: object, name: str) -> pd.Timestamp | None:
    """Turn a date, datetime, ISO string or Timestamp into a whole-day Timestamp (None stays).

    Raises
    ------
    InputError
        ``value`` is not a date; the message names ``name``.
    """
    if value is None:
        return None
    stamp = pd.NaT
    if isinstance(value, str):
        # ISO 8601 only: a guessed day/month order would silently move a cut-off.
        stamp = pd.to_datetime(value.strip(), format="ISO8601", errors="coerce")
    elif isinstance(value, (dt.date, np.datetime64)):
        stamp = pd.Timestamp(value)
    if not pd.isna(stamp):
        return stamp.tz_localize(None).normalize() if stamp.tzinfo else stamp.normalize()
    raise InputError(f"{name} {value!r} is not a date; give it as 2025-06-30.")


class _Ledger:
    """Exclusion reasons, collected per record position."""

    def __init__(self, n: int) -> None:
        self.reasons: dict[int, list[str]] = {}
        self.kinds: dict[int, list[str]] = {}
        self.excluded = np.zeros(n, dtype=bool)
        self._bad_cells: dict[str, np.ndarray] = {}

    def exclude(self, mask: np.ndarray, kind: str, reason: str | Callable[[int], str],
                bad_cell: str | None = None) -> None:
        """Add ``reason`` (text, or a function of the position) to every masked record.

        ``kind`` is the short category of the reason, free of any record's values, for counts
        that may be published. ``bad_cell`` names the column whose cell could not be read, so
        that the same cell is not reported again as missing.
        """
        for pos in np.flatnonzero(mask):
            text = reason if isinstance(reason, str) else reason(int(pos))
            self.reasons.setdefault(int(pos), []).append(text)
            if kind not in self.kinds.setdefault(int(pos), []):
                self.kinds[int(pos)].append(kind)
        self.excluded |= mask
        if bad_cell is not None:
            self._bad_cells[bad_cell] = mask

    def unreadable(self, column: str) -> np.ndarray:
        """Records whose cell in ``column`` could not be read."""
        return self._bad_cells.get(column, np.zeros_like(self.excluded))


def read_records(
    path: str | Path, spec: Spec | str | Path, *, cutoff: object = None, today: object = None
) -> Records:
    """Read a CSV or Parquet extract and validate it against a spec.

    Parameters
    ----------
    path : str or pathlib.Path
        ``.csv`` (UTF-8, header row) or ``.parquet`` file, one row per recipient.
    spec : Spec or str or pathlib.Path
        The study spec, or the path of its TOML file.
    cutoff : date-like, optional
        Data cut-off. Transplants after it are excluded; last-seen dates after it are
        truncated to it (counted as ``last_seen_after_cutoff``). Default: the spec's
        ``analysis.cutoff``; with neither, no cut-off is applied.
    today : date-like, optional
        A record with any date after this day is excluded (``date after today``): such a
        date cannot be true. Default: the computer's date today.

    Returns
    -------
    Records

    Raises
    ------
    InputError
        Unreadable file, no rows, a missing column, a column of the wrong type in most rows,
        duplicate recipient ids. The message names the file and the column.
    """
    spec = spec if isinstance(spec, Spec) else load_spec(spec)
    path = Path(path)
    stamp = to_timestamp(cutoff if cutoff is not None else spec.analysis.cutoff, "cut-off")
    day = to_timestamp(today if today is not None else dt.date.today(), "today")
    table, emptied = _read_table(path, spec)
    _check_columns(table.column_names, spec, path)
    ledger = _Ledger(table.num_rows)
    ids = _id_text(table[spec.columns.recipient])
    parsed = {spec.columns.recipient: ids.to_numpy(zero_copy_only=False)}
    parsed[spec.columns.program] = _by_distinct(
        table[spec.columns.program], lambda s: _program_codes(clean_text(s), spec, path))
    if spec.strata is not None:
        parsed[spec.strata] = _by_distinct(table[spec.strata], clean_text)
    _check_duplicates(ids, spec, path)
    _parse_date_columns(table, parsed, spec, path, ledger)
    for cov in spec.covariates:
        _parse_covariate(table, parsed, cov, path, ledger, spec.decimal)
    frame = _frame(table, parsed, path)
    del table, parsed, ids
    pa.default_memory_pool().release_unused()  # the file's buffers are not needed any more
    _check_records(frame, spec, stamp, ledger, day)
    excluded = ledger.excluded
    exclusions = _exclusion_frame(frame, spec, ledger, excluded)
    # The full frame is not kept: without exclusions it becomes the kept frame itself, else
    # one copy of the kept rows (take, unlike a masked .loc, needs no second copy to write).
    kept = frame.take(np.flatnonzero(~excluded)) if excluded.any() else frame
    kept, corrections = _correct(kept, spec, stamp)
    return Records(
        frame=kept,
        exclusions=exclusions,
        warnings=_warning_counts(corrections),
        corrections=corrections,
        n_read=len(frame),
        source=path,
        spec=spec,
        cutoff=stamp,
        today=day,
        emptied=emptied,
    )


def count_by_kind(table: pd.DataFrame, key: str = "reason") -> pd.DataFrame:
    """Count the rows of an exclusions or corrections table per ``kind``, most frequent first.

    Kinds carry no record's own values (dates, ages), so the counts can be published. A record
    excluded for several kinds counts once, under their joint kind (``"a; b"``), so that the
    counts add up to the records excluded. Used by ``casemix check`` and the public tables.

    Parameters
    ----------
    table : pandas.DataFrame
        With a ``kind`` column (one row per excluded record, or per correction).
    key : str, default "reason"
        Name of the output column holding the kind.

    Returns
    -------
    pandas.DataFrame
        Columns ``key``, ``records``; ties sorted by kind.
    """
    counts = (
        table.groupby(table["kind"].rename(key), sort=True)
        .size()
        .rename("records")
        .reset_index()
    )
    return counts.sort_values(["records", key], ascending=[False, True], kind="stable",
                              ignore_index=True)


def _read_table(path: Path, spec: Spec) -> tuple[pa.Table, pd.DataFrame]:
    """The file as an Arrow table (CSV: every column as text), and the cells emptied."""
    if not path.is_file():
        raise InputError(f"records file '{path}' does not exist; check the path.")
    suffix = path.suffix.lower()
    try:
        if suffix in _PARQUET_SUFFIXES:
            table = _read_parquet(path)
        elif suffix in _CSV_SUFFIXES:
            header = _check_header(path, spec)
            table = _read_csv_arrow(path, spec, header)
            if table is None:
                table = _read_csv_pandas(path, spec)
        else:
            raise InputError(
                f"records file '{path}' has suffix '{path.suffix}'; casemix reads .csv and "
                ".parquet files. Rename or convert the file."
            )
    except pd.errors.EmptyDataError:
        raise InputError(f"records file '{path}' is empty; it needs a header row.") from None
    except pd.errors.ParserError as exc:
        opened = re.search(r"EOF inside string starting at row (\d+)", str(exc))
        if opened is None:
            raise InputError(
                f"records file '{path}' cannot be read as CSV ({exc}); check the separator "
                "(delimiter in the [records] table of the spec) and the quotes."
            ) from None
        row = int(opened.group(1))  # 0-based line of the file = 1-based data row
        raise InputError(
            f"records file '{path}': a double quote (\") on line {row + 1} (data row {row}) "
            "opens a field that is never closed, so every later line would be read into it. "
            "Remove the stray quote, or quote the field on both sides."
        ) from None
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        if isinstance(exc, InputError):
            raise
        raise InputError(
            f"records file '{path}' cannot be read ({type(exc).__name__}: {exc}); save it "
            "as UTF-8 CSV with a header row, or as Parquet."
        ) from None
    if table.num_rows == 0:
        raise InputError(f"records file '{path}' has no data rows (only a header).")
    if suffix in _PARQUET_SUFFIXES:
        return table, _emptied_frame([])
    return _apply_missing_tokens(table, spec.missing_tokens, spec.columns.recipient)


def _read_parquet(path: Path) -> pa.Table:
    """The Parquet file's columns as stored (typed), without a stored pandas index."""
    import pyarrow.parquet as pq

    table = pq.read_table(path)
    index = (table.schema.pandas_metadata or {}).get("index_columns", [])
    return table.drop_columns([c for c in index if isinstance(c, str)])


def _read_csv_arrow(path: Path, spec: Spec, header: list[str]) -> pa.Table | None:
    """Read a CSV file with Arrow's reader, every column as text, no missing-value guessing.

    Gives the cells pandas' reader gives with ``dtype=str, skipinitialspace=True,
    na_filter=False``, or None where the two could differ (a quote in the header, a quote
    after leading spaces, a file Arrow refuses: ragged rows, bad UTF-8, an unclosed quote);
    the caller then reads the file with pandas, whose messages name the problem. Every column
    but the recipient ids comes dictionary-encoded (the reader builds the dictionaries while
    it converts), so that the checks below and the parsing look at each distinct cell once.
    """
    import pyarrow.csv as pacsv

    if not header or any('"' in name for name in header):
        return None
    fields = [f"f{i}" for i in range(len(header))]
    coded = pa.dictionary(pa.int32(), pa.string())
    kinds = {field: pa.string() if name.strip() == spec.columns.recipient else coded
             for field, name in zip(fields, header, strict=True)}
    try:
        table = pacsv.read_csv(
            path,
            read_options=pacsv.ReadOptions(skip_rows=1, column_names=fields),
            parse_options=pacsv.ParseOptions(delimiter=spec.delimiter, newlines_in_values=True),
            convert_options=pacsv.ConvertOptions(
                column_types=kinds, strings_can_be_null=False,
                quoted_strings_can_be_null=False, null_values=[],
            ),
        ).unify_dictionaries()
    except pa.ArrowException:
        return None
    with path.open("rb") as handle, mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ) as data:
        quoted = data.find(b'"') >= 0  # without a quote no cell can hold a line break
    columns = []
    for column in table.columns:
        if pa.types.is_dictionary(column.type):
            column = column.combine_chunks()
        cells = _cells(column)
        if pc.any(pc.starts_with(cells, " ")).as_py():  # skipinitialspace
            if quoted and pc.any(pc.match_substring_regex(cells, '^ +"')).as_py():
                return None
            cells = pc.utf8_ltrim(cells, characters=" ")
            column = (pa.DictionaryArray.from_arrays(column.indices, cells)
                      if pa.types.is_dictionary(column.type) else cells)
        columns.append(pa.chunked_array([column]) if isinstance(column, pa.Array) else column)
    table = pa.table(columns, names=[name.lstrip(" ") for name in header])
    breaks = quoted and any(
        pc.any(pc.match_substring(_cells(table[c]), mark)).as_py()
        for c in spec.required_columns if c in table.column_names for mark in "\r\n")
    if breaks:
        _check_line_breaks(_text_frame(table), spec, path)
    return table


def _cells(column: pa.Array | pa.ChunkedArray) -> pa.Array | pa.ChunkedArray:
    """The text to look at: a dictionary-encoded column's dictionary (each value once; every
    value of a dictionary the CSV reader built occurs in some cell), else the column."""
    if not pa.types.is_dictionary(column.type):
        return column
    if isinstance(column, pa.ChunkedArray):
        column = column.combine_chunks()
    return column.dictionary


def _read_csv_pandas(path: Path, spec: Spec) -> pa.Table:
    """Read a CSV file with pandas (the files Arrow's reader refuses or could read otherwise)."""
    # Everything as text, and no missing-value guessing: types are coerced column by column
    # so that a bad cell becomes an exclusion with a reason rather than a silently changed
    # dtype, and the spec's missing-value tokens are applied afterwards.
    raw = pd.read_csv(path, dtype=str, encoding="utf-8-sig", skipinitialspace=True,
                      sep=spec.delimiter, keep_default_na=False, na_filter=False)
    if len(raw):
        _check_line_breaks(raw, spec, path)
    return pa.table({str(c): pa.array(raw[c].to_numpy(dtype=object), type=pa.string(),
                                      from_pandas=True) for c in raw.columns})


def _text_frame(table: pa.Table) -> pd.DataFrame:
    """Text columns (plain or dictionary-encoded) as object columns (missing cells None)."""
    return pd.DataFrame({name: pd.Series(_decoded(table[name]).to_numpy(zero_copy_only=False),
                                         dtype=object) for name in table.column_names})


def _decoded(column: pa.ChunkedArray) -> pa.ChunkedArray:
    kind = column.type
    return column.cast(kind.value_type) if pa.types.is_dictionary(kind) else column
def _check_header(path: Path, spec: Spec) -> list[str]:
    """Refuse a header naming a column twice, or one written with another separator.

    Returns the header's fields as written (empty when it cannot be read).
    """
    try:
        with path.open(encoding="utf-8-sig", newline="") as handle:
            header = next(csv.reader(handle, delimiter=spec.delimiter), [])
    except (OSError, UnicodeDecodeError):
        return []  # read_csv reports it with its own message
    names = [h.strip() for h in header]
    twice = sorted({n for n in names if names.count(n) > 1})
    if twice:
        shown = ", ".join(f"'{n}'" for n in twice)
        raise InputError(
            f"records file '{path}': the header names {shown} more than once; each column "
            "needs its own name (casemix would not know which one to use). Rename or remove "
            "the repeated column."
        )
    if len(names) == 1 and spec.columns.recipient not in names:
        for other in (";", "\t", "|", ","):
            parts = [p.strip().strip('"') for p in names[0].split(other)]
            if other != spec.delimiter and spec.columns.recipient in parts:
                shown, setting = ("tab", "\\t") if other == "\t" else (f"'{other}'", other)
                raise InputError(
                    f"records file '{path}': the header is one column that holds the spec's "
                    f"column names separated by {shown}; the file is separated by {shown}, "
                    f"not '{spec.delimiter}'. Set delimiter = \"{setting}\" in the [records] "
                    "table of the spec (and decimal = \",\" if numbers use a decimal comma)."
                )
    return header


def _check_line_breaks(raw: pd.DataFrame, spec: Spec, path: Path) -> None:
    """Refuse line breaks inside cells of the spec's columns (a stray quote merges lines).

    Codes, dates and numbers never hold a line break; when one does, a double quote opened a
    field that ran over the following lines, and the records parsed no longer match the
    file's lines. The message gives the file line of the record where the field starts.
    """
    columns = [c for c in spec.required_columns if c in raw.columns]
    breaks = pd.DataFrame({c: raw[c].str.contains("[\r\n]", regex=True) for c in columns})
    hit = breaks.to_numpy().any(axis=1)
    if not hit.any():
        return
    lines_in = raw.apply(lambda col: col.str.count("\n")).sum(axis=1).to_numpy()
    first = int(np.flatnonzero(hit)[0])
    line = 2 + first + int(lines_in[:first].sum())  # header is line 1
    column = breaks.columns[breaks.iloc[first].to_numpy()][0]
    spans = int(lines_in[first]) + 1
    raise InputError(
        f"records file '{path}': {plural(int(hit.sum()), 'record')} hold line breaks in "
        f"columns that cannot have them; the first, data row {first + 1}, starts on line "
        f"{line} and its column '{column}' runs over {spans} lines: a double quote (\") in or "
        f"near line {line} opens a field that swallows the following lines "
        f"({plural(len(raw), 'record')} parsed from {len(raw) + int(lines_in.sum())} data lines). "
        "Remove the stray quote, or quote the field on both sides."
    )


def _apply_missing_tokens(table: pa.Table, tokens: tuple[str, ...],
                          ids: str) -> tuple[pa.Table, pd.DataFrame]:
    """Empty the cells whose stripped text is a token; count them per token and column.

    Every column but the ids (mostly distinct) is dictionary-encoded (if the CSV reader has
    not done it), so that the stripping and the token look-up run over its distinct cells
    only; the reader parses the encoded columns from their dictionaries (:func:`_by_distinct`).
    """
    counts = []
    value_set = pa.array(tokens, type=pa.string())
    for i, name in enumerate(table.column_names):
        column = table.column(i)
        if name == ids:
            text = pc.utf8_trim_whitespace(column)
            hit = pc.is_in(text, value_set=value_set)
            if not pc.any(hit).as_py():
                continue
            found = pc.value_counts(pc.filter(text, hit))
            found = zip(found.field("values").to_pylist(), found.field("counts").to_pylist(),
                        strict=True)
            column = pc.if_else(hit, pa.scalar(None, pa.string()), column)
        else:
            encoded = column.combine_chunks()
            if not pa.types.is_dictionary(encoded.type):  # read by pandas' reader
                encoded = encoded.dictionary_encode()
            text = pc.utf8_trim_whitespace(encoded.dictionary)
            hit = pc.is_in(text, value_set=value_set).to_numpy(zero_copy_only=False)
            found = {}
            if hit.any():
                indices = encoded.indices.to_numpy()
                cells = np.bincount(indices, minlength=len(hit))
                for token, n in zip(text.filter(pa.array(hit)).to_pylist(), cells[hit].tolist(),
                                    strict=True):
                    found[token] = found.get(token, 0) + n
                emptied = hit[indices]
                encoded = pa.DictionaryArray.from_arrays(
                    pa.array(np.where(emptied, 0, indices), mask=emptied), encoded.dictionary)
            found = found.items()
            column = pa.chunked_array([encoded])
        for token, n in found:
            if token != "":  # an empty cell is simply empty
                counts.append((token, name, int(n)))
        table = table.set_column(i, name, column)
    return table, _emptied_frame(counts)


def _emptied_frame(counts: list[tuple[str, str, int]]) -> pd.DataFrame:
    frame = pd.DataFrame(counts, columns=["token", "column", "cells"])
    frame = frame.astype({"token": object, "column": object, "cells": np.int64})
    return frame.sort_values(["token", "column"], kind="stable", ignore_index=True)


def _program_codes(codes: pd.Series, spec: Spec, path: Path) -> pd.Series:
    """Normalise codes (spec option) or warn about codes equal up to letter case and spaces."""
    key = codes.str.upper().str.replace(r"\s+", "", regex=True)
    if spec.normalise_programs:
        return key.astype(object).where(codes.notna(), None)
    variants = pd.DataFrame({"key": key, "code": codes}).dropna().drop_duplicates()
    clash = variants[variants["key"].duplicated(keep=False)]
    if len(clash):
        groups = clash.groupby("key", sort=True)["code"].apply(sorted)
        shown = "; ".join(" and ".join(f"'{c}'" for c in g) for g in groups.iloc[:_SHOW])
        warnings.warn(DataWarning(
            f"records file '{path}': "
            f"{plural(len(groups), 'program code', ('differs', 'differ'))} from another "
            f"code only in letter case or spaces ({shown}); they are counted as different "
            "programs. If they are the same program, set normalise_programs = true in the "
            "[records] table of the spec (codes upper-cased, spaces removed)."
        ), stacklevel=5)
    return codes


def _check_columns(names: list[str], spec: Spec, path: Path) -> None:
    absent = [c for c in spec.required_columns if c not in names]
    if not absent:
        return
    details = "; ".join(f"'{c}'{closest(c, names)}" for c in absent)
    raise InputError(
        f"records file '{path}' lacks {plural(len(absent), 'column')} named in "
        f"{spec.where}: {details}. Rename the column in the file or change the spec. "
        f"The file has: {', '.join(map(str, names))}."
    )


def is_text_column(series: pd.Series) -> bool:
    """Whether every filled cell of ``series`` is text (an all-missing column counts as text)."""
    return pd.api.types.infer_dtype(series, skipna=True) in ("string", "empty")


def clean_text(series: pd.Series) -> pd.Series:
    """Return the cells as stripped text (object dtype); blank or missing cells become None.

    Non-text cells (numbers from Parquet) are shown as text, so ``7`` becomes ``"7"``. A
    column of text is cleaned once per distinct value.
    """
    if len(series) > _DISTINCT_FROM and is_text_column(series):
        codes, distinct = pd.factorize(series)  # missing cells get code -1
        cleaned = _clean_cells(pd.Series(np.asarray(distinct, dtype=object), dtype=object))
        out = np.append(cleaned.to_numpy(dtype=object), None)[codes]
        return pd.Series(out, index=series.index, dtype=object)
    return _clean_cells(series)


def _clean_cells(series: pd.Series) -> pd.Series:
    out = pd.Series(None, index=series.index, dtype=object)
    filled = series.notna()
    # Arrow strings strip in compiled code (the object-dtype path is a Python loop).
    text = series[filled].astype(str).astype("string[pyarrow]").str.strip()
    out[filled] = text.to_numpy(dtype=object)
    return out.mask(out == "", None)


def _series(column: pa.ChunkedArray) -> pd.Series:
    """A column as pandas gives it from a Parquet file."""
    return column.to_pandas()


def _by_distinct(column: pa.ChunkedArray, parse: Callable[[pd.Series], object]) -> object:
    """Apply ``parse`` (elementwise, from a Series to Series) once per distinct cell.

    Text and date columns have few distinct values (dates, codes, numbers written as text):
    each is parsed once with the same pandas functions and the results are taken back to the
    rows, so every cell gets exactly what parsing the whole column would give it. Columns of
    other types (numbers, timestamps) are parsed whole. Returns an array, or a tuple of
    arrays when ``parse`` returns a tuple.
    """
    kind = column.type
    if pa.types.is_dictionary(kind) and (pa.types.is_string(kind.value_type)
                                         or pa.types.is_large_string(kind.value_type)):
        encoded = column.combine_chunks()
        indices, dictionary = encoded.indices, encoded.dictionary
        filled = indices.null_count == 0
        values = indices.to_numpy() if filled else indices.fill_null(0).to_numpy()
        present = None if filled else np.asarray(indices.is_valid())
        cells = np.bincount(values if filled else values[present], minlength=len(dictionary))
        if not cells.all():  # only the values some cell holds (a dictionary may hold others)
            used = np.flatnonzero(cells)
            remap = np.zeros(len(dictionary), dtype=np.int64)
            remap[used] = np.arange(len(used))
            dictionary, values = dictionary.take(pa.array(used)), remap[values]
        codes = values if filled else np.where(present, values, len(dictionary))
        return _parse_distinct(dictionary, codes, parse)
    if pa.types.is_dictionary(kind):
        column, kind = column.cast(kind.value_type), kind.value_type
    if not (pa.types.is_string(kind) or pa.types.is_large_string(kind)
            or pa.types.is_date(kind)):
        out = parse(_series(column))
        return tuple(r.to_numpy() for r in out) if isinstance(out, tuple) else out.to_numpy()
    encoded = column.combine_chunks().dictionary_encode()
    codes = encoded.indices.fill_null(len(encoded.dictionary)).to_numpy()
    return _parse_distinct(encoded.dictionary, codes, parse)


def _parse_distinct(dictionary: pa.Array, codes: np.ndarray,
                    parse: Callable[[pd.Series], object]) -> object:
    """``parse`` the distinct cells (and a missing one, code ``len(dictionary)``), to rows."""
    distinct = np.empty(len(dictionary) + 1, dtype=object)
    distinct[:-1] = dictionary.to_pandas().to_numpy(dtype=object)
    distinct[-1] = None  # what a missing cell gives
    out = parse(pd.Series(distinct, dtype=object))
    if isinstance(out, tuple):
        return tuple(r.to_numpy()[codes] for r in out)
    return out.to_numpy()[codes]


def _id_text(column: pa.ChunkedArray) -> pa.ChunkedArray:
    """Recipient ids as stripped text, blank cells missing (the ids are mostly distinct)."""
    if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
        text = pc.utf8_trim_whitespace(column)
        return pc.if_else(pc.equal(text, ""), pa.scalar(None, text.type), text)
    return pa.chunked_array([pa.array(clean_text(_series(column)).to_numpy(), type=pa.string())])


def _cell(column: pa.ChunkedArray, pos: int) -> object:
    """One cell as read (for messages)."""
    return column[pos].as_py()


def _frame(table: pa.Table, parsed: dict[str, np.ndarray], path: Path) -> pd.DataFrame:
    """The records frame: parsed spec columns, every other column as read, in file order."""
    others = [name for name in table.column_names if name not in parsed]
    if others and path.suffix.lower() in _PARQUET_SUFFIXES:
        rest = pd.read_parquet(path, columns=others).reset_index(drop=True)
    else:
        rest = _text_frame(table.select(others))
    index = pd.RangeIndex(table.num_rows)
    # Each parsed array keeps its dtype (object text stays object under pandas 3) and becomes
    # the frame's column as it is (copy=False: no consolidated copy).
    columns = {name: pd.Series(parsed[name], index=index, dtype=parsed[name].dtype, copy=False)
               if name in parsed else rest[name].set_axis(index) for name in table.column_names}
    return pd.DataFrame(columns, index=index, copy=False)


def _check_duplicates(ids: pa.ChunkedArray, spec: Spec, path: Path) -> None:
    distinct = len(pc.unique(ids)) - (ids.null_count > 0)  # unique() counts null once
    if distinct == len(ids) - ids.null_count:
        return
    ids = pd.Series(ids.to_numpy(zero_copy_only=False), dtype=object)
    dup = ids.notna() & ids.duplicated(keep=False)
    groups = ids.index[dup].groupby(ids[dup].to_numpy())
    shown = [f"'{k}' in {format_rows(groups[k])}" for k in sorted(groups)[:_SHOW]]
    raise InputError(
        f"records file '{path}': {plural(len(groups), 'recipient id', ('occurs', 'occur'))} "
        "more than once "
        f"in column '{spec.columns.recipient}' ({'; '.join(shown)}). Each transplant needs "
        "its own id (a recipient transplanted twice is two recipients); fix the ids."
    )


def _fail_if_mostly_bad(bad: np.ndarray, present: np.ndarray, column: pa.ChunkedArray,
                        where: str, what: str, fix: str) -> None:
    n_bad, n_present = int(bad.sum()), int(present.sum())
    if n_bad >= _WRONG_TYPE_MIN and n_bad > _WRONG_TYPE_SHARE * n_present:
        cells = pd.Series(column.take(np.flatnonzero(bad)).to_pylist(), dtype=object)
        examples = ", ".join(repr(v) for v in cells.astype(str).unique()[:3])
        raise InputError(
            f"{where} is not {what} in {n_bad} of {n_present} filled rows "
            f"(for example {examples}); {fix}"
        )


def _parse_dates(
    series: pd.Series, date_format: str | None
) -> tuple[pd.Series, pd.Series, pd.Series]:
    """Parse one column of dates to whole days.

    Parameters
    ----------
    series : pandas.Series
        Text (ISO 8601 unless ``date_format``), dates, datetimes or ``datetime64``.
    date_format : str or None
        ``strftime`` format for text cells.

    Returns
    -------
    dates : pandas.Series of datetime64
        ``NaT`` where missing or unparsable.
    bad : pandas.Series of bool
        Filled cells that could not be parsed.
    present : pandas.Series of bool
        Filled cells (not missing, not blank).
    """
    fmt = date_format or "ISO8601"
    if pd.api.types.is_datetime64_any_dtype(series):
        present = series.notna()
        dates = series.dt.tz_localize(None) if series.dt.tz is not None else series
    elif is_text_column(series):
        text = clean_text(series)
        present = text.notna()
        dates = pd.to_datetime(text, format=fmt, errors="coerce")
    else:  # mixed cells (Parquet dates, Excel-like objects): slow path, one cell at a time
        present = clean_text(series).notna()
        dates = pd.to_datetime(series.astype(object).map(_one_date), errors="coerce")
        text = series.astype(object).map(lambda v: v if isinstance(v, str) else None)
        dates = dates.fillna(pd.to_datetime(clean_text(text), format=fmt, errors="coerce"))
    # One unit whatever the source (pandas 3 infers seconds or microseconds per column); a
    # date outside the nanosecond range is unreadable, as pandas 2 parses it.
    dates = dates.dt.normalize()
    dates = dates.where((dates >= pd.Timestamp.min) & (dates <= pd.Timestamp.max))
    dates = dates.astype("datetime64[ns]")
    return dates, present & dates.isna(), present


def _one_date(value: object) -> object:
    """A date-like cell as a Timestamp; anything else (text, numbers) as missing."""
    return pd.Timestamp(value) if isinstance(value, (dt.date, np.datetime64)) else None


def _parse_date_columns(table: pa.Table, parsed: dict[str, np.ndarray], spec: Spec,
                        path: Path, ledger: _Ledger) -> None:
    expected = spec.date_format or "YYYY-MM-DD"
    fix = (
        "write the dates as YYYY-MM-DD or set date_format in the [records] table of the spec."
        if spec.date_format is None
        else f"check the date_format \"{spec.date_format}\" in the [records] table of the spec."
    )
    for column in spec.date_columns:
        original = table[column]
        dates, bad, present = _by_distinct(
            original, lambda s: _parse_dates(s, spec.date_format))
        where = f"records file '{path}': column '{column}'"
        _fail_if_mostly_bad(bad, present, original, where, "a date", fix)
        ledger.exclude(bad, f"unreadable {column}", lambda p, c=column, v=original: (
            f"{c} '{_cell(v, p)}' is not a date (expected {expected})"), bad_cell=column)
        parsed[column] = dates


def _numbers(series: pd.Series, binary: bool,
             decimal: str = ".") -> tuple[pd.Series, pd.Series]:
    """Float values (NaN where missing or unreadable) and the filled cells of a column."""
    if pd.api.types.is_bool_dtype(series) or pd.api.types.is_numeric_dtype(series):
        values, present = series.astype(float), series.notna()
    else:
        text = clean_text(series)
        present = text.notna()
        if binary:
            values = text.str.lower().map(_BINARY_TEXT).astype(float)
        else:
            if decimal == ",":  # "27,5" -> "27.5"; a '.' may be a thousands mark: unreadable
                dotted = text.str.contains(".", regex=False, na=False)
                text = text.where(~dotted).str.replace(",", ".", regex=False)
            values = pd.to_numeric(text, errors="coerce").astype(float)
    allowed = ((values == 0.0) | (values == 1.0)) if binary else np.isfinite(values)
    return values.where(allowed), present


def _label(cov: Covariate) -> str:
    """The file's column name and, where different, the covariate's name in brackets."""
    return cov.column if cov.column == cov.name else f"{cov.column} ({cov.name})"


def _parse_covariate(table: pa.Table, parsed: dict[str, np.ndarray], cov: Covariate,
                     path: Path, ledger: _Ledger, decimal: str = ".") -> None:
    original = table[cov.column]
    if cov.kind == "categorical":
        parsed[cov.column] = _by_distinct(original, clean_text)
        return
    binary = cov.kind == "binary"
    mark = "','" if decimal == "," else "'.'"
    what, fix = (
        ("binary", "use 0/1, yes/no or true/false.") if binary
        else ("a number", f"use numbers with {mark} decimals (set decimal in the [records] "
              "table of the spec).")
    )
    values, present = _by_distinct(original, lambda s: _numbers(s, binary, decimal))
    bad = present & np.isnan(values)
    where = f"records file '{path}': column '{cov.column}' (covariate {cov.name})"
    _fail_if_mostly_bad(bad, present, original, where, what, fix)
    ledger.exclude(bad, f"unreadable {_label(cov)}",
                   lambda p: f"{_label(cov)} '{_cell(original, p)}' is not {what}",
                   bad_cell=cov.column)
    parsed[cov.column] = values


def _check_records(frame: pd.DataFrame, spec: Spec, cutoff: pd.Timestamp | None,
                   ledger: _Ledger, today: pd.Timestamp) -> None:
    cols = spec.columns
    required = [
        (cols.recipient, "recipient id"), (cols.program, "program"),
        (cols.transplant_date, "transplant date"), (cols.last_seen, "last-seen date"),
    ]  # fmt: skip
    if spec.strata is not None:
        required.append((spec.strata, "strata value"))
    for column, what in required:
        # An unparsable date already has its own reason; only empty cells count here.
        empty = frame[column].isna().to_numpy() & ~ledger.unreadable(column)
        ledger.exclude(empty, f"missing {what}", f"{what} (column '{column}') is missing")
    tx = frame[cols.transplant_date]
    for column in (cols.last_seen, *spec.event_columns):
        before = (frame[column] < tx).to_numpy()
        ledger.exclude(before, f"{column} before the transplant date", lambda p, c=column: (
            f"{c} {_day(frame[c].iloc[p])} is before the transplant date {_day(tx.iloc[p])}"))
    for column in spec.date_columns:
        future = (frame[column] > today).to_numpy()
        ledger.exclude(future, "date after today", lambda p, c=column: (
            f"{c} {_day(frame[c].iloc[p])} is after today ({_day(today)}); a date that "
            "cannot be true makes the whole record doubtful"))
    for cov in spec.covariates:
        _check_covariate(frame[cov.column], cov, ledger)
    if cutoff is not None:
        late = (tx > cutoff).to_numpy()
        ledger.exclude(late, "transplanted after the cut-off", lambda p: (
            f"transplanted {_day(tx.iloc[p])}, after the cut-off {_day(cutoff)}"))


def _day(value: pd.Timestamp) -> str:
    return value.strftime("%Y-%m-%d")


def _check_covariate(values: pd.Series, cov: Covariate, ledger: _Ledger) -> None:
    if cov.missing == "exclude":
        empty = values.isna().to_numpy() & ~ledger.unreadable(cov.column)
        ledger.exclude(empty, f"missing {_label(cov)}",
                       f"{_label(cov)} is missing and its missing policy is \"exclude\"")
    if cov.lower is None and cov.upper is None:
        return
    lower = -np.inf if cov.lower is None else cov.lower
    upper = np.inf if cov.upper is None else cov.upper
    outside = (values.notna() & ((values < lower) | (values > upper))).to_numpy()
    bounds = f"{lower:g} to {upper:g}"
    ledger.exclude(outside, f"{_label(cov)} outside its plausible range", lambda p: (
        f"{_label(cov)} {values.iloc[p]:g} is outside the plausible range {bounds}"))


def _exclusion_frame(frame: pd.DataFrame, spec: Spec, ledger: _Ledger,
                     excluded: np.ndarray) -> pd.DataFrame:
    positions = np.flatnonzero(excluded)
    return pd.DataFrame(
        {
            "row": (positions + 1).astype(np.int64),
            "recipient": frame[spec.columns.recipient].to_numpy()[positions],
            "reason": ["; ".join(ledger.reasons[p]) for p in positions],
            "program": frame[spec.columns.program].to_numpy()[positions],
            "kind": ["; ".join(ledger.kinds[p]) for p in positions],
        }
    )


def _correct(kept: pd.DataFrame, spec: Spec,
             cutoff: pd.Timestamp | None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Extend last-seen to the latest event up to the cut-off, then truncate it at the cut-off.

    An event dated after the cut-off is outside the data's complete period: it is not counted
    and does not lengthen follow-up (noted as ``event_after_cutoff``).
    """
    last = spec.columns.last_seen
    notes = []
    if spec.event_columns:
        # As int64 nanoseconds NaT is the smallest value: a row's maximum skips it.
        never = np.iinfo(np.int64).min
        events = np.stack([nanoseconds(kept[c]) for c in spec.event_columns])
        if cutoff is not None:
            cut = nanoseconds(pd.Series([cutoff]))[0]
            notes.append(((events > cut).any(axis=0), "event_after_cutoff"))
            events = np.where(events <= cut, events, never)
        latest = events.max(axis=0)
        seen = nanoseconds(kept[last])
        extend = (latest > seen) & (seen != never)
        notes.append((extend, "event_after_last_seen"))
        kept[last] = kept[last].mask(extend, pd.Series(latest.view("datetime64[ns]"),
                                                       index=kept.index))
    if cutoff is not None:
        late = kept[last] > cutoff
        notes.append((late, "last_seen_after_cutoff"))
        kept[last] = kept[last].mask(late, cutoff)
    parts = [
        pd.DataFrame({
            "row": (kept.index[mask] + 1).astype(np.int64),
            "recipient": kept.loc[mask, spec.columns.recipient].to_numpy(),
            "program": kept.loc[mask, spec.columns.program].to_numpy(),
            "kind": kind,
        })
        for mask, kind in notes
    ]
    columns = ["row", "recipient", "program", "kind"]
    corrections = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=columns)
    corrections = corrections.sort_values(["row", "kind"], kind="stable", ignore_index=True)
    return kept, corrections[columns]


def nanoseconds(dates: pd.Series) -> np.ndarray:
    """Dates as int64 nanoseconds since 1970 (NaT: the smallest int64)."""
    return dates.to_numpy(dtype="datetime64[ns]").view(np.int64)


def _warning_counts(corrections: pd.DataFrame) -> pd.DataFrame:
    if corrections.empty:
        return pd.DataFrame({"program": pd.Series(dtype=object), "kind": pd.Series(dtype=object),
                             "count": pd.Series(dtype=np.int64)})
    counts = corrections.groupby(["program", "kind"], sort=True).size()
    return counts.rename("count").reset_index().astype({"count": np.int64})
