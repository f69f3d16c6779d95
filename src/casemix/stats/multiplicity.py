"""False discovery rate across programs (Benjamini & Hochberg 1995).

Applied to the one-sided exact Poisson p-values of each program's observed count against its
expected count, one direction at a time (more events, fewer events), as suggested for
institutional comparisons by Jones, Ohlssen & Spiegelhalter (2008). The step-up q-value is a
sort and a running minimum, so it is written out here rather than importing statsmodels.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from casemix.errors import InputError
from casemix.stats.poisson import as_observed_expected, check_level, exact_p_values

__all__ = ["bh_q_values", "fdr_table"]


def bh_q_values(p_values) -> np.ndarray:
    """Return Benjamini-Hochberg q-values (adjusted p-values), in input order.

    :math:`q_{(i)} = \\min_{k \\ge i} \\min(1, m\\,p_{(k)} / k)` for the p-values sorted
    ascending, m of them.

    Parameters
    ----------
    p_values : array_like of float, shape (m,)
        Values in [0, 1].

    Returns
    -------
    ndarray of float, shape (m,)
    """
    p = np.asarray(p_values, dtype=float)
    if p.ndim != 1 or np.isnan(p).any() or (p < 0).any() or (p > 1).any():
        raise InputError(
            "p-values must be a one-dimensional list of numbers between 0 and 1 "
            "with no missing values"
        )
    m = p.size
    order = np.argsort(p, kind="stable")
    scaled = p[order] * m / np.arange(1, m + 1)
    running = np.minimum.accumulate(scaled[::-1])[::-1]
    q = np.empty(m)
    q[order] = np.minimum(running, 1.0)
    return q


def fdr_table(program, observed, expected, *, alpha: float = 0.05) -> pd.DataFrame:
    """One-sided exact p-values and their Benjamini-Hochberg q-values for every program.

    Parameters
    ----------
    program : array_like of str, shape (n,)
    observed : array_like of int, shape (n,)
    expected : array_like of float, shape (n,)
    alpha : float, default 0.05
        False discovery rate at which a program is flagged.

    Returns
    -------
    DataFrame, shape (n, 8)
        Columns ``program, observed, expected, p_more, q_more, p_fewer, q_fewer, fdr_flag``
        (``more_events``, ``fewer_events`` or ``none``), sorted by program.
    """
    alpha = check_level(alpha, "alpha")
    o, e = as_observed_expected(observed, expected)
    p_more, p_fewer = exact_p_values(o, e)
    q_more, q_fewer = bh_q_values(p_more), bh_q_values(p_fewer)
    flag = np.where(
        q_more <= alpha, "more_events", np.where(q_fewer <= alpha, "fewer_events", "none")
    )
    table = pd.DataFrame(
        {
            "program": np.asarray(program, dtype=object),
            "observed": o.astype(int),
            "expected": e,
            "p_more": p_more,
            "q_more": q_more,
            "p_fewer": p_fewer,
            "q_fewer": q_fewer,
            "fdr_flag": flag,
        }
    )
    return table.sort_values("program", kind="stable").reset_index(drop=True)
