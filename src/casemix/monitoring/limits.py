"""Control limits of the CUSUM charts by simulation, one program at a time.

Under hazard ratio 1, each of the program's recipients fails at a time drawn from his or her
own cumulative hazard exp(lp) H0(u) by inversion of the step function (the first day u with
exp(lp) H0(u) >= an Exp(1) draw), censored where his or her follow-up ended (for recipients
with an observed event, where it could have ended: the horizon or the cut-off). Each
simulated history gives the largest G over the period of each chart; the limit h is the
smallest value that at most ``level`` of the histories reach. All replicates of a program
are drawn at once (numpy, vectorised); the random stream of a program depends only on the
seed and its code, so the limits do not depend on which programs are monitored together or
in which order.

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

# elements of the (histories, points, events) work arrays held at once, and of the
# (histories, recipients) uniform draws
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
        events = _Events(rows, who, when, entry, censor, risk, stratum, block)
        for group in events.groups():
            day, correction = events.padded(group, hazard, days)
            out[:, done + group] = cusum_maxima(day, correction, full, rhos)
        done += block
    return out


class _Events:
    """Simulated events of a block of histories, sorted by history and day (internal).

    Histories are handled in groups of similar event counts, each padded only to its own
    largest count: the work per history grows with the square of its events.
    """

    def __init__(self, rows, who, when, entry, censor, risk, stratum, block):
        day = entry[who] + when
        order = np.lexsort((day, rows))
        self.counts = np.bincount(rows, minlength=block)
        self.first = np.cumsum(self.counts) - self.counts
        who = who[order]
        self.day, self.start = day[order], when[order]
        self.entry, self.end = entry[who], censor[who]
        self.risk, self.stratum = risk[who], stratum[who]

    def groups(self):
        """Histories in groups (arrays of history numbers) of similar event counts."""
        rank = np.argsort(self.counts, kind="stable")
        done = 0
        while done < rank.size:
            widest = max(int(self.counts[rank[min(done + 255, rank.size - 1)]]), 1)
            size = int(np.clip(_CHUNK_ELEMENTS // ((2 * widest + 1) * widest), 1, 256))
            yield rank[done : done + size]
            done += size

    def padded(self, group: np.ndarray, hazard: np.ndarray, days: int):
        """(history, slot) arrays of a group: event days padded with ``days + 2``, and the
        correction (see :func:`casemix.monitoring.cusum.cusum_maxima`) of its histories."""
        counts = self.counts[group]
        width = max(int(counts.max(initial=0)), 1)
        slot = np.arange(width)
        real = slot[None, :] < counts[:, None]
        index = np.where(real, self.first[group][:, None] + slot[None, :], 0)
        if self.day.size == 0:
            return np.full(real.shape, days + 2, dtype=np.intp), lambda points: 0.0

        def take(values, pad):
            return np.where(real, values[index], pad)

        day = take(self.day, days + 2)
        entry, start, end = take(self.entry, 0), take(self.start, 0), take(self.end, 0)
        risk = take(self.risk, 0.0)
        row = take(self.stratum, 0) * hazard.shape[1]  # offsets into the flattened table
        flat = hazard.ravel()
        base = (risk * flat[row + start]).sum(axis=1)[:, None]  # sum_k risk_k H(X_k)
        entry, start, end, row = (a.astype(np.int32)[:, None, :] for a in (entry, start, end, row))

        def correction(points: np.ndarray) -> np.ndarray:
            u = points.astype(np.int32)[:, :, None] - entry
            np.maximum(u, start, out=u)
            np.minimum(u, end, out=u)
            u += row
            return np.matmul(flat[u], risk[:, :, None])[:, :, 0] - base

        return day, correction


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
