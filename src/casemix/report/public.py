"""Copies of an evaluation's tables for public release, with small counts hidden.

Only tables of programs and groups are copied; the record-level files (recipients.csv,
exclusions.csv and corrections.csv, one row per recipient) are never part of a public release:
excluded records are published as counts per reason and corrections as counts per kind.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from casemix._io import write_csv
from casemix.data.records import count_by_kind
from casemix.report.folder import read_csv_as_written, read_evaluation_folder
from casemix.report.suppress import check_threshold, suppress_counts

__all__ = ["PUBLIC_COUNTS", "corrections_by_kind", "exclusions_by_reason", "write_public_tables"]

PUBLIC_COUNTS = {
    "programs.csv": ("recipients", "observed"),
    "followup.csv": ("recipients", "lost_to_followup"),
    "curves.csv": ("at_risk",),
    "casemix.csv": (),
    "coefficients.csv": (),
    "exclusions_by_reason.csv": ("records",),
    "corrections_by_kind.csv": ("records",),
    "out_of_range.csv": ("recipients",),
}
"""Public file -> its count columns (the ones suppressed)."""


def exclusions_by_reason(exclusions: pd.DataFrame) -> pd.DataFrame:
    """Count excluded records per kind of reason, most frequent first (ties by reason).

    The kinds (``exclusions.kind``) carry no record's own values (dates, ages), so the counts
    can be published; a record excluded for several kinds counts once under their joint kind.

    Parameters
    ----------
    exclusions : pandas.DataFrame
        One row per excluded record, with a ``kind`` column.

    Returns
    -------
    pandas.DataFrame
        Columns ``reason`` (the kind), ``records``.
    """
    return count_by_kind(exclusions, "reason")


def corrections_by_kind(corrections: pd.DataFrame) -> pd.DataFrame:
    """Count corrections of kept records per kind (``correction``, ``records``), as above."""
    return count_by_kind(corrections, "correction")


def write_public_tables(folder: str | Path, out: str | Path, n: int) -> Path:
    """Write the evaluation's program-level tables into ``out`` with counts under ``n`` hidden.

    Parameters
    ----------
    folder : str or Path
        The evaluation folder (checked as for the report).
    out : str or Path
        The folder to write (created if missing); file names as in :data:`PUBLIC_COUNTS`.
    n : int
        Counts from 1 to ``n - 1`` become the text ``"<n"`` (at least 2).

    Returns
    -------
    Path
        ``out``.
    """
    n = check_threshold(n)
    data = read_evaluation_folder(folder)
    tables = {
        "programs.csv": data.programs,
        "followup.csv": data.followup,
        "curves.csv": data.curves,
        "casemix.csv": data.casemix,
        "coefficients.csv": data.coefficients,
        "exclusions_by_reason.csv": exclusions_by_reason(data.exclusions),
    }
    if data.corrections is not None:
        tables["corrections_by_kind.csv"] = corrections_by_kind(data.corrections)
    extra = Path(folder) / "out_of_range.csv"
    if extra.is_file():  # written by newer evaluations; older folders do not have it
        tables["out_of_range.csv"] = read_csv_as_written(extra, ["program"])
    out = Path(out)
    for name, table in tables.items():
        write_csv(out / name, suppress_counts(table, PUBLIC_COUNTS[name], n))
    return out
