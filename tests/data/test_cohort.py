"""Tests of build_cohort: hand-worked follow-up, lifelines as the reference, and properties."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from oracles import lifelines

from casemix import Records, build_cohort, read_records
from casemix.data.cohort import DAY_ZERO_TIME
from casemix.data.spec import spec_from_dict
from casemix.errors import InputError, SpecError

SPEC_DICT = {
    "columns": {
        "recipient": "recipient_id", "program": "program",
        "transplant_date": "transplant_date", "last_seen": "last_seen_date",
    },
    "outcomes": {
        "graft_failure": {"dates": ["graft_loss_date", "death_date"]},
        "death": {"dates": ["death_date"]},
    },
    "analysis": {"cutoff": "2025-06-30", "horizon_days": 365},
}
SPEC = spec_from_dict(SPEC_DICT)
COLUMNS = ["recipient_id", "program", "transplant_date", "last_seen_date", "graft_loss_date",
           "death_date"]

# Hand-worked cases, cut-off 2025-06-30, horizon 365 days. Day counts are datetime.date
# differences (e.g. date(2025, 6, 30) - date(2025, 3, 1) = 121 days).
CASES = [
    # id, program, transplant, last seen, graft loss, death, graft-failure (time, event), why
    # day 0 is analysis time 0.5 (DAY_ZERO_TIME, the documented convention)
    ("C01", "LV01", "2023-01-01", "2023-01-01", "2023-01-01", "", (0.5, 1)),  # failure on day 0
    ("C02", "LV01", "2023-01-01", "2024-06-01", "", "", (365, 0)),  # censored at the horizon
    ("C03", "LV01", "2023-01-01", "2024-06-01", "2024-01-01", "", (365, 1)),  # on the horizon day
    ("C04", "LV01", "2023-01-01", "2024-06-01", "2024-01-02", "", (365, 0)),  # one day after it
    ("C05", "LV01", "2025-03-01", "2025-06-30", "", "", (121, 0)),  # partial: the cut-off
    ("C06", "LV01", "2025-03-01", "2025-06-30", "", "2025-06-30", (121, 1)),  # on the cut-off day
    ("C07", "LV02", "2025-03-01", "2025-08-01", "", "2025-07-15", (121, 0)),  # after the cut-off
    ("C08", "LV02", "2023-01-01", "2023-03-01", "", "", (59, 0)),  # last seen early
    ("C09", "LV02", "2023-06-01", "2023-07-01", "", "2023-09-01", (92, 1)),  # after last seen
    ("C10", "LV02", "2023-01-01", "2024-06-01", "2023-02-01", "2023-12-01", (31, 1)),
    ("C11", "LV02", "2025-06-30", "2025-06-30", "", "", (0.5, 0)),  # transplanted on the cut-off
]


def _write(path: Path, rows: list[tuple]) -> Path:
    frame = pd.DataFrame([r[:6] for r in rows], columns=COLUMNS)
    frame.to_csv(path, index=False)
    return path


@pytest.fixture
def records(tmp_path: Path) -> Records:
    return read_records(_write(tmp_path / "c.csv", CASES), SPEC)


def test_hand_worked_follow_up(records: Records) -> None:
    cohort = build_cohort(records, "graft_failure", 365, dt.date(2025, 6, 30))
    expected = pd.DataFrame([c[6] for c in CASES], columns=["time", "event"])
    got = cohort.frame[["time", "event"]].reset_index(drop=True)
    pd.testing.assert_frame_equal(got, expected, check_dtype=False)
    assert cohort.frame["time"].dtype == np.float64 and cohort.frame["event"].dtype == np.int64
    assert cohort.n_read == len(cohort.frame) + len(cohort.exclusions) == 11
    # C10 for death: death 2023-12-01 = day 334 (date(2023, 12, 1) - date(2023, 1, 1)).
    death = build_cohort(records, "death", 365, "2025-06-30")
    assert death.frame.loc[9, ["time", "event"]].tolist() == [334, 1]
    assert death.frame.loc[0, ["time", "event"]].tolist() == [0.5, 0]  # C01 alive, seen day 0


def test_defaults_come_from_the_records_and_spec(records: Records) -> None:
    cohort = build_cohort(records, "graft_failure")
    assert cohort.horizon_days == 365.0 and cohort.cutoff == pd.Timestamp("2025-06-30")
    assert cohort.window == (None, None)


def test_completeness_and_lost_to_follow_up(records: Records) -> None:
    cohort = build_cohort(records, "graft_failure", 365, "2025-06-30")
    # LV01: observed 0+365+365+365+121+121 = 1337 of potential 1337 (events end potential).
    # LV02: observed 121+59+92+31+0 = 303 of potential 121+365+92+31+0 = 609 (hand-worked).
    fu = cohort.followup
    assert fu["program"].tolist() == ["LV01", "LV02"]
    assert fu["recipients"].tolist() == [6, 5]
    assert fu["observed_days"].tolist() == [1337, 303]
    assert fu["potential_days"].tolist() == [1337, 609]
    np.testing.assert_allclose(fu["completeness"], [1.0, 303 / 609], rtol=1e-15)
    # C08 was last seen 306 days before its potential end (365 - 59): lost beyond the default
    # 182 days, not beyond a lenient 365.
    assert fu["lost_to_followup"].tolist() == [0, 1]
    assert cohort.lost_after_days == 182.0
    lenient = build_cohort(records, "graft_failure", 365, "2025-06-30", lost_after_days=365)
    assert lenient.followup["lost_to_followup"].tolist() == [0, 0]


def test_everyone_on_the_cut_off_day_has_undefined_completeness(tmp_path: Path) -> None:
    records = read_records(_write(tmp_path / "c.csv", CASES[-1:]), SPEC)
    cohort = build_cohort(records, "graft_failure", 365, "2025-06-30")
    assert np.isnan(cohort.followup["completeness"].iloc[0])


def test_window_and_earlier_cut_off_exclude_with_reasons(records: Records) -> None:
    cohort = build_cohort(records, "graft_failure", 365, "2024-12-31",
                          window=("2023-02-01", None))
    assert dict(zip(cohort.exclusions["row"], cohort.exclusions["reason"], strict=True)) == {
        1: "transplanted 2023-01-01, before the cohort window (from 2023-02-01)",
        2: "transplanted 2023-01-01, before the cohort window (from 2023-02-01)",
        3: "transplanted 2023-01-01, before the cohort window (from 2023-02-01)",
        4: "transplanted 2023-01-01, before the cohort window (from 2023-02-01)",
        5: "transplanted 2025-03-01, after the cut-off 2024-12-31",
        6: "transplanted 2025-03-01, after the cut-off 2024-12-31",
        7: "transplanted 2025-03-01, after the cut-off 2024-12-31",
        8: "transplanted 2023-01-01, before the cohort window (from 2023-02-01)",
        10: "transplanted 2023-01-01, before the cohort window (from 2023-02-01)",
        11: "transplanted 2025-06-30, after the cut-off 2024-12-31",
    }
    assert list(cohort.frame.index) == [8]  # only C09 (0-based file row 8) remains
    assert cohort.exclusions["program"].tolist() == ["LV01"] * 6 + ["LV02"] * 4
    assert cohort.n_read == len(cohort.frame) + len(cohort.exclusions)
    windowed = build_cohort(records, "graft_failure", window=(None, "2024-12-31"))
    assert set(windowed.exclusions["row"]) == {5, 6, 7, 11}
    assert windowed.exclusions["reason"].iloc[0] == (
        "transplanted 2025-03-01, after the cohort window (to 2024-12-31)"
    )


def test_records_exclusions_are_carried_over(tmp_path: Path) -> None:
    bad = ("B01", "", "2023-01-01", "2023-06-01", "", "")  # no program
    records = read_records(_write(tmp_path / "c.csv", [*CASES, bad]), SPEC)
    cohort = build_cohort(records, "graft_failure", window=(None, "2024-12-31"))
    assert cohort.exclusions["row"].tolist() == [5, 6, 7, 11, 12]
    assert cohort.exclusions["reason"].iloc[-1] == "program (column 'program') is missing"
    assert cohort.n_read == 12 == len(cohort.frame) + len(cohort.exclusions)


def test_errors(records: Records, tmp_path: Path) -> None:
    with pytest.raises(SpecError, match=r"no outcome 'graft_fail' \(closest: 'graft_failure'"):
        build_cohort(records, "graft_fail", 365)
    with pytest.raises(InputError, match=r"horizon_days must be a positive number of days"):
        build_cohort(records, "death", 0)
    with pytest.raises(InputError, match=r"cut-off 2025-07-01 is after 2025-06-30, the cut-off "
                                         r"the records '.*c.csv' were read with"):
        build_cohort(records, "death", 365, "2025-07-01")
    with pytest.raises(InputError, match=r"window start 2024-01-01 is after window end"):
        build_cohort(records, "death", 365, window=("2024-01-01", "2023-01-01"))
    with pytest.raises(InputError, match=r"window must be \(from_date, to_date\)"):
        build_cohort(records, "death", 365, window=("2024-01-01",))
    bare = spec_from_dict({k: v for k, v in SPEC_DICT.items() if k != "analysis"})
    plain = read_records(tmp_path / "c.csv", bare)
    with pytest.raises(InputError, match=r"no cut-off: pass cutoff, set analysis.cutoff"):
        build_cohort(plain, "death", 365)
    with pytest.raises(InputError, match=r"no follow-up horizon: pass horizon_days"):
        build_cohort(plain, "death", cutoff="2025-06-30")
    clash = pd.read_csv(tmp_path / "c.csv").assign(time=1)
    clash.to_csv(tmp_path / "t.csv", index=False)
    with pytest.raises(InputError, match=r"has a column 'time', which the cohort adds; rename"):
        build_cohort(read_records(tmp_path / "t.csv", SPEC), "death")


# --- Kaplan-Meier of cohorts against lifelines on open datasets ---------------------------


def _dated_extract(path: Path, time: np.ndarray, status: np.ndarray, spacing_days: int) -> Path:
    """An extract whose follow-up in days is (time, status), with staggered transplant dates."""
    tx = pd.Timestamp("2015-01-01") + pd.to_timedelta(np.arange(len(time)) * spacing_days, "D")
    end = tx + pd.to_timedelta(time, "D")
    frame = pd.DataFrame({
        "recipient_id": [f"S{i:03d}" for i in range(len(time))],
        "program": "LV01",
        "transplant_date": tx.strftime("%Y-%m-%d"),
        "last_seen_date": end.strftime("%Y-%m-%d"),
        "graft_loss_date": "",
        "death_date": np.where(status == 1, end.strftime("%Y-%m-%d"), ""),
    })
    frame.to_csv(path, index=False)
    return path


def _km(time: np.ndarray, event: np.ndarray):
    return lifelines().KaplanMeierFitter().fit(time, event)


def test_km_of_lung_cohort_matches_the_reference_values(tmp_path: Path) -> None:
    lung = lifelines("lifelines.datasets").load_lung()
    path = _dated_extract(tmp_path / "lung.csv", lung["time"].to_numpy(),
                          lung["status"].to_numpy(), 3)
    records = read_records(path, SPEC, cutoff="2030-01-01")
    full = build_cohort(records, "death", 1100)
    km = _km(full.frame["time"], full.frame["event"])
    # docs/validation.md 1.3 (REFERENCE LIBRARY: statsmodels SurvfuncRight on load_lung):
    # S(180) = 0.721671, S(365) = 0.409242, S(730) = 0.115693.
    np.testing.assert_allclose(km.predict([180, 365, 730]), [0.721671, 0.409242, 0.115693],
                               rtol=1e-6)
    # A one-year horizon censors later follow-up but leaves the curve up to a year unchanged.
    year = build_cohort(records, "death", 365)
    assert year.frame["time"].max() == 365
    np.testing.assert_allclose(_km(year.frame["time"], year.frame["event"]).predict([180, 365]),
                               [0.721671, 0.409242], rtol=1e-6)


def test_km_of_leukemia_cohort_matches_the_published_values(tmp_path: Path) -> None:
    leukemia = lifelines("lifelines.datasets").load_leukemia()
    arm = leukemia.query("Rx == 0")  # the 6-MP arm (21 subjects, weeks)
    path = _dated_extract(tmp_path / "leuk.csv", arm["t"].to_numpy() * 7,
                          arm["status"].to_numpy(), 10)
    cohort = build_cohort(read_records(path, SPEC, cutoff="2030-01-01"), "death", 365)
    km = _km(cohort.frame["time"] / 7, cohort.frame["event"])
    # docs/validation.md 1.1: Klein & Moeschberger Example 4.1 / Table 4.1A (from memory;
    # verified with lifelines, statsmodels, sksurv): S at weeks 6, 7, 10, 13, 16, 22, 23.
    np.testing.assert_allclose(
        km.predict([6, 7, 10, 13, 16, 22, 23]),
        [0.857143, 0.806723, 0.752941, 0.690196, 0.627451, 0.537815, 0.448179],
        rtol=1e-6,
    )


def test_km_with_a_calendar_cut_off_equals_lifelines_on_the_same_data(tmp_path: Path) -> None:
    lung = lifelines("lifelines.datasets").load_lung()
    path = _dated_extract(tmp_path / "lung.csv", lung["time"].to_numpy(),
                          lung["status"].to_numpy(), 3)
    cutoff = pd.Timestamp("2016-06-30")
    records = read_records(path, SPEC, cutoff=cutoff)
    cohort = build_cohort(records, "death", 1100)
    raw = pd.read_csv(path, dtype=str)
    inside = pd.to_datetime(raw["transplant_date"]) <= cutoff
    raw = raw[inside].reset_index(drop=True).astype(object)  # lifelines wants object text
    # Reference: lifelines' own date-to-duration conversion, censoring at the earlier of
    # last seen and the cut-off (the horizon does not bind: lung follow-up ends by day 1022).
    fill = pd.to_datetime(raw["last_seen_date"]).clip(upper=cutoff)
    to_durations = lifelines("lifelines.utils").datetimes_to_durations
    t_ref, e_ref = to_durations(raw["transplant_date"], raw["death_date"], fill_date=fill)
    assert len(cohort.exclusions) == (~inside).sum() > 0
    assert (cohort.frame["time"] < lung["time"][inside.to_numpy()]).any()  # the cut-off bites
    t_ref = _day_zero(t_ref)
    np.testing.assert_array_equal(cohort.frame["time"], t_ref)
    np.testing.assert_array_equal(cohort.frame["event"], e_ref.astype(int))
    ours, ref = _km(cohort.frame["time"], cohort.frame["event"]), _km(t_ref, e_ref)
    pd.testing.assert_frame_equal(ours.survival_function_, ref.survival_function_,
                                  check_names=False, rtol=1e-12)


# --- properties of the follow-up arithmetic -----------------------------------------------


def _day_zero(days):
    """The documented day-0 convention applied to reference durations: 0 days -> 0.5."""
    days = np.asarray(days, dtype=float)
    return np.where(days == 0, DAY_ZERO_TIME, days)


_BASE = pd.Timestamp("2020-01-01")


@st.composite
def _recipients(draw: st.DrawFn) -> pd.DataFrame:
    n = draw(st.integers(1, 12))
    tx = draw(st.lists(st.integers(0, 1500), min_size=n, max_size=n))
    seen = draw(st.lists(st.integers(0, 1500), min_size=n, max_size=n))
    event = draw(st.lists(st.one_of(st.none(), st.integers(0, 1500)), min_size=n, max_size=n))
    ls = [max(s, e or 0) for s, e in zip(seen, event, strict=True)]  # as read_records leaves it
    day = pd.Timedelta(days=1)
    return pd.DataFrame({
        "recipient_id": [f"H{i}" for i in range(n)],
        "program": [f"LV0{i % 3}" for i in range(n)],
        "transplant_date": [_BASE + t * day for t in tx],
        "last_seen_date": [_BASE + (t + s) * day for t, s in zip(tx, ls, strict=True)],
        "graft_loss_date": pd.NaT,
        "death_date": [pd.NaT if e is None else _BASE + (t + e) * day
                       for t, e in zip(tx, event, strict=True)],
    })


def _in_memory(frame: pd.DataFrame) -> Records:
    empty = pd.DataFrame({"row": pd.Series(dtype=np.int64), "recipient": pd.Series(dtype=object),
                          "reason": pd.Series(dtype=object), "program": pd.Series(dtype=object)})
    return Records(frame=frame, exclusions=empty, warnings=pd.DataFrame(),
                   corrections=pd.DataFrame(), n_read=len(frame), source=Path("memory.csv"),
                   spec=SPEC, cutoff=None)


@settings(max_examples=60, deadline=None)
@given(_recipients(), st.integers(0, 2000), st.integers(0, 400), st.integers(1, 1500))
def test_follow_up_properties(frame: pd.DataFrame, cut: int, later: int, horizon: int) -> None:
    records = _in_memory(frame)
    cutoff = _BASE + pd.Timedelta(days=cut)
    cohort = build_cohort(records, "death", horizon, cutoff)
    c = cohort.frame
    assert cohort.n_read == len(c) + len(cohort.exclusions)
    limit = (cutoff - c["transplant_date"]).dt.days
    bound = np.fmax(np.minimum(limit, horizon), DAY_ZERO_TIME)
    assert (c["time"] > 0).all() and (c["time"] <= bound).all()
    ev_days = (c["death_date"] - c["transplant_date"]).dt.days
    inside = ev_days <= np.minimum(limit, horizon)
    assert ((c["event"] == 1) == inside).all()  # event exactly when it falls inside follow-up
    assert (c.loc[c["event"] == 1, "time"] == _day_zero(ev_days[c["event"] == 1])).all()
    fu = cohort.followup
    assert ((fu["completeness"].dropna() >= 0) & (fu["completeness"].dropna() <= 1)).all()
    assert (fu["lost_to_followup"] <= fu["recipients"]).all()
    # Reference: lifelines' date-to-duration conversion with censoring at the earlier of last
    # seen, cut-off and horizon end.
    horizon_end = c["transplant_date"] + pd.to_timedelta(horizon, "D")
    fill = c["last_seen_date"].clip(upper=cutoff)
    fill = fill.where(fill <= horizon_end, horizon_end)
    if len(c):
        to_durations = lifelines("lifelines.utils").datetimes_to_durations
        t_ref, e_ref = to_durations(c["transplant_date"], c["death_date"], fill_date=fill)
        np.testing.assert_array_equal(c["time"], _day_zero(t_ref))
        np.testing.assert_array_equal(c["event"], e_ref.astype(int))
    # Monotone in the cut-off: a later cut-off never shortens follow-up or removes an event.
    more = build_cohort(records, "death", horizon, cutoff + pd.Timedelta(days=later)).frame
    both = c.index
    assert (more.loc[both, "time"] >= c["time"]).all()
    assert (more.loc[both, "event"] >= c["event"]).all()


# --- death: censoring at death and records dated after it ---------------------------------

DEATH_SPEC = spec_from_dict({
    **SPEC_DICT,
    "columns": {**SPEC_DICT["columns"], "death": "death_date"},
    "outcomes": {
        **SPEC_DICT["outcomes"],
        "graft_failure_death_censored": {"dates": ["graft_loss_date"],
                                         "censor_at": ["death_date"]},
    },
})
# Hand-worked, cut-off 2025-06-30, horizon 365; day counts are datetime.date differences
# (date(2023, 6, 1) - date(2023, 1, 1) = 151, date(2023, 3, 1) - date(2023, 1, 1) = 59).
# id, program, transplant, last seen, graft loss, death,
# death-censored (time, event, ended), all-cause (time, event)
DEATH_CASES = [
    ("D01", "LV01", "2023-01-01", "2023-06-01", "", "2023-06-01", (151, 0, 1), (151, 1)),
    ("D02", "LV01", "2023-01-01", "2023-06-01", "2023-03-01", "2023-06-01", (59, 1, 0), (59, 1)),
    # a graft loss on the day of death counts: the event wins the tie
    ("D03", "LV01", "2023-01-01", "2023-06-01", "2023-06-01", "2023-06-01", (151, 1, 0), (151, 1)),
    # death after the horizon (day 365 = 2024-01-01) ends nothing inside it
    ("D04", "LV02", "2023-01-01", "2024-03-01", "", "2024-03-01", (365, 0, 0), (365, 0)),
    ("D05", "LV02", "2025-03-01", "2025-06-30", "", "", (121, 0, 0), (121, 0)),
]
AFTER_DEATH = [
    # last seen 92 days after the death
    ("D06", "LV02", "2023-01-01", "2023-09-01", "", "2023-06-01"),
    # a graft loss dated after the death
    ("D07", "LV02", "2023-01-01", "2023-06-01", "2023-08-01", "2023-06-01"),
]


def test_death_censored_outcome_ends_follow_up_at_death(tmp_path: Path) -> None:
    records = read_records(_write(tmp_path / "d.csv", DEATH_CASES + AFTER_DEATH), DEATH_SPEC)
    censored = build_cohort(records, "graft_failure_death_censored", 365, "2025-06-30")
    got = censored.frame[["time", "event", "ended"]].to_numpy().tolist()
    assert got == [list(c[6]) for c in DEATH_CASES]
    # D01 died with a working graft: not lost to follow-up, its potential follow-up ends at death
    assert censored.followup["lost_to_followup"].sum() == 0
    all_cause = build_cohort(records, "graft_failure", 365, "2025-06-30")
    assert all_cause.frame[["time", "event"]].to_numpy().tolist() == [
        list(c[7]) for c in DEATH_CASES
    ]
    assert all_cause.frame["ended"].sum() == 0


def test_records_dated_after_death_are_excluded(tmp_path: Path) -> None:
    records = read_records(_write(tmp_path / "d.csv", DEATH_CASES + AFTER_DEATH), DEATH_SPEC)
    for outcome in ("graft_failure", "death", "graft_failure_death_censored"):
        cohort = build_cohort(records, outcome, 365, "2025-06-30")
        assert "D06" not in set(cohort.frame["recipient_id"])
        late = cohort.exclusions[cohort.exclusions["kind"] == "dated after death"]
        assert late["recipient"].tolist() == ["D06", "D07"]
        assert late["reason"].iloc[0] == (
            "last_seen_date 2023-09-01 after the death on 2023-06-01; correct the dates in the file"
        )
        assert "graft_loss_date 2023-08-01" in late["reason"].iloc[1]
    # without a death column the check cannot be made and nothing is excluded for it
    plain = read_records(_write(tmp_path / "p.csv", DEATH_CASES + AFTER_DEATH), SPEC)
    kept = build_cohort(plain, "graft_failure", 365, "2025-06-30")
    assert "dated after death" not in set(kept.exclusions.get("kind", pd.Series(dtype=object)))


def test_censor_at_must_not_repeat_an_event_date() -> None:
    bad = {**SPEC_DICT, "outcomes": {"x": {"dates": ["death_date"], "censor_at": ["death_date"]}}}
    with pytest.raises(SpecError, match=r"in both 'outcomes\.x\.dates' and '\S+censor_at'"):
        spec_from_dict(bad)
    assert spec_from_dict(DEATH_SPEC.to_dict()) == DEATH_SPEC
