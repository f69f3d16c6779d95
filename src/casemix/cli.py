"""The ``casemix`` command line: each command reads its inputs, calls the library, writes files.

No computation happens here. Exit codes: 0 success, 1 bad input (the message names the file,
column or rows and the fix), 2 usage errors (typer's own). Bad input never shows a traceback.
"""

from __future__ import annotations

import datetime as dt
import sys
import warnings
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from enum import Enum
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer
from rich.console import Console

import casemix
from casemix.errors import CasemixError, CasemixWarning, plural

__all__ = [
    "app",
    "main",
]

if TYPE_CHECKING:  # pandas, scipy, statsmodels and matplotlib load inside the commands only
    import pandas as pd

app = typer.Typer(
    name="casemix",
    help=(
        "Compare each program's observed events with the events expected for its own case "
        "mix under a reference model, with shrunken hazard ratios and verdicts.\n\n"
        "Start with `casemix demo` to see the whole job on invented data."
    ),
    no_args_is_help=True,
    add_completion=False,
    rich_markup_mode=None,
)
out = Console(highlight=False, soft_wrap=True)
err = Console(stderr=True, highlight=False, soft_wrap=True)


CHECK_LISTED = 20


class Ties(str, Enum):
    efron = "efron"
    breslow = "breslow"


def _version(value: bool) -> None:
    if value:
        out.print(f"casemix {casemix.__version__}")
        raise typer.Exit()


@app.callback()
def _main(
    version: Annotated[
        bool,
        typer.Option("--version", callback=_version, is_eager=True, help="Print the version."),
    ] = False,
) -> None:
    """casemix: risk-adjusted observed-versus-expected evaluation of clinical programs."""


@contextmanager
def _guarded() -> Iterator[None]:
    """Turn casemix errors into a one-line message and exit 1; show warnings plainly."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", CasemixWarning)
        try:
            yield
        except CasemixError as exc:
            _show_warnings(caught)
            err.print(f"error: {exc}", markup=False)
            raise typer.Exit(1) from None
        except OSError as exc:
            _show_warnings(caught)
            name = getattr(exc, "filename", None) or ""
            err.print(f"error: cannot use {name}: {exc.strerror or exc}", markup=False)
            raise typer.Exit(1) from None
    _show_warnings(caught)


def _show_warnings(caught) -> None:
    seen = set()
    for item in caught:
        text = str(item.message)
        if issubclass(item.category, CasemixWarning) and text not in seen:
            seen.add(text)
            err.print(f"warning: {text}", markup=False)


@contextmanager
def _steps(total: int) -> Iterator[Callable[[str], None]]:
    """A progress bar over named steps, shown only when stderr is a terminal."""
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    progress = Progress(
        TextColumn("{task.description:<28}"),
        BarColumn(),
        TimeElapsedColumn(),
        console=err,
        disable=not err.is_terminal,
        transient=True,
    )
    with progress:
        task = progress.add_task("starting", total=total)

        def advance(description: str) -> None:
            progress.update(task, description=description, advance=1)

        yield advance


def _date(value: str | None, option: str) -> dt.date | None:
    if value is None:
        return None
    try:
        return dt.date.fromisoformat(value)
    except ValueError:
        err.print(f"error: {option} {value!r} is not a date; write it as YYYY-MM-DD", markup=False)
        raise typer.Exit(2) from None


_PRIOR_CHOICES = {
    "hier": ("hierarchical", False),
    "hier-free": ("hierarchical", True),
    "eb": ("empirical_bayes", False),
    "eb-free": ("empirical_bayes", True),
}


def _prior(value: str):
    """Parse --prior: 'rules' (the rules file's [prior]), 'hier', 'hier-free', 'eb', 'eb-free'
    (hierarchical or plug-in empirical Bayes, mean fixed at 1 or free) or 'fixed:SHAPE,RATE'."""
    from casemix.stats.shrinkage import fixed_prior

    if value == "rules":
        return None
    if value in _PRIOR_CHOICES:
        return _PRIOR_CHOICES[value]
    if value.startswith("fixed:"):
        try:
            shape, rate = (float(part) for part in value[len("fixed:") :].split(","))
            return fixed_prior(shape, rate)
        except (ValueError, CasemixError):
            pass
    err.print(
        f"error: --prior {value!r} is not understood; use rules, hier, hier-free, eb, eb-free "
        "or fixed:SHAPE,RATE "
        "(e.g. fixed:2,2)",
        markup=False,
    )
    raise typer.Exit(2)


ExistingFile = Annotated[
    Path, typer.Argument(exists=True, dir_okay=False, readable=True, metavar="RECORDS")
]
SpecOption = Annotated[
    Path, typer.Option("--spec", exists=True, dir_okay=False, help="Study spec (TOML).")
]
CutoffOption = Annotated[
    str | None, typer.Option("--cutoff", help="Date the data are complete to (YYYY-MM-DD).")
]
FromOption = Annotated[
    str | None, typer.Option("--from", help="First transplant date of the window (YYYY-MM-DD).")
]
ModelOption = Annotated[
    Path, typer.Option("--model", exists=True, dir_okay=False, help="Reference model (.json).")
]
OutDirOption = Annotated[Path, typer.Option("--out", file_okay=False, help="Output folder.")]
ToOption = Annotated[
    str | None, typer.Option("--to", help="Last transplant date of the window (YYYY-MM-DD).")
]


@app.command()
def check(
    records: ExistingFile,
    spec: SpecOption,
    cutoff: CutoffOption = None,
    window_from: FromOption = None,
    window_to: ToOption = None,
    model: Annotated[
        Path | None,
        typer.Option("--model", exists=True, dir_okay=False,
                     help="Also check against a fitted reference model (.json)."),
    ] = None,
    out_dir: Annotated[
        Path | None,
        typer.Option("--out", file_okay=False,
                     help="Write every exclusion and correction (CSV) into this folder."),
    ] = None,
) -> None:
    """Validate an extract: what would be excluded and why, per reason and per program.

    Exit code 0 when the extract is usable, 1 when it is not (missing columns, duplicate
    recipient ids, unreadable file, covariates the --model cannot encode).

    Example: casemix check cohort.csv --spec spec.toml --cutoff 2025-06-30
    --from 2023-01-01 --to 2024-12-31 --model model.json --out checked
    """
    from casemix._io import write_csv
    from casemix.data.check import check_extract
    from casemix.data.records import read_records

    cut = _date(cutoff, "--cutoff")
    window = (_date(window_from, "--from"), _date(window_to, "--to"))
    with _guarded():
        reference = None
        if model is not None:  # the model code (and scipy.stats) only when a model is given
            from casemix.model.reference import ReferenceModel

            reference = ReferenceModel.load(model)
        data = read_records(records, spec, cutoff=cut)
        result = check_extract(data, window=window, model=reference)
        if out_dir is not None:
            write_csv(out_dir / "exclusions.csv", result.exclusions)
            write_csv(out_dir / "corrections.csv", result.corrections)
    excluded = len(result.exclusions)
    out.print(
        f"{records}: {plural(data.n_read, 'record')} read, {result.n_kept} kept, "
        f"{excluded} excluded ({excluded / data.n_read:.1%}), "
        f"{plural(result.corrections['row'].nunique(), 'record')} kept with a correction"
    )
    if excluded:
        _print_counts("Excluded, by reason", result.by_reason, "reason")
        shown = result.exclusions[["row", "recipient", "reason"]].head(CHECK_LISTED)
        title = "Excluded records" + (
            f" (first {CHECK_LISTED} of {excluded}; all in --out DIR/exclusions.csv)"
            if excluded > CHECK_LISTED
            else ""
        )
        _print_counts(title, shown.astype(str), "reason")
        by_program = (
            result.exclusions.fillna({"program": "(missing)"})
            .groupby("program")
            .size()
            .rename("records")
            .reset_index()
        )
        _print_counts("Excluded, by program", by_program, "program")
    if len(result.corrections):
        counts = result.corrections.groupby(["program", "kind"]).size().rename("count")
        _print_counts("Kept with a correction", counts.reset_index(), "program")
    if data.emptied is not None and len(data.emptied):
        _print_counts("Cells read as missing, by token", data.emptied, "token")
    for text in result.skipped:
        out.print(f"not checked: {text}", markup=False)
    for text in result.warnings:
        err.print(f"warning: {text}", markup=False)
    if out_dir is not None:
        out.print(f"every exclusion and correction written to {out_dir}")
    if not result.usable:
        for text in result.problems:
            err.print(f"error: {text}", markup=False)
        err.print("The extract is not usable as it is.", markup=False)
        raise typer.Exit(1)
    out.print("The extract is usable" + (
        f", with {len(result.warnings)} warning(s) above." if result.warnings else "."))


def _print_counts(title: str, frame: pd.DataFrame, key: str) -> None:
    from rich.table import Table

    table = Table(title=title, title_justify="left")
    for name in frame.columns:
        table.add_column(str(name), justify="left" if name == key else "right")
    for row in frame.itertuples(index=False):
        table.add_row(*(str(value) for value in row))
    out.print(table)


@app.command()
def fit(
    records: ExistingFile,
    spec: SpecOption,
    out_path: Annotated[
        Path, typer.Option("--out", help="Model file (.json) with --outcome; else the folder "
                                         "of the plan's models.")
    ],
    outcome: Annotated[
        str | None,
        typer.Option("--outcome", help="An outcome named in the spec: fit that one model. "
                                       "Without it, every analysis of the spec's [analyses]."),
    ] = None,
    horizon: Annotated[
        int | None,
        typer.Option("--horizon", min=1,
                     help="Horizon in days (default: horizon_days in the spec's [analysis])."),
    ] = None,
    cutoff: CutoffOption = None,
    window_from: FromOption = None,
    window_to: ToOption = None,
    ties: Annotated[
        Ties, typer.Option("--ties", help="Handling of tied event times.")
    ] = Ties.efron,
) -> None:
    """Fit a reference model on a reference population and save it as JSON.

    Without --outcome, fit the models of every analysis of the spec's study plan
    ([analyses]): one per outcome, horizon and reference window, saved into the --out folder
    with index.json.

    Example: casemix fit reference.csv --spec spec.toml --outcome graft_failure
    --horizon 365 --cutoff 2022-12-31 --out model.json

    Example: casemix fit reference.csv --spec spec.toml --cutoff 2022-12-31 --out models
    """
    from casemix.data.cohort import apply_window
    from casemix.data.records import read_records
    from casemix.model.reference import fit_reference

    cut = _date(cutoff, "--cutoff")
    window = (_date(window_from, "--from"), _date(window_to, "--to"))
    if outcome is None:
        _plan_only_options(horizon=horizon, window=window)
        _fit_plan(records, spec, out_path, cut, ties.value)
        return
    with _guarded(), _steps(2) as step:
        data = read_records(records, spec, cutoff=cut)
        step("fitting the reference model")
        model = fit_reference(data, data.spec, outcome, horizon, cut, ties.value, window)
        model.save(out_path)
        step("saved")
        excluded, _ = apply_window(data, model.cutoff, model.window)
    fit_ = model.fit
    source = "--horizon" if horizon is not None else "the spec's [analysis] horizon_days"
    out.print(
        f"fitted {outcome} at {model.horizon_days} days (from {source}) on "
        f"{plural(fit_.n, 'recipient')} with {plural(fit_.n_events, 'event')} "
        f"({plural(len(fit_.names), 'term')}, concordance "
        f"{model.concordance:.3f})",
        markup=False,
    )
    out.print(
        f"{plural(data.n_read, 'record')} read: {fit_.n} used, {len(excluded)} excluded "
        f"({len(data.exclusions)} by the record checks, "
        f"{len(excluded) - len(data.exclusions)} transplanted after the cut-off "
        f"{model.cutoff.isoformat()} or outside the window {_window_words(model.window)})"
    )
    out.print(f"model written to {out_path}")


def _plan_only_options(**given) -> None:
    """Refuse single-analysis options in a plan run (each analysis sets its own)."""
    named = {"horizon": "--horizon", "window": "--from/--to"}
    used = [named[k] for k, v in given.items() if v not in (None, (None, None))]
    if used:
        err.print(
            f"error: {' and '.join(used)} apply to one analysis; a study plan sets the horizon "
            "and the windows of each analysis in the spec's [analyses] (or give --outcome, or "
            "a single --model file)",
            markup=False,
        )
        raise typer.Exit(2)


def _fit_plan(records: Path, spec_path: Path, folder: Path, cutoff, ties: str) -> None:
    from casemix.data.records import read_records
    from casemix.data.spec import load_spec
    from casemix.model.plan import fit_plan, plan_of

    with _guarded():
        spec = load_spec(spec_path)
        plan = plan_of(spec)
        distinct = {(a.outcome, a.horizon_days, a.reference_window) for a in plan}
        with _steps(len(distinct) + 2) as step:
            data = read_records(records, spec, cutoff=cutoff)
            step("reading records")
            models = fit_plan(data, spec, cutoff=cutoff, ties=ties, progress=step).save(folder)
            step("saved")
    _plan_fit_summary(models, data)


def _plan_fit_summary(models, data) -> None:
    out.print(f"{plural(data.n_read, 'record')} read, {len(data.exclusions)} excluded by the "
              "record checks", markup=False)
    shown = set()
    for name, model in models.models.items():
        file = models.files[name]
        fit_ = model.fit
        again = " (shared)" if file in shown else ""
        shown.add(file)
        out.print(
            f"{name}: {model.outcome} at {model.horizon_days} days, reference "
            f"{_window_words(model.window)}, {plural(fit_.n, 'recipient')}, "
            f"{plural(fit_.n_events, 'event')}, concordance {model.concordance:.3f} -> "
            f"{file}{again}",
            markup=False,
        )
    out.print(f"models and index.json written to {models.folder}")


def _window_words(window) -> str:
    start, end = (None if d is None else str(d) for d in window)
    return f"{start or 'any'} to {end or 'any'}"


@app.command()
def evaluate(
    records: ExistingFile,
    model: Annotated[
        Path, typer.Option("--model", exists=True,
                           help="Reference model (.json), or a folder of models written by "
                                "`casemix fit` for the study plan: every analysis is run.")
    ],
    out_dir: OutDirOption,
    rules: Annotated[
        Path | None,
        typer.Option("--rules", exists=True, dir_okay=False, help="Verdict rules (TOML)."),
    ] = None,
    prior: Annotated[
        str,
        typer.Option(
            "--prior",
            help="rules (default: the rules file's [prior], else hierarchical with mean 1), "
            "hier, hier-free, eb, eb-free (plug-in empirical Bayes), or fixed:SHAPE,RATE.",
        ),
    ] = "rules",
    cutoff: CutoffOption = None,
    window_from: FromOption = None,
    window_to: ToOption = None,
    report: Annotated[
        bool, typer.Option("--report/--no-report",
                           help="Also write report.html (a study plan: the study report, "
                                "report/index.html).")
    ] = True,
) -> None:
    """Evaluate every program of a cohort against a reference model; write the evaluation files.

    Outcome and horizon come from the model file. With a folder of models (`casemix fit`
    without --outcome), every analysis of the study plan is evaluated with its own cohort
    window: the --out folder gets one sub-folder per analysis in the same format, plus
    overview.csv (one row per program and analysis), recipients.csv and study.json.

    Example: casemix evaluate cohort.csv --model model.json --rules rules.toml
    --cutoff 2025-06-30 --out results

    Example: casemix evaluate cohort.csv --model models --rules rules.toml
    --cutoff 2025-06-30 --out study
    """
    from casemix.evaluation.evaluate import evaluate as run_evaluation

    cut = _date(cutoff, "--cutoff")
    window = (_date(window_from, "--from"), _date(window_to, "--to"))
    chosen = _prior(prior)
    if model.is_dir():
        _plan_only_options(window=window)
        study = _evaluate_plan(records, model, rules, chosen, cut, out_dir, report)
        _plan_summary(study, out_dir, report)
        return
    with _guarded(), _steps(2 + report) as step:
        step("evaluating programs")
        result = run_evaluation(
            records,
            model,
            rules,
            **_prior_options(chosen),
            cutoff=cut,
            window=None if window == (None, None) else window,
        )
        step("writing files")
        result.save(out_dir)
        if report:
            step("writing the report")
            _write_report(out_dir)
        step("done")
    _summary(result, out_dir, report)


def _prior_options(chosen) -> dict:
    """``prior``, ``prior_method`` and ``free_mean`` of evaluate from a parsed --prior."""
    pair = isinstance(chosen, tuple)
    return {"prior": None if chosen is None or pair else chosen,
            "prior_method": chosen[0] if pair else None,
            "free_mean": chosen[1] if pair else None}


def _evaluate_plan(records, models_folder: Path, rules, chosen, cutoff, out_dir: Path,
                   report: bool):
    from casemix.evaluation.study import evaluate_plan
    from casemix.model.plan import PlanModels

    with _guarded():
        models = PlanModels.load(models_folder)
        with _steps(len(models) + report + 2) as step:
            options = _prior_options(chosen)
            study = evaluate_plan(records, models, rules, options.pop("prior"), cutoff=cutoff,
                                  progress=step, **options)
            step("writing files")
            study.save(out_dir)
            if report:
                step("writing the study report")
                _write_study_report(study, out_dir)
            step("done")
    return study


def _plan_summary(study, folder: Path, report: bool) -> None:
    """Per analysis: what was evaluated, then the programs given a verdict other than consistent
    (the whole table, one row per program and analysis, is overview.csv)."""
    for name in study:
        evaluation = study[name]
        entry, counts = evaluation.run["analysis"], evaluation.run["counts"]
        start, end = entry["cohort_window"]
        out.print(
            f"{name}: {entry['outcome'].replace('_', ' ')} within {entry['horizon_days']} days,"
            f" cohort {start} to {end}, {plural(counts['kept'], 'recipient')}; reference "
            f"{_window_words(entry['reference_window'])}"
            + (" (overlaps the cohort window)" if entry["reference_overlaps_cohort"] else ""),
            markup=False,
        )
        programs = evaluation.programs
        for verdict in ("excess", "favorable", "too_little_data"):
            rows = programs[programs["verdict"] == verdict]
            if len(rows):
                listed = ", ".join(f"{r.program} (HR {r.hr_mean:.2f})"
                                   for r in rows.itertuples(index=False))
                out.print(f"  {verdict.replace('_', ' ')}: {listed}", markup=False)
    out.print(
        "A statistical indicator, not a finding about quality of care; small programs are "
        "uncertain; decisions belong to clinical review."
    )
    out.print(f"study written to {folder}: one folder per analysis, overview.csv (every "
              "program and analysis), recipients.csv (cohort membership)")
    if report:
        out.print(f"study report: {_study_report_index(folder)}", markup=False)


def _study_report_index(folder: Path) -> Path:
    from casemix.evaluation.study import REPORT_FOLDER
    from casemix.report.study import INDEX_PAGE

    return folder / REPORT_FOLDER / INDEX_PAGE


def _write_study_report(study, folder: Path, out_folder: Path | None = None) -> Path:
    """The study report (index, network and program pages), by default in FOLDER/report."""
    from casemix.evaluation.study import REPORT_FOLDER
    from casemix.report.study import write_study_report

    return write_study_report(study, folder / REPORT_FOLDER if out_folder is None
                              else out_folder)


def _write_report(folder: Path, out_file: Path | None = None, suppress_below=None, audit=None):
    from casemix.report import write_report

    return write_report(folder, out_file, suppress_below=suppress_below, audit_folder=audit)


_SOURCES = {
    "cutoff": {"given": "--cutoff", "records": "the records", "spec": "the [analysis] "
               "cutoff of the spec stored in the model"},
    "window": {"given": "--from/--to", "spec": "the [analysis] cohort_from/cohort_to of the "
               "spec stored in the model", "none": "no window given: every transplant"},
}


def _counts(result, given: str | None = None) -> None:
    """Print where the cut-off and window came from, and what happened to every record.

    ``given`` names who gave a cut-off or window that was passed in (default: the options).
    """
    run = result.run
    sources = run.get("provenance", {})
    start, end = run["window"]

    def source(key: str) -> str:
        if given is not None and sources.get(key) == "given":
            return given
        return _SOURCES[key].get(sources.get(key), "?")

    out.print(
        f"cut-off {run['cutoff']} (from {source('cutoff')}); "
        f"window {start or 'any'} to {end or 'any'} (from {source('window')})",
        markup=False,
    )
    counts = run["counts"]
    out.print(
        f"{counts['read']} records read: {counts['kept']} kept, {counts['excluded']} excluded "
        f"(exclusions.csv), {counts['corrected']} kept with a correction (corrections.csv)",
        markup=False,
    )


def _summary(result, folder: Path, report: bool, given: str | None = None) -> None:
    _counts(result, given)
    programs = result.programs
    level = f"{100 * result.rules.credible_level:g}%"
    from rich.table import Table

    table = Table(title="Programs (HR: shrunken hazard ratio)", title_justify="left", box=None)
    for name, justify in [
        ("program", "left"),
        ("recipients", "right"),
        ("O", "right"),
        ("E", "right"),
        ("O/E", "right"),
        ("HR", "right"),
        (f"{level} credible", "right"),
        ("verdict", "left"),
    ]:
        table.add_column(name, justify=justify, no_wrap=True)
    for row in programs.itertuples(index=False):
        table.add_row(
            str(row.program),
            str(row.recipients),
            str(row.observed),
            f"{row.expected:.1f}",
            f"{row.oe_ratio:.2f}",
            f"{row.hr_mean:.2f}",
            f"{row.hr_lower:.2f} to {row.hr_upper:.2f}",
            str(row.verdict).replace("_", " "),
        )
    out.print(table)
    out.print(
        "A statistical indicator, not a finding about quality of care; small programs are "
        "uncertain; decisions belong to clinical review."
    )
    out.print(f"evaluation files written to {folder}")
    if report:
        out.print(f"report: {folder / 'report.html'}")


@app.command()
def report(
    folder: Annotated[
        Path, typer.Argument(exists=True, file_okay=False,
                             help="Evaluation folder, or a study folder (with study.json).",
                             metavar="FOLDER")
    ],
    out_file: Annotated[
        Path | None,
        typer.Option("--out", help="Report file (.html); with --suppress-below, the public "
                                   "release folder (default FOLDER/public); for a study, "
                                   "the report folder (default FOLDER/report)."),
    ] = None,
    suppress_below: Annotated[
        int | None,
        typer.Option("--suppress-below", min=2,
                     help="Write a public release: counts from 1 to N-1 hidden, with every "
                          "figure that gives them back. N is your choice: values around 10-11 "
                          "are common practice (no source); the disclosure rules that apply "
                          "to your data come first."),
    ] = None,
    audit: Annotated[
        Path | None,
        typer.Option("--audit", exists=True, file_okay=False, help="Audit folder to include."),
    ] = None,
) -> None:
    """Write the self-contained HTML report of an evaluation folder.

    With --suppress-below N, write a public release instead, to its own folder (FOLDER/public
    or --out): tables, run.json and report.html in which counts from 1 to N-1 and every
    figure from which they could be worked out are withheld or coarsened (docs/disclosure.md).
    The internal files and report are not touched.

    For a study folder (`casemix evaluate --model MODELS_FOLDER`), write the study report:
    FOLDER/report/index.html, network.html (every program in every analysis) and a page per
    program in programs/. --suppress-below and --audit are refused there.

    Example: casemix report results --suppress-below 11

    Example: casemix report study
    """
    if (folder / "study.json").is_file():
        _study_report(folder, out_file, suppress_below, audit)
        return
    with _guarded():
        if suppress_below is None:
            path = _write_report(folder, out_file, None, audit)
        else:
            from casemix.report import write_public_release

            if audit is not None:
                err.print("error: --audit is not part of a public release; leave it out with "
                          "--suppress-below", markup=False)
                raise typer.Exit(2)
            public = write_public_release(folder, suppress_below, out_file)
            out.print(f"public release (counts under {suppress_below} hidden, figures that "
                      f"give them back withheld): {public}")
            path = public / "report.html"
    out.print(f"report: {path}")


def _study_report(folder: Path, out_folder: Path | None, suppress_below, audit) -> None:
    """`casemix report` on a study folder: load the Study, write its pages."""
    if audit is not None:
        err.print("error: --audit belongs to one evaluation; pass an analysis folder of the "
                  f"study (for example {folder / 'graft_1y'}) with --audit", markup=False)
        raise typer.Exit(2)
    if suppress_below is not None:
        err.print("error: --suppress-below is not available for a study report yet: its "
                  "pages would show counts the disclosure rule hides. Write the public release "
                  f"of each analysis instead: casemix report {folder / 'ANALYSIS'} "
                  f"--suppress-below {suppress_below}", markup=False)
        raise typer.Exit(2)
    from casemix.evaluation.study import Study

    with _guarded():
        index = _write_study_report(Study.load(folder), folder, out_folder)
    out.print(f"study report: {index}", markup=False)


@app.command()
def audit(
    reference_records: ExistingFile,
    model: ModelOption,
    out_dir: OutDirOption,
    cohort: Annotated[
        Path | None,
        typer.Option("--cohort", exists=True, dir_okay=False, help="Evaluation cohort records."),
    ] = None,
    bootstrap: Annotated[
        int, typer.Option("--bootstrap", min=2, help="Bootstrap refits (at least 2).")
    ] = 200,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Random seed.")] = 0,
    cutoff: Annotated[
        str | None, typer.Option("--cutoff", help="Cut-off of the cohort records (YYYY-MM-DD).")
    ] = None,
    window_from: FromOption = None,
    window_to: ToOption = None,
    evaluation: Annotated[
        Path | None,
        typer.Option(
            "--evaluation", exists=True, file_okay=False,
            help="Evaluation folder of this cohort: its model, rules, prior and dates are used.",
        ),
    ] = None,
    rules: Annotated[
        Path | None,
        typer.Option("--rules", exists=True, dir_okay=False, help="Verdict rules (TOML)."),
    ] = None,
    prior: Annotated[
        str | None, typer.Option("--prior", help="eb (default), eb-free, or fixed:SHAPE,RATE.")
    ] = None,
    workers: Annotated[
        int, typer.Option("--workers", min=1, help="Local worker processes for the refits.")
    ] = 2,
    scheduler: Annotated[
        str | None,
        typer.Option(
            "--scheduler",
            envvar="CASEMIX_SCHEDULER",
            help="Address of a Dask scheduler to run the refits on (needs casemix[cluster]).",
        ),
    ] = None,
) -> None:
    """Run the statistician's checks of a reference model (and of an evaluation, with --cohort).

    With --evaluation the audit evaluates the cohort exactly as that evaluation did and
    checks that every verdict agrees; otherwise give the same --rules and --prior.

    Example: casemix audit reference.csv --model model.json --cohort cohort.csv
    --evaluation results --out audit
    """
    from casemix.audit import run_audit
    from casemix.data.records import read_records
    from casemix.model.reference import ReferenceModel

    cut = _date(cutoff, "--cutoff")
    window = (_date(window_from, "--from"), _date(window_to, "--to"))
    chosen = None if prior is None else _prior(prior)
    with _guarded():
        reference = ReferenceModel.load(model)
        ref_records = read_records(reference_records, reference.spec, cutoff=reference.cutoff)
        result = run_audit(
            ref_records,
            reference,
            cohort,
            bootstrap=bootstrap,
            seed=seed,
            workers=workers,
            scheduler=scheduler,
            progress=err.is_terminal,
            cutoff=cut,
            window=None if window == (None, None) else window,
            rules=rules,
            prior=None if chosen in (None, "free") else chosen,
            free_mean=chosen == "free",
            evaluation=evaluation,
        )
        result.save(out_dir)
    for finding in result.findings:
        out.print(f"- {finding}", markup=False)
    out.print(f"audit written to {out_dir}")


@app.command()
def monitor(
    records: ExistingFile,
    model: ModelOption,
    start: Annotated[
        str, typer.Option("--from", help="First day of monitoring (YYYY-MM-DD).")
    ],
    out_dir: OutDirOption,
    cutoff: CutoffOption = None,
    rules: Annotated[
        Path | None,
        typer.Option("--rules", exists=True, dir_okay=False,
                     help="Rules file; its [monitoring] table sets rho, level, limits."),
    ] = None,
) -> None:
    """Monitor every program between evaluations: CUSUM charts and observed minus expected.

    Follows the recipients transplanted from --from to the cut-off day by day against the
    reference model; writes monitoring_state.csv, monitoring_signals.csv,
    monitoring_series.csv, monitoring.json and monitoring.html into the folder.

    Example: casemix monitor cohort.csv --model model.json --from 2024-01-01
    --cutoff 2025-06-30 --out monitoring
    """
    with _guarded(), _steps(2) as step:
        step("simulating control limits")
        result = _monitor_files(records, model, _date(start, "--from"),
                                _date(cutoff, "--cutoff"), rules, out_dir)
        step("done")
    _monitor_summary(result, out_dir)


def _monitor_files(records, model, start, cutoff, rules, out_dir: Path):
    from casemix.monitoring import monitor as run_monitoring
    from casemix.report.monitoring import write_monitoring_page

    result = run_monitoring(records, model, start, cutoff, rules)
    result.save(out_dir)
    write_monitoring_page(result, out_dir / "monitoring.html")
    return result


def _monitor_summary(result, folder: Path) -> None:
    state = result.state
    signalled = state[state["signalled"]]
    out.print(f"{state['program'].nunique()} programs monitored from {result.run['start']} to "
              f"{result.run['cutoff']}; {len(signalled)} of {len(state)} charts signalled")
    for row in signalled.itertuples(index=False):
        word = "raised" if row.chart == "upper" else "lowered"
        out.print(f"- {row.program}: {word}-hazard chart signalled on {row.signal_dates} "
                  f"(observed {row.observed}, expected {row.expected:.1f} since the start)")
    out.print("A signal is a prompt to look closer, not a finding about quality of care; "
              "decisions belong to clinical review.")
    out.print(f"monitoring: {folder / 'monitoring.html'}")


@app.command()
def demo(
    out_dir: Annotated[
        Path, typer.Option("--out", file_okay=False, help="Folder for every demo file.")
    ] = Path("demo_out"),
    seed: Annotated[int, typer.Option("--seed", min=0, help="Seed of the invented data.")] = 2026,
) -> None:
    """Run the whole job on the invented Lorran Valley demo network.

    Writes reference.csv, cohort.csv, spec.toml, rules.toml, model.json and the evaluation
    files of one-year graft failure with report.html into the folder, then the monitoring
    files (monitoring_*.csv, monitoring.json, monitoring.html), then the study plan of the
    spec (graft failure and death at 30, 365 and 1095 days): its models in models/ and its
    evaluation in study/ (one folder per analysis, overview.csv); prints a summary.

    Example: casemix demo --out demo_out
    """
    from casemix import demo as scenario
    from casemix.data.spec import load_spec

    with _guarded():
        paths = scenario.write_demo(out_dir, seed=seed)
        plan = load_spec(paths["spec"]).analyses
        fits = {(a.outcome, a.horizon_days, a.reference_window) for a in plan.values()}
        with _steps(8 + len(fits) + len(plan)) as step:
            result, monitoring, study = _demo_steps(paths, out_dir, step)
    out.print(
        "Lorran Valley Transplant Network (invented data): graft failure within 365 days, "
        f"{plural(result.run['counts']['kept'], 'cohort recipient')} in "
        f"{plural(len(result.programs), 'program')}"
    )
    _summary(result, out_dir, True, given="the demo scenario")
    _monitor_summary(monitoring, out_dir)
    out.print(f"The study plan of {out_dir / 'spec.toml'}: every analysis, models in "
              f"{out_dir / 'models'}", markup=False)
    _plan_summary(study, out_dir / "study", True)


def _demo_steps(paths: dict, out_dir: Path, step: Callable[[str], None]):
    """The demo's work: the one-year graft-failure evaluation, monitoring, the study plan."""
    from casemix import demo as scenario
    from casemix.data.records import read_records
    from casemix.evaluation.evaluate import evaluate as run_evaluation
    from casemix.evaluation.study import evaluate_plan
    from casemix.model.plan import fit_plan
    from casemix.model.reference import fit_reference

    step("fitting the reference model")
    reference = read_records(paths["reference"], paths["spec"], cutoff=scenario.REFERENCE_CUTOFF)
    model = fit_reference(reference, reference.spec, "graft_failure", 365,
                          scenario.REFERENCE_CUTOFF, window=scenario.REFERENCE_WINDOW)
    model.save(out_dir / "model.json")
    step("evaluating programs")
    cohort = read_records(paths["cohort"], paths["spec"], cutoff=scenario.COHORT_CUTOFF)
    result = run_evaluation(cohort, out_dir / "model.json", paths["rules"],
                            cutoff=scenario.COHORT_CUTOFF, window=scenario.COHORT_WINDOW)
    step("writing files")
    result.save(out_dir)
    step("writing the report")
    _write_report(out_dir)
    step("monitoring programs")
    monitoring = _monitor_files(cohort, out_dir / "model.json", scenario.COHORT_WINDOW[0],
                                scenario.COHORT_CUTOFF, paths["rules"], out_dir)
    models = fit_plan(reference, cutoff=scenario.REFERENCE_CUTOFF, progress=step)
    models = models.save(out_dir / "models")
    study = evaluate_plan(cohort, models, paths["rules"], cutoff=scenario.COHORT_CUTOFF,
                          progress=step)
    step("writing the study")
    study.save(out_dir / "study")
    step("writing the study report")
    _write_study_report(study, out_dir / "study")
    step("done")
    return result, monitoring, study


def main() -> None:
    """Entry point of the ``casemix`` console script."""
    app(prog_name="casemix")


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
