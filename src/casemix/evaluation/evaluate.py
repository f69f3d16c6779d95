"""The Python API of a whole evaluation: cohort -> expected -> programs -> shrinkage -> verdicts.

``evaluate`` wires the stages; ``Evaluation.save`` writes the evaluation folder and
``Evaluation.load`` reads it back, checked against the file contract of
:mod:`casemix.evaluation.folder`.
"""

from __future__ import annotations

import json
import warnings
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

import casemix
from casemix._io import replace_folder, sha256_file, write_csv, write_json
from casemix.data.check import reason_warnings
from casemix.data.cohort import build_cohort
from casemix.data.records import Records, count_by_kind, read_records
from casemix.errors import DataWarning, InputError, plural
from casemix.evaluation.expected import ExpectedEvents, expected_events
from casemix.evaluation.explain import casemix_contributions
from casemix.evaluation.folder import PROGRAM_COLUMNS, TABLES, read_run, read_tables
from casemix.evaluation.programs import program_table, survival_curves
from casemix.model.reference import FORMAT_VERSION, ReferenceModel, resolve_analysis
from casemix.stats.poisson import network_oe
from casemix.stats.shrinkage import Prior, posterior
from casemix.stats.verdict import Rules, assign_verdicts, load_rules, rules_from_dict

__all__ = [
    "CAUTIONS",
    "INPUT_FILES",
    "NETWORK_TEST_LEVEL",
    "OWNED_FILES",
    "PROGRAM_COLUMNS",
    "Evaluation",
    "coefficient_table",
    "evaluate",
]

NETWORK_TEST_LEVEL = 0.05
"""Two-sided p-value below which the network's overall O/E is called different from 1."""

#: Entries of an evaluation folder that belong to one evaluation: a new save replaces them all
#: (a stale report or public release of an earlier run never stays beside new results).
OWNED_FILES = (*(table.name for table in TABLES), "run.json", "report.html", "public")
#: Inputs that may sit beside the results (``casemix demo`` writes them there); kept as they are.
INPUT_FILES = ("reference.csv", "cohort.csv", "spec.toml", "rules.toml", "model.json")

CAUTIONS = (
    "This is a statistical indicator that compares observed with expected events; it is not "
    "a finding about the quality of care of any program.",
    "Expected events come from a model of the reference population: case-mix factors that "
    "the model does not contain are not adjusted for.",
    "Small programs are uncertain: their intervals are wide and their hazard ratios are "
    "pulled towards the reference by the prior.",
    "Decisions about programs belong to clinical review under the applicable rules and "
    "licensed practice, not to this output alone.",
)


@dataclass(frozen=True, eq=False)
class Evaluation:
    """The result of :func:`evaluate`: tables plus the facts of the run.

    The same object is read back from its folder by :meth:`load`; the tables' columns are
    the file contract of :mod:`casemix.evaluation.folder`.

    Attributes
    ----------
    programs : DataFrame
        One row per program, sorted by code, columns ``PROGRAM_COLUMNS``.
    recipients : DataFrame
        ``recipient``, ``program``, ``time``, ``event``, ``expected``, ``lp``, ``stratum``.
    exclusions : DataFrame
        ``row``, ``recipient``, ``reason``, ``program``, ``kind``.
    followup : DataFrame
        Per program: follow-up completeness and lost to follow-up.
    casemix : DataFrame
        Case-mix contributions per program and covariate group (see casemix.evaluation.explain).
    curves : DataFrame
        Observed and expected survival per program on a grid of days.
    coefficients : DataFrame
        The reference model's terms with hazard ratios and 95% limits.
    out_of_range : DataFrame or None
        Recipients with covariates outside the reference range, per program and covariate;
        None when loaded from a folder written before this table was saved.
    prior : Prior or None
        The prior the verdicts were made with; None when loaded from a folder whose run.json
        does not hold it whole (a hierarchical prior written without its components).
    rules : Rules
        The verdict rules. Loaded from a folder, their ``[prior]`` settings are the defaults:
        run.json keeps the prior they chose, not how it was chosen.
    run : dict
        The content of ``run.json``.
    corrections : DataFrame or None
        ``row``, ``recipient``, ``program``, ``kind``: one line per correction of a recipient
        kept in the cohort (see casemix.data.records); None when loaded from a folder written
        before corrections were saved.
    expected : ExpectedEvents or None
        What :func:`evaluate` computed the tables from: the cohort, its design matrix and
        strata, rows as in ``recipients`` (so that later stages such as the audit need not
        build them again). Not saved: None for an evaluation read back by :meth:`load`.
    """

    programs: pd.DataFrame
    recipients: pd.DataFrame
    exclusions: pd.DataFrame
    followup: pd.DataFrame
    casemix: pd.DataFrame
    curves: pd.DataFrame
    coefficients: pd.DataFrame
    out_of_range: pd.DataFrame | None
    prior: Prior | None
    rules: Rules
    run: dict
    corrections: pd.DataFrame | None = None
    expected: ExpectedEvents | None = None

    def save(self, folder: str | Path) -> Path:
        """Write the evaluation files into ``folder`` as a whole (see casemix._io.replace_folder).

        A new folder is created; an existing one must be empty, an earlier evaluation folder
        (its :data:`OWNED_FILES` are all replaced, so no stale file stays) or hold only
        :data:`INPUT_FILES`. The files are written into a temporary folder that is then
        swapped in.

        Raises
        ------
        InputError
            ``folder`` holds other files and is not an evaluation folder.
        """
        return replace_folder(Path(folder), self._write, owned=OWNED_FILES,
                              allowed=INPUT_FILES)

    def _write(self, folder: Path) -> None:
        for table in TABLES:
            frame = getattr(self, table.attribute)
            if frame is not None:
                write_csv(folder / table.name, frame, exact=True)  # load gives it back
        write_json(folder / "run.json", self.run)

    @classmethod
    def load(cls, folder: str | Path) -> Evaluation:
        """Read an evaluation folder written by :meth:`save`, checked against its contract.

        Text columns (program codes, verdicts, terms, reasons) are read as written, numbers
        as floats; ``corrections.csv`` and ``out_of_range.csv`` may be absent (folders of
        earlier versions). The prior and the rules are rebuilt from ``run.json``.

        Parameters
        ----------
        folder : str or Path
            The folder written by ``Evaluation.save``.

        Returns
        -------
        Evaluation

        Raises
        ------
        InputError
            For a missing file, column or run.json key, a non-numeric value in a numeric
            column, an empty or repeated program code, an unknown verdict, or a prior or
            rules in run.json that are not valid; the message names the file, the column and
            the lines.
        """
        folder = Path(folder)
        if not folder.is_dir():
            raise InputError(f"{folder}: not a folder; pass the folder an evaluation was "
                             "saved to.")
        tables = read_tables(folder)
        run = read_run(folder)
        path = folder / "run.json"
        return cls(**tables, prior=_stored_prior(run["prior"], path),
                   rules=rules_from_dict(run["rules"], source=str(path)), run=run)


def _stored_prior(values: Any, path: Path) -> Prior | None:
    if isinstance(values, dict) and values.get("method") == "hierarchical" and not values.get(
            "components"):
        return None  # written before the mixture's components were kept
    try:
        return Prior.from_dict(values)
    except InputError as err:
        raise InputError(f"{path}: {err} Write the evaluation again.") from err


def coefficient_table(model: ReferenceModel, level: float = 0.95) -> pd.DataFrame:
    """The reference model's coefficients with hazard ratios, Wald limits and p-values."""
    fit = model.fit
    z = stats.norm.ppf(0.5 + level / 2)
    return pd.DataFrame(
        {
            "term": fit.names,
            "group": model.design.groups,
            "coef": fit.coef,
            "se": fit.se,
            "hr": np.exp(fit.coef),
            "hr_lower": np.exp(fit.coef - z * fit.se),
            "hr_upper": np.exp(fit.coef + z * fit.se),
            "p_value": 2 * stats.norm.sf(np.abs(fit.coef / fit.se)),
        }
    )


def _rules(rules) -> Rules:
    if rules is None:
        return Rules()
    if isinstance(rules, Rules):
        return rules
    return load_rules(rules)


def _records(records, model: ReferenceModel, cutoff) -> Records:
    if isinstance(records, Records):
        return records
    return read_records(records, model.spec, cutoff=cutoff)


def evaluate(
    cohort_records: Records | str | Path,
    model: ReferenceModel | str | Path,
    rules: Rules | str | Path | None = None,
    prior: Prior | None = None,
    *,
    free_mean: bool | None = None,
    prior_method: str | None = None,
    cutoff=None,
    window=None,
) -> Evaluation:
    """Evaluate every program of an evaluation cohort against a reference model.

    Parameters
    ----------
    cohort_records : Records or path
        The evaluation cohort's records (a path is read with the model's spec and ``cutoff``).
    model : ReferenceModel or path
        The reference model; its outcome and horizon are used.
    rules : Rules or path, optional
        Verdict thresholds (default: the design's defaults).
    prior : Prior, optional
        Prior of the hazard ratios; default: chosen from the programs as the rules' ``[prior]``
        settings say (hierarchical with the mean fixed at 1 unless set otherwise).
    free_mean : bool, optional
        Override the rules' ``free_mean`` (estimate the prior mean instead of fixing it at 1).
    prior_method : {"hierarchical", "empirical_bayes", "fixed"}, optional
        Override the rules' prior method.
    cutoff : date, optional
        Date the cohort's data are complete to (default: the records' or the spec's).
    window : (date or None, date or None), optional
        Transplant-date window of the cohort (default: the spec's).
    """
    model_path = None
    if not isinstance(model, ReferenceModel):
        model_path = Path(model)
        model = ReferenceModel.load(model_path)
    records = _records(cohort_records, model, cutoff)
    rules = _rules(rules)
    provenance = _provenance(cohort_records, records, model, cutoff, window)
    if cutoff is None:
        cutoff = records.cutoff
    _, cutoff, window = resolve_analysis(model.spec, model.horizon_days, cutoff, window)
    cohort = build_cohort(records, model.outcome, model.horizon_days, cutoff, window)
    if cohort.frame.empty:
        raise InputError(
            f"no recipient of {records.source} is left in the evaluation cohort (cut-off "
            f"{_date_text(cutoff)}, window {_date_text(window[0]) or 'any'} to "
            f"{_date_text(window[1]) or 'any'}); all {plural(cohort.n_read, 'record')} excluded. "
            "Check the dates and the exclusions."
        )
    for text in reason_warnings(cohort.exclusions, cohort.n_read):
        warnings.warn(DataWarning(f"{records.source}: {text}"), stacklevel=2)
    expected = expected_events(cohort, model)
    table = program_table(expected, level=rules.credible_level)
    observed, exp = table["observed"].to_numpy(), table["expected"].to_numpy()
    if prior is None:
        settings = rules.prior
        if free_mean is not None:
            settings = replace(settings, free_mean=bool(free_mean))
        if prior_method is not None:
            settings = replace(settings, method=prior_method)
        prior = settings.choose(observed, exp)
    post = posterior(
        observed,
        exp,
        prior,
        level=rules.credible_level,
        upper_margin=rules.upper_margin,
        lower_margin=rules.lower_margin,
    )
    verdicts = assign_verdicts(observed, exp, prior, rules)
    contributions = casemix_contributions(expected, model)
    totals = contributions[contributions["group"] == "total"].set_index("program")["factor"]
    programs = pd.concat(
        [table, post.reset_index(drop=True), verdicts.reset_index(drop=True)], axis=1
    )
    programs["casemix_factor"] = programs["program"].map(totals).to_numpy()
    run = _run_facts(records, cohort, model, model_path, prior, rules)
    run.update(_network_facts(programs, prior, rules))
    run["cautions"] = list(CAUTIONS) + _network_cautions(run, prior)
    run["provenance"] = provenance
    # as run.json holds it (keys sorted, lists), so that a loaded evaluation has the same run
    run = json.loads(json.dumps(run, sort_keys=True, allow_nan=False))
    return Evaluation(
        programs=programs[PROGRAM_COLUMNS],
        recipients=expected.frame.drop(columns="expected_at_horizon"),
        exclusions=cohort.exclusions,
        followup=cohort.followup,
        casemix=contributions,
        curves=survival_curves(expected, model, level=rules.credible_level),
        coefficients=coefficient_table(model),
        out_of_range=expected.out_of_range,
        prior=prior,
        rules=rules,
        run=run,
        corrections=cohort.corrections,
        expected=expected,
    )


def _network_facts(programs: pd.DataFrame, prior: Prior, rules: Rules) -> dict[str, Any]:
    """The centre of shrinkage, the network's O/E with its test, and expected false flags."""
    network = network_oe(programs["observed"], programs["expected"], rules.credible_level)
    judged = programs["verdict"] != "too_little_data"
    false_flags = float(programs.loc[judged, "null_flag_probability"].sum())
    wrong = np.select([programs["verdict"] == "excess", programs["verdict"] == "favorable"],
                      [1.0 - programs["p_above"], 1.0 - programs["p_below"]], 0.0)
    return {
        "network": {**network, "level": rules.credible_level, "centre": prior.centre},
        "multiplicity": {
            "programs_judged": int(judged.sum()),
            "expected_false_flags": false_flags,
            "flags": int(programs["verdict"].isin(["excess", "favorable"]).sum()),
            "rule": "bayesian_fdr" if rules.bayesian_fdr > 0 else "probability",
            "bayesian_fdr": rules.bayesian_fdr,
            "posterior_expected_wrong_flags": float(wrong.sum()),
            "note": (
                "Expected number of programs given a verdict other than consistent if every "
                "program's true hazard ratio were 1, under the rules in force with the prior "
                "held fixed."
            ),
        },
    }


def _share_text(value: float) -> str:
    """An expected count in words: "about 0.15"; "fewer than 0.01" rather than "5.4e-21"."""
    return f"about {value:.2g}" if value >= 0.01 else "fewer than 0.01"


def _network_cautions(run: dict, prior: Prior) -> list[str]:
    network, many = run["network"], run["multiplicity"]
    cautions = [
        f"Under these rules {_share_text(many['expected_false_flags'])} of the "
        f"{many['programs_judged']} programs judged would get a verdict other than consistent "
        "even if every program's true hazard ratio were 1: verdicts are screening signals."
    ]
    if network["p_value"] < NETWORK_TEST_LEVEL and prior.method != "fixed" and not prior.free_mean:
        cautions.append(
            f"The network as a whole has O/E {network['oe']:.2f} ({network['level']:.0%} "
            f"{network['oe_lower']:.2f} to {network['oe_upper']:.2f}; exact test of 1: p = "
            f"{network['p_value']:.2g}): it differs from the reference, and the prior's centre "
            "fixed at 1 reads that drift as spread between programs. Consider the free mean "
            "(--prior hier-free) or a reference model refitted on recent years."
        )
    return cautions


def _provenance(given_records, records: Records, model: ReferenceModel, cutoff,
                window) -> dict[str, str]:
    """Where the cut-off and the window come from: given, the records, or the model's spec."""
    if cutoff is not None:
        cut = "given"
    elif isinstance(given_records, Records) and records.cutoff is not None:
        cut = "records"
    else:
        cut = "spec"
    if window is not None:
        win = "given"
    elif model.spec.analysis.window != (None, None):
        win = "spec"
    else:
        win = "none"
    return {"cutoff": cut, "window": win}


def _date_text(value) -> str | None:
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return None
    return pd.Timestamp(value).date().isoformat()


def _run_facts(records, cohort, model, model_path, prior, rules) -> dict[str, Any]:
    inputs = {"records": {"path": str(records.source), "sha256": sha256_file(records.source)}}
    if model_path is not None:
        inputs["model"] = {"path": str(model_path), "sha256": sha256_file(model_path)}
    fit = model.fit
    return {
        "casemix_version": casemix.__version__,
        "outcome": model.outcome,
        "outcome_definition": model.spec.outcome(model.outcome).definition(
            model.spec.columns.death
        ),
        "horizon_days": int(model.horizon_days),
        "cutoff": _date_text(cohort.cutoff),
        "window": [_date_text(d) for d in cohort.window],
        "inputs": inputs,
        "model": {
            "format_version": FORMAT_VERSION,
            "fingerprint": model.fingerprint,
            "n": fit.n,
            "events": fit.n_events,
            "ties": fit.ties,
            "loglik": fit.loglik,
            "concordance": model.concordance,
            "reference_cutoff": model.cutoff.isoformat(),
            "reference_window": [_date_text(d) for d in model.window],
            "covariates": list(dict.fromkeys(model.design.groups)),
            "strata": model.spec.strata,
        },
        "prior": prior.to_dict(),
        "credible_level": rules.credible_level,
        "rules": rules.to_dict(),
        "counts": {
            "read": int(cohort.n_read),
            "kept": len(cohort.frame),
            "excluded": len(cohort.exclusions),
            "corrected": int(cohort.corrections["row"].nunique()),
            "corrections": {str(k): int(n) for k, n in
                            cohort.corrections["kind"].value_counts().sort_index().items()},
            "excluded_by_reason": {str(k): int(n) for k, n in
                                   count_by_kind(cohort.exclusions).itertuples(index=False)},
        },
        "cautions": list(CAUTIONS),
    }
