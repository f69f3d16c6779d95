"""The evaluation folder's file contract, and the reading and checking of its files.

``Evaluation.save`` writes the files of :data:`TABLES` and ``run.json``;
``Evaluation.load`` reads them back through :func:`read_tables` and :func:`read_run`. The
contract is written here once: each file's columns in order, which are text (read as
written, so a program coded ``NA``, ``007`` or left empty keeps its code under pandas 3),
which are numbers (read as floats) and which a folder written by an earlier version may
lack. Extra columns are kept as ``read_csv`` reads them.

Rows in messages are counted as a spreadsheet shows them: line 1 is the header, the first
data row is line 2.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from casemix._io import read_csv_as_written
from casemix.errors import InputError, plural
from casemix.stats.verdict import VERDICTS

__all__ = [
    "PROGRAM_COLUMNS",
    "RUN_KEYS",
    "TABLES",
    "Column",
    "TableFile",
    "read_run",
    "read_tables",
]


@dataclass(frozen=True)
class Column:
    """One column of a contract file.

    Attributes
    ----------
    name : str
    kind : {"text", "number", "flag"}
        Text is read as written; numbers must be numbers (empty means missing) and are read
        as floats; flags (true/false) are read as ``read_csv`` reads them.
    required : bool, default True
        False for a column that folders written by earlier versions may lack.
    """

    name: str
    kind: str
    required: bool = True


def _columns(kind: str, names: str, *, required: bool = True) -> tuple[Column, ...]:
    return tuple(Column(name, kind, required) for name in names.split())


@dataclass(frozen=True)
class TableFile:
    """One CSV file of the folder and the :class:`~casemix.evaluation.Evaluation` attribute.

    Attributes
    ----------
    attribute : str
        The Evaluation attribute; the file is ``attribute + ".csv"``.
    columns : tuple of Column
        The contract columns; for ``programs`` in the order they are written.
    required : bool, default True
        False for a file that folders written by earlier versions may lack (the attribute is
        then None).
    """

    attribute: str
    columns: tuple[Column, ...]
    required: bool = True

    @property
    def name(self) -> str:
        """The file name."""
        return f"{self.attribute}.csv"

    def names(self, kind: str) -> list[str]:
        """The columns of one kind."""
        return [c.name for c in self.columns if c.kind == kind]


TABLES = (
    TableFile("programs", (
        *_columns("text", "program"),
        *_columns("number", "recipients observed expected oe_ratio hr_mean hr_lower hr_upper "
                            "p_above p_below"),
        *_columns("text", "verdict"),
        *_columns("number", "observed_survival expected_survival oe_lower oe_upper"),
        *_columns("number", "hr_median weight observed_survival_lower observed_survival_upper",
                  required=False),
        *_columns("number", "events_to_excess events_to_favorable"),
        *_columns("number", "p_more_exact p_fewer_exact casemix_factor events_more_to_change "
                            "events_fewer_to_change", required=False),
        *_columns("flag", "excess_reachable favorable_reachable", required=False),
        *_columns("number", "detectable_hr_excess detectable_hr_favorable "
                            "null_flag_probability competing_events cumulative_incidence",
                  required=False),
    )),
    TableFile("recipients", (
        *_columns("text", "recipient program"),
        *_columns("number", "time event expected"),
        *_columns("number", "lp", required=False),
        *_columns("text", "stratum", required=False),
    )),
    TableFile("exclusions", (
        *_columns("number", "row"),
        *_columns("text", "recipient reason"),
        *_columns("text", "program", required=False),
        *_columns("text", "kind"),
    )),
    TableFile("corrections", (
        *_columns("number", "row"), *_columns("text", "recipient program kind"),
    ), required=False),
    TableFile("followup", (
        *_columns("text", "program"),
        *_columns("number", "recipients completeness lost_to_followup"),
        *_columns("number", "observed_days potential_days", required=False),
    )),
    TableFile("casemix", (
        *_columns("text", "program group"),
        *_columns("number", "contribution factor"),
        *_columns("number", "expected expected_average", required=False),
    )),
    TableFile("curves", (
        *_columns("text", "program"),
        *_columns("number", "time observed observed_lower observed_upper at_risk expected"),
    )),
    TableFile("coefficients", (
        *_columns("text", "term"),
        *_columns("text", "group", required=False),
        *_columns("number", "coef se hr hr_lower hr_upper p_value"),
    )),
    TableFile("out_of_range", (
        *_columns("text", "program covariate"), *_columns("number", "recipients"),
    ), required=False),
)
"""Every CSV file of an evaluation folder, in the order of the Evaluation's attributes."""

PROGRAM_COLUMNS = [c.name for c in TABLES[0].columns]
"""The columns of ``programs.csv`` (and of ``Evaluation.programs``), in order."""

RUN_KEYS = ("outcome", "horizon_days", "cutoff", "model", "prior", "rules", "counts")
"""Keys ``run.json`` must hold for the report."""


def _lines(mask: np.ndarray) -> str:
    lines = np.flatnonzero(mask) + 2  # line 1 is the header
    shown = ", ".join(str(x) for x in lines[:8])
    return shown + (f" and {len(lines) - 8} more" if len(lines) > 8 else "")


def _read_table(folder: Path, table: TableFile) -> pd.DataFrame | None:
    path = folder / table.name
    if not path.is_file():
        if not table.required:  # folders written before this file was saved
            return None
        raise InputError(
            f"{path}: file not found. The report needs the full evaluation folder; run "
            "`casemix evaluate ... --out DIR` again to write it."
        )
    try:
        frame = read_csv_as_written(path, table.names("text"))
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as err:
        raise InputError(f"{path}: cannot be read as CSV ({err}); write it again.") from err
    missing = [c.name for c in table.columns if c.required and c.name not in frame.columns]
    if missing:
        raise InputError(
            f"{path}: missing {plural(len(missing), 'column')} {', '.join(missing)}; the file "
            "was written by another version or edited by hand. Write the evaluation again."
        )
    for column in table.names("number"):
        if column not in frame.columns:
            continue
        values = pd.to_numeric(frame[column], errors="coerce")
        bad = values.isna().to_numpy() & frame[column].notna().to_numpy()
        if bad.any():
            raise InputError(
                f"{path}: column {column!r} has values that are not numbers on lines "
                f"{_lines(bad)}; fix or remove them."
            )
        frame[column] = values.astype(float)
    return frame


def _check_programs(frame: pd.DataFrame, path: Path) -> pd.DataFrame:
    empty = (frame["program"] == "").to_numpy()
    if empty.any():
        raise InputError(f"{path}: column 'program' is empty on lines {_lines(empty)}.")
    repeated = frame["program"].duplicated(keep=False).to_numpy()
    if repeated.any():
        raise InputError(
            f"{path}: program codes repeat on lines {_lines(repeated)}; each program must have "
            "exactly one row."
        )
    unknown = ~frame["verdict"].isin(VERDICTS).to_numpy()
    if unknown.any():
        raise InputError(
            f"{path}: column 'verdict' has unknown values on lines {_lines(unknown)}; allowed "
            f"are {', '.join(VERDICTS)}."
        )
    return frame.sort_values("program", kind="stable").reset_index(drop=True)


def read_tables(folder: Path) -> dict[str, pd.DataFrame | None]:
    """Read every file of :data:`TABLES` from ``folder`` and check it against the contract.

    Returns
    -------
    dict of str to DataFrame or None
        By Evaluation attribute; None for an optional file the folder lacks. ``programs``
        is sorted by program code.

    Raises
    ------
    InputError
        For a missing file or column, a non-numeric value in a numeric column, an empty or
        repeated program code, or an unknown verdict; the message names the file, the column
        and the lines.
    """
    tables = {table.attribute: _read_table(folder, table) for table in TABLES}
    tables["programs"] = _check_programs(tables["programs"], folder / "programs.csv")
    return tables


def read_run(folder: Path) -> dict:
    """Read ``run.json`` and check that it holds :data:`RUN_KEYS`.

    Raises
    ------
    InputError
        No file, invalid JSON, or missing keys (named).
    """
    path = folder / "run.json"
    if not path.is_file():
        raise InputError(
            f"{path}: file not found. Run `casemix evaluate ... --out DIR` again to write it."
        )
    try:
        run = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        raise InputError(f"{path}: not valid JSON ({err}); write the evaluation again.") from err
    missing = [k for k in RUN_KEYS if not isinstance(run, dict) or k not in run]
    if missing:
        raise InputError(
            f"{path}: missing {plural(len(missing), 'key')} {', '.join(missing)}; write the "
            "evaluation again."
        )
    return run
