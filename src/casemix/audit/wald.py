"""Joint Wald tests of a Cox model's terms, one per covariate group (spline, categorical).

:math:`W_J = \\hat\\beta_J' V_{JJ}^{-1} \\hat\\beta_J \\sim \\chi^2_{|J|}` under
:math:`\\beta_J = 0`: a spline or a categorical covariate is read as one term, not one column
at a time. A few lines of numpy and scipy.stats.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from casemix.errors import InputError

__all__ = ["wald_groups"]


def wald_groups(coef, cov, groups, *, scale: float = 1.0) -> pd.DataFrame:
    """Joint Wald test that every coefficient of a group is zero.

    Parameters
    ----------
    coef : array_like of float, shape (p,)
    cov : array_like of float, shape (p, p)
    groups : sequence of str, length p
        The group of each coefficient (e.g. ``Design.groups``).
    scale : float, default 1
        Multiplies each quadratic form (the proportional-hazards test reuses the form).

    Returns
    -------
    DataFrame
        Index ``group`` (first-seen order); columns ``statistic``, ``df``, ``p_value``.
    """
    b = np.asarray(coef, dtype=float)
    v = np.asarray(cov, dtype=float)
    labels = np.asarray(groups, dtype=object)
    if v.shape != (b.size, b.size) or labels.shape != b.shape:
        raise InputError(
            f"give one group per coefficient and a {b.size} x {b.size} covariance; got "
            f"{labels.shape[0]} groups and shape {v.shape}"
        )
    rows = {}
    for name in dict.fromkeys(labels):
        j = np.flatnonzero(labels == name)
        stat = float(scale * b[j] @ np.linalg.solve(v[np.ix_(j, j)], b[j]))
        rows[name] = (stat, j.size, float(stats.chi2.sf(stat, j.size)))
    return pd.DataFrame.from_dict(
        rows, orient="index", columns=["statistic", "df", "p_value"]
    ).rename_axis("group")
