"""A whole periodic evaluation: every analysis of the study plan, evaluated in one run.

:func:`evaluate_plan` evaluates each analysis of the plan with its own reference model
(:func:`casemix.model.plan.fit_plan`) and cohort window through
:func:`casemix.evaluation.evaluate.evaluate`, the single run, so each analysis gives exactly
the numbers of ``evaluate(records, model, rules, cutoff=..., window=...)``. The result, a
:class:`Study`, holds one :class:`~casemix.evaluation.evaluate.Evaluation` per analysis, the
overview (one row per program and analysis) and each kept record's membership of every
analysis' cohort; :meth:`Study.save` writes the study folder (layout in DEVELOPERS.md).
"""

from __future__ import annotations

import datetime as dt
import json
import warnings
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from types import MappingProxyType
from typing import Any

import pandas as pd

import casemix
from casemix._io import read_csv_as_written, replace_folder, sha256_file, write_csv, write_json
from casemix.data.check import reason_warnings
from casemix.data.cohort import WINDOW_KIND
from casemix.data.records import Records, read_records
from casemix.data.spec import PlanAnalysis, closest
from casemix.errors import CasemixWarning, DataWarning, InputError
from casemix.evaluation.evaluate import CAUTIONS, PROGRAM_COLUMNS, Evaluation, evaluate
from casemix.model.plan import INDEX_FILE, PlanModels, plan_of, records_cutoff
from casemix.model.reference import ReferenceModel
from casemix.stats.shrinkage import Prior
from casemix.stats.verdict import Rules

__all__ = ["REPORT_FOLDER", "STUDY_FILE", "STUDY_TABLES", "Study", "evaluate_plan"]

STUDY_FILE = "study.json"
#: Tables of the study folder beside the analyses' sub-folders.
STUDY_TABLES = ("overview.csv", "recipients.csv")
#: The study report's folder inside a study folder (casemix.report.study): a new save
#: removes it, so that no report of earlier results stays beside new ones.
REPORT_FOLDER = "report"


@dataclass(frozen=True, eq=False)
class Study:
    """The result of :func:`evaluate_plan`: one evaluation per analysis of the plan.

    ``study["graft_1y"]`` is that analysis' :class:`Evaluation`; iterating gives the analysis
    names in plan order.

    Attributes
    ----------
    evaluations : Mapping[str, Evaluation]
        Analysis name -> its evaluation, in plan order. Each ``run`` has an ``analysis``
        entry: the name, outcome, horizon, cohort and reference windows (and where each
        cohort date came from), the model file and whether the windows overlap.
    membership : DataFrame
        One row per record kept by the record checks (file order): ``recipient``,
        ``program``, ``transplant_date`` (ISO text), then one 0/1 column per analysis (1: in
        that analysis' cohort). Records excluded by the record checks are in no cohort; each
        analysis' ``exclusions`` gives every record's reason.
    run : dict
        The content of ``study.json``: the cut-off, the inputs and every analysis' entry.
    """

    evaluations: Mapping[str, Evaluation]
    membership: pd.DataFrame
    run: dict

    def __getitem__(self, name: str) -> Evaluation:
        if name not in self.evaluations:
            raise KeyError(f"no analysis '{name}'{closest(name, self.evaluations)}; "
                           f"analyses: {', '.join(self.evaluations)}")
        return self.evaluations[name]

    def __iter__(self) -> Iterator[str]:
        return iter(self.evaluations)

    def __len__(self) -> int:
        return len(self.evaluations)

    @property
    def overview(self) -> pd.DataFrame:
        """One row per analysis and program (plan order, then program order): ``analysis``,
        then the columns of ``programs.csv``."""
        parts = [ev.programs[PROGRAM_COLUMNS].assign(analysis=name)
                 for name, ev in self.evaluations.items()]
        table = pd.concat(parts, ignore_index=True)
        return table[["analysis", *PROGRAM_COLUMNS]]

    def save(self, folder: str | Path) -> Path:
        """Write the study folder as a whole (atomic, see casemix._io.replace_folder).

        One sub-folder per analysis in the evaluation folder format (``Evaluation.save``),
        plus ``overview.csv``, ``recipients.csv`` (:attr:`membership`) and ``study.json``.
        An existing folder must be empty or a study folder; the sub-folders of the
        analyses its ``study.json`` names are replaced too, so no stale analysis stays, and
        so is a study report (:data:`REPORT_FOLDER`) of earlier results.
        """
        folder = Path(folder)
        owned = {STUDY_FILE, *STUDY_TABLES, REPORT_FOLDER, *self.evaluations,
                 *_saved_analyses(folder)}

        def write(tmp: Path) -> None:
            for name, evaluation in self.evaluations.items():
                evaluation.save(tmp / name)
            write_csv(tmp / "overview.csv", self.overview)
            write_csv(tmp / "recipients.csv", self.membership)
            write_json(tmp / STUDY_FILE, self.run)

        return replace_folder(folder, write, owned=owned)

    @classmethod
    def load(cls, folder: str | Path) -> Study:
        """Read a study folder written by :meth:`save`.

        Every analysis ``study.json`` lists is read from its sub-folder with
        :meth:`Evaluation.load <casemix.evaluation.evaluate.Evaluation.load>`, in the order
        listed (the plan's); ``recipients.csv`` gives :attr:`membership` (codes as written).

        Parameters
        ----------
        folder : str or Path
            The folder written by ``Study.save``.

        Returns
        -------
        Study

        Raises
        ------
        InputError
            Not a folder, no or malformed ``study.json``, a missing ``recipients.csv`` or
            column of it, or an analysis folder that cannot be read (the message names the
            analysis and the file).
        """
        folder = Path(folder)
        if not folder.is_dir():
            raise InputError(f"{folder}: not a folder; pass the folder a study was saved to.")
        path = folder / STUDY_FILE
        if not path.is_file():
            raise InputError(f"{folder}: no {STUDY_FILE}, so this is not a study folder; pass "
                             "the folder `casemix evaluate --model MODELS_FOLDER` wrote.")
        try:
            run = json.loads(path.read_text(encoding="utf-8"))
            names = [str(entry["folder"]) for entry in run["analyses"]]
        except ValueError as exc:
            raise InputError(f"{path}: not valid JSON ({exc}); write the study again.") from None
        except (KeyError, TypeError):
            raise InputError(f"{path}: needs a list 'analyses' whose entries have a "
                             "'folder'; write the study again.") from None
        if not names or len(set(names)) != len(names):
            raise InputError(f"{path}: 'analyses' must list one or more distinct folders; "
                             f"it lists {names}.")
        evaluations = {}
        for name in names:
            try:
                evaluations[name] = Evaluation.load(folder / name)
            except InputError as exc:
                raise InputError(f"analysis '{name}' of {path}: {exc}") from None
        members = folder / "recipients.csv"
        if not members.is_file():
            raise InputError(f"{members}: missing; write the study again.")
        membership = read_csv_as_written(members, ["recipient", "program", "transplant_date"])
        missing = [c for c in ("recipient", "program", "transplant_date", *names)
                   if c not in membership.columns]
        if missing:
            raise InputError(f"{members}: missing column(s) {', '.join(missing)}; write the "
                             "study again.")
        return cls(evaluations=MappingProxyType(evaluations), membership=membership, run=run)


def evaluate_plan(
    records: Records | str | Path,
    models: PlanModels | str | Path,
    rules: Rules | str | Path | None = None,
    prior: Prior | None = None,
    *,
    free_mean: bool | None = None,
    prior_method: str | None = None,
    cutoff=None,
    progress: Callable[[str], None] | None = None,
) -> Study:
    """Evaluate every analysis of the study plan on an evaluation cohort's records.

    Parameters
    ----------
    records : Records or path
        The cohort's records (a path is read with the models' spec and ``cutoff``).
    models : PlanModels or path
        From :func:`~casemix.model.plan.fit_plan`, or the folder it was saved to.
    rules, prior, free_mean, prior_method
        As for :func:`~casemix.evaluation.evaluate.evaluate`, applied to every analysis.
    cutoff : date, optional
        Date the cohort data are complete to (default: the records', else the spec's); the
        cohort windows' defaults are counted from it (docs/spec.md, "The study plan").
    progress : callable, optional
        Called with a short text (``"evaluating graft_1y"``) before each analysis.

    Returns
    -------
    Study

    Raises
    ------
    InputError, SpecError
        No cut-off, a cohort window after the cut-off, an analysis left without recipients
        (the message names the analysis).

    Warns
    -----
    DataWarning
        An analysis' reference window overlaps its cohort window (also in its run.json).
    """
    if not isinstance(models, PlanModels):
        models = PlanModels.load(models)
    spec = models.spec
    if not isinstance(records, Records):
        records = read_records(records, spec, cutoff=cutoff)
    plan = plan_of(spec)
    cut = records_cutoff(records, cutoff, spec)
    windows = {a.name: a.cohort_window(cut) for a in plan}
    evaluations = {}
    for analysis in plan:
        if progress is not None:
            progress(f"evaluating {analysis.name}")
        model = models[analysis.name]
        entry = _entry(analysis, windows[analysis.name], model, models)
        if entry["reference_overlaps_cohort"]:
            warnings.warn(DataWarning(_overlap_text(entry)), stacklevel=2)
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", CasemixWarning)
                evaluation = evaluate(records, model, rules, prior, free_mean=free_mean,
                                      prior_method=prior_method, cutoff=cut,
                                      window=windows[analysis.name])
        except InputError as exc:
            raise InputError(f"analysis '{analysis.name}': {exc}") from None
        for text in _warnings(caught, evaluation, records):
            warnings.warn(DataWarning(f"analysis '{analysis.name}': {text}"), stacklevel=2)
        run = {**evaluation.run, "analysis": entry}
        if models.folder is not None:
            path = models.folder / models.files[analysis.name]
            run["inputs"] = {**run["inputs"],
                             "model": {"path": str(path), "sha256": sha256_file(path)}}
        evaluations[analysis.name] = replace(evaluation, run=run)
    return Study(
        evaluations=MappingProxyType(evaluations),
        membership=_membership(records, evaluations),
        run=_study_facts(records, models, cut, evaluations),
    )


def _text(day: dt.date | None) -> str | None:
    return None if day is None else day.isoformat()


def _entry(analysis: PlanAnalysis, window: tuple[dt.date, dt.date], model: ReferenceModel,
           models: PlanModels) -> dict[str, Any]:
    """The ``analysis`` entry of an analysis' run.json."""
    start, end = model.window
    reference_end = model.cutoff if end is None else min(end, model.cutoff)
    overlaps = (start is None or start <= window[1]) and reference_end >= window[0]
    return {
        "name": analysis.name,
        "outcome": analysis.outcome,
        "horizon_days": analysis.horizon_days,
        "cohort_window": [_text(d) for d in window],
        "cohort_window_source": {
            "cohort_from": "spec" if analysis.cohort_from else "default",
            "cohort_to": "spec" if analysis.cohort_to else "default",
        },
        "reference_window": [_text(d) for d in model.window],
        "reference_cutoff": _text(model.cutoff),
        "reference_overlaps_cohort": bool(overlaps),
        "model_file": models.files[analysis.name],
        "fingerprint": model.fingerprint,
    }


def _overlap_text(entry: dict[str, Any]) -> str:
    start, end = entry["reference_window"]
    return (
        f"analysis '{entry['name']}': the reference window ({start or 'open'} to "
        f"{end or entry['reference_cutoff']}) overlaps the cohort window "
        f"({entry['cohort_window'][0]} to {entry['cohort_window'][1]}): recipients in both "
        "are compared with a model fitted partly on themselves, which pulls their results "
        "towards the reference. Allowed; recorded in run.json (reference_overlaps_cohort)."
    )


def _warnings(caught, evaluation: Evaluation, records: Records) -> list[str]:
    """The single run's warnings, except that exclusion shares leave out the cohort window.

    One records file serves every cohort window of the plan, so transplants outside one
    analysis' window are expected; the exclusion-share warnings are given again for the
    other reasons only.
    """
    n_read = evaluation.run["counts"]["read"]
    prefix = f"{records.source}: "
    shares = {prefix + t for t in reason_warnings(evaluation.exclusions, n_read)}
    exclusions = evaluation.exclusions
    other = exclusions[exclusions["kind"] != WINDOW_KIND]
    kept = [str(w.message) for w in caught
            if issubclass(w.category, CasemixWarning) and str(w.message) not in shares]
    for w in caught:
        if not issubclass(w.category, CasemixWarning):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return [*(prefix + t for t in reason_warnings(other, n_read)), *kept]


def _membership(records: Records, evaluations: dict[str, Evaluation]) -> pd.DataFrame:
    columns = records.spec.columns
    frame = records.frame
    table = pd.DataFrame({
        "recipient": frame[columns.recipient].to_numpy(dtype=object),
        "program": frame[columns.program].to_numpy(dtype=object),
        "transplant_date": frame[columns.transplant_date].dt.strftime("%Y-%m-%d")
        .to_numpy(dtype=object),
    })
    for name, evaluation in evaluations.items():
        inside = table["recipient"].isin(evaluation.recipients["recipient"])
        table[name] = inside.to_numpy().astype("int64")
    return table


def _study_facts(records: Records, models: PlanModels, cutoff: dt.date,
                 evaluations: dict[str, Evaluation]) -> dict[str, Any]:
    inputs: dict[str, Any] = {
        "records": {"path": str(records.source), "sha256": sha256_file(records.source)},
    }
    if models.folder is not None:
        index = models.folder / INDEX_FILE
        inputs["models"] = {"path": str(index), "sha256": sha256_file(index)}
    return {
        "casemix_version": casemix.__version__,
        "cutoff": cutoff.isoformat(),
        "analyses": [{**ev.run["analysis"], "folder": name}
                     for name, ev in evaluations.items()],
        "inputs": inputs,
        "cautions": list(CAUTIONS),
    }


def _saved_analyses(folder: Path) -> list[str]:
    """Analysis folders named by an existing study.json (a new save replaces them too)."""
    try:
        content = json.loads((folder / STUDY_FILE).read_text(encoding="utf-8"))
        return [str(entry["folder"]) for entry in content["analyses"]]
    except (OSError, ValueError, KeyError, TypeError):
        return []
