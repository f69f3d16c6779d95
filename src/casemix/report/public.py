"""Copies of an evaluation's tables for public release, with small counts hidden.

Only tables of programs and groups are copied; the record-level files (recipients.csv and
exclusions.csv, one row per recipient) are never part of a public release, and excluded
records are published as counts per reason instead.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from casemix._io import write_csv
from casemix.report.folder import read_csv_as_written, read_evaluation_folder
from casemix.report.suppress import check_threshold, suppress_counts

__all__ = ["PUBLIC_COUNTS", "exclusions_by_reason", "write_public_tables"]

PUBLIC_COUNTS = {
    "programs.csv": ("recipients", "observed"),
    "followup.csv": ("recipients", "lost_to_followup"),
    "curves.csv": ("at_risk",),
    "casemix.csv": (),
    "coefficients.csv": (),
    "exclusions_by_reason.csv": ("records",),
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
    counts = (
        exclusions.groupby(exclusions["kind"].rename("reason"), sort=True)
        .size()
        .rename("records")
        .reset_index()
    )
    return counts.sort_values(["records", "reason"], ascending=[False, True], kind="stable",
                              ignore_index=True)


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
    extra = Path(folder) / "out_of_range.csv"
    if extra.is_file():  # written by newer evaluations; older folders do not have it
        tables["out_of_range.csv"] = read_csv_as_written(extra, ["program"])
    out = Path(out)
    for name, table in tables.items():
        write_csv(out / name, suppress_counts(table, PUBLIC_COUNTS[name], n))
    return out
