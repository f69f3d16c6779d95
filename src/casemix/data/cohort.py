"""From validated records to follow-up: ``time`` (days) and ``event`` (0/1) per recipient.

For a recipient transplanted on day ``T`` (all dates are whole days):

* event date ``D`` = the earliest of the outcome's date columns (none if all are empty);
* end date ``C`` = the earliest of the outcome's ``censor_at`` columns (for example death
  in death-censored graft failure): follow-up stops there without an event, and an event
  dated after ``C`` does not count (one dated on ``C`` does);
* potential follow-up end ``P`` = min(cut-off, ``T`` + horizon);
* last seen ``L`` = the last-seen date, extended to ``D`` if ``D`` is later and not after the
  cut-off (records already do this and count it). An event after the cut-off lies outside
  the period the data are complete for: it is not counted and does not lengthen follow-up
  past the last real contact;
* ``event`` = 1 if ``D`` exists and ``D <= P`` (an event on the day of the transplant, on the
  horizon day or on the cut-off day counts), else 0;
* ``time`` = ``D - T`` if ``event`` else ``min(L, P) - T``, in days (float); never negative,
  never past the horizon or the cut-off;
* **day 0**: a follow-up of 0 days (an event, or the end of follow-up, on the day of the
  transplant) becomes ``DAY_ZERO_TIME`` = 0.5 days, for the reference population and the
  evaluation cohort alike (both go through :func:`build_cohort`). A recipient who fails on
  the day of the transplant was at risk for part of that day; half a day keeps these events
  before every later one and after nothing, and keeps every time positive (so a log time
  scale applies). A cohort day-0 event is expected with the reference's own day-0 hazard;
  when the reference has no day-0 event its E is 0 (the audit reports such events).

Records dated after death are excluded (kind ``dated after death``) when the spec names a
death column: a last-seen date or any outcome date later than the death date cannot be right,
and keeping it would give risk time after death or count an event after it.

Per program, the follow-up completeness index (Clark, Altman & De Stavola, 2002) is
``sum(observed) / sum(potential)`` where observed = ``time`` and potential = ``D - T`` for an
event and ``P - T`` otherwise; it is NaN when the potential follow-up is zero (everyone
transplanted on the cut-off day). A recipient is **lost to follow-up** when, without an event,
``P - L`` is more than ``lost_after_days`` (default 182) days: last seen more than about six
months (a usual interval between follow-up visits; our choice, configurable) before the end of
the follow-up that could have been observed.

Plain pandas/numpy arithmetic on datetime64 columns; nothing is hand-written beyond that.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from casemix.data.records import Records, nanoseconds, to_timestamp
from casemix.errors import InputError

#: Exclusion kind of a transplant outside the cohort window.
WINDOW_KIND = "transplanted outside the cohort window"

__all__ = ["DAY_ZERO_TIME", "WINDOW_KIND", "Cohort", "apply_window", "build_cohort", "follow_up"]

_DAY = pd.Timedelta(days=1)
# analysis time (days) of a follow-up that ends on the day of the transplant
DAY_ZERO_TIME = 0.5


@dataclass(frozen=True, eq=False)
class Cohort:
    """Recipients with their follow-up for one outcome, horizon and cut-off.

    Attributes
    ----------
    frame : pandas.DataFrame
        The kept record columns plus ``time`` (float days, a day-0 end at ``DAY_ZERO_TIME``),
        ``event`` (int 0/1) and ``ended`` (int 0/1: follow-up stopped at a ``censor_at``
        date, the competing event); index = 0-based row of the records file.
    exclusions : pandas.DataFrame
        ``row``, ``recipient``, ``reason``, ``program``: the records' exclusions plus
        recipients outside the cut-off or the transplant-date window, sorted by row.
    followup : pandas.DataFrame
        One row per program (sorted): ``program``, ``recipients``, ``completeness``,
        ``lost_to_followup``, ``observed_days``, ``potential_days``.
    outcome : str
    horizon_days : float
    cutoff : pandas.Timestamp
    window : tuple of (pandas.Timestamp or None)
        Inclusive transplant-date window ``(from, to)``.
    n_read : int
        Records read from the file; ``n_read == len(frame) + len(exclusions)``.
    lost_after_days : float
        The lost-to-follow-up threshold used.
    corrections : pandas.DataFrame or None
        ``row``, ``recipient``, ``program``, ``kind``: the records' corrections of the
        recipients kept in the cohort (those of excluded records are not repeated).
    """

    frame: pd.DataFrame
    exclusions: pd.DataFrame
    followup: pd.DataFrame
    outcome: str
    horizon_days: float
    cutoff: pd.Timestamp
    window: tuple[pd.Timestamp | None, pd.Timestamp | None]
    n_read: int
    lost_after_days: float = 182.0
    corrections: pd.DataFrame | None = field(default=None, repr=False)


def follow_up(
    transplant: pd.Series,
    last_seen: pd.Series,
    event_date: pd.Series,
    cutoff: pd.Timestamp,
    horizon_days: float,
    end_date: pd.Series | None = None,
) -> pd.DataFrame:
    """Follow-up arithmetic for aligned datetime64 Series (rules in the module docstring).

    Parameters
    ----------
    transplant, last_seen : pandas.Series of datetime64, shape (n,)
        No missing values; ``transplant <= cutoff``.
    event_date : pandas.Series of datetime64, shape (n,)
        ``NaT`` where there is no event.
    cutoff : pandas.Timestamp
    horizon_days : float
    end_date : pandas.Series of datetime64, shape (n,), optional
        The date that ends follow-up without an event (``NaT`` where there is none).

    Returns
    -------
    pandas.DataFrame
        Same index; float columns ``time``, ``potential``, ``last_seen_days`` (days from the
        transplant to the extended last-seen date) and int columns ``event`` and ``ended``
        (1 where follow-up stopped at ``end_date``, inside the horizon and the cut-off).
    """
    ev = ((event_date - transplant) / _DAY).to_numpy(dtype=float)
    seen = ((last_seen - transplant) / _DAY).to_numpy(dtype=float)
    to_cutoff = ((cutoff - transplant) / _DAY).to_numpy(float)
    window = np.minimum(float(horizon_days), to_cutoff)
    end = np.full(ev.shape, np.nan)
    if end_date is not None:
        end = ((end_date - transplant) / _DAY).to_numpy(dtype=float)
        ev = np.where(end < ev, np.nan, ev)  # an event after the end does not count
    # Follow-up reaches a recorded event up to the cut-off (fmax ignores NaN); a later event
    # is not evidence of survival to the cut-off that the data can be trusted with.
    seen = np.fmax(seen, np.where(ev <= to_cutoff, ev, np.nan))
    seen = np.fmin(seen, end)  # and stops at the end date (fmin ignores NaN)
    window = np.fmin(window, end)
    event = ev <= window  # False where there is no event (NaN compares False)
    ended = ~event & (end <= window)
    time = np.where(event, ev, np.minimum(seen, window))
    return pd.DataFrame(
        {
            "time": time,
            "event": event.astype(np.int64),
            "ended": ended.astype(np.int64),
            "potential": np.where(event, ev, window),
            "last_seen_days": seen,
        },
        index=transplant.index,
    )


def build_cohort(
    records: Records,
    outcome: str,
    horizon_days: float | None = None,
    cutoff: object = None,
    window: tuple[object, object] | None = None,
    *,
    lost_after_days: float = 182.0,
) -> Cohort:
    """Give every kept recipient its follow-up ``time`` and ``event`` for one outcome.

    Parameters
    ----------
    records : Records
    outcome : str
        Name of an ``[outcomes.NAME]`` table of the spec.
    horizon_days : float, optional
        Follow-up that counts, in days. Default: the spec's ``analysis.horizon_days``.
    cutoff : date-like, optional
        Data cut-off (inclusive). Default: the cut-off the records were read with. It may
        not be later than that one, because last-seen dates were truncated to it.
    window : (date-like or None, date-like or None), optional
        Inclusive transplant-date window; ``None`` keeps every transplant (the spec's
        ``cohort_from``/``cohort_to`` apply only when passed, e.g.
        ``window=spec.analysis.window``).
    lost_after_days : float, default 182
        A recipient without an event last seen more than this many days before the end of
        the potential follow-up counts as lost to follow-up.

    Returns
    -------
    Cohort

    Raises
    ------
    SpecError
        Unknown outcome.
    InputError
        No horizon or cut-off, a cut-off after the records' cut-off, a bad window.
    """
    spec = records.spec
    chosen = spec.outcome(outcome)
    dates = chosen.dates
    horizon = _horizon(horizon_days, spec.analysis.horizon_days)
    stamp = _cutoff(cutoff, records)
    start, end = _window(window)
    frame = records.frame
    for name in ("time", "event", "ended"):
        if name in frame.columns:
            raise InputError(
                f"records file '{records.source}' has a column '{name}', which the cohort "
                "adds; rename that column in the file."
            )
    exclusions, kept = apply_window(records, stamp, (start, end))
    # Every record kept (a reference population): a shallow copy, the columns added below
    # go to it alone.
    out = frame.copy(deep=False) if len(kept) == len(frame) else frame.loc[kept].copy()
    fu = follow_up(
        out[spec.columns.transplant_date],
        out[spec.columns.last_seen],
        _earliest(out, dates),
        stamp,
        horizon,
        _earliest(out, chosen.censor_at) if chosen.censor_at else None,
    )
    out["time"] = fu["time"].mask(fu["time"] == 0, DAY_ZERO_TIME)
    out["event"] = fu["event"]
    out["ended"] = fu["ended"]
    return Cohort(
        frame=out,
        exclusions=exclusions,
        followup=_followup(out[spec.columns.program], fu, lost_after_days),
        outcome=outcome,
        horizon_days=horizon,
        cutoff=stamp,
        window=(start, end),
        n_read=records.n_read,
        lost_after_days=float(lost_after_days),
        corrections=_kept_corrections(records, out.index),
    )


def _earliest(frame: pd.DataFrame, columns: tuple[str, ...]) -> pd.Series:
    """Each row's earliest date of ``columns`` (NaT where all are NaT), datetime64[ns]."""
    never, last = np.iinfo(np.int64).min, np.iinfo(np.int64).max  # NaT is the smallest
    days = np.stack([nanoseconds(frame[c]) for c in columns])
    earliest = np.where(days == never, last, days).min(axis=0)
    earliest[earliest == last] = never
    return pd.Series(earliest.view("datetime64[ns]"), index=frame.index)


def _kept_corrections(records: Records, kept: pd.Index) -> pd.DataFrame:
    corrections = records.corrections
    if corrections is None or corrections.empty:
        return pd.DataFrame({"row": pd.Series(dtype=np.int64),
                             **{c: pd.Series(dtype=object)
                                for c in ("recipient", "program", "kind")}})
    inside = corrections["row"].isin(np.asarray(kept) + 1).to_numpy()
    return corrections.loc[inside].reset_index(drop=True)


def _horizon(value: float | None, default: int | None) -> float:
    value = default if value is None else value
    if value is None:
        raise InputError(
            "no follow-up horizon: pass horizon_days or set analysis.horizon_days in the spec."
        )
    if isinstance(value, bool) or not np.isfinite(value) or value <= 0:
        raise InputError(f"horizon_days must be a positive number of days, not {value!r}.")
    return float(value)


def _cutoff(value: object, records: Records) -> pd.Timestamp:
    stamp = to_timestamp(value, "cut-off")
    if stamp is None:
        stamp = records.cutoff
    if stamp is None:
        raise InputError(
            "no cut-off: pass cutoff, set analysis.cutoff in the spec, or read the records "
            "with read_records(..., cutoff=...)."
        )
    if records.cutoff is not None and stamp > records.cutoff:
        raise InputError(
            f"cut-off {stamp:%Y-%m-%d} is after {records.cutoff:%Y-%m-%d}, the cut-off the "
            f"records '{records.source}' were read with (last-seen dates were truncated to "
            "it); read the records again with the later cut-off."
        )
    return stamp


def _window(window: tuple[object, object] | None) -> tuple[pd.Timestamp | None, ...]:
    if window is None:
        return (None, None)
    if len(window) != 2:
        raise InputError(
            f"window must be (from_date, to_date), either may be None; got {window!r}."
        )
    start = to_timestamp(window[0], "window start")
    end = to_timestamp(window[1], "window end")
    if start is not None and end is not None and start > end:
        raise InputError(
            f"window start {start:%Y-%m-%d} is after window end {end:%Y-%m-%d}; swap them."
        )
    return (start, end)


def apply_window(records: Records, cutoff: object,
                 window: tuple[object, object] | None) -> tuple[pd.DataFrame, pd.Index]:
    """Exclude the kept records transplanted after the cut-off or outside the window.

    Records dated after death (a last-seen or outcome date later than the death date) are
    excluded here too, so that every stage that selects recipients counts them alike.

    Parameters
    ----------
    records : Records
    cutoff : date-like or None
        None skips the cut-off check.
    window : (date-like or None, date-like or None) or None
        Inclusive transplant-date window.

    Returns
    -------
    exclusions : pandas.DataFrame
        The records' exclusions plus these, sorted by row (columns as ``Records.exclusions``).
    kept : pandas.Index
        Index of ``records.frame`` of the recipients left.

    Raises
    ------
    InputError
        A window whose start is after its end, or a cut-off before the window starts.
    """
    stamp = to_timestamp(cutoff, "cut-off")
    start, end = _window(window)
    if stamp is not None and start is not None and stamp < start:
        raise InputError(
            f"the cut-off {stamp:%Y-%m-%d} precedes the cohort window, which starts "
            f"{start:%Y-%m-%d}: no transplant in the window has any follow-up. Check the "
            "cut-off and the window (--cutoff, --from, or [analysis] in the spec)."
        )
    tx = records.frame[records.spec.columns.transplant_date]
    reasons = _window_reasons(tx, stamp, start, end)
    _after_death_reasons(records.frame, records.spec, reasons)
    return _exclusions(records, reasons), tx.index[~reasons.hit]


@dataclass
class _Reasons:
    """Exclusion reason text and kind of the records they apply to (None elsewhere).

    Only the few excluded records get text; the masks cover every record.
    """

    hit: np.ndarray
    reason: np.ndarray
    kind: np.ndarray

    @classmethod
    def none(cls, n: int) -> _Reasons:
        return cls(np.zeros(n, dtype=bool), np.full(n, None, dtype=object),
                   np.full(n, None, dtype=object))

    def add(self, mask: np.ndarray, reason: np.ndarray | list[str], kind: str) -> None:
        """Give ``reason`` (one per masked record) and ``kind`` to the masked records."""
        self.reason[mask] = reason
        self.kind[mask] = kind
        self.hit |= mask


def _window_reasons(tx: pd.Series, cutoff: pd.Timestamp | None, start: pd.Timestamp | None,
                    end: pd.Timestamp | None) -> _Reasons:
    """Reasons for recipients outside the cut-off or window (the first that applies)."""
    reasons = _Reasons.none(len(tx))
    checks = [] if cutoff is None else [(tx > cutoff, f", after the cut-off {cutoff:%Y-%m-%d}",
                                         "transplanted after the cut-off")]
    if end is not None:
        checks.append((tx > end, f", after the cohort window (to {end:%Y-%m-%d})",
                       WINDOW_KIND))
    if start is not None:
        checks.append((tx < start, f", before the cohort window (from {start:%Y-%m-%d})",
                       WINDOW_KIND))
    for mask, text, kind in checks:
        mask = mask.to_numpy() & ~reasons.hit
        if mask.any():
            day = tx[mask].dt.strftime("%Y-%m-%d")  # only the few excluded: strftime is slow
            reasons.add(mask, ("transplanted " + day + text).to_numpy(dtype=object), kind)
    return reasons


def _after_death_reasons(frame: pd.DataFrame, spec, reasons: _Reasons) -> None:
    """Add a reason for records with a last-seen or outcome date after the death date."""
    death_column = spec.columns.death
    if death_column is None:
        return
    death = frame[death_column]
    later = [c for c in (spec.columns.last_seen, *spec.event_columns) if c != death_column]
    hits = [(column, (frame[column] > death).to_numpy()) for column in later]
    mask = np.logical_or.reduce([hit for _, hit in hits]) if hits else np.zeros_like(reasons.hit)
    mask &= ~reasons.hit
    if not mask.any():
        return
    rows = np.flatnonzero(mask)
    text = np.full(len(rows), "", dtype=object)
    for column, hit in hits:
        inside = hit[rows]
        if inside.any():
            days = frame[column].iloc[rows[inside]].dt.strftime("%Y-%m-%d")
            text[inside] = text[inside] + f"{column} " + days.to_numpy(dtype=object) + ", "
    deaths = death.iloc[rows].dt.strftime("%Y-%m-%d").to_numpy(dtype=object)
    reasons.add(mask, [f"{t[:-2]} after the death on {d}; correct the dates in the file"
                       for t, d in zip(text, deaths, strict=True)], "dated after death")


def _exclusions(records: Records, reasons: _Reasons) -> pd.DataFrame:
    positions = np.flatnonzero(reasons.hit)
    frame = records.frame
    new = pd.DataFrame(
        {
            "row": (frame.index[positions] + 1).astype(np.int64),
            "recipient": frame[records.spec.columns.recipient].to_numpy()[positions],
            "reason": reasons.reason[positions],
            "program": frame[records.spec.columns.program].to_numpy()[positions],
            "kind": reasons.kind[positions],
        }
    )
    parts = [p for p in (records.exclusions, new) if len(p)]
    if not parts:
        return records.exclusions.copy()
    combined = pd.concat(parts, ignore_index=True)
    return combined.sort_values("row", kind="stable", ignore_index=True)


def _followup(program: pd.Series, fu: pd.DataFrame, lost_after_days: float) -> pd.DataFrame:
    lost = (fu["event"] == 0) & (fu["potential"] - fu["last_seen_days"] > lost_after_days)
    parts = pd.DataFrame(
        {
            "program": program.to_numpy(dtype=object),
            "observed_days": fu["time"].to_numpy(),
            "potential_days": fu["potential"].to_numpy(),
            "lost_to_followup": lost.to_numpy(dtype=np.int64),
        }
    )
    table = parts.groupby("program", sort=True).agg(
        recipients=("observed_days", "size"),
        observed_days=("observed_days", "sum"),
        potential_days=("potential_days", "sum"),
        lost_to_followup=("lost_to_followup", "sum"),
    )
    potential = table["potential_days"].to_numpy(dtype=float)
    observed = table["observed_days"].to_numpy(dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        completeness = np.where(potential > 0, observed / potential, np.nan)
    table["completeness"] = completeness
    table = table.reset_index()
    columns = ["program", "recipients", "completeness", "lost_to_followup",
               "observed_days", "potential_days"]
    return table[columns].astype({"recipients": np.int64, "lost_to_followup": np.int64})
