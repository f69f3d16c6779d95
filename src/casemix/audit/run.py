"""The whole audit in one call: ``run_audit(...) -> Audit``, and ``Audit.save(folder)``.

The reference records must be the model's own fitting data (checked by the data
fingerprint); they give the model-level checks (proportional hazards, discrimination,
calibration, cross-checks). An evaluation cohort adds the per-program checks (overdispersion,
prior sensitivity, bootstrap and delta-method uncertainty of E, own-data influence,
multiplicity).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from casemix._io import atomic_write_text, sha256_file, write_csv, write_json
from casemix._optional import available
from casemix.audit.agreement import evaluation_settings, verdict_agreement
from casemix.audit.bootstrap import (
    ProgramArrays,
    bootstrap_expected,
    check_replicates,
    delta_expected,
)
from casemix.audit.calibration import (
    calibration_by_horizon,
    calibration_by_risk,
    calibration_by_size,
    calibration_regression,
)
from casemix.audit.crosscheck import crosscheck_lifelines, crosscheck_statsmodels
from casemix.audit.findings import THRESHOLDS, all_findings
from casemix.audit.influence import leave_one_program_out
from casemix.audit.ph import TRANSFORMS, ph_test, ph_test_groups, schoenfeld_residuals
from casemix.audit.sensitivity import prior_sensitivity, verdict_changes
from casemix.audit.wald import wald_groups
from casemix.data.records import Records, read_records
from casemix.errors import InputError
from casemix.evaluation.evaluate import evaluate
from casemix.model.reference import ReferenceModel, reference_data
from casemix.parallel import DEFAULT_WORKERS, replicate_map
from casemix.report.audit_page import audit_html
from casemix.stats.dispersion import MIN_PROGRAMS, adjusted_funnel_limits, overdispersion
from casemix.stats.multiplicity import fdr_table
from casemix.survival import concordance

__all__ = ["HORIZONS", "Audit", "run_audit"]

# follow-up cuts (days) for calibration by horizon, kept when within the model's horizon
HORIZONS = (30, 90, 365, 1095)


@dataclass(frozen=True, eq=False)
class Audit:
    """The audit's tables and findings (a snapshot; see :func:`run_audit`).

    :meth:`save` writes it to a folder and :meth:`load` reads it back.

    Attributes
    ----------
    tables : dict of str to DataFrame
        Tidy tables by name (the CSV file names without ``.csv``): always ``ph``,
        ``concordance``, ``calibration_risk``, ``calibration_regression``,
        ``calibration_horizon``, ``crosscheck``, ``coefficients``, ``joint_tests``; with a
        cohort also ``calibration_size``, ``overdispersion``, ``dispersion_programs``,
        ``prior_sensitivity``, ``prior_verdicts``, ``bootstrap``,
        ``bootstrap_coefficients``, ``bootstrap_draws``, ``influence``, ``fdr``. Risk
        groups (``calibration_risk``) are on one scale for both populations: the log
        relative risk against the reference population's average recipient.
    schoenfeld : DataFrame or None
        Scaled Schoenfeld residuals of the reference fit (one row per event), for the plot;
        not saved, so None for an audit read back by :meth:`load`.
    findings : tuple of str
        Plain-words findings, most important checks first.
    facts : dict
        Settings and facts of the run (seed, replicates, model fingerprint, thresholds).
    """

    tables: dict[str, pd.DataFrame]
    schoenfeld: pd.DataFrame | None
    findings: tuple[str, ...]
    facts: dict[str, Any] = field(default_factory=dict)

    def save(self, folder: str | Path) -> Path:
        """Write every table as CSV, ``findings.json``, ``audit.json`` and ``audit.html``.

        Each file is written atomically; ``folder`` is created if missing.
        """
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        for name, table in sorted(self.tables.items()):
            write_csv(folder / f"{name}.csv", table)
        write_json(folder / "findings.json", list(self.findings))
        write_json(folder / "audit.json", self.facts)
        atomic_write_text(folder / "audit.html", audit_html(self))
        return folder

    @classmethod
    def load(cls, folder: str | Path) -> Audit:
        """Read an audit folder written by :meth:`save`: every CSV, the findings and facts.

        Raises
        ------
        InputError
            Not a folder, ``findings.json`` or ``audit.json`` missing (an empty list of
            findings would then read like a clean audit) or not valid, or a CSV that cannot
            be read; the message names the file.
        """
        folder = Path(folder)
        if not folder.is_dir():
            raise InputError(f"{folder}: audit folder not found; pass the folder `casemix "
                             "audit` wrote, or leave it out.")
        absent = [n for n in ("findings.json", "audit.json") if not (folder / n).is_file()]
        if absent:
            raise InputError(
                f"{folder}: not a complete audit folder ({' and '.join(absent)} missing), so "
                "an empty list of findings would read like a clean audit. Pass the folder "
                "`casemix audit ... --out DIR` wrote, or run the audit again."
            )
        findings, facts = (_json(folder / name) for name in ("findings.json", "audit.json"))
        if not isinstance(findings, list):
            raise InputError(f"{folder / 'findings.json'}: must hold a list of findings; run "
                             "the audit again.")
        if not isinstance(facts, dict):
            raise InputError(f"{folder / 'audit.json'}: must hold an object of facts; run the "
                             "audit again.")
        tables = {}
        for path in sorted(folder.glob("*.csv")):
            try:
                tables[path.stem] = pd.read_csv(path)
            except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as err:
                raise InputError(f"{path}: cannot be read as CSV ({err}); run the audit "
                                 "again.") from err
        texts = tuple(i if isinstance(i, str) else "; ".join(f"{k}: {v}" for k, v in i.items())
                      for i in findings)
        return cls(tables=tables, schoenfeld=None, findings=texts, facts=facts)


def _json(path: Path) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        raise InputError(f"{path}: not valid JSON ({err}); run the audit again.") from err


def _load(model, reference_records):
    if not isinstance(model, ReferenceModel):
        model = ReferenceModel.load(model)
    records = reference_records
    if not isinstance(records, Records):
        records = read_records(records, model.spec, cutoff=model.cutoff)
    data = reference_data(
        records, model.spec, model.outcome, model.horizon_days, model.cutoff, model.window,
        design=model.design,
    )  # fmt: skip
    if data.fingerprint() != model.fingerprint:
        raise InputError(
            f"the reference records ({records.source}) are not the data the model was fitted "
            "on (their fingerprint differs from the model's): pass the same reference extract, "
            "read with the same spec and cut-off"
        )
    return model, data


def _model_checks(model, data, reference_programs, transforms) -> dict[str, pd.DataFrame]:
    fit = model.fit
    args = (data.time, data.event, data.X)
    ph = pd.concat(
        [ph_test(fit, *args, t, strata=data.strata).assign(transform=t) for t in transforms]
    ).reset_index()
    # one risk scale for both populations: log relative risk against the reference average
    lp = np.log(fit.relative_risk(data.X))
    e = fit.expected_events(data.time, data.X, data.strata)
    c = concordance(data.time, data.event, lp)
    horizons = [h for h in HORIZONS if h < model.horizon_days] + [model.horizon_days]
    horizons = [h for h in horizons if h <= data.time.max()]
    tables = {
        "ph": ph[["transform", "term", "statistic", "df", "p_value"]],
        "concordance": pd.DataFrame([{"population": "reference", **asdict(c)}]),
        "calibration_risk": calibration_by_risk(data.event, e, lp).assign(population="reference"),
        "calibration_regression": calibration_regression(data.event, e, lp)
        .reset_index()
        .assign(population="reference"),
        "calibration_horizon": calibration_by_horizon(
            fit, data.time, data.event, data.X, horizons, strata=data.strata
        ).assign(population="reference"),
    }
    checks = [crosscheck_statsmodels(fit, *args, data.strata)] if available("statsmodels") else []
    if fit.ties == "efron" and available("lifelines"):
        checks.append(crosscheck_lifelines(fit, *args, reference_programs, data.strata))
    tables["crosscheck"] = pd.concat(checks, ignore_index=True)
    tables["coefficients"] = pd.DataFrame(
        {"term": list(fit.names), "coef": fit.coef, "se": fit.se, "hr": np.exp(fit.coef)}
    )
    groups = model.design.groups
    wald = wald_groups(fit.coef, fit.cov, groups)
    ph_joint = ph_test_groups(fit, *args, groups, "rank", strata=data.strata)
    tables["joint_tests"] = pd.DataFrame(
        {
            "covariate": wald.index,
            "columns": wald["df"].to_numpy(),
            "wald": wald["statistic"].to_numpy(),
            "wald_p_value": wald["p_value"].to_numpy(),
            "ph_statistic": ph_joint["statistic"].to_numpy(),
            "ph_p_value": ph_joint["p_value"].to_numpy(),
        }
    )
    return tables


def _evaluation(cohort_records, model, cutoff, window, settings):
    """The evaluation and the cohort's arrays, rows aligned with ``evaluation.recipients``."""
    records = cohort_records
    if not isinstance(records, Records):
        records = read_records(records, model.spec, cutoff=cutoff)
    evaluation = evaluate(
        records, model, settings["rules"], settings["prior"], free_mean=settings["free_mean"],
        cutoff=cutoff, window=window,
    )  # fmt: skip
    frame = evaluation.expected.cohort.frame  # the evaluation's own cohort and design matrix
    arrays = ProgramArrays.build(
        frame["time"].to_numpy(float), evaluation.expected.X, evaluation.expected.strata,
        frame[model.spec.columns.program].astype(str),
    )  # fmt: skip
    return evaluation, arrays


def _settings(model, cohort_records, rules, prior, free_mean, folder) -> dict[str, Any]:
    """Rules and prior for the audit's evaluation: given, or read from an evaluation folder."""
    if folder is None:
        return {"rules": rules, "prior": prior, "free_mean": free_mean, "folder": None}
    if rules is not None or prior is not None or free_mean:
        raise InputError(
            "give either an evaluation folder or rules and a prior, not both: the audit takes "
            "the evaluation's own rules and prior from its run.json"
        )
    found = evaluation_settings(folder, model.fingerprint)
    source = getattr(cohort_records, "source", cohort_records)
    if found.records_sha256 is not None and Path(source).is_file():
        if sha256_file(source) != found.records_sha256:
            raise InputError(
                f"the cohort records {source} are not the file the evaluation in {folder} read "
                "(their checksum differs); pass the same cohort records"
            )
    window = None if found.window == (None, None) else found.window
    return {"rules": found.rules, "prior": found.prior, "free_mean": False, "folder": folder,
            "cutoff": found.cutoff, "window": window,
            "evaluation": found.evaluation}  # fmt: skip


def _dispersion(programs: pd.DataFrame) -> dict[str, pd.DataFrame]:
    used = programs[programs["expected"] > 0]
    if len(used) < MIN_PROGRAMS:
        return {}  # too few programs to estimate a spread (said in the facts' notes)
    result = overdispersion(used["observed"], used["expected"])
    summary = pd.DataFrame(
        [
            {
                "programs": len(used),
                "phi": result.phi,
                "statistic": result.statistic,
                "p_value": result.p_value,
                "p_value_raw": result.p_value_raw,
                "simulations": result.simulations,
                "tau2": result.tau2,
                "z_low": result.limits[0],
                "z_high": result.limits[1],
            }
        ]
    )
    per = used[["program", "observed", "expected", "oe_ratio"]].assign(
        z=result.z, z_winsorised=result.z_winsorised
    )
    for method in ("multiplicative", "additive"):
        for level, tag in ((0.95, "95"), (0.998, "998")):
            low, high = adjusted_funnel_limits(used["expected"], result, level=level, method=method)
            per[f"{method}_lower_{tag}"], per[f"{method}_upper_{tag}"] = low, high
    return {"overdispersion": summary, "dispersion_programs": per.reset_index(drop=True)}


def _cohort_calibration(evaluation, model, arrays) -> dict[str, pd.DataFrame]:
    rec = evaluation.recipients
    event, e, lp = rec["event"].to_numpy(), rec["expected"].to_numpy(), rec["lp"].to_numpy()
    horizons = [h for h in HORIZONS if h < model.horizon_days] + [model.horizon_days]
    horizons = [h for h in horizons if h <= arrays.time.max()]
    X = arrays.X
    return {
        "calibration_risk": calibration_by_risk(event, e, lp).assign(population="cohort"),
        "calibration_regression": calibration_regression(event, e, lp)
        .reset_index()
        .assign(population="cohort"),
        "calibration_horizon": calibration_by_horizon(
            model.fit, arrays.time, event, X, horizons, strata=arrays.strata
        ).assign(population="cohort"),
        "concordance": pd.DataFrame(
            [{"population": "cohort", **asdict(concordance(arrays.time, event, lp))}]
        ),
    }


def _program_checks(model, data, evaluation, arrays, options) -> tuple[dict, dict]:
    programs = evaluation.programs.set_index("program").loc[list(arrays.programs)].reset_index()
    observed = programs["observed"].to_numpy()
    tables = _dispersion(programs)
    notes = []
    if len(programs) >= MIN_PROGRAMS:
        tables["calibration_size"] = calibration_by_size(programs)
    else:
        notes.append(
            f"size groups and overdispersion need at least {MIN_PROGRAMS} programs with "
            f"expected events; the cohort has {len(programs)}"
        )
    long, prior_notes = prior_sensitivity(programs, evaluation.prior, evaluation.rules)
    tables["prior_sensitivity"], tables["prior_verdicts"] = long, verdict_changes(long)
    boot = bootstrap_expected(
        data, model.fit, arrays, observed, evaluation.prior,
        replicates=options["bootstrap"], seed=options["seed"],
        level=evaluation.rules.credible_level, map_fn=options["map_fn"],
        progress=options["progress"],
    )  # fmt: skip
    delta = delta_expected(model.fit, arrays, level=evaluation.rules.credible_level)
    tables["bootstrap"] = boot.programs.merge(
        delta.drop(columns="expected"), on="program", validate="one_to_one"
    )
    tables["bootstrap_coefficients"] = boot.coefficients
    tables["bootstrap_draws"] = pd.DataFrame(
        {
            "replicate": np.repeat(np.arange(1, boot.draws.shape[0] + 1), boot.draws.shape[1]),
            "program": np.tile(np.asarray(arrays.programs, dtype=object), boot.draws.shape[0]),
            "expected": boot.draws.ravel(),
        }
    )
    reference_program = data.cohort.frame[model.spec.columns.program].astype(str).to_numpy()
    tables["influence"] = leave_one_program_out(
        data, model.fit, reference_program, arrays, observed, map_fn=options["map_fn"]
    )
    fdr = fdr_table(programs["program"], observed, programs["expected"])
    tables["fdr"] = fdr.merge(programs[["program", "verdict"]], on="program")
    facts = {"bootstrap_failed": boot.failed, "prior_notes": prior_notes, "notes": notes}
    return tables, facts


def _merge(tables: dict, extra: dict) -> dict:
    """Append the cohort rows of tables the reference already has; add the new ones."""
    out = dict(tables)
    for name, table in extra.items():
        out[name] = pd.concat([out[name], table], ignore_index=True) if name in out else table
    return out


def run_audit(
    reference_records,
    model,
    cohort_records=None,
    *,
    bootstrap: int = 200,
    seed: int = 0,
    map_fn: Callable | None = None,
    workers: int = DEFAULT_WORKERS,
    scheduler: str | None = None,
    progress: bool = False,
    cutoff=None,
    window=None,
    rules=None,
    prior=None,
    free_mean: bool = False,
    evaluation=None,
) -> Audit:
    """Run every check of the audit.

    Parameters
    ----------
    reference_records : Records or path
        The reference extract the model was fitted on (a path is read with the model's spec
        and cut-off).
    model : ReferenceModel or path
    cohort_records : Records or path, optional
        An evaluation cohort: adds the per-program checks.
    bootstrap : int, default 200
        Bootstrap replicates of the reference fit (with a cohort only).
    seed : int, default 0
        Seed of the bootstrap; the same seed gives the same tables.
    map_fn : callable, optional
        ``map_fn(func, items)`` used for the refits; default
        :func:`casemix.parallel.replicate_map` with ``workers`` and ``scheduler``.
    workers : int, default 2
        Local worker processes for the refits (each with one BLAS thread).
    scheduler : str, optional
        Address of a Dask scheduler to run the refits on instead (default: the
        ``CASEMIX_SCHEDULER`` environment variable, else local processes).
    progress : bool, default False
        Show a progress bar on a terminal.
    cutoff, window : optional
        The cohort's cut-off and transplant-date window, as for :func:`casemix.evaluation.evaluate`.
    rules, prior, free_mean : optional
        Verdict rules and prior, as for :func:`casemix.evaluation.evaluate`; the audit's
        verdicts are made with them.
    evaluation : path, optional
        An evaluation folder of this cohort: its model fingerprint must be the model's, its
        rules, prior, cut-off and window are used (give neither ``rules`` nor ``prior``), and
        the audit's verdicts are checked to be the evaluation's, program by program.

    Returns
    -------
    Audit
    """
    if evaluation is not None and cohort_records is None:
        raise InputError(
            "an evaluation folder is checked against its cohort: give the cohort records too "
            "(--cohort)"
        )
    if cohort_records is not None:
        check_replicates(bootstrap)  # before any work, not after the model checks
    model, data = _load(model, reference_records)
    reference_programs = ProgramArrays.build(
        data.time, data.X, data.strata,
        data.cohort.frame[model.spec.columns.program].astype(str),
    )  # fmt: skip
    transforms = list(TRANSFORMS)  # every time is > 0 (the cohort's day-0 convention)
    tables = _model_checks(model, data, reference_programs, transforms)
    facts: dict[str, Any] = {
        "model_fingerprint": model.fingerprint,
        "outcome": model.outcome,
        "horizon_days": model.horizon_days,
        "reference_recipients": int(data.time.size),
        "reference_events": int(data.event.sum()),
        "ties": model.fit.ties,
        "transforms": transforms,
        "notes": [],
        "findings_transform": "rank",
        "thresholds": THRESHOLDS,
        "seed": int(seed),
        "bootstrap": 0,
    }
    if cohort_records is not None:
        settings = _settings(model, cohort_records, rules, prior, free_mean, evaluation)
        if settings["folder"] is not None:
            cutoff = settings["cutoff"] if cutoff is None else cutoff
            window = settings["window"] if window is None else window
        link = evaluation
        evaluation, arrays = _evaluation(cohort_records, model, cutoff, window, settings)
        facts["evaluation"] = {
            "folder": None if link is None else str(link),
            "rules": evaluation.rules.to_dict(),
            "prior": evaluation.prior.to_dict(),
            "programs_agreeing": None if link is None else verdict_agreement(
                evaluation.programs, settings["evaluation"]
            ),
        }  # fmt: skip
        if map_fn is None:
            map_fn = partial(replicate_map, workers=workers, scheduler=scheduler)
        options = {"bootstrap": bootstrap, "seed": seed, "map_fn": map_fn, "progress": progress}
        program_tables, program_facts = _program_checks(model, data, evaluation, arrays, options)
        tables = _merge(tables, _cohort_calibration(evaluation, model, arrays))
        tables = _merge(tables, program_tables)
        facts["notes"] = facts["notes"] + program_facts.pop("notes")
        facts.update(program_facts, bootstrap=int(bootstrap), cohort_recipients=len(arrays.time))
    schoenfeld = schoenfeld_residuals(model.fit, data.time, data.event, data.X, strata=data.strata)
    findings = tuple(all_findings(tables, facts))
    return Audit(tables=tables, schoenfeld=schoenfeld, findings=findings, facts=facts)
