"""Death-censored graft failure on the invented demo network: the report's competing block.

The counts are checked against the generator's own dates with plain pandas (a death with a
working graft inside the follow-up), and the incidence against 1 - Kaplan-Meier: equal
without competing ends, smaller with them (Aalen-Johansen; the estimator itself is checked
against lifelines in tests/survival/test_competing.py).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from casemix.data.records import read_records
from casemix.data.spec import load_spec
from casemix.demo import COHORT_CUTOFF, REFERENCE_CUTOFF, REFERENCE_WINDOW, generate
from casemix.evaluation.evaluate import Evaluation, evaluate
from casemix.model.reference import fit_reference
from casemix.report.build import render_report


@pytest.fixture(scope="module")
def folders(tmp_path_factory):
    folder = tmp_path_factory.mktemp("competing")
    network = generate()
    (folder / "spec.toml").write_text(network.spec_text, encoding="utf-8")
    network.reference.iloc[::3].to_csv(folder / "reference.csv", index=False)
    network.cohort.to_csv(folder / "cohort.csv", index=False)
    spec = load_spec(folder / "spec.toml")
    out = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the demo's planted broken records
        reference = read_records(folder / "reference.csv", spec, cutoff=REFERENCE_CUTOFF)
        cohort = read_records(folder / "cohort.csv", spec, cutoff=COHORT_CUTOFF)
        for outcome in ("graft_failure_death_censored", "graft_failure"):
            model = fit_reference(reference, spec, outcome, 365, REFERENCE_CUTOFF,
                                  window=REFERENCE_WINDOW)
            out[outcome] = evaluate(cohort, model, cutoff=COHORT_CUTOFF).save(folder / outcome)
    return out, network


def test_competing_ends_are_the_deaths_with_a_working_graft(folders):
    out, _ = folders
    programs = pd.read_csv(out["graft_failure_death_censored"] / "programs.csv")
    recipients = pd.read_csv(out["graft_failure_death_censored"] / "recipients.csv")
    raw = pd.read_csv(out["graft_failure_death_censored"].parent / "cohort.csv",
                      parse_dates=["transplant_date", "graft_loss_date", "retransplant_date",
                                   "death_date"])
    raw = raw.set_index("recipient_id").loc[recipients["recipient"]]
    days = lambda c: (raw[c] - raw["transplant_date"]).dt.days  # noqa: E731
    loss = np.fmin(days("graft_loss_date"), days("retransplant_date"))
    # plain pandas: death inside the follow-up, before any graft loss (an event wins a tie)
    died = days("death_date")
    dies_first = (died <= recipients["time"].to_numpy()) & ~(loss <= died)
    by_program = dies_first.groupby(recipients["program"].to_numpy()).sum()
    assert programs.set_index("program")["competing_events"].to_dict() == by_program.to_dict()
    assert programs["competing_events"].sum() > 0
    ok = programs["cumulative_incidence"].notna()
    assert (programs.loc[ok, "cumulative_incidence"]
            <= 1 - programs.loc[ok, "observed_survival"] + 1e-12).all()
    all_cause = pd.read_csv(out["graft_failure"] / "programs.csv")
    assert all_cause["competing_events"].sum() == 0
    # the CSV files hold about 10 significant digits
    np.testing.assert_allclose(all_cause["cumulative_incidence"],
                               1 - all_cause["observed_survival"], rtol=1e-8)


def test_report_explains_the_difference_only_for_the_censored_outcome(folders, strict_html):
    out, _ = folders
    html = render_report(Evaluation.load(out["graft_failure_death_censored"]))
    strict_html(html)
    assert "Failure with a competing event" in html and "Aalen-Johansen" in html
    assert "follow-up ends without an event at death_date" in html
    all_cause = render_report(Evaluation.load(out["graft_failure"]))
    assert "Failure with a competing event" not in all_cause
