"""Read and check the evaluation folder the report is built from.

The folder holds the files written by ``Evaluation.save`` (DEVELOPERS.md, "Evaluation
folder"). Each CSV must have its contract columns; extra columns are kept. Text columns
(program codes, verdicts, terms, reasons) are read as written, so a program coded ``NA`` or
``007`` stays that way.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from casemix.errors import InputError, plural
from casemix.stats.verdict import VERDICTS

__all__ = ["EvaluationFolder", "read_csv_as_written", "read_evaluation_folder"]

# The strings read_csv takes as missing by default (pandas documentation of `na_values`).
_DEFAULT_NA = ("", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND",
               "1.#QNAN", "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null")

# file -> (text columns, numeric columns) of the contract
_CONTRACT: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    "programs.csv": (
        ("program", "verdict"),
        ("recipients", "observed", "expected", "oe_ratio", "hr_mean", "hr_lower", "hr_upper",
         "p_above", "p_below", "observed_survival", "expected_survival", "oe_lower",
         "oe_upper", "events_to_excess", "events_to_favorable"),
    ),
    "recipients.csv": (("recipient", "program"), ("time", "event", "expected")),
    "exclusions.csv": (("recipient", "reason", "kind"), ("row",)),
    "followup.csv": (("program",), ("recipients", "completeness", "lost_to_followup")),
    "casemix.csv": (("program", "group"), ("contribution", "factor")),
    "curves.csv": (
        ("program",),
        ("time", "observed", "observed_lower", "observed_upper", "at_risk", "expected"),
    ),
    "coefficients.csv": (("term",), ("coef", "se", "hr", "hr_lower", "hr_upper", "p_value")),
}
_RUN_KEYS = ("outcome", "horizon_days", "cutoff", "model", "prior", "rules", "counts")


@dataclass(frozen=True)
class EvaluationFolder:
    """The tables and run facts of one evaluation, as read from its folder.

    Attributes
    ----------
    path : Path
        The folder.
    programs, recipients, exclusions, followup, casemix, curves, coefficients : DataFrame
        The CSV files of the same names; ``programs`` sorted by program code.
    run : dict
        The parsed ``run.json``.
    corrections : DataFrame or None
        ``corrections.csv`` (``row``, ``recipient``, ``program``, ``kind``); None for a folder
        written before corrections were saved.
    """

    path: Path
    programs: pd.DataFrame
    recipients: pd.DataFrame
    exclusions: pd.DataFrame
    followup: pd.DataFrame
    casemix: pd.DataFrame
    curves: pd.DataFrame
    coefficients: pd.DataFrame
    run: dict
    corrections: pd.DataFrame | None = None


def _rows(mask: np.ndarray) -> str:
    # Rows as a user sees them in a spreadsheet: line 1 is the header, data start at line 2.
    lines = np.flatnonzero(mask) + 2
    shown = ", ".join(str(x) for x in lines[:8])
    return shown + (f" and {len(lines) - 8} more" if len(lines) > 8 else "")


def read_csv_as_written(path: str | Path, text_columns: Sequence[str]) -> pd.DataFrame:
    """Read a CSV file, keeping ``text_columns`` exactly as written.

    A program coded ``NA`` or an empty code stays that text; the other columns are read as
    ``read_csv`` reads them by default. ``converters={column: str}`` is not enough: from
    pandas 3 on the missing-value check also runs on converted values, so ``NA`` and ``""``
    would become NaN there and a program would vanish from the report.

    Parameters
    ----------
    path : str or Path
        The CSV file.
    text_columns : sequence of str
        Columns read as text with no value taken as missing (absent ones are ignored).
    """
    header = pd.read_csv(path, nrows=0).columns
    text = [c for c in header if c in text_columns]
    return pd.read_csv(path, dtype=dict.fromkeys(text, str), keep_default_na=False,
                       na_values={c: list(_DEFAULT_NA) for c in header if c not in text})


def _read_csv(folder: Path, name: str) -> pd.DataFrame:
    path = folder / name
    if not path.is_file():
        raise InputError(
            f"{path}: file not found. The report needs the full evaluation folder; run "
            "`casemix evaluate ... --out DIR` again to write it."
        )
    text_cols, num_cols = _CONTRACT[name]
    try:
        frame = read_csv_as_written(path, text_cols)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as err:
        raise InputError(f"{path}: cannot be read as CSV ({err}); write it again.") from err
    missing = [c for c in (*text_cols, *num_cols) if c not in frame.columns]
    if missing:
        raise InputError(
            f"{path}: missing {plural(len(missing), 'column')} {', '.join(missing)}; the file "
            "was written by another version or edited by hand. Write the evaluation again."
        )
    for column in num_cols:
        values = pd.to_numeric(frame[column], errors="coerce")
        bad = values.isna().to_numpy() & frame[column].notna().to_numpy()
        if bad.any():
            raise InputError(
                f"{path}: column {column!r} has values that are not numbers on lines "
                f"{_rows(bad)}; fix or remove them."
            )
        frame[column] = values.astype(float)
    return frame


def _check_programs(frame: pd.DataFrame, path: Path) -> pd.DataFrame:
    empty = (frame["program"] == "").to_numpy()
    if empty.any():
        raise InputError(f"{path}: column 'program' is empty on lines {_rows(empty)}.")
    repeated = frame["program"].duplicated(keep=False).to_numpy()
    if repeated.any():
        raise InputError(
            f"{path}: program codes repeat on lines {_rows(repeated)}; each program must have "
            "exactly one row."
        )
    unknown = ~frame["verdict"].isin(VERDICTS).to_numpy()
    if unknown.any():
        raise InputError(
            f"{path}: column 'verdict' has unknown values on lines {_rows(unknown)}; allowed "
            f"are {', '.join(VERDICTS)}."
        )
    return frame.sort_values("program", kind="stable").reset_index(drop=True)


def _read_run(folder: Path) -> dict:
    path = folder / "run.json"
    if not path.is_file():
        raise InputError(
            f"{path}: file not found. Run `casemix evaluate ... --out DIR` again to write it."
        )
    try:
        run = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        raise InputError(f"{path}: not valid JSON ({err}); write the evaluation again.") from err
    missing = [k for k in _RUN_KEYS if not isinstance(run, dict) or k not in run]
    if missing:
        raise InputError(
            f"{path}: missing {plural(len(missing), 'key')} {', '.join(missing)}; write the "
            "evaluation again."
        )
    return run


def _read_corrections(folder: Path) -> pd.DataFrame | None:
    path = folder / "corrections.csv"
    if not path.is_file():  # folders written before corrections were saved
        return None
    frame = pd.read_csv(path, converters={c: str for c in ("recipient", "program", "kind")})
    missing = [c for c in ("row", "recipient", "program", "kind") if c not in frame.columns]
    if missing:
        raise InputError(
            f"{path}: missing {plural(len(missing), 'column')} {', '.join(missing)}; write the "
            "evaluation again."
        )
    return frame


def read_evaluation_folder(folder: str | Path) -> EvaluationFolder:
    """Read every file of an evaluation folder and check it against the file contract.

    Parameters
    ----------
    folder : str or Path
        The folder written by ``Evaluation.save``.

    Returns
    -------
    EvaluationFolder

    Raises
    ------
    InputError
        For a missing file, column or run.json key, a non-numeric value in a numeric
        column, an empty or repeated program code, or an unknown verdict; the message names
        the file, the column and the lines.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder}: not a folder; pass the folder an evaluation was saved to.")
    tables = {name: _read_csv(folder, name) for name in _CONTRACT}
    programs = _check_programs(tables.pop("programs.csv"), folder / "programs.csv")
    return EvaluationFolder(
        path=folder,
        programs=programs,
        run=_read_run(folder),
        corrections=_read_corrections(folder),
        **{name.removesuffix(".csv"): frame for name, frame in tables.items()},
    )
