"""Tests of casemix.monitoring.monitor on the invented Lorran Valley network.

Outside references: the generator's known truth (casemix.demo: LV02's hazard doubles from
RISE.start, LV04 has hazard ratio 0.6), and the expected events of the evaluation stage
(casemix.evaluation.expected, itself checked against lifelines' step-function baseline), which
A(t) must reach on the last day.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from casemix import demo
from casemix.data.cohort import build_cohort
from casemix.data.records import read_records
from casemix.errors import InputError
from casemix.evaluation.expected import expected_events
from casemix.model.reference import ReferenceModel
from casemix.monitoring import MonitoringRules, monitor

MODEL = Path(__file__).resolve().parents[2] / "models" / "lorran_valley_graft_failure_365.json"
START = "2022-01-01"
CUTOFF = demo.COHORT_CUTOFF
FAST = MonitoringRules(replicates=200)


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    paths = demo.write_demo(tmp_path_factory.mktemp("monitor"))
    records = read_records(paths["cohort"], paths["spec"], cutoff=CUTOFF)
    return records, ReferenceModel.load(MODEL), paths


@pytest.fixture(scope="module")
def result(inputs):
    records, model, _ = inputs
    return monitor(records, model, START, CUTOFF, FAST)


def test_tables_and_the_expected_events_they_reach(result, inputs):
    records, model, _ = inputs
    state = result.state
    assert len(state) == 32 and list(state["chart"][:2]) == ["upper", "lower"]
    cohort = build_cohort(records, model.outcome, model.horizon_days, CUTOFF, (START, CUTOFF))
    per_program = expected_events(cohort, model).frame.groupby("program")
    upper = state[state["chart"] == "upper"].set_index("program")
    np.testing.assert_allclose(upper["expected"], per_program["expected"].sum(), rtol=1e-10)
    assert (upper["observed"] == per_program["event"].sum()).all()
    last = result.series.groupby("program").tail(1).set_index("program")
    np.testing.assert_allclose(last["expected"], upper["expected"], rtol=1e-12)
    np.testing.assert_allclose(last["g_upper"], upper["g_now"])
    series = result.series
    assert series.groupby("program")["date"].agg(["first", "last"]).eq(
        [START, str(CUTOFF)]).all().all()
    np.testing.assert_allclose(series["o_minus_e"], series["observed"] - series["expected"])
    # the band: Poisson quantiles (scipy.stats.poisson) of each day's expected events
    np.testing.assert_array_equal(series["band_upper"] + series["expected"],
                                  stats.poisson.ppf(0.975, series["expected"]))


def test_the_known_stories_signal_on_their_own_chart(result):
    state = result.state.set_index(["program", "chart"])
    # Generator truth: LV02 doubles from 2023-07-01; LV04 has hazard ratio 0.6 throughout.
    assert state.loc[("LV02", "upper"), "signalled"]
    assert state.loc[("LV02", "upper"), "first_signal"] > demo.RISE.start.isoformat()
    assert state.loc[("LV04", "lower"), "signalled"]
    assert not state.loc[("LV04", "upper"), "signalled"]
    signals = result.signals
    assert (signals["g"] >= signals["h"]).all()
    # a false-signal share near the level: at most a few of the other charts signal
    others = state.drop([("LV02", "upper"), ("LV04", "lower"), ("LV05", "upper")])
    assert others["signalled"].sum() <= 4  # 29 charts at 5%: P(5 or more) = 0.05 (binom)


def test_same_inputs_same_outputs_and_limits_do_not_depend_on_other_programs(result, inputs,
                                                                             tmp_path):
    records, model, paths = inputs
    again = monitor(records, model, START, CUTOFF, FAST)
    pd.testing.assert_frame_equal(again.state, result.state)
    frame = pd.read_csv(paths["cohort"], dtype=str, keep_default_na=False)
    few = tmp_path / "few.csv"
    frame[frame["program"].isin(["LV04", "LV09"])].to_csv(few, index=False)
    alone = monitor(few, model, START, CUTOFF, FAST).state.set_index(["program", "chart"])
    together = result.state.set_index(["program", "chart"]).loc[alone.index]
    pd.testing.assert_series_equal(alone["h"], together["h"])
    other_seed = monitor(records, model, START, CUTOFF, dataclasses.replace(FAST, seed=1))
    assert not np.allclose(other_seed.state["h"], result.state["h"])


def test_fixed_limit_and_running_on_after_a_signal(inputs, result):
    records, model, _ = inputs
    fixed = monitor(records, model, START, CUTOFF, MonitoringRules(h=3.0, replicates=0))
    assert set(fixed.state["h_source"]) == {"fixed"} and (fixed.state["h"] == 3.0).all()
    assert fixed.state["signal_probability"].isna().all()
    on = monitor(records, model, START, CUTOFF, MonitoringRules(h=3.0, replicates=0,
                                                                restart=False))
    # without restarts G never drops back to 0 at a signal, so it is never below
    assert (on.series["g_upper"].to_numpy() >= fixed.series["g_upper"].to_numpy() - 1e-12).all()
    # the first signal is the same either way; later ones differ
    pd.testing.assert_series_equal(on.state["first_signal"], fixed.state["first_signal"])
    assert (on.state["signals"] != fixed.state["signals"]).any()


def test_save_writes_the_files(result, tmp_path):
    folder = result.save(tmp_path / "out")
    assert sorted(p.name for p in folder.iterdir()) == [
        "monitoring.json", "monitoring_series.csv", "monitoring_signals.csv",
        "monitoring_state.csv"]
    back = pd.read_csv(folder / "monitoring_state.csv")
    assert list(back.columns) == list(result.state.columns)


def test_bad_input_is_a_clear_error(inputs):
    records, model, _ = inputs
    with pytest.raises(InputError, match="monitoring start 2025-07-01 is after the cut-off"):
        monitor(records, model, "2025-07-01", CUTOFF, FAST)
    with pytest.raises(InputError, match=r"needs follow-up to 400 days but the reference "
                                         r"model's horizon is 365 days"):
        monitor(records, model, START, CUTOFF, dataclasses.replace(FAST, horizon_days=400))
    short = dataclasses.replace(model.fit, baselines=tuple(
        dataclasses.replace(b, last_time=200.0) for b in model.fit.baselines))
    with pytest.raises(InputError, match="baseline hazard is known only to day 200"):
        monitor(records, dataclasses.replace(model, fit=short), START, CUTOFF, FAST)
    with pytest.raises(InputError, match=r"no recipient of .* was transplanted between"):
        monitor(records, model, "2025-06-01", CUTOFF, FAST)
