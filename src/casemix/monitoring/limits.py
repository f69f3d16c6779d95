"""Control limits of the CUSUM charts by simulation, one program at a time.

Under hazard ratio 1, each of the program's recipients fails at a time drawn from his or her
own cumulative hazard exp(lp) H0(u) by inversion of the step function (the first day u with
exp(lp) H0(u) >= an Exp(1) draw), censored at the follow-up that could have been observed
(the horizon or the cut-off; earlier for recipients lost to follow-up). Each simulated history
gives the largest G over the period of each chart; the limit h is the smallest value that at
most ``level`` of the histories reach. All replicates of a program are drawn at once
(numpy, vectorised); the random stream of a program depends only on the seed and its code, so
the limits do not depend on which programs are monitored together or in which order.

Monte Carlo error: the share of histories that reach h is reported with its binomial
standard error, and a distribution-free 95% interval for h itself from the order statistics of
the simulated maxima.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np
from scipy import stats

from casemix.monitoring.cusum import cusum_maxima, expected_by_day

__all__ = ["ControlLimit", "control_limit", "program_seed", "simulate_maxima"]

# elements of the (replicates, points, events) work arrays held at once, and of the
# (replicates, recipients) uniform draws
_CHUNK_ELEMENTS = 4_000_000
_DRAW_ELEMENTS = 2_000_000


def program_seed(seed: int, program: str) -> np.random.SeedSequence:
    """The seed sequence of one program: the run's seed and a digest of the program code."""
    digest = hashlib.sha256(str(program).encode("utf-8")).digest()
    return np.random.SeedSequence(int(seed), spawn_key=tuple(np.frombuffer(digest[:16], "<u4")))


def simulate_maxima(
    entry: np.ndarray,
    censor: np.ndarray,
    risk: np.ndarray,
    stratum: np.ndarray,
    hazard: np.ndarray,
    days: int,
    rhos,
    replicates: int,
    rng: np.random.Generator,
    hr: float = 1.0,
) -> np.ndarray:
    """Largest G of each chart over simulated histories of one program.

    Parameters
    ----------
    entry, censor : ndarray of int, shape (n,)
        Transplant day from the start of monitoring, and days to censoring after it.
    risk : ndarray, shape (n,)
        exp(lp) against the baseline of ``hazard``.
    stratum : ndarray of int, shape (n,)
    hazard : ndarray, shape (strata, horizon + 1)
        Baseline cumulative hazard at whole days (right-continuous step function).
    days : int
        Last day of the period (``entry + censor <= days``).
    rhos : sequence of float
        Hazard ratios of the charts.
    replicates : int
    rng : numpy.random.Generator
    hr : float, default 1.0
        True hazard ratio of the simulated program (1 for control limits).

    Returns
    -------
    ndarray, shape (len(rhos), replicates)
    """
    entry, censor = np.asarray(entry, np.intp), np.asarray(censor, np.intp)
    stratum = np.asarray(stratum, np.intp)
    risk = np.asarray(risk, float) * hr
    full = expected_by_day(entry, censor, risk, stratum, hazard, days)
    p_event = -np.expm1(-risk * hazard[stratum, censor])
    out = np.empty((len(rhos), replicates))
    done = 0
    while done < replicates:
        block = min(replicates - done, max(1, _DRAW_ELEMENTS // max(1, entry.size)))
        draw = rng.random((block, entry.size))
        rows, who = np.nonzero(draw < p_event)
        target = -np.log1p(-draw[rows, who]) / risk[who]
        when = np.empty(who.size, dtype=np.intp)
        for s in np.unique(stratum[who]):
            mine = stratum[who] == s
            when[mine] = np.searchsorted(hazard[s], target[mine], side="left")
        when = np.minimum(when, censor[who])
        histories = _Events(rows, who, when, entry, censor, risk, stratum, hazard, block, days)
        step = max(1, _CHUNK_ELEMENTS // max(1, (2 * histories.width + 1) * histories.width))
        for first in range(0, block, step):
            part = slice(first, min(first + step, block))
            out[:, done + part.start : done + part.stop] = cusum_maxima(
                histories.day[part], histories.correction(part), full, rhos
            )
        done += block
    return out


class _Events:
    """Simulated events of a block of histories as padded (history, slot) arrays (internal)."""

    def __init__(self, rows, who, when, entry, censor, risk, stratum, hazard, block, days):
        day = entry[who] + when
        order = np.lexsort((day, rows))
        rows, who, when, day = rows[order], who[order], when[order], day[order]
        counts = np.bincount(rows, minlength=block)
        self.width = max(int(counts.max(initial=0)), 1)
        slot = np.arange(rows.size) - np.repeat(np.cumsum(counts) - counts, counts)
        shape = (block, self.width)
        self.day = np.full(shape, days + 2, dtype=np.intp)
        self.day[rows, slot] = day
        self._entry = np.zeros(shape, np.intp)
        self._start = np.zeros(shape, np.intp)
        self._end = np.zeros(shape, np.intp)
        self._risk = np.zeros(shape)
        self._stratum = np.zeros(shape, np.intp)
        self._entry[rows, slot] = entry[who]
        self._start[rows, slot] = when
        self._end[rows, slot] = censor[who]
        self._risk[rows, slot] = risk[who]
        self._stratum[rows, slot] = stratum[who]
        self._hazard = hazard

    def correction(self, part: slice):
        """The follow-up each history's events cut short, as expected events by day."""
        entry, start, end = self._entry[part], self._start[part], self._end[part]
        risk, stratum, hazard = self._risk[part], self._stratum[part], self._hazard

        def lost(points: np.ndarray) -> np.ndarray:
            since = points[:, :, None] - entry[:, None, :]
            u = np.clip(since, start[:, None, :], end[:, None, :])
            s = stratum[:, None, :]
            cut = hazard[s, u] - hazard[s, start[:, None, :]]
            return (risk[:, None, :] * cut).sum(axis=2)

        return lost


@dataclass(frozen=True)
class ControlLimit:
    """A simulated control limit and its Monte Carlo error.

    Attributes
    ----------
    h : float
        Smallest limit that at most ``level`` of the simulated histories reach (inf when no
        history ever leaves 0: the chart cannot signal).
    h_lower, h_upper : float
        Distribution-free 95% interval for the exact limit (order statistics).
    signal_probability : float
        Share of simulated histories that reach ``h`` (at most ``level``).
    signal_probability_se : float
        Its binomial Monte Carlo standard error.
    """

    h: float
    h_lower: float
    h_upper: float
    signal_probability: float
    signal_probability_se: float


def control_limit(maxima: np.ndarray, level: float) -> ControlLimit:
    """The limit h for a chart from its simulated maxima (see :class:`ControlLimit`)."""
    values = np.sort(np.asarray(maxima, dtype=float))
    r = values.size
    allowed = min(int(np.floor(level * r + 1e-9)), r - 1)  # histories that may reach h
    kept = values[r - allowed - 1]  # the largest value that must stay below h
    above = values[values > kept]
    h = float((kept + above[0]) / 2.0) if above.size else np.inf
    if not np.isfinite(h) and kept > 0:
        h = float(np.nextafter(kept, np.inf))
    # order statistics around the (1 - level) quantile: a 95% interval for the exact limit
    z = stats.norm.ppf(0.975) * np.sqrt(r * level * (1.0 - level))
    centre = r * (1.0 - level)
    low = values[int(np.clip(np.floor(centre - z) - 1, 0, r - 1))]
    high = values[int(np.clip(np.ceil(centre + z) - 1, 0, r - 1))]
    share = float(np.mean(values >= h)) if np.isfinite(h) else 0.0
    return ControlLimit(
        h=h,
        h_lower=float(low),
        h_upper=float(high),
        signal_probability=share,
        signal_probability_se=float(np.sqrt(share * (1.0 - share) / r)),
    )
