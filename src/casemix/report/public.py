"""Excluded records counted per reason, the form in which exclusions are shown and published.

The record-level files (recipients.csv, exclusions.csv and corrections.csv, one row per
recipient) are never part of a public release (see :mod:`casemix.report.release`); excluded
records are published as counts per reason and corrections as counts per kind instead.
"""

from __future__ import annotations

import pandas as pd

from casemix.data.records import count_by_kind

__all__ = ["corrections_by_kind", "exclusions_by_reason"]


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
