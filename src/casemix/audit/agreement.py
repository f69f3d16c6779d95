"""The audit evaluates exactly as the evaluation did: its settings, and the check of verdicts.

An evaluation folder (read with ``Evaluation.load``) holds the model fingerprint, the cut-off,
the window, the verdict rules and the prior the evaluation used. :func:`evaluation_settings`
takes them (and refuses a folder made with another model); after the audit has evaluated the
cohort again, :func:`verdict_agreement` compares its verdicts with the evaluation's and
refuses any difference, so that one page never shows two verdicts for one program.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from casemix.errors import InputError
from casemix.evaluation.evaluate import Evaluation
from casemix.stats.shrinkage import Prior
from casemix.stats.verdict import Rules

__all__ = ["EvaluationSettings", "check_audit", "evaluation_settings", "verdict_agreement"]


@dataclass(frozen=True, eq=False)
class EvaluationSettings:
    """What an evaluation folder fixes for the audit.

    Attributes
    ----------
    folder : Path
    evaluation : Evaluation
        The evaluation as read from the folder.
    rules : Rules
    prior : Prior
        The prior as the evaluation used it (an estimated prior is not estimated again).
    cutoff : str or None
        ISO date of the evaluation's cut-off.
    window : tuple of (str or None)
        ISO dates of the evaluation's transplant-date window.
    records_sha256 : str or None
        Checksum of the cohort records file the evaluation read.
    """

    folder: Path
    evaluation: Evaluation
    rules: Rules
    prior: Prior
    cutoff: str | None
    window: tuple[str | None, str | None]
    records_sha256: str | None


def evaluation_settings(folder: str | Path, model_fingerprint: str) -> EvaluationSettings:
    """Read the settings of an evaluation folder, checking it used the audited model.

    Parameters
    ----------
    folder : str or Path
        A folder written by ``casemix evaluate`` (``Evaluation.save``).
    model_fingerprint : str
        The audited model's data fingerprint.

    Raises
    ------
    InputError
        The folder does not pass ``Evaluation.load``, its run.json lacks the model
        fingerprint or the whole prior, or the model fingerprint differs.
    """
    folder = Path(folder)
    evaluation = Evaluation.load(folder)
    run = evaluation.run
    fingerprint = run["model"].get("fingerprint") if isinstance(run["model"], dict) else None
    if evaluation.prior is None or fingerprint is None:
        missing = "the prior's mixture components" if fingerprint else "the model fingerprint"
        raise InputError(
            f"{folder / 'run.json'}: lacks {missing}; run the evaluation again with this version"
        )
    if fingerprint != model_fingerprint:
        raise InputError(
            f"the evaluation in {folder} was made with another reference model (fingerprint "
            f"{str(fingerprint)[:12]}, the audited model's is {model_fingerprint[:12]}); audit "
            "with the model the evaluation used"
        )
    window = tuple(run.get("window") or (None, None))
    sha = run.get("inputs", {}).get("records", {}).get("sha256")
    return EvaluationSettings(folder, evaluation, evaluation.rules, evaluation.prior,
                              run.get("cutoff"), window, sha)


def verdict_agreement(programs: pd.DataFrame, evaluation: Evaluation) -> int:
    """Check that the audit's programs carry the evaluation's verdicts.

    Parameters
    ----------
    programs : DataFrame
        The audit's own evaluation: ``program``, ``verdict``.
    evaluation : Evaluation
        The evaluation it must agree with (read with ``Evaluation.load``).

    Returns
    -------
    int
        The number of programs compared (all of them agree).

    Raises
    ------
    InputError
        A program missing on either side or any verdict that differs, naming the programs.
    """
    theirs = evaluation.programs.set_index("program")["verdict"]
    ours = programs.assign(program=programs["program"].astype(str)).set_index("program")
    ours = ours["verdict"]
    if set(theirs.index) != set(ours.index):
        only = sorted(set(theirs.index) ^ set(ours.index))
        raise InputError(
            "the audit's cohort and the evaluation hold different programs "
            f"({', '.join(only[:5])}); pass the cohort records the evaluation read"
        )
    differ = sorted(p for p in ours.index if ours[p] != theirs[p])
    if differ:
        raise InputError(
            f"the audit's verdicts differ from the evaluation for {', '.join(differ[:5])}; pass "
            "the cohort records and cut-off the evaluation used"
        )
    return len(ours)


def check_audit(audit, run: dict) -> None:
    """Refuse to show an audit beside an evaluation it did not evaluate like.

    Parameters
    ----------
    audit : Audit
        The audit (:func:`casemix.audit.run_audit`, or read back with ``Audit.load``).
    run : dict
        The evaluation's ``run.json``.

    Raises
    ------
    InputError
        The audit was made with another model, without a cohort, or with other rules or prior.
    """
    theirs = audit.facts.get("model_fingerprint")
    ours = run["model"].get("fingerprint")
    if ours is None or theirs != ours:
        raise InputError(
            f"the audit is of another reference model (fingerprint {str(theirs)[:12]}..., the "
            f"evaluation's is {str(ours)[:12]}...); audit the model the evaluation used "
            "(casemix audit --evaluation), or leave the audit out."
        )
    link = audit.facts.get("evaluation")
    same = isinstance(link, dict) and link.get("rules") == run["rules"] and all(
        link.get("prior", {}).get(k) == run["prior"][k] for k in ("shape", "rate")
    )
    if not same:
        raise InputError(
            "the audit did not make its verdicts with this evaluation's rules and prior; run "
            "it again with --evaluation on this evaluation folder"
        )
