"""Read and validate a registry extract (CSV or Parquet) into :class:`Records`.

Problems with the whole file (missing column, unreadable file, no rows, a column of the wrong
type in most rows, duplicate recipient ids) raise :class:`~casemix.errors.InputError`. Problems
with one record exclude that record with a reason (``Records.exclusions``); corrections that
keep a record (follow-up extended to an event recorded after last-seen, last-seen truncated at
the cut-off) are listed per record in ``Records.corrections`` and counted per program in
``Records.warnings``. Nothing is dropped silently: ``n_read == len(frame) + len(exclusions)``.

Row numbers: ``Records.frame`` keeps the 0-based position of each record in the file as its
index; ``row`` in ``exclusions`` and ``corrections`` and the row numbers in messages are
1-based *data* row numbers (the first record under the header is row 1, which a spreadsheet
shows on line 2). Parsing is done with pandas (``read_csv``, ``read_parquet``,
``to_datetime``, ``to_numeric``); only the bookkeeping is written here.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from casemix.data.spec import Covariate, Spec, closest, load_spec
from casemix.errors import InputError, plural

__all__ = [
    "WARNING_KINDS",
    "Records",
    "clean_text",
    "format_rows",
    "read_records",
    "to_timestamp",
]

#: Kinds of correction that keep a record, as they appear in ``Records.warnings``.
WARNING_KINDS = ("event_after_last_seen", "last_seen_after_cutoff")

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


@dataclass(frozen=True)
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
    """

    frame: pd.DataFrame
    exclusions: pd.DataFrame
    warnings: pd.DataFrame
    corrections: pd.DataFrame
    n_read: int
    source: Path
    spec: Spec
    cutoff: pd.Timestamp | None = None


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
    path: str | Path, spec: Spec | str | Path, *, cutoff: object = None
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
    raw = _read_table(path)
    _check_columns(raw, spec, path)
    frame = raw.copy()
    frame.index = pd.RangeIndex(len(raw))
    ledger = _Ledger(len(frame))
    for column in (spec.columns.recipient, spec.columns.program, spec.strata):
        if column is not None:
            frame[column] = clean_text(frame[column])
    _check_duplicates(frame, spec, path)
    _parse_date_columns(frame, spec, path, ledger)
    for cov in spec.covariates:
        _parse_covariate(frame, cov, path, ledger)
    _check_records(frame, spec, stamp, ledger)
    excluded = ledger.excluded
    exclusions = _exclusion_frame(frame, spec, ledger, excluded)
    kept = frame.loc[~excluded].copy()
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
    )


def _read_table(path: Path) -> pd.DataFrame:
    if not path.is_file():
        raise InputError(f"records file '{path}' does not exist; check the path.")
    suffix = path.suffix.lower()
    try:
        if suffix in _PARQUET_SUFFIXES:
            raw = pd.read_parquet(path)
        elif suffix in _CSV_SUFFIXES:
            # Everything as text: types are coerced column by column so that a bad cell
            # becomes an exclusion with a reason rather than a silently changed dtype.
            raw = pd.read_csv(path, dtype=str, encoding="utf-8-sig", skipinitialspace=True)
        else:
            raise InputError(
                f"records file '{path}' has suffix '{path.suffix}'; casemix reads .csv and "
                ".parquet files. Rename or convert the file."
            )
    except pd.errors.EmptyDataError:
        raise InputError(f"records file '{path}' is empty; it needs a header row.") from None
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        if isinstance(exc, InputError):
            raise
        raise InputError(
            f"records file '{path}' cannot be read ({type(exc).__name__}: {exc}); save it "
            "as UTF-8 CSV with a header row, or as Parquet."
        ) from None
    if len(raw) == 0:
        raise InputError(f"records file '{path}' has no data rows (only a header).")
    return raw


def _check_columns(raw: pd.DataFrame, spec: Spec, path: Path) -> None:
    absent = [c for c in spec.required_columns if c not in raw.columns]
    if not absent:
        return
    details = "; ".join(f"'{c}'{closest(c, raw.columns)}" for c in absent)
    raise InputError(
        f"records file '{path}' lacks {plural(len(absent), 'column')} named in "
        f"{spec.where}: {details}. Rename the column in the file or change the spec. "
        f"The file has: {', '.join(map(str, raw.columns))}."
    )


def _is_text_column(series: pd.Series) -> bool:
    return pd.api.types.infer_dtype(series, skipna=True) in ("string", "empty")


def clean_text(series: pd.Series) -> pd.Series:
    """Return the cells as stripped text (object dtype); blank or missing cells become None.

    Non-text cells (numbers from Parquet) are shown as text, so ``7`` becomes ``"7"``.
    """
    out = pd.Series(None, index=series.index, dtype=object)
    filled = series.notna()
    # Arrow strings strip in compiled code (the object-dtype path is a Python loop).
    text = series[filled].astype(str).astype("string[pyarrow]").str.strip()
    out[filled] = text.to_numpy(dtype=object)
    return out.mask(out == "", None)


def _check_duplicates(frame: pd.DataFrame, spec: Spec, path: Path) -> None:
    ids = frame[spec.columns.recipient]
    dup = ids.notna() & ids.duplicated(keep=False)
    if not dup.any():
        return
    groups = frame.index[dup].groupby(ids[dup].to_numpy())
    shown = [f"'{k}' in {format_rows(groups[k])}" for k in sorted(groups)[:_SHOW]]
    raise InputError(
        f"records file '{path}': {plural(len(groups), 'recipient id', ('occurs', 'occur'))} "
        "more than once "
        f"in column '{spec.columns.recipient}' ({'; '.join(shown)}). Each transplant needs "
        "its own id (a recipient transplanted twice is two recipients); fix the ids."
    )


def _fail_if_mostly_bad(bad: pd.Series, present: pd.Series, series: pd.Series, where: str,
                        what: str, fix: str) -> None:
    n_bad, n_present = int(bad.sum()), int(present.sum())
    if n_bad >= _WRONG_TYPE_MIN and n_bad > _WRONG_TYPE_SHARE * n_present:
        examples = ", ".join(repr(v) for v in series[bad].astype(str).unique()[:3])
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
    elif _is_text_column(series):
        text = clean_text(series)
        present = text.notna()
        dates = pd.to_datetime(text, format=fmt, errors="coerce")
    else:  # mixed cells (Parquet dates, Excel-like objects): slow path, one cell at a time
        present = clean_text(series).notna()
        dates = pd.to_datetime(series.astype(object).map(_one_date), errors="coerce")
        text = series.astype(object).map(lambda v: v if isinstance(v, str) else None)
        dates = dates.fillna(pd.to_datetime(clean_text(text), format=fmt, errors="coerce"))
    # One unit whatever the source (pandas 3 infers seconds or microseconds per column).
    dates = dates.dt.normalize().astype("datetime64[ns]")
    return dates, present & dates.isna(), present


def _one_date(value: object) -> object:
    """A date-like cell as a Timestamp; anything else (text, numbers) as missing."""
    return pd.Timestamp(value) if isinstance(value, (dt.date, np.datetime64)) else None


def _parse_date_columns(frame: pd.DataFrame, spec: Spec, path: Path, ledger: _Ledger) -> None:
    expected = spec.date_format or "YYYY-MM-DD"
    fix = (
        "write the dates as YYYY-MM-DD or set date_format in the [records] table of the spec."
        if spec.date_format is None
        else f"check the date_format \"{spec.date_format}\" in the [records] table of the spec."
    )
    for column in spec.date_columns:
        original = frame[column]
        dates, bad, present = _parse_dates(original, spec.date_format)
        where = f"records file '{path}': column '{column}'"
        _fail_if_mostly_bad(bad, present, original, where, "a date", fix)
        ledger.exclude(bad.to_numpy(), f"unreadable {column}", lambda p, c=column, v=original: (
            f"{c} '{v.iloc[p]}' is not a date (expected {expected})"), bad_cell=column)
        frame[column] = dates


def _numbers(series: pd.Series, binary: bool) -> tuple[pd.Series, pd.Series]:
    """Float values (NaN where missing or unreadable) and the filled cells of a column."""
    if pd.api.types.is_bool_dtype(series) or pd.api.types.is_numeric_dtype(series):
        values, present = series.astype(float), series.notna()
    else:
        text = clean_text(series)
        present = text.notna()
        if binary:
            values = text.str.lower().map(_BINARY_TEXT).astype(float)
        else:
            values = pd.to_numeric(text, errors="coerce").astype(float)
    allowed = values.isin([0.0, 1.0]) if binary else np.isfinite(values)
    return values.where(allowed), present


def _parse_covariate(frame: pd.DataFrame, cov: Covariate, path: Path, ledger: _Ledger) -> None:
    original = frame[cov.column]
    if cov.kind == "categorical":
        frame[cov.column] = clean_text(original)
        return
    binary = cov.kind == "binary"
    what, fix = (
        ("binary", "use 0/1, yes/no or true/false.") if binary
        else ("a number", "use numbers with '.' decimals.")
    )
    values, present = _numbers(original, binary)
    bad = present & values.isna()
    where = f"records file '{path}': column '{cov.column}' (covariate {cov.name})"
    _fail_if_mostly_bad(bad, present, original, where, what, fix)
    ledger.exclude(bad.to_numpy(), f"unreadable {cov.name}",
                   lambda p: f"{cov.column} '{original.iloc[p]}' is not {what}",
                   bad_cell=cov.column)
    frame[cov.column] = values


def _check_records(frame: pd.DataFrame, spec: Spec, cutoff: pd.Timestamp | None,
                   ledger: _Ledger) -> None:
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
        ledger.exclude(empty, f"missing {cov.name}",
                       f"{cov.name} (column '{cov.column}') is missing and its missing "
                       "policy is \"exclude\"")
    if cov.lower is None and cov.upper is None:
        return
    lower = -np.inf if cov.lower is None else cov.lower
    upper = np.inf if cov.upper is None else cov.upper
    outside = (values.notna() & ((values < lower) | (values > upper))).to_numpy()
    bounds = f"{lower:g} to {upper:g}"
    ledger.exclude(outside, f"{cov.name} outside its plausible range", lambda p: (
        f"{cov.name} {values.iloc[p]:g} is outside the plausible range {bounds}"))


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
    """Extend last-seen to the latest recorded event, then truncate it at the cut-off."""
    last = spec.columns.last_seen
    notes = []
    if spec.event_columns:
        latest = kept[list(spec.event_columns)].max(axis=1)
        extend = latest > kept[last]
        notes.append((extend, "event_after_last_seen"))
        kept[last] = kept[last].mask(extend, latest)
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


def _warning_counts(corrections: pd.DataFrame) -> pd.DataFrame:
    if corrections.empty:
        return pd.DataFrame({"program": pd.Series(dtype=object), "kind": pd.Series(dtype=object),
                             "count": pd.Series(dtype=np.int64)})
    counts = corrections.groupby(["program", "kind"], sort=True).size()
    return counts.rename("count").reset_index().astype({"count": np.int64})
