"""Small-count suppression for public release of tables (reports and CSV files).

Counts from 1 to N - 1 are replaced by the text ``"<N"``; zeros and counts of N or more stay.
Publishing no cell under 11 is common practice in health statistics (N = 11).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from casemix.errors import InputError

__all__ = ["check_threshold", "suppress_counts", "suppress_value", "suppressed_text"]


def check_threshold(n: object) -> int:
    """Return ``n`` as an int after checking that it is a whole number of at least 2.

    Raises
    ------
    InputError
        When ``n`` is not a whole number or is below 2 (nothing would be hidden).
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 2:
        raise InputError(
            f"suppress_below must be a whole number of at least 2 (got {n!r}); "
            "for example 11 hides counts 1 to 10."
        )
    return int(n)


def suppressed_text(n: int) -> str:
    """Return the text shown in place of a hidden count, ``"<n"``."""
    return f"<{n}"


def suppress_counts(df: pd.DataFrame, columns: Sequence[str], n: int) -> pd.DataFrame:
    """Return a copy of ``df`` with counts from 1 to ``n - 1`` hidden in ``columns``.

    Parameters
    ----------
    df : pandas.DataFrame
        Any table; it is not changed.
    columns : sequence of str
        Count columns (whole numbers, missing allowed).
    n : int
        Threshold, at least 2: counts ``1 <= c < n`` become the text ``"<n"``.

    Returns
    -------
    pandas.DataFrame
        Same shape and order. The listed columns hold text (object dtype): the count
        written as a whole number, ``"<n"``, or missing where the input was missing.

    Raises
    ------
    InputError
        When a column is missing, holds something other than whole numbers, or ``n`` is
        not a whole number of at least 2.
    """
    n = check_threshold(n)
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise InputError(
            f"cannot suppress counts: no column {', '.join(map(repr, missing))} in the table "
            f"(it has {', '.join(map(str, df.columns))}); pass existing count columns."
        )
    out = df.copy()
    for column in columns:
        out[column] = _suppress_column(df[column], column, n)
    return out


def _suppress_column(values: pd.Series, column: str, n: int) -> pd.Series:
    numeric = pd.to_numeric(values, errors="coerce")
    bad = numeric.isna() & values.notna() | (numeric.notna() & (numeric % 1 != 0))
    if bad.any():
        where = np.flatnonzero(bad.to_numpy())
        rows = ", ".join(str(i) for i in where[:5])
        raise InputError(
            f"cannot suppress counts in column {column!r}: values that are not whole numbers "
            f"in {'row' if where.size == 1 else 'rows'} {rows} (0-based); only count columns "
            "can be suppressed."
        )
    text = [suppress_value(c, n) for c in numeric]
    return pd.Series(text, index=values.index, dtype=object, name=values.name)


def suppress_value(count: float, n: int) -> str | None:
    """Return one count as text, ``"<n"`` when ``1 <= count < n``; ``None`` when missing.

    Parameters
    ----------
    count : float
        A whole number or NaN (not checked here: :func:`suppress_counts` checks columns).
    n : int
        Threshold, at least 2.
    """
    if pd.isna(count):
        return None
    return suppressed_text(n) if 1 <= count < n else str(int(count))
