"""Checks of the arrays handed to the survival engine, with messages that say how to fix them."""

from __future__ import annotations

import numpy as np

from casemix.errors import InputError, plural
from casemix.survival._gram import BLOCK_ROWS, weighted_variance

__all__ = [
    "as_matrix",
    "as_time_event",
    "as_weights",
    "check_columns",
]


def as_time_event(time, event) -> tuple[np.ndarray, np.ndarray]:
    """Return ``time`` as float64 and ``event`` as int8 after checking both.

    Parameters
    ----------
    time : array_like, shape (n,)
        Follow-up times, finite and >= 0 (0 is a valid failure time).
    event : array_like, shape (n,)
        1 for an event, 0 for censoring.
    """
    time = np.asarray(time, dtype=float)
    if time.ndim != 1:
        raise InputError(f"time must be one-dimensional; got shape {time.shape}")
    bad = ~np.isfinite(time)
    if bad.any():
        raise InputError(
            f"time has {plural(int(bad.sum()), 'row')} that {'is' if bad.sum() == 1 else 'are'} "
            "NaN or infinite "
            f"(first at row {int(np.flatnonzero(bad)[0])}); give every recipient a finite "
            "follow-up time"
        )
    if (time < 0).any():
        raise InputError(
            f"time has {plural(int((time < 0).sum()), 'negative value')} "
            f"(first at row {int(np.flatnonzero(time < 0)[0])}); "
            "follow-up cannot end before it starts"
        )
    event_raw = np.asarray(event)
    if event_raw.shape != time.shape:
        raise InputError(
            f"event has {plural(event_raw.shape[0] if event_raw.ndim else 0, 'row')} but time has "
            f"{time.shape[0]}; give one event indicator per recipient"
        )
    with np.errstate(invalid="ignore"):
        ok = np.isin(event_raw, (0, 1))
    if not ok.all():
        raise InputError(
            f"event must be 0 or 1; {plural(int((~ok).sum()), 'row', ('holds', 'hold'))} other "
            "values "
            f"(first at row {int(np.flatnonzero(~ok)[0])}: {event_raw[~ok][0]!r})"
        )
    return time, event_raw.astype(np.int8)


def as_weights(weights, n: int) -> np.ndarray:
    """Return case weights (ones when None), checked to be finite and positive."""
    if weights is None:
        return np.ones(n)
    weights = np.asarray(weights, dtype=float)
    if weights.shape != (n,):
        raise InputError(f"weights must have one value per row ({n}); got shape {weights.shape}")
    bad = ~np.isfinite(weights) | (weights <= 0)
    if bad.any():
        raise InputError(
            f"weights must be finite and > 0; {plural(int(bad.sum()), 'row', ('is', 'are'))} not "
            f"(first at row {int(np.flatnonzero(bad)[0])})"
        )
    return weights


def as_matrix(X, n: int, names: tuple[str, ...] | None) -> tuple[np.ndarray, tuple[str, ...]]:
    """Return ``X`` as a float64 (n, p) array and the column names, checking values."""
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    if X.ndim != 2 or X.shape[0] != n:
        raise InputError(f"X must have shape (n, p) with n = {plural(n, 'row')}; got {X.shape}")
    if X.shape[1] == 0:
        raise InputError("X has no columns; give at least one covariate")
    if names is None:
        names = tuple(f"x{j}" for j in range(X.shape[1]))
    names = tuple(str(name) for name in names)
    if len(names) != X.shape[1]:
        raise InputError(f"{len(names)} names given for {X.shape[1]} columns of X")
    for j in np.flatnonzero(~np.isfinite(X).all(axis=0)):
        bad = ~np.isfinite(X[:, j])
        kind = "NaN" if np.isnan(X[bad, j]).any() else "infinite"
        raise InputError(
            f"column '{names[j]}' has {plural(int(bad.sum()), 'row')} that "
            f"{'is' if bad.sum() == 1 else 'are'} {kind} "
            f"(first at row {int(np.flatnonzero(bad)[0])}); impute or exclude them before fitting"
        )
    return X, names


def check_columns(
    X: np.ndarray, names: tuple[str, ...], weights: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Refuse constant columns; return the weighted column means and standard deviations.

    Collinear columns are found later, from the information matrix at beta = 0, which the fit
    computes anyway (a collinear X makes it singular).
    """
    center = weights @ X / weights.sum()
    # A column is constant when every row equals the first (X is finite); most columns
    # already vary within the first rows, and only the others are read to the end.
    first = X[:1]
    varies = (X[:BLOCK_ROWS] != first).any(axis=0)
    rest = np.flatnonzero(~varies)
    varies[rest] = (X[:, rest] != first[:, rest]).any(axis=0)
    constant = np.flatnonzero(~varies)
    if constant.size:
        listed = ", ".join(f"'{names[j]}'" for j in constant)
        raise InputError(
            f"column {listed} is constant in the fitting data; its effect cannot be estimated: "
            "drop it or fit on data where it varies"
        )
    return center, np.sqrt(weighted_variance(X, weights, center))
