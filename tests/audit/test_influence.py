"""Leave-one-program-out influence against lifelines refits without each program."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from audit_helpers import step_expected
from oracles import LIFELINES_MISSING

pytest.importorskip("lifelines", reason=LIFELINES_MISSING)
from lifelines import CoxPHFitter

from casemix.audit import ProgramArrays, leave_one_program_out
from casemix.survival import fit_cox

NAMES = ["fin", "age", "race", "wexp", "mar", "paro"]


def _program(frame):
    # a partition of rossi into three "programs" by prior convictions (not a covariate here)
    return np.select([frame["prio"] <= 1, frame["prio"] <= 3], ["A", "B"], "C")


def test_matches_refitting_without_each_program(rossi):
    ref = rossi.iloc[::2].reset_index(drop=True)  # reference: even rows
    coh = rossi.iloc[1::2].reset_index(drop=True)  # cohort: odd rows
    X = ref[NAMES].to_numpy(float)
    fit = fit_cox(ref["week"], ref["arrest"], X, names=NAMES)
    data = SimpleNamespace(time=ref["week"].to_numpy(float), event=ref["arrest"].to_numpy(),
                           X=X, strata=None)  # fmt: skip
    cohort = ProgramArrays.build(coh["week"], coh[NAMES].to_numpy(float), None, _program(coh))
    observed = np.bincount(cohort.code, coh["arrest"].to_numpy())
    table = leave_one_program_out(data, fit, _program(ref), cohort, observed, map_fn=map)
    assert list(table["program"]) == ["A", "B", "C"]
    for j, program in enumerate(cohort.programs):
        keep = _program(ref) != program
        # REFERENCE LIBRARY: lifelines CoxPHFitter on the reference without the program,
        # E from its baseline read as a step function (docs/validation.md convention 3)
        cph = CoxPHFitter().fit(ref.loc[keep, [*NAMES, "week", "arrest"]], "week", "arrest")
        mine = coh[_program(coh) == program]
        e = step_expected(cph, mine, NAMES).sum()
        assert table.loc[j, "expected_without"] == pytest.approx(e, rel=1e-4)
        assert table.loc[j, "reference_recipients"] == int((~keep).sum())
        assert table.loc[j, "oe_ratio_without"] == pytest.approx(observed[j] / e, rel=1e-4)
    # the full-fit E of each program sums to the cohort total under the full model
    assert table["expected"].sum() == pytest.approx(cohort.expected(fit).sum())


def test_program_missing_from_the_reference_keeps_its_expected(rossi):
    ref = rossi[rossi["prio"] <= 3]
    X = ref[NAMES].to_numpy(float)
    fit = fit_cox(ref["week"], ref["arrest"], X, names=NAMES)
    data = SimpleNamespace(time=ref["week"].to_numpy(float), event=ref["arrest"].to_numpy(),
                           X=X, strata=None)  # fmt: skip
    cohort = ProgramArrays.build(rossi["week"], rossi[NAMES].to_numpy(float), None, _program(rossi))
    observed = np.bincount(cohort.code, rossi["arrest"].to_numpy())
    table = leave_one_program_out(data, fit, _program(ref), cohort, observed, map_fn=map)
    c = table.set_index("program").loc["C"]
    assert c["reference_recipients"] == 0 and c["expected_without"] == c["expected"]
