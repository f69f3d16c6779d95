"""Harrell's concordance index in O(n log n), vectorised with numpy.

Written by hand for speed at registry scale: lifelines' ``concordance_index`` is O(n log n)
too, but it walks the subjects in a Python loop over a binary tree (measured here: 19 s at
10^6 rows with tied times on a 2-core machine). Here every step is a whole-array numpy
operation: two sorts by risk score, then one pass per bit of the (time, status) code, in
which a stable partition on that bit (a most-significant-digit radix sort) counts the pairs
whose codes first differ at that bit; each pass writes into work arrays allocated once.
Whole-number times spanning at most n values (follow-up in days) are coded by their offset
from the first time, without a sort (about 10 passes for a year's follow-up, whatever n is);
other times by their dense rank (about log2(2n) passes when all are distinct).

Pair conventions (the same as lifelines and scikit-survival)
-------------------------------------------------------------
* A pair is comparable when the shorter time is an event. At equal times, an event paired
  with a censored subject is comparable (the censored one is taken to outlive it); two
  events at the same time, and two censored subjects, are not.
* The subject that fails first should have the higher risk score: such a pair is
  concordant, the reverse discordant; equal risk scores count 1/2.

References
----------
Harrell FE, Califf RM, Pryor DB, Lee KL, Rosati RA. Evaluating the yield of medical tests.
JAMA 1982;247:2543-2546.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from casemix.errors import InputError, plural
from casemix.survival.validate import as_time_event

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


def _smaller_after(values: np.ndarray, flagged: np.ndarray) -> int:
    """Count pairs of positions i < j with values[j] < values[i] and i flagged.

    Most-significant bit first, the array is kept stably partitioned by the bits seen so far
    (groups of equal prefix, positions ascending within a group). A pair whose values first
    differ at bit b lies in one group at that bit, i with a 1 there and j with a 0 after it:
    each flagged i with a 1 adds the zeros that follow it in its group. Then the group is
    split, zeros first, both halves keeping their order.

    Parameters
    ----------
    values : ndarray of int, shape (n,)
        Non-negative integer codes, n >= 1.
    flagged : ndarray of bool, shape (n,)

    Returns
    -------
    int
    """
    n = values.size
    span = int(values.max()) + 1
    bits = max(1, (span - 1).bit_length())
    kind = np.int32 if 2 * max(n, span) < 2**31 else np.int64
    # below[u]: number of values < u (u up to 2^bits, so every group end has an entry)
    below = np.full((1 << bits) + 1, n, dtype=kind)
    below[0] = 0
    np.cumsum(np.bincount(values, minlength=span), out=below[1 : span + 1])
    packed = (values.astype(kind) << 1) | flagged.astype(kind)  # the flag rides in bit 0
    moved = np.empty_like(packed)
    position = np.arange(n, dtype=kind)
    zeros_before = np.zeros(n + 1, dtype=kind)
    # work arrays reused by every pass (whole-array numpy steps write into them in place)
    one, group_low, group_start, place, other = (np.empty(n, dtype=kind) for _ in range(5))
    zeros_upto = zeros_before[:-1]
    total = 0
    for b in range(bits - 1, -1, -1):
        np.right_shift(packed, b + 1, out=one)
        one &= 1
        np.right_shift(packed, b + 2, out=group_low)
        group_low <<= b + 1  # smallest value of the element's group
        np.subtract(1, one, out=place)
        np.cumsum(place, out=zeros_before[1:])
        # zeros from each position to its group's end; each flagged one adds them
        np.add(group_low, 2 << b, out=other)
        np.take(below, other, out=other, mode="clip")
        np.take(zeros_before, other, out=other, mode="clip")
        other -= zeros_upto
        np.bitwise_and(one, packed, out=place)
        place *= other
        total += int(place.sum(dtype=np.int64))
        # new place: zeros keep their rank among the group's zeros, ones go after all zeros
        # (a one moves ahead past the zeros that follow it in its group)
        other += position
        np.take(below, group_low, out=group_start, mode="clip")
        np.take(zeros_before, group_start, out=place, mode="clip")
        np.subtract(zeros_upto, place, out=place)
        place += group_start
        other -= place
        other *= one
        place += other
        moved[place] = packed
        packed, moved = moved, packed
    return total


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


def _time_codes(time: np.ndarray) -> np.ndarray:
    """Integer codes in the order of the times: days since the first when the times are whole
    numbers spanning at most n values (registry follow-up), else dense ranks."""
    low = time.min()
    offset = time - low
    codes = offset.astype(np.int64)
    if np.array_equal(codes, offset) and codes.max() < time.size:
        return codes
    return np.unique(time, return_inverse=True)[1].reshape(-1)


def _by_risk(risk: np.ndarray, key: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Order by risk descending, then key descending; and where each risk value starts."""
    order = np.argsort(-risk)
    ranked = risk[order]
    new_risk = np.r_[True, ranked[1:] != ranked[:-1]]
    # the sort left equal risks in any order; a second, nearly sorted pass orders their keys
    combined = np.cumsum(new_risk, dtype=np.int64) * (int(key.max()) + 1) - key[order]
    return order[np.argsort(combined, kind="stable")], new_risk


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
    n = time.size
    risk = _check_risk(risk, n)
    if n == 0:
        return Concordance(float("nan"), 0, 0, 0, 0)
    # key orders pairs by (time, censored): j is comparable with event i exactly when its key
    # is strictly larger than i's (later time, or the same time and censored)
    is_event = event.astype(bool)
    key = _time_codes(time) * 2 + (~is_event)
    span = int(key.max()) + 1
    at_key = np.bincount(key, minlength=span)
    later = n - np.cumsum(at_key)  # subjects with a strictly larger key
    n_comp = int(np.bincount(key[is_event], minlength=span) @ later)
    # by risk descending, every j after i has a risk <= i's; equal risks are ordered by key
    # descending, so the j with i's risk and a larger key come before i (tied, not concordant)
    order, new_risk = _by_risk(risk, key)
    key_sorted = key[order]
    event_sorted = is_event[order]
    n_conc = _smaller_after(span - 1 - key_sorted, event_sorted)
    new_run = new_risk.copy()
    new_run[1:] |= key_sorted[1:] != key_sorted[:-1]
    position = np.arange(n)
    risk_start = np.maximum.accumulate(np.where(new_risk, position, 0))
    run_start = np.maximum.accumulate(np.where(new_run, position, 0))
    n_tied = int((run_start - risk_start)[event_sorted].sum())
    n_disc = n_comp - n_conc - n_tied
    c = (n_conc + 0.5 * n_tied) / n_comp if n_comp else float("nan")
    return Concordance(c, n_conc, n_disc, n_tied, n_comp)
