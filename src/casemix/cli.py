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
from typing import Annotated

import pandas as pd
import typer
from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

import casemix
from casemix.errors import CasemixError, CasemixWarning

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


def _prior(value: str):
    """Parse --prior: 'eb' (mean fixed at 1), 'eb-free' (free mean) or 'fixed:SHAPE,RATE'."""
    from casemix.stats.shrinkage import fixed_prior

    if value == "eb":
        return None
    if value == "eb-free":
        return "free"
    if value.startswith("fixed:"):
        try:
            shape, rate = (float(part) for part in value[len("fixed:") :].split(","))
            return fixed_prior(shape, rate)
        except (ValueError, CasemixError):
            pass
    err.print(
        f"error: --prior {value!r} is not understood; use eb, eb-free or fixed:SHAPE,RATE "
        "(e.g. fixed:2,2)",
        markup=False,
    )
    raise typer.Exit(2)


ExistingFile = Annotated[Path, typer.Argument(exists=True, dir_okay=False, readable=True)]
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
) -> None:
    """Validate an extract: what would be excluded and why, per reason and per program.

    Exit code 0 when the extract is usable, 1 when it is not (missing columns, duplicate
    recipient ids, unreadable file).

    Example: casemix check cohort.csv --spec spec.toml --cutoff 2025-06-30
    """
    from casemix.data.records import read_records

    with _guarded():
        result = read_records(records, spec, cutoff=_date(cutoff, "--cutoff"))
    out.print(
        f"{records}: {result.n_read} records read, {len(result.frame)} kept, "
        f"{len(result.exclusions)} excluded"
    )
    if len(result.exclusions):
        _print_counts("Excluded, by reason", _reason_counts(result.exclusions), "reason")
        shown = result.exclusions[["row", "recipient", "reason"]].head(CHECK_LISTED)
        title = "Excluded records" + (
            f" (first {CHECK_LISTED} of {len(result.exclusions)})"
            if len(result.exclusions) > CHECK_LISTED
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
    if len(result.warnings):
        _print_counts("Kept with a correction", result.warnings, "program")
    out.print("The extract is usable.")


def _reason_counts(exclusions: pd.DataFrame) -> pd.DataFrame:
    kinds = exclusions["kind"].str.split("; ").explode()
    return kinds.value_counts().rename_axis("reason").rename("records").reset_index()


def _print_counts(title: str, frame: pd.DataFrame, key: str) -> None:
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
    outcome: Annotated[str, typer.Option("--outcome", help="An outcome named in the spec.")],
    horizon: Annotated[int, typer.Option("--horizon", min=1, help="Horizon in days.")],
    out_path: Annotated[Path, typer.Option("--out", dir_okay=False, help="Model file (.json).")],
    cutoff: CutoffOption = None,
    window_from: FromOption = None,
    window_to: ToOption = None,
    ties: Annotated[
        Ties, typer.Option("--ties", help="Handling of tied event times.")
    ] = Ties.efron,
) -> None:
    """Fit a reference model on a reference population and save it as JSON.

    Example: casemix fit reference.csv --spec spec.toml --outcome graft_failure
    --horizon 365 --cutoff 2022-12-31 --out model.json
    """
    from casemix.data.records import read_records
    from casemix.model.reference import fit_reference

    cut = _date(cutoff, "--cutoff")
    window = (_date(window_from, "--from"), _date(window_to, "--to"))
    with _guarded(), _steps(2) as step:
        data = read_records(records, spec, cutoff=cut)
        step("fitting the reference model")
        model = fit_reference(data, data.spec, outcome, horizon, cut, ties.value, window)
        model.save(out_path)
        step("saved")
    fit_ = model.fit
    out.print(
        f"fitted {outcome} at {horizon} days on {fit_.n} recipients with {fit_.n_events} events "
        f"({len(fit_.names)} terms, concordance {model.concordance:.3f}); "
        f"{len(data.exclusions)} records excluded"
    )
    out.print(f"model written to {out_path}")


@app.command()
def evaluate(
    records: ExistingFile,
    model: ModelOption,
    out_dir: OutDirOption,
    rules: Annotated[
        Path | None,
        typer.Option("--rules", exists=True, dir_okay=False, help="Verdict rules (TOML)."),
    ] = None,
    prior: Annotated[
        str, typer.Option("--prior", help="eb (default), eb-free, or fixed:SHAPE,RATE.")
    ] = "eb",
    cutoff: CutoffOption = None,
    window_from: FromOption = None,
    window_to: ToOption = None,
    report: Annotated[
        bool, typer.Option("--report/--no-report", help="Also write report.html.")
    ] = True,
) -> None:
    """Evaluate every program of a cohort against a reference model; write the evaluation files.

    Outcome and horizon come from the model file.

    Example: casemix evaluate cohort.csv --model model.json --rules rules.toml
    --cutoff 2025-06-30 --out results
    """
    from casemix.evaluation.evaluate import evaluate as run_evaluation

    cut = _date(cutoff, "--cutoff")
    window = (_date(window_from, "--from"), _date(window_to, "--to"))
    chosen = _prior(prior)
    with _guarded(), _steps(2 + report) as step:
        step("evaluating programs")
        result = run_evaluation(
            records,
            model,
            rules,
            prior=None if chosen == "free" else chosen,
            free_mean=chosen == "free",
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


def _write_report(folder: Path, out_file: Path | None = None, suppress_below=None, audit=None):
    from casemix.report import write_report

    return write_report(folder, out_file, suppress_below=suppress_below, audit_folder=audit)


def _summary(result, folder: Path, report: bool) -> None:
    programs = result.programs
    level = f"{100 * result.rules.credible_level:g}%"
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
        Path, typer.Argument(exists=True, file_okay=False, help="Evaluation folder.")
    ],
    out_file: Annotated[
        Path | None,
        typer.Option("--out", help="Report file (.html); with --suppress-below, the public "
                                   "release folder (default FOLDER/public)."),
    ] = None,
    suppress_below: Annotated[
        int | None,
        typer.Option("--suppress-below", min=2,
                     help="Write a public release: counts from 1 to N-1 hidden, with every "
                          "figure that gives them back."),
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

    Example: casemix report results --suppress-below 11
    """
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


@app.command()
def audit(
    reference_records: ExistingFile,
    model: ModelOption,
    out_dir: OutDirOption,
    cohort: Annotated[
        Path | None,
        typer.Option("--cohort", exists=True, dir_okay=False, help="Evaluation cohort records."),
    ] = None,
    bootstrap: Annotated[int, typer.Option("--bootstrap", min=0, help="Bootstrap refits.")] = 200,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Random seed.")] = 0,
    cutoff: Annotated[
        str | None, typer.Option("--cutoff", help="Cut-off of the cohort records (YYYY-MM-DD).")
    ] = None,
    window_from: FromOption = None,
    window_to: ToOption = None,
) -> None:
    """Run the statistician's checks of a reference model (and of an evaluation, with --cohort).

    Example: casemix audit reference.csv --model model.json --cohort cohort.csv
    --cutoff 2025-06-30 --out audit
    """
    from casemix.audit import run_audit
    from casemix.data.records import read_records
    from casemix.model.reference import ReferenceModel

    cut = _date(cutoff, "--cutoff")
    window = (_date(window_from, "--from"), _date(window_to, "--to"))
    with _guarded():
        reference = ReferenceModel.load(model)
        ref_records = read_records(reference_records, reference.spec, cutoff=reference.cutoff)
        cohort_records = (
            None if cohort is None else read_records(cohort, reference.spec, cutoff=cut)
        )
        result = run_audit(
            ref_records,
            reference,
            cohort_records,
            bootstrap=bootstrap,
            seed=seed,
            progress=err.is_terminal,
            cutoff=cut,
            window=None if window == (None, None) else window,
        )
        result.save(out_dir)
    for finding in result.findings:
        out.print(f"- {finding}", markup=False)
    out.print(f"audit written to {out_dir}")


@app.command()
def demo(
    out_dir: Annotated[
        Path, typer.Option("--out", file_okay=False, help="Folder for every demo file.")
    ] = Path("demo_out"),
    seed: Annotated[int, typer.Option("--seed", min=0, help="Seed of the invented data.")] = 2026,
) -> None:
    """Run the whole job on the invented Lorran Valley demo network.

    Writes reference.csv, cohort.csv, spec.toml, rules.toml, model.json and the evaluation
    files with report.html into the folder, and prints a summary.

    Example: casemix demo --out demo_out
    """
    from casemix import demo as scenario
    from casemix.data.records import read_records
    from casemix.evaluation.evaluate import evaluate as run_evaluation
    from casemix.model.reference import fit_reference

    with _guarded(), _steps(5) as step:
        paths = scenario.write_demo(out_dir, seed=seed)
        step("fitting the reference model")
        reference = read_records(
            paths["reference"], paths["spec"], cutoff=scenario.REFERENCE_CUTOFF
        )
        model = fit_reference(
            reference,
            reference.spec,
            "graft_failure",
            365,
            scenario.REFERENCE_CUTOFF,
            window=scenario.REFERENCE_WINDOW,
        )
        model.save(out_dir / "model.json")
        step("evaluating programs")
        cohort = read_records(paths["cohort"], paths["spec"], cutoff=scenario.COHORT_CUTOFF)
        result = run_evaluation(
            cohort,
            out_dir / "model.json",
            paths["rules"],
            cutoff=scenario.COHORT_CUTOFF,
            window=scenario.COHORT_WINDOW,
        )
        step("writing files")
        result.save(out_dir)
        step("writing the report")
        _write_report(out_dir)
        step("done")
    out.print(
        "Lorran Valley Transplant Network (invented data): graft failure within 365 days, "
        f"{len(cohort.frame)} cohort recipients in {len(result.programs)} programs"
    )
    _summary(result, out_dir, True)


def main() -> None:
    """Entry point of the ``casemix`` console script."""
    app(prog_name="casemix")


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
