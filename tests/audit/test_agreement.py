"""The audit evaluates as the evaluation did: same rules, prior and model, same verdicts.

Invented Lorran Valley network (casemix.demo, seeded); the verdicts compared are the
evaluation's own (casemix.evaluate), so the check is of agreement, not of a number.
"""

from __future__ import annotations

import json
import shutil
import warnings

import pytest

from casemix.audit import Audit, run_audit
from casemix.audit.agreement import check_audit, verdict_agreement
from casemix.data.records import read_records
from casemix.data.spec import load_spec
from casemix.demo import COHORT_CUTOFF, REFERENCE_CUTOFF, REFERENCE_WINDOW, generate
from casemix.errors import InputError
from casemix.evaluation.evaluate import Evaluation, evaluate
from casemix.model.reference import fit_reference

# a user's own rules: a smaller probability and a clinical margin for excess (on this slice
# of the demo the margin turns the planted excess program LV05 into "consistent")
USER_RULES = "[verdict]\nprobability = 0.95\nupper_margin = 1.5\n"


@pytest.fixture(scope="module")
def linked(tmp_path_factory):
    folder = tmp_path_factory.mktemp("linked")
    network = generate()
    (folder / "spec.toml").write_text(network.spec_text, encoding="utf-8")
    (folder / "rules.toml").write_text(USER_RULES, encoding="utf-8")
    network.reference.iloc[::3].to_csv(folder / "reference.csv", index=False)
    network.cohort.to_csv(folder / "cohort.csv", index=False)
    spec = load_spec(folder / "spec.toml")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the demo's planted broken records
        reference = read_records(folder / "reference.csv", spec, cutoff=REFERENCE_CUTOFF)
        cohort = read_records(folder / "cohort.csv", spec, cutoff=COHORT_CUTOFF)
        model = fit_reference(reference, spec, cutoff=REFERENCE_CUTOFF, window=REFERENCE_WINDOW)
        evaluation = evaluate(cohort, model, folder / "rules.toml", cutoff=COHORT_CUTOFF)
        evaluation.save(folder / "evaluation")
        options = {"bootstrap": 2, "seed": 1, "map_fn": map}
        by_folder = run_audit(reference, model, folder / "cohort.csv",
                              evaluation=folder / "evaluation", **options)
        by_rules = run_audit(reference, model, cohort, rules=folder / "rules.toml",
                             cutoff=COHORT_CUTOFF, **options)
        by_default = run_audit(reference, model, cohort, cutoff=COHORT_CUTOFF, **options)
    return {"folder": folder, "evaluation": evaluation, "by_folder": by_folder,
            "by_rules": by_rules, "by_default": by_default, "reference": reference,
            "model": model, "cohort": cohort}  # fmt: skip


def _verdicts(audit):
    return audit.tables["fdr"].set_index("program")["verdict"].sort_index()


def test_audit_with_the_users_rules_agrees_on_every_verdict(linked):
    theirs = linked["evaluation"].programs.set_index("program")["verdict"].sort_index()
    for name in ("by_folder", "by_rules"):
        assert _verdicts(linked[name]).equals(theirs), name
    facts = linked["by_folder"].facts["evaluation"]
    assert facts["rules"]["probability"] == 0.95 and facts["rules"]["upper_margin"] == 1.5
    assert facts["programs_agreeing"] == len(theirs)
    assert any("agree with that evaluation for all" in f for f in linked["by_folder"].findings)


def test_default_rules_differ_and_are_refused_beside_the_evaluation(linked, tmp_path):
    # the situation of the issue: an audit with the default rules calls programs otherwise
    theirs = linked["evaluation"].programs.set_index("program")["verdict"].sort_index()
    assert not _verdicts(linked["by_default"]).equals(theirs)
    with pytest.raises(InputError, match="verdicts differ from the evaluation"):
        verdict_agreement(linked["by_default"].tables["fdr"],
                          Evaluation.load(linked["folder"] / "evaluation"))
    run = json.loads((linked["folder"] / "evaluation" / "run.json").read_text())
    linked["by_default"].save(tmp_path / "default")
    with pytest.raises(InputError, match="did not make its verdicts with this evaluation's"):
        check_audit(Audit.load(tmp_path / "default"), run)
    linked["by_folder"].save(tmp_path / "linked")
    check_audit(Audit.load(tmp_path / "linked"), run)  # the linked audit is accepted


def test_evaluation_of_another_model_or_cohort_is_refused(linked, tmp_path):
    folder = linked["folder"]
    run = json.loads((folder / "evaluation" / "run.json").read_text())
    other = shutil.copytree(folder / "evaluation", tmp_path / "other")
    (other / "run.json").write_text(json.dumps({**run, "model": {"fingerprint": "0" * 64}}))
    with pytest.raises(InputError, match="made with another reference model"):
        run_audit(linked["reference"], linked["model"], linked["cohort"], evaluation=other,
                  bootstrap=2, map_fn=map)
    changed = tmp_path / "cohort.csv"
    changed.write_text((folder / "cohort.csv").read_text() + "\n")
    with pytest.raises(InputError, match="are not the file the evaluation"):
        run_audit(linked["reference"], linked["model"], changed,
                  evaluation=folder / "evaluation", bootstrap=2, map_fn=map)
    with pytest.raises(InputError, match="give either an evaluation folder or rules"):
        run_audit(linked["reference"], linked["model"], linked["cohort"],
                  evaluation=folder / "evaluation", rules=folder / "rules.toml")
