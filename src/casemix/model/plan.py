"""The reference models of a study plan: one per (outcome, horizon, reference window), indexed.

:func:`fit_plan` fits, with :func:`~casemix.model.reference.fit_reference`, one model per
distinct (outcome, horizon, reference window) of the spec's ``[analyses]`` and lets every
analysis that needs it share it. :meth:`PlanModels.save` writes each model as today (one
JSON file, format versioned) into one folder with ``index.json``: per analysis its model
file, the model's outcome, horizon, reference window and cut-off, its fingerprint and the
sha256 of the file (the layout is in models/README.md). :meth:`PlanModels.load` refuses an
index whose model files changed after it was written.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Any

import pandas as pd

import casemix
from casemix._io import replace_folder, sha256_file, write_json
from casemix.data.records import Records
from casemix.data.spec import PlanAnalysis, Spec, closest, load_spec
from casemix.errors import InputError, ModelFileError
from casemix.model.reference import ReferenceModel, fit_reference

__all__ = [
    "INDEX_FILE",
    "INDEX_FORMAT_VERSION",
    "INDEX_KIND",
    "PlanModels",
    "fit_plan",
    "plan_of",
    "records_cutoff",
]

INDEX_FILE = "index.json"
INDEX_FORMAT_VERSION = 1
INDEX_KIND = "casemix model index"


def plan_of(spec: Spec) -> tuple[PlanAnalysis, ...]:
    """The analyses of the spec's plan, in order.

    Raises
    ------
    InputError
        The spec has no ``[analyses]``.
    """
    if not spec.analyses:
        raise InputError(
            f"{spec.where} has no study plan: add [analyses.NAME] tables (outcome, "
            "horizon_days; see docs/spec.md) or run one analysis (give the outcome)."
        )
    return tuple(spec.analyses.values())


def records_cutoff(records: Records, cutoff, spec: Spec) -> dt.date:
    """The cut-off of a plan run: given, else the records', else the spec's [analysis] one."""
    for value in (cutoff, records.cutoff, spec.analysis.cutoff):
        if value is not None:
            return pd.Timestamp(value).date()
    raise InputError(
        "no cut-off: give the date the data are complete to (e.g. --cutoff 2025-06-30), read "
        "the records with a cut-off, or set [analysis] cutoff in the spec."
    )


@dataclass(frozen=True, eq=False)
class PlanModels:
    """The reference models of a study plan.

    Attributes
    ----------
    spec : Spec
        The spec the models were fitted with; its ``analyses`` is the plan.
    models : Mapping[str, ReferenceModel]
        Analysis name -> its model, in plan order; analyses with the same outcome, horizon
        and reference window share one object.
    files : Mapping[str, str]
        Analysis name -> model file name in the folder.
    folder : pathlib.Path or None
        The folder the models were loaded from or last saved to.
    """

    spec: Spec
    models: Mapping[str, ReferenceModel]
    files: Mapping[str, str]
    folder: Path | None = None

    def __getitem__(self, name: str) -> ReferenceModel:
        if name not in self.models:
            raise KeyError(f"no analysis '{name}'{closest(name, self.models)}; analyses: "
                           f"{', '.join(self.models)}")
        return self.models[name]

    def __iter__(self) -> Iterator[str]:
        return iter(self.models)

    def __len__(self) -> int:
        return len(self.models)

    def index(self) -> dict[str, Any]:
        """The content of ``index.json`` without the files' sha256 (added by :meth:`save`)."""
        return {
            "format_version": INDEX_FORMAT_VERSION,
            "kind": INDEX_KIND,
            "casemix_version": casemix.__version__,
            "analyses": [_entry(name, self.files[name], model)
                         for name, model in self.models.items()],
        }

    def save(self, folder: str | Path) -> PlanModels:
        """Write every model once and ``index.json`` into ``folder`` as a whole (atomic).

        An existing folder must be empty or a models folder (earlier model files named by
        its index are replaced too). Returns the models with ``folder`` set.
        """
        folder = Path(folder)
        owned = {INDEX_FILE, *self.files.values(), *_indexed_files(folder)}

        def write(tmp: Path) -> None:
            content = self.index()
            written: dict[str, str] = {}
            for entry in content["analyses"]:
                name = entry["model"]
                if name not in written:
                    self.models[entry["analysis"]].save(tmp / name)
                    written[name] = sha256_file(tmp / name)
                entry["sha256"] = written[name]
            write_json(tmp / INDEX_FILE, content)

        replace_folder(folder, write, owned=owned)
        return PlanModels(self.spec, self.models, self.files, folder)

    @classmethod
    def load(cls, folder: str | Path) -> PlanModels:
        """Read a models folder written by :meth:`save`.

        Raises
        ------
        ModelFileError
            No or unreadable ``index.json``, an unknown index format, a model file changed
            after the index was written, or an index that does not match the models' plan.
        """
        folder = Path(folder)
        content = _read_index(folder / INDEX_FILE)
        loaded: dict[str, ReferenceModel] = {}
        models, files = {}, {}
        for entry in content["analyses"]:
            name, file = entry["analysis"], entry["model"]
            path = folder / file
            if file not in loaded:
                if not path.is_file() or sha256_file(path) != entry.get("sha256"):
                    raise ModelFileError(
                        f"model file {path} of analysis '{name}' is missing or changed after "
                        f"{folder / INDEX_FILE} was written; refit the plan (casemix fit)."
                    )
                loaded[file] = ReferenceModel.load(path)
            models[name], files[name] = loaded[file], file
        spec = next(iter(loaded.values())).spec
        _check_index(folder, spec, models, content["analyses"])
        return cls(spec, MappingProxyType(models), MappingProxyType(files), folder)


def fit_plan(
    records: Records,
    spec: Spec | str | Path | None = None,
    *,
    cutoff=None,
    ties: str = "efron",
    progress: Callable[[str], None] | None = None,
) -> PlanModels:
    """Fit the reference models of every analysis of the plan on a reference population.

    Parameters
    ----------
    records : Records
        The reference population (from :func:`casemix.read_records`).
    spec : Spec or path, optional
        Default: the spec the records were read with; it must have ``[analyses]``.
    cutoff : date, optional
        Date the reference data are complete to (default: the records', else the spec's).
    ties : {"efron", "breslow"}
    progress : callable, optional
        Called with a short text (``"fitting graft_1y"``) before each model is fitted.

    Returns
    -------
    PlanModels
        One model per distinct (outcome, horizon, reference window), shared by the analyses
        that need it; each is what ``fit_reference(records, spec, outcome, horizon_days,
        cutoff, ties, window=reference window)`` gives.

    Raises
    ------
    InputError, SpecError
        No plan, no cut-off, a reference window after the cut-off or one that cannot support
        the horizon (the message names the analysis).
    """
    if spec is None:
        spec = records.spec
    elif not isinstance(spec, Spec):
        spec = load_spec(spec)
    plan = plan_of(spec)
    cut = records_cutoff(records, cutoff, spec)
    for analysis in plan:
        analysis.check_reference(cut)
    fitted: dict[tuple, ReferenceModel] = {}
    models = {}
    for analysis in plan:
        key = _key(analysis)
        if key not in fitted:
            if progress is not None:
                progress(f"fitting {analysis.name}")
            try:
                fitted[key] = fit_reference(records, spec, analysis.outcome,
                                            analysis.horizon_days, cut, ties,
                                            analysis.reference_window)
            except InputError as exc:
                raise InputError(f"analysis '{analysis.name}': {exc}") from None
        models[analysis.name] = fitted[key]
    return PlanModels(spec, MappingProxyType(models), MappingProxyType(_file_names(plan)))


def _key(analysis: PlanAnalysis) -> tuple:
    return (analysis.outcome, analysis.horizon_days, analysis.reference_window)


def _file_names(plan: tuple[PlanAnalysis, ...]) -> dict[str, str]:
    """``OUTCOME_HORIZONd.json``, with the reference window added where that is ambiguous."""
    keys = list(dict.fromkeys(_key(a) for a in plan))
    bases = [f"{outcome}_{horizon}d" for outcome, horizon, _ in keys]
    names = {}
    for key, base in zip(keys, bases, strict=True):
        if bases.count(base) > 1:
            start, end = (d.isoformat() if d else "open" for d in key[2])
            base = f"{base}_{start}_{end}"
        names[key] = f"{base}.json"
    return {a.name: names[_key(a)] for a in plan}


def _entry(name: str, file: str, model: ReferenceModel) -> dict[str, Any]:
    return {
        "analysis": name,
        "model": file,
        "outcome": model.outcome,
        "horizon_days": model.horizon_days,
        "reference_window": [None if d is None else d.isoformat() for d in model.window],
        "reference_cutoff": model.cutoff.isoformat(),
        "fingerprint": model.fingerprint,
    }


def _indexed_files(folder: Path) -> list[str]:
    """Model files named by an existing index (so that a new save replaces them too)."""
    try:
        content = json.loads((folder / INDEX_FILE).read_text(encoding="utf-8"))
        return [str(e["model"]) for e in content["analyses"]]
    except (OSError, ValueError, KeyError, TypeError):
        return []


def _read_index(path: Path) -> dict[str, Any]:
    try:
        content = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ModelFileError(
            f"cannot read the model index {path} ({exc.strerror}); give a folder written by "
            "`casemix fit` for a study plan."
        ) from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ModelFileError(f"model index {path} is not valid JSON ({exc}).") from None
    if not isinstance(content, dict) or content.get("kind") != INDEX_KIND:
        raise ModelFileError(f"{path} is not a casemix model index; refit the plan.")
    if content.get("format_version") != INDEX_FORMAT_VERSION:
        raise ModelFileError(
            f"{path}: index format_version {content.get('format_version')!r} is not supported "
            f"(this casemix reads {INDEX_FORMAT_VERSION}); refit the plan with this version."
        )
    if not content.get("analyses"):
        raise ModelFileError(f"{path} lists no analysis; refit the plan.")
    return content


def _check_index(folder: Path, spec: Spec, models: dict, entries: list) -> None:
    """The index, the models' spec and the models' outcomes and horizons must agree."""
    where = folder / INDEX_FILE
    if list(models) != list(spec.analyses):
        raise ModelFileError(
            f"{where} lists the analyses {', '.join(models)} but the models' spec plans "
            f"{', '.join(spec.analyses) or 'none'}; refit the plan."
        )
    for entry in entries:
        name = entry["analysis"]
        model, planned = models[name], spec.analyses[name]
        if model.spec != spec or (model.outcome, model.horizon_days) != (
                planned.outcome, planned.horizon_days) or tuple(model.window) != (
                planned.reference_window) or model.fingerprint != entry.get("fingerprint"):
            raise ModelFileError(
                f"{where}: the model of analysis '{name}' ({entry['model']}) does not match "
                "the plan; refit the plan."
            )
