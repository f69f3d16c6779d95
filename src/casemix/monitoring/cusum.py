"""Risk-adjusted CUSUM in continuous time on a Cox model, and cumulative observed minus expected.

For one program, in calendar time t from the start of monitoring, N(t) counts its observed
events and A(t) its expected events: each recipient contributes exp(x . beta) dH0 over the
days he or she is at risk within the horizon, so with the reference model's right-continuous
Breslow step function, A(t) = sum_i exp(lp_i) H0(min(t - transplant_i, followup_i)). For a
hazard ratio rho the log-likelihood ratio of (s, t] is

    (N(t) - N(s)) log rho - (rho - 1) (A(t) - A(s)),

the Poisson log-likelihood ratio of the events in (s, t] (Biswas & Kalbfleisch 2008), and the
CUSUM is G(t) = max over s <= t of that ratio, which signals when G(t) >= h. Writing
L(t) = N(t) log rho - (rho - 1) A(t), G(t) = L(t) - min(0, min over s <= t of L(s)).

Every date is a whole day, so N and A are step functions that jump only on whole days: a daily
grid is exact (:func:`cusum_path`). For simulated histories only the days around events matter
(:func:`cusum_maxima`): between event days L moves one way only (down for rho > 1, up for
rho < 1), so the largest G and the smallest L over any stretch without events are found at its
ends, the day before an event day and the event day itself. numpy has no such recursion, so it
is written out here.

References
----------
Biswas P, Kalbfleisch JD. A risk-adjusted CUSUM in continuous time based on the Cox model.
Statistics in Medicine 2008;27:3382-3406.

Steiner SH, Cook RJ, Farewell VT, Treasure T. Monitoring surgical performance using
risk-adjusted cumulative sum charts. Biostatistics 2000;1:441-452.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "cusum_maxima",
    "cusum_path",
    "expected_by_day",
    "log_likelihood_ratio",
    "observed_by_day",
]


def log_likelihood_ratio(observed, expected, rho: float) -> np.ndarray:
    """Return N log rho - (rho - 1) A, the log-likelihood ratio of hazard ratio rho against 1.

    Parameters
    ----------
    observed, expected : array_like
        Events N and expected events A (cumulative, or over any one stretch of time).
    rho : float
        Hazard ratio of the alternative, > 0.
    """
    observed = np.asarray(observed, dtype=float)
    return observed * np.log(rho) - (rho - 1.0) * np.asarray(expected, dtype=float)


def cusum_path(
    observed, expected, rho: float, h: float = np.inf, *, restart: bool = True
) -> tuple[np.ndarray, np.ndarray]:
    """The CUSUM G on a grid of times, and the grid positions where it signals.

    Parameters
    ----------
    observed, expected : array_like, shape (m,)
        N and A at successive grid times (cumulative from the start, where both are 0).
    rho : float
        Hazard ratio to detect (> 1 for an upper chart, < 1 for a lower one).
    h : float, default inf
        Control limit; a signal when G >= h.
    restart : bool, default True
        After a signal G starts again from zero (the next stretch begins at the signal); else
        G runs on and a new signal is counted each time it climbs back to h from below.

    Returns
    -------
    g : ndarray, shape (m,)
        G at each grid time (on a signal day with restart, the value that signalled).
    signals : ndarray of int
        Grid positions of the signals, ascending.
    """
    llr = log_likelihood_ratio(observed, expected, rho)
    g = np.empty_like(llr)
    signals: list[int] = []
    begin, base = 0, 0.0
    while begin < llr.size:
        stretch = llr[begin:] - base
        part = stretch - np.minimum(0.0, np.minimum.accumulate(stretch))
        above = part >= h
        if not restart:
            g[begin:] = part
            up = above & ~np.concatenate([[False], above[:-1]])
            signals.extend((begin + np.flatnonzero(up)).tolist())
            break
        crossed = np.flatnonzero(above)
        if crossed.size == 0:
            g[begin:] = part
            break
        k = int(crossed[0])
        g[begin : begin + k + 1] = part[: k + 1]
        signals.append(begin + k)
        base = llr[begin + k]
        begin += k + 1
    return g, np.asarray(signals, dtype=np.intp)


def expected_by_day(entry, stop, risk, stratum, hazard: np.ndarray, days: int) -> np.ndarray:
    """A(t) on the calendar days 0..days: expected events accrued by each day's end.

    Parameters
    ----------
    entry : ndarray of int, shape (n,)
        Transplant day of each recipient, counted from the start of monitoring (>= 0).
    stop : ndarray of int, shape (n,)
        Days at risk after the transplant (follow-up), with entry + stop <= days.
    risk : ndarray, shape (n,)
        Relative risk exp(lp) against the baseline of ``hazard``.
    stratum : ndarray of int, shape (n,)
        Row of ``hazard`` of each recipient.
    hazard : ndarray, shape (strata, horizon + 1)
        Baseline cumulative hazard at whole days 0..horizon (right-continuous: the jump on a
        day is included in that day's value).
    days : int
        Last calendar day.

    Returns
    -------
    ndarray, shape (days + 1,)
    """
    entry, stop = np.asarray(entry, dtype=np.intp), np.asarray(stop, dtype=np.intp)
    jumps = np.diff(hazard, axis=1, prepend=0.0)
    counts = stop + 1
    owner = np.repeat(np.arange(entry.size), counts)
    offset = np.arange(owner.size) - np.repeat(np.cumsum(counts) - counts, counts)
    weights = np.asarray(risk, dtype=float)[owner] * jumps[np.asarray(stratum)[owner], offset]
    daily = np.bincount(entry[owner] + offset, weights=weights, minlength=days + 1)
    return np.cumsum(daily[: days + 1])


def observed_by_day(entry, stop, event, days: int) -> np.ndarray:
    """N(t) on the calendar days 0..days: events on or before each day (shape (days + 1,))."""
    entry, stop = np.asarray(entry, dtype=np.intp), np.asarray(stop, dtype=np.intp)
    hit = np.asarray(event).astype(bool)
    daily = np.bincount(entry[hit] + stop[hit], minlength=days + 1)
    return np.cumsum(daily[: days + 1]).astype(float)


def cusum_maxima(
    event_day: np.ndarray,
    correction,
    expected_full: np.ndarray,
    rhos,
) -> np.ndarray:
    """Largest G over the period of each history, found from the days around its events.

    Parameters
    ----------
    event_day : ndarray of int, shape (r, k)
        Each history's event days in ascending order, padded on the right with
        ``days + 2`` (where ``days + 1 == expected_full.size``).
    correction : callable
        ``correction(points)`` with ``points`` of shape (r, q) (calendar days, -1 allowed)
        returns, shape (r, q), how much less expected each history has accrued by those days
        than ``expected_full`` (the follow-up its events cut short).
    expected_full : ndarray, shape (days + 1,)
        A(t) by day had no recipient had an event (everyone at risk to his or her censoring).
    rhos : sequence of float
        Hazard ratios of the charts.

    Returns
    -------
    ndarray, shape (len(rhos), r)
        max over t of G(t), per chart and history (0 when G never leaves 0).
    """
    r, k = event_day.shape
    days = expected_full.size - 1
    real = event_day <= days
    new_day = real & np.concatenate(
        [np.ones((r, 1), bool), event_day[:, 1:] != event_day[:, :-1]], axis=1
    )
    # sequence per history: (day before event 1, event day 1, ..., last day of the period)
    points = np.empty((r, 2 * k + 1), dtype=np.intp)
    points[:, 0:-1:2] = event_day - 1
    points[:, 1:-1:2] = event_day
    points[:, -1] = days
    valid = np.empty(points.shape, dtype=bool)
    valid[:, 0:-1:2] = new_day
    valid[:, 1:-1:2] = real
    valid[:, -1] = True
    clipped = np.minimum(np.maximum(points, -1), days)
    expected = np.concatenate([[0.0], expected_full])[clipped + 1] - correction(clipped)
    # events on or before each point: the rows are sorted, so one searchsorted over all rows
    stride = days + 3
    flat = (event_day + stride * np.arange(r)[:, None]).ravel()
    upto = np.searchsorted(flat, flat, side="right").reshape(r, k) - k * np.arange(r)[:, None]
    observed = np.empty(points.shape)
    observed[:, 0:-1:2] = np.arange(k)  # before the first event of a day: the earlier ones
    observed[:, 1:-1:2] = upto
    observed[:, -1] = real.sum(axis=1)
    out = np.empty((len(rhos), r))
    for c, rho in enumerate(rhos):
        llr = log_likelihood_ratio(observed, expected, rho)
        low = np.minimum.accumulate(np.where(valid, llr, np.inf), axis=1)
        g = np.where(valid, llr - np.minimum(0.0, low), 0.0)
        out[c] = np.maximum(g.max(axis=1), 0.0)
    return out
