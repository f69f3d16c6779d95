"""Harrell's concordance index in O(n log n), vectorised with numpy.

Written by hand for speed at registry scale: lifelines' ``concordance_index`` is O(n log n)
too, but it walks the subjects in a Python loop over a binary tree (measured here: 19 s at
10^6 rows with tied times on a 2-core machine, against under 4 s for this version).
Here the pair counts come from a bottom-up merge sort whose every level is a handful of
whole-array numpy operations (log2 n levels).

Pair conventions (the same as lifelines and scikit-survival)
-------------------------------------------------------------
* A pair is comparable when the shorter time is an event. At equal times, an event paired
  with a censored subject is comparable (the censored one is taken to outlive it); two
  events at the same time, and two censored subjects, are not.
* The subject that fails first should have the higher risk score: such a pair is
  concordant, the reverse discordant; equal risk scores count 1/2.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from casemix.errors import InputError, plural
from casemix.survival._validate import as_time_event

__all__ = ["Concordance", "concordance"]


@dataclass(frozen=True)
class Concordance:
    """Harrell's C and the pair counts behind it.

    Attributes
    ----------
    c : float
        (concordant + tied_risk / 2) / comparable; NaN when no pair is comparable.
    concordant, discordant, tied_risk, comparable : int
        Numbers of pairs; comparable = concordant + discordant + tied_risk.
    """

    c: float
    concordant: int
    discordant: int
    tied_risk: int
    comparable: int


def _smaller_after(values: np.ndarray) -> np.ndarray:
    """For each position i, count positions j > i with values[j] < values[i].

    Bottom-up merge sort: at block size s, each left block counts the elements of its right
    neighbour that are smaller by one global ``searchsorted`` (blocks are kept sorted and
    offset by their pair number so that the whole array of right blocks is sorted).

    Parameters
    ----------
    values : ndarray of int, shape (n,)
        Non-negative integer codes (dense ranks).

    Returns
    -------
    ndarray of int64, shape (n,)
    """
    n = values.size
    span = np.int64(values.max()) + 1 if n else np.int64(1)
    counts = np.zeros(n, dtype=np.int64)
    order = np.arange(n)  # order[k]: element at position k; sorted within blocks of size s
    position = np.arange(n)
    size = 1
    while size < n:
        block = position // size
        pair = (block // 2).astype(np.int64)
        key = pair * span + values[order]
        right = (block % 2).astype(bool)
        right_keys = key[right]
        left = ~right
        counts[order[left]] += np.searchsorted(right_keys, key[left], side="left") - (
            np.searchsorted(right_keys, pair[left] * span, side="left")
        )
        # a left block precedes its right block, so a stable sort by key merges each pair
        order = order[np.argsort(key, kind="stable")]
        size *= 2
    return counts


def _dense_rank(values: np.ndarray) -> np.ndarray:
    return np.unique(values, return_inverse=True)[1].reshape(-1)


def _check_risk(risk, n: int) -> np.ndarray:
    risk = np.asarray(risk, dtype=float)
    if risk.shape != (n,):
        raise InputError(f"risk must have one score per row ({n}); got shape {risk.shape}")
    bad = ~np.isfinite(risk)
    if bad.any():
        raise InputError(
            f"risk has {plural(int(bad.sum()), 'row')} that {'is' if bad.sum() == 1 else 'are'} "
            "NaN or infinite (first at row "
            f"{int(np.flatnonzero(bad)[0])}); score every recipient before computing C"
        )
    return risk


def concordance(time, event, risk) -> Concordance:
    """Return Harrell's C of a risk score: do higher scores fail first?

    Parameters
    ----------
    time : array_like of float, shape (n,)
    event : array_like of {0, 1}, shape (n,)
    risk : array_like of float, shape (n,)
        Higher means an earlier expected failure (for a Cox model, the linear predictor).

    Returns
    -------
    Concordance
    """
    time, event = as_time_event(time, event)
    risk = _check_risk(risk, time.size)
    # order pairs by (time, censored): j is comparable with event i exactly when its key is
    # strictly larger than i's (later time, or the same time and censored)
    censored = 1 - event.astype(np.int64)
    key = _dense_rank(_dense_rank(time).astype(np.int64) * 2 + censored)
    score = _dense_rank(risk)
    # within equal keys put lower scores first, so no element after i with i's key is smaller
    order = np.lexsort((score, key))
    is_event = event[order].astype(bool)
    smaller = _smaller_after(score[order])[is_event]
    key_sorted = key[order]
    comparable = time.size - np.searchsorted(key_sorted, key_sorted[is_event], side="right")
    # equal scores with a strictly larger key: sort by (score, key) and count
    combined = score.astype(np.int64) * (np.int64(key.max()) + 1) + key
    combined_sorted = np.sort(combined)
    ev_score = score[order][is_event].astype(np.int64)
    end_of_score = np.searchsorted(
        combined_sorted, (ev_score + 1) * (np.int64(key.max()) + 1), side="left"
    )
    tied = end_of_score - np.searchsorted(combined_sorted, combined[order][is_event], "right")
    n_conc, n_comp, n_tied = int(smaller.sum()), int(comparable.sum()), int(tied.sum())
    n_disc = n_comp - n_conc - n_tied
    c = (n_conc + 0.5 * n_tied) / n_comp if n_comp else float("nan")
    return Concordance(c, n_conc, n_disc, n_tied, n_comp)
