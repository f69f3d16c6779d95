"""Excluded records counted per reason, the form in which exclusions are shown and published.

The record-level files (recipients.csv and exclusions.csv, one row per recipient) are never
part of a public release (see :mod:`casemix.report.release`); excluded records are published
as counts per reason instead.
"""

from __future__ import annotations

import pandas as pd

__all__ = ["exclusions_by_reason"]


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
