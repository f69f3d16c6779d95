"""Tests of the ``casemix`` command line, run in-process with typer's CliRunner.

The command line computes nothing itself, so most tests check behaviour: exit codes (0
success, 1 bad input, 2 usage), the files written, and that bad input gives a message naming
the file, column or rows and the fix, never a traceback. Expected counts come from the demo
generator's own record of what it planted (``casemix.demo.generate().planted``: a simulation
with a known truth), the demo's hazard ratios are checked against the generator's true ones,
and the posterior of a fixed prior against scipy.stats.gamma.
"""

from __future__ import annotations

import importlib.metadata
import json
import os
import re
import shutil
import subprocess
import sys
import traceback
from html.parser import HTMLParser
from pathlib import Path

import pandas as pd
import pytest
from scipy import stats
from typer.testing import CliRunner, Result

from casemix import demo
from casemix.cli import app

# Wide enough that rich does not wrap the count tables (the parser below copes if it does).
runner = CliRunner(env={"COLUMNS": "200", "NO_COLOR": "1"})
PROGRAMS = [f"LV{i:02d}" for i in range(1, 17)]
DEMO_FILES = [
    "reference.csv", "cohort.csv", "spec.toml", "rules.toml", "model.json",
    "programs.csv", "recipients.csv", "exclusions.csv", "run.json", "report.html",
    "monitoring_state.csv", "monitoring_signals.csv", "monitoring_series.csv",
    "monitoring.json", "monitoring.html",
]
EVALUATION_FILES = ["programs.csv", "recipients.csv", "exclusions.csv", "run.json"]
PLAN = ["graft_30d", "death_30d", "graft_1y", "death_1y", "graft_3y", "death_3y"]
COMMANDS = ["demo", "check", "fit", "evaluate", "report", "audit", "monitor"]
REFERENCE_CUTOFF, COHORT_CUTOFF = "2022-12-31", "2025-06-30"
CHECK_SHOWN = 20  # excluded records `casemix check` prints (the rest go to --out)


def invoke(*args: object) -> Result:
    return runner.invoke(app, [str(a) for a in args])


def _uncaught(result: Result) -> str:
    """The traceback of an exception that escaped the command (empty when none did)."""
    exc = result.exception
    if exc is None or isinstance(exc, SystemExit):
        return ""
    return "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))


def assert_exit(result: Result, code: int, *patterns: str) -> None:
    """Exit code as given, no traceback for the user, and every pattern in the output."""
    escaped = _uncaught(result)
    assert not escaped, f"an exception reached the user:\n{escaped}"
    assert "Traceback" not in result.output
    assert result.exit_code == code, result.output
    for pattern in patterns:
        assert re.search(pattern, result.output), f"{pattern!r} not in:\n{result.output}"


def count_table(text: str, title: str) -> dict[str, int]:
    """The rows of a two-column count table printed under ``title``: key -> count."""
    lines = text.splitlines()
    start = next(i for i, line in enumerate(lines) if line.strip() == title)
    rows: list[list[str]] = []
    for line in lines[start + 1 :]:
        stripped = line.strip()
        if stripped[:1] in ("└", "+") or not stripped:
            break
        if stripped[:1] not in ("│", "|"):
            continue  # top border, header rule
        cells = [cell.strip() for cell in re.split(r"[│|]", stripped)[1:-1]]
        if rows and not cells[-1]:  # a wrapped cell continues the row above
            rows[-1][0] += " " + cells[0]
        else:
            rows.append(cells)
    return {key: int(count) for key, count in rows if count.isdigit()}


class _Rows(HTMLParser):
    """The text of every table row of an HTML page, one list of cell texts per row."""

    def __init__(self) -> None:
        super().__init__()
        self.rows: list[list[str]] = []
        self._cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        if tag == "tr":
            self.rows.append([])
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None and self.rows:
            self.rows[-1].append("".join(self._cell).strip())
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def html_rows(path: Path) -> list[list[str]]:
    parser = _Rows()
    parser.feed(path.read_text(encoding="utf-8"))
    return parser.rows


@pytest.fixture(scope="module")
def network() -> demo.DemoNetwork:
    return demo.generate()  # the same default seed as `casemix demo`


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory) -> tuple[Path, Result]:
    folder = tmp_path_factory.mktemp("cli") / "demo_out"
    return folder, invoke("demo", "--out", folder)


@pytest.fixture(scope="module")
def demo_dir(demo_run) -> Path:
    folder, result = demo_run
    assert_exit(result, 0)
    return folder


@pytest.fixture(scope="module")
def evaluation_dir(demo_dir, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("cli") / "results"
    result = invoke(
        "evaluate", demo_dir / "cohort.csv", "--model", demo_dir / "model.json",
        "--rules", demo_dir / "rules.toml", "--cutoff", COHORT_CUTOFF, "--no-report",
        "--out", out,
    )
    assert_exit(result, 0)
    return out


def _extract(demo_dir: Path, folder: Path, name: str, edit=None, rows: int = 120) -> Path:
    """The first ``rows`` records of the demo cohort (none of them planted), optionally edited."""
    frame = pd.read_csv(demo_dir / "cohort.csv", dtype=str, keep_default_na=False).head(rows)
    if edit is not None:
        frame = edit(frame)
    path = folder / name
    frame.to_csv(path, index=False, lineterminator="\n")
    return path


# --- demo -------------------------------------------------------------------------------


def test_demo_writes_its_files_flat_and_the_study_plan_in_two_folders(demo_dir, demo_run):
    for name in DEMO_FILES:
        assert (demo_dir / name).is_file(), name
    assert sorted(p.name for p in demo_dir.iterdir() if p.is_dir()) == ["models", "study"]
    assert (demo_dir / "models" / "index.json").is_file()
    for name in PLAN:
        assert (demo_dir / "study" / name / "programs.csv").is_file(), name
    assert (demo_dir / "study" / "overview.csv").is_file()
    output = demo_run[1].output
    for code in PROGRAMS:
        assert code in output
    assert f"report: {demo_dir / 'report.html'}" in output
    assert f"study report: {demo_dir / 'study' / 'report' / 'index.html'}" in output
    pages = demo_dir / "study" / "report"
    assert (pages / "network.html").is_file() and len(list((pages / "programs").iterdir())) == 16
    assert "not a finding about quality of care" in output
    # not a terminal: the progress bar stays quiet
    assert "fitting the reference model" not in output
    assert "graft_3y: graft failure within 1095 days, cohort 2022-01-01 to 2022-12-31" in output


def test_demo_plan_one_year_graft_failure_is_the_flat_analysis(demo_dir):
    flat = (demo_dir / "programs.csv").read_bytes()
    assert (demo_dir / "study" / "graft_1y" / "programs.csv").read_bytes() == flat


def test_demo_recovers_the_true_hazard_ratios(demo_dir, network):
    programs = pd.read_csv(demo_dir / "programs.csv").merge(network.truth, on="program")
    assert sorted(programs["program"]) == PROGRAMS
    inside = programs["hr_lower"].le(programs["true_hr"]) & programs["true_hr"].le(
        programs["hr_upper"]
    )
    # Rule: at least 13 of the 16 true hazard ratios inside their 95% credible intervals.
    # Were the intervals exact, P(12 or fewer inside) = binom.cdf(12, 16, 0.95) = 0.0070
    # (scipy.stats.binom 1.17), so 13 is a fair bar for one fixed seed.
    assert inside.sum() >= 13, programs.loc[~inside, ["program", "true_hr", "hr_lower",
                                                       "hr_upper"]]


def test_demo_tells_the_stories_it_was_built_with(demo_dir):
    programs = pd.read_csv(demo_dir / "programs.csv").set_index("program")
    # Generator truth (casemix.demo): LV03 poor raw survival explained by case mix (HR 1.0),
    # LV04 clearly favorable (HR 0.6), LV05 easy case mix hiding an excess (HR 1.6).
    assert programs["observed_survival"].idxmin() == "LV03"
    assert programs.loc["LV03", "verdict"] == "consistent"
    assert programs.loc["LV04", "verdict"] == "favorable"
    assert programs.loc["LV05", "verdict"] == "excess"


def test_demo_report_and_run_show_the_planted_corrections(demo_dir, demo_run, network):
    planted = network.planted[(network.planted["role"] == "cohort")
                              & (network.planted["handling"] == "kept, warned")]
    programs = network.cohort.set_index("recipient_id").loc[planted["recipient_id"], "program"]
    run = json.loads((demo_dir / "run.json").read_text(encoding="utf-8"))
    assert run["counts"]["corrected"] == len(planted) == 4
    assert "4 kept with a correction (corrections.csv)" in demo_run[1].output
    rows = html_rows(demo_dir / "report.html")
    header = next(r for r in rows if "Records corrected" in r)
    total = header.index("Records corrected")
    body = rows[rows.index(header) + 1:]
    body = body[:next(i for i, r in enumerate(body) if r[0] not in PROGRAMS)]
    shown = {r[0]: int(r[total]) for r in body}
    assert shown == programs.value_counts().to_dict()


def test_demo_into_an_existing_file_is_a_usage_error(tmp_path):
    target = tmp_path / "taken"
    target.write_text("not a folder\n")
    assert_exit(invoke("demo", "--out", target), 2, "taken")


# --- check ------------------------------------------------------------------------------


def test_check_a_usable_extract_counts_exclusions_per_reason_and_program(demo_dir, network):
    result = invoke("check", demo_dir / "cohort.csv", "--spec", demo_dir / "spec.toml",
                    "--cutoff", COHORT_CUTOFF)
    assert_exit(result, 0, "The extract is usable")
    planted = network.planted[network.planted["role"] == "cohort"]
    excluded = planted[planted["handling"] == "excluded"]
    n_read = len(network.cohort)
    assert f"{n_read} records read, {n_read - len(excluded)} kept, {len(excluded)} excluded" in (
        result.output
    )
    by_reason = count_table(result.output, "Excluded, by reason")
    assert sum(by_reason.values()) == len(excluded)  # each planted record breaks one rule
    # counted by kind of reason (no record's own values), e.g. "missing program"
    for words in ("before the transplant date", "after the cut-off", "missing program",
                  "outside its plausible range"):
        assert any(words in reason for reason in by_reason), words
    # the generator's record of which program each excluded recipient belongs to
    programs = network.cohort.set_index("recipient_id").loc[excluded["recipient_id"], "program"]
    expected = programs.fillna("(missing)").value_counts().to_dict()
    assert count_table(result.output, "Excluded, by program") == expected


def test_check_reports_a_missing_column_with_the_file_and_a_fix(demo_dir, tmp_path):
    path = _extract(demo_dir, tmp_path, "no_donor_age.csv",
                    lambda f: f.drop(columns="donor_age"))
    result = invoke("check", path, "--spec", demo_dir / "spec.toml")
    assert_exit(result, 1, "no_donor_age.csv", "'donor_age'", "(?i)rename|closest")


def test_check_refuses_duplicate_recipient_ids(demo_dir, tmp_path):
    def duplicate(frame):
        return pd.concat([frame, frame.iloc[[5]]], ignore_index=True)

    path = _extract(demo_dir, tmp_path, "twice.csv", duplicate)
    twice = pd.read_csv(path, dtype=str)["recipient_id"].iloc[5]
    result = invoke("check", path, "--spec", demo_dir / "spec.toml")
    assert_exit(result, 1, "twice.csv", "recipient_id", twice, "more than once")


@pytest.mark.parametrize(
    ("name", "content", "pattern"),
    [
        ("latin1.csv", "recipient_id,program\nR1,Ch\xe2teau\n".encode("latin-1"), "UTF-8"),
        ("broken.parquet", b"PAR1 this is not parquet", "cannot be read"),
        ("nothing.csv", b"", "empty"),
        ("header_only.csv", None, "no data rows"),
    ],
    ids=["not-utf8", "corrupt-parquet", "zero-bytes", "header-only"],
)
def test_check_refuses_unreadable_and_empty_files(demo_dir, tmp_path, name, content, pattern):
    path = tmp_path / name
    if content is None:
        header = (demo_dir / "cohort.csv").read_text(encoding="utf-8").splitlines()[0]
        content = (header + "\n").encode()
    path.write_bytes(content)
    result = invoke("check", path, "--spec", demo_dir / "spec.toml")
    assert_exit(result, 1, re.escape(name), pattern)


def test_check_missing_file_is_a_usage_error_naming_it(demo_dir, tmp_path):
    result = invoke("check", tmp_path / "nowhere.csv", "--spec", demo_dir / "spec.toml")
    assert_exit(result, 2, "nowhere.csv", "does not exist")


def _setting(*cells: tuple[int, object, str]):
    """An edit for _extract that writes each (row, column(s), value) into a copy."""
    def edit(frame):
        frame = frame.copy()
        for row, column, value in cells:
            frame.loc[row, column] = value
        return frame

    return edit


def test_check_excludes_bad_dates_and_says_why(demo_dir, tmp_path):
    spoil = _setting((3, "transplant_date", "2023-02-30"), (7, "transplant_date", "next spring"))
    path = _extract(demo_dir, tmp_path, "dates.csv", spoil)
    result = invoke("check", path, "--spec", demo_dir / "spec.toml", "--cutoff", COHORT_CUTOFF)
    assert_exit(result, 0, "120 records read, 118 kept, 2 excluded",
                "'2023-02-30' is not a date", "'next spring' is not a date")


def test_check_without_a_cutoff_says_what_it_skipped_and_flags_future_dates(demo_dir, tmp_path):
    future = _setting((4, ["transplant_date", "last_seen_date"], "2099-03-01"))
    path = _extract(demo_dir, tmp_path, "future.csv", future)
    result = invoke("check", path, "--spec", demo_dir / "spec.toml")
    assert_exit(result, 0, "120 records read, 119 kept, 1 excluded",
                r"transplant_date 2099-03-01 is after today",
                r"not checked: no cut-off given \(--cutoff, or \[analysis\] cutoff")
    assert count_table(result.output, "Excluded, by reason") == {"date after today": 1}


def test_check_against_a_model_lists_every_problem_at_once(demo_dir, tmp_path):
    unseen = _setting((2, "recipient_sex", "x"), (6, "donor_type", "domino"))
    path = _extract(demo_dir, tmp_path, "levels.csv", unseen)
    result = invoke("check", path, "--spec", demo_dir / "spec.toml", "--cutoff", COHORT_CUTOFF,
                    "--model", demo_dir / "model.json")
    assert_exit(result, 1, r"covariate recipient_sex .*'x' in row 3",
                r"covariate donor_type .*'domino' in row 7", "fit the reference model again",
                "not usable")
    fine = invoke("check", _extract(demo_dir, tmp_path, "fine.csv"), "--spec",
                  demo_dir / "spec.toml", "--cutoff", COHORT_CUTOFF, "--model",
                  demo_dir / "model.json")
    assert_exit(fine, 0, "The extract is usable")
    assert "not checked: no model" not in fine.output


def test_check_warns_above_the_exclusion_share_and_writes_every_list(demo_dir, network,
                                                                     tmp_path):
    # The cohort's planted rows plus a window of one year: most transplants fall outside it.
    out = tmp_path / "checked"
    result = invoke("check", demo_dir / "cohort.csv", "--spec", demo_dir / "spec.toml",
                    "--cutoff", COHORT_CUTOFF, "--from", "2024-01-01", "--to", "2024-12-31",
                    "--out", out)
    assert_exit(result, 0, r"excluded \(\d+\.\d%\)", r"warning: \d+ of \d+ records \(\d+\.\d%\) "
                r"are excluded, more than 20%", "transplanted outside the cohort window",
                "usable, with")
    exclusions = pd.read_csv(out / "exclusions.csv")
    n_read = len(network.cohort)
    before = (network.cohort["transplant_date"] < "2024-01-01").sum()
    assert len(exclusions) > CHECK_SHOWN and len(exclusions) >= before  # the full list
    assert sum(count_table(result.output, "Excluded, by reason").values()) == len(exclusions)
    corrections = pd.read_csv(out / "corrections.csv")
    assert f"{n_read} records read, {n_read - len(exclusions)} kept" in result.output
    assert set(corrections.columns) == {"row", "recipient", "program", "kind"}


def test_check_notes_a_reference_level_that_does_not_occur(demo_dir, tmp_path):
    spec = tmp_path / "spec.toml"
    text = (demo_dir / "spec.toml").read_text(encoding="utf-8")
    spec.write_text(text.replace('reference = "deceased"', 'reference = "Deceased"'))
    result = invoke("check", _extract(demo_dir, tmp_path, "c.csv"), "--spec", spec,
                    "--cutoff", COHORT_CUTOFF)
    assert_exit(result, 0, r"covariate donor_type .*the reference level 'Deceased' declared "
                r"in the spec does not occur")


def test_check_bad_cutoff_is_a_usage_error(demo_dir):
    result = invoke("check", demo_dir / "cohort.csv", "--spec", demo_dir / "spec.toml",
                    "--cutoff", "30/06/2025")
    assert_exit(result, 2, "--cutoff '30/06/2025' is not a date", "YYYY-MM-DD")


def test_check_reports_a_malformed_spec(demo_dir, tmp_path):
    spec = tmp_path / "broken.toml"
    spec.write_text("[columns\nrecipient = 'recipient_id'\n")
    result = invoke("check", demo_dir / "cohort.csv", "--spec", spec)
    assert_exit(result, 1, "broken.toml", "TOML")


# --- fit --------------------------------------------------------------------------------


def test_fit_writes_a_model(demo_dir, network, tmp_path):
    out = tmp_path / "model.json"
    result = invoke("fit", demo_dir / "reference.csv", "--spec", demo_dir / "spec.toml",
                    "--outcome", "graft_failure", "--horizon", 365,
                    "--cutoff", REFERENCE_CUTOFF, "--ties", "breslow", "--out", out)
    planted = network.planted[network.planted["role"] == "reference"]
    kept = len(network.reference) - int((planted["handling"] == "excluded").sum())
    assert_exit(result, 0, f"on {kept} recipients", f"model written to {re.escape(str(out))}")
    model = json.loads(out.read_text(encoding="utf-8"))
    assert (model["outcome"], model["horizon_days"], model["cutoff"]) == (
        "graft_failure", 365, REFERENCE_CUTOFF)
    assert model["fit"]["ties"] == "breslow"


def test_fit_unknown_outcome_is_named(demo_dir, tmp_path):
    result = invoke("fit", demo_dir / "reference.csv", "--spec", demo_dir / "spec.toml",
                    "--outcome", "graft_survival", "--horizon", 365,
                    "--cutoff", REFERENCE_CUTOFF, "--out", tmp_path / "model.json")
    assert_exit(result, 1, "'graft_survival'", "graft_failure, graft_failure_death_censored, death")
    assert not (tmp_path / "model.json").exists()


def test_fit_takes_the_horizon_from_the_spec_and_counts_add_up(demo_dir, network, tmp_path):
    out = tmp_path / "model.json"
    result = invoke("fit", demo_dir / "reference.csv", "--spec", demo_dir / "spec.toml",
                    "--outcome", "graft_failure", "--cutoff", REFERENCE_CUTOFF,
                    "--from", "2019-01-01", "--out", out)
    assert_exit(result, 0, r"at 365 days \(from the spec's \[analysis\] horizon_days\)")
    counts = re.search(r"(\d+) records read: (\d+) used, (\d+) excluded \((\d+) by the record "
                       r"checks, (\d+) transplanted after the cut-off 2022-12-31 or outside the "
                       r"window 2019-01-01 to any\)", result.output)
    read, used, excluded, checks, window = (int(g) for g in counts.groups())
    assert read == len(network.reference) and read == used + excluded
    assert excluded == checks + window and window > 0
    # the generator's own dates: transplants before 2019 (none of them planted ones)
    early = (network.reference["transplant_date"] < "2019-01-01").sum()
    assert early - checks <= window <= early  # some early ones fail a record check first


def test_fit_refuses_a_horizon_the_reference_follow_up_does_not_reach(demo_dir, tmp_path):
    result = invoke("fit", demo_dir / "reference.csv", "--spec", demo_dir / "spec.toml",
                    "--outcome", "graft_failure", "--horizon", 5000,
                    "--cutoff", REFERENCE_CUTOFF, "--out", tmp_path / "model.json")
    assert_exit(result, 1, r"cannot support a horizon of 5000 days: its longest follow-up is "
                r"\d+ days and none of its \d+ recipients was followed to day 5000")
    assert not (tmp_path / "model.json").exists()


@pytest.mark.parametrize(
    ("option", "value", "pattern"),
    [
        ("--cutoff", "2022-13-31", "--cutoff '2022-13-31' is not a date"),
        ("--from", "last year", "--from 'last year' is not a date"),
        ("--horizon", "0", "--horizon"),
        ("--ties", "exact", "--ties"),
    ],
)
def test_fit_bad_options_are_usage_errors(demo_dir, tmp_path, option, value, pattern):
    args = {"--outcome": "graft_failure", "--horizon": "365", "--cutoff": REFERENCE_CUTOFF,
            "--out": str(tmp_path / "model.json"), option: value}
    flat = [part for pair in args.items() for part in pair]
    result = invoke("fit", demo_dir / "reference.csv", "--spec", demo_dir / "spec.toml", *flat)
    assert_exit(result, 2, re.escape(pattern))
    assert not (tmp_path / "model.json").exists()


# --- evaluate ---------------------------------------------------------------------------


def _evaluate(demo_dir: Path, out: Path, *extra: object, model: Path | None = None) -> Result:
    return invoke("evaluate", demo_dir / "cohort.csv", "--model", model or demo_dir / "model.json",
                  "--rules", demo_dir / "rules.toml", "--cutoff", COHORT_CUTOFF,
                  "--from", "2022-01-01", "--to", "2024-12-31", "--no-report", *extra,
                  "--out", out)


@pytest.mark.parametrize(
    ("prior", "expected"),
    [
        ("eb", {"method": "empirical_bayes", "free_mean": False}),
        ("eb-free", {"method": "empirical_bayes", "free_mean": True}),
        ("fixed:2,2", {"method": "fixed", "shape": 2.0, "rate": 2.0}),
    ],
)
def test_evaluate_writes_the_files_with_the_chosen_prior(demo_dir, tmp_path, prior, expected):
    out = tmp_path / "results"
    out.mkdir()  # an existing empty folder is fine
    result = _evaluate(demo_dir, out, "--prior", prior)
    assert_exit(result, 0, f"evaluation files written to {re.escape(str(out))}")
    for name in EVALUATION_FILES:
        assert (out / name).is_file(), name
    assert not (out / "report.html").exists()  # --no-report
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    assert {key: run["prior"][key] for key in expected} == expected
    assert run["window"] == ["2022-01-01", "2024-12-31"]
    assert run["cutoff"] == COHORT_CUTOFF
    programs = pd.read_csv(out / "programs.csv")
    assert sorted(programs["program"]) == PROGRAMS


def test_evaluate_says_where_the_cut_off_and_window_came_from_and_counts(demo_dir, network,
                                                                         tmp_path):
    out = tmp_path / "results"
    result = _evaluate(demo_dir, out)
    assert_exit(result, 0, r"cut-off 2025-06-30 \(from --cutoff\); window 2022-01-01 to "
                r"2024-12-31 \(from --from/--to\)")
    counts = json.loads((out / "run.json").read_text(encoding="utf-8"))["counts"]
    assert (f"{counts['read']} records read: {counts['kept']} kept, {counts['excluded']} "
            f"excluded (exclusions.csv), {counts['corrected']} kept with a correction") in (
        result.output)
    assert counts["read"] == len(network.cohort) == counts["kept"] + counts["excluded"]
    # The planted corrections of the demo cohort (the generator's record), kept and listed.
    planted = network.planted[(network.planted["role"] == "cohort")
                              & (network.planted["handling"] == "kept, warned")]
    corrections = pd.read_csv(out / "corrections.csv", dtype={"recipient": str})
    assert set(corrections["recipient"]) == set(planted["recipient_id"])
    assert counts["corrected"] == len(planted) == 4
    bare = invoke("evaluate", demo_dir / "cohort.csv", "--model", demo_dir / "model.json",
                  "--cutoff", COHORT_CUTOFF, "--no-report", "--out", tmp_path / "bare")
    assert_exit(bare, 0, r"window any to any \(from no window given: every transplant\)")


def test_evaluate_warns_when_one_reason_excludes_a_large_share(demo_dir, tmp_path):
    result = _evaluate(demo_dir, tmp_path / "r", "--from", "2024-01-01")
    assert_exit(result, 0, r"warning: .*cohort.csv: \d+ of \d+ records \(\d+\.\d%\) are "
                r"excluded as \"transplanted outside the cohort window\", more than 20%")


def test_evaluate_cut_off_before_the_window_is_said_in_iso_dates(demo_dir, tmp_path):
    result = invoke("evaluate", demo_dir / "cohort.csv", "--model", demo_dir / "model.json",
                    "--cutoff", "2021-01-01", "--from", "2022-01-01", "--no-report",
                    "--out", tmp_path / "r")
    assert_exit(result, 1, r"the cut-off 2021-01-01 precedes the cohort window, which starts "
                r"2022-01-01")
    assert "datetime" not in result.output


def test_evaluate_fixed_prior_gives_the_conjugate_posterior(demo_dir, tmp_path):
    out = tmp_path / "results"
    assert_exit(_evaluate(demo_dir, out, "--prior", "fixed:2,2"), 0)
    programs = pd.read_csv(out / "programs.csv")
    # Gamma(2, 2) prior and Poisson(HR E) counts: posterior Gamma(2 + O, 2 + E); mean and
    # equal-tailed 95% limits from scipy.stats.gamma. Tolerance: the CSV keeps 10 digits.
    shape = 2 + programs["observed"].to_numpy(float)
    rate = 2 + programs["expected"].to_numpy(float)
    posterior = stats.gamma(shape, scale=1 / rate)
    assert programs["hr_mean"].to_numpy() == pytest.approx(posterior.mean(), rel=1e-8)
    assert programs["hr_lower"].to_numpy() == pytest.approx(posterior.ppf(0.025), rel=1e-8)
    assert programs["hr_upper"].to_numpy() == pytest.approx(posterior.ppf(0.975), rel=1e-8)


@pytest.mark.parametrize("prior", ["flat", "fixed:2", "fixed:two,2", "fixed:-1,2", "fixed:0,1"])
def test_evaluate_bad_prior_is_a_usage_error(demo_dir, tmp_path, prior):
    out = tmp_path / "results"
    result = _evaluate(demo_dir, out, "--prior", prior)
    assert_exit(result, 2, "--prior", "fixed:2,2")
    assert not out.exists()


def test_evaluate_refuses_an_edited_model(demo_dir, tmp_path):
    model = json.loads((demo_dir / "model.json").read_text(encoding="utf-8"))
    model["coefficients"]["coef"][0] += 0.5
    edited = tmp_path / "edited.json"
    edited.write_text(json.dumps(model, indent=2), encoding="utf-8")
    result = _evaluate(demo_dir, tmp_path / "results", model=edited)
    assert_exit(result, 1, "edited.json", "checksum does not match", "refit")


def test_evaluate_refuses_a_model_that_is_not_json(demo_dir, tmp_path):
    broken = tmp_path / "broken.json"
    broken.write_text("{coefficients: ", encoding="utf-8")
    result = _evaluate(demo_dir, tmp_path / "results", model=broken)
    assert_exit(result, 1, "broken.json", "not valid JSON", "casemix fit")


def test_evaluate_without_a_cutoff_asks_for_one(demo_dir, tmp_path):
    result = invoke("evaluate", demo_dir / "cohort.csv", "--model", demo_dir / "model.json",
                    "--no-report", "--out", tmp_path / "results")
    assert_exit(result, 1, "cut-off", "--cutoff")


def test_evaluate_reports_a_cohort_missing_a_covariate(demo_dir, tmp_path):
    path = _extract(demo_dir, tmp_path, "no_bmi.csv", lambda f: f.drop(columns="bmi"))
    result = invoke("evaluate", path, "--model", demo_dir / "model.json",
                    "--cutoff", COHORT_CUTOFF, "--no-report", "--out", tmp_path / "results")
    assert_exit(result, 1, "no_bmi.csv", "'bmi'")


# --- report -----------------------------------------------------------------------------


def _small_programs(folder: Path) -> pd.Series:
    """Observed events of the programs with 1 to 10 events (hidden by --suppress-below 11)."""
    observed = pd.read_csv(folder / "programs.csv").set_index("program")["observed"]
    small = observed[observed.between(1, 10)]
    assert len(small), "the demo has programs with fewer than 11 events"
    return small


def _rows_of(path: Path, code: str) -> list[list[str]]:
    return [row for row in html_rows(path) if row and row[0] == code]


def test_report_writes_an_html_file_with_every_program_and_its_counts(evaluation_dir, tmp_path):
    folder = tmp_path / "results"
    shutil.copytree(evaluation_dir, folder)
    result = invoke("report", folder)
    assert_exit(result, 0, re.escape(f"report: {folder / 'report.html'}"))
    report = folder / "report.html"
    assert set(PROGRAMS) <= {row[0] for row in html_rows(report) if row}
    # without suppression the small counts are shown (the counterpart of the test below)
    for code, observed in _small_programs(folder).items():
        assert any(str(observed) in row for row in _rows_of(report, code)), code
    assert "&lt;11" not in report.read_text(encoding="utf-8")


def test_report_suppress_below_hides_small_counts(evaluation_dir, tmp_path):
    folder = tmp_path / "results"
    shutil.copytree(evaluation_dir, folder)
    internal = (folder / "programs.csv").read_bytes()
    result = invoke("report", folder, "--suppress-below", 11)
    out = folder / "public" / "report.html"
    assert_exit(result, 0, re.escape(f"report: {out}"))
    assert "Public release: counts from 1 to 10" in out.read_text(encoding="utf-8")
    small = _small_programs(folder)
    for code, observed in small.items():  # no table cell holds the hidden count itself
        rows = _rows_of(out, code)
        assert any("<11" in row for row in rows), rows
        assert not any(str(observed) in row for row in rows), rows
    public = pd.read_csv(folder / "public" / "programs.csv", dtype=str).set_index("program")
    assert (public.loc[small.index, "observed"] == "<11").all()
    assert public.loc[small.index, "oe_ratio"].isna().all()  # O/E would give O back
    # the evaluation's own files are not touched; --out names another public folder
    assert (folder / "programs.csv").read_bytes() == internal
    assert not (folder / "report.html").exists()
    assert_exit(invoke("report", folder, "--suppress-below", 11, "--out", tmp_path / "pub"), 0)
    assert (tmp_path / "pub" / "withheld.csv").is_file()
    assert_exit(invoke("report", folder, "--suppress-below", 11, "--out", folder), 1,
                "internal files")


def test_report_of_an_incomplete_folder_names_the_missing_file(tmp_path):
    (tmp_path / "results").mkdir()
    result = invoke("report", tmp_path / "results")
    assert_exit(result, 1, "programs.csv", "casemix evaluate")


def test_report_suppress_below_one_is_a_usage_error(evaluation_dir):
    assert_exit(invoke("report", evaluation_dir, "--suppress-below", 1), 2, "--suppress-below")


# --- audit ------------------------------------------------------------------------------


def test_audit_writes_its_folder(demo_dir, network, tmp_path):
    out = tmp_path / "audit"
    result = invoke("audit", demo_dir / "reference.csv", "--model", demo_dir / "model.json",
                    "--cohort", demo_dir / "cohort.csv", "--cutoff", COHORT_CUTOFF,
                    "--bootstrap", 20, "--seed", 1, "--workers", 1, "--out", out)
    assert_exit(result, 0, f"audit written to {re.escape(str(out))}")
    findings = json.loads((out / "findings.json").read_text(encoding="utf-8"))
    assert findings
    for finding in findings:  # every finding is shown to the user, not only saved
        assert f"- {finding}" in result.output
    facts = json.loads((out / "audit.json").read_text(encoding="utf-8"))
    planted = network.planted[network.planted["role"] == "cohort"]
    cohort = len(network.cohort) - int((planted["handling"] == "excluded").sum())
    assert (facts["bootstrap"], facts["seed"], facts["cohort_recipients"]) == (20, 1, cohort)


def test_audit_of_an_evaluation_with_user_rules_agrees_with_it(demo_dir, tmp_path):
    rules = tmp_path / "rules.toml"
    rules.write_text("[verdict]\nprobability = 0.95\nupper_margin = 1.2\n", encoding="utf-8")
    results, audit = tmp_path / "results", tmp_path / "audit"
    assert_exit(invoke("evaluate", demo_dir / "cohort.csv", "--model", demo_dir / "model.json",
                       "--rules", rules, "--cutoff", COHORT_CUTOFF, "--from", "2022-01-01",
                       "--no-report", "--out", results), 0)
    result = invoke("audit", demo_dir / "reference.csv", "--model", demo_dir / "model.json",
                    "--cohort", demo_dir / "cohort.csv", "--evaluation", results,
                    "--bootstrap", 2, "--out", audit)
    assert_exit(result, 0, r"probability 0\.95, margins 1 and 1\.2", r"agree with that "
                r"evaluation for all 16 programs")
    facts = json.loads((audit / "audit.json").read_text(encoding="utf-8"))
    theirs = pd.read_csv(results / "programs.csv").set_index("program")["verdict"]
    ours = pd.read_csv(audit / "fdr.csv").set_index("program")["verdict"]
    assert facts["evaluation"]["programs_agreeing"] == 16 and ours.sort_index().equals(
        theirs.sort_index())
    assert_exit(invoke("report", results, "--audit", audit), 0)
    both = invoke("audit", demo_dir / "reference.csv", "--model", demo_dir / "model.json",
                  "--cohort", demo_dir / "cohort.csv", "--evaluation", results,
                  "--rules", rules, "--out", tmp_path / "again")
    assert_exit(both, 1, "give either an evaluation folder or rules")


def test_audit_bootstrap_below_its_real_minimum_is_refused_before_any_work(demo_dir, tmp_path):
    result = invoke("audit", demo_dir / "reference.csv", "--model", demo_dir / "model.json",
                    "--cohort", demo_dir / "cohort.csv", "--cutoff", COHORT_CUTOFF,
                    "--bootstrap", 0, "--out", tmp_path / "audit")
    assert_exit(result, 2, "--bootstrap", r"greater than or equal to 2")
    assert not (tmp_path / "audit").exists()
    help_text = invoke("audit", "--help").output
    assert "at least 2" in help_text


def test_audit_bad_cutoff_is_a_usage_error(demo_dir, tmp_path):
    result = invoke("audit", demo_dir / "reference.csv", "--model", demo_dir / "model.json",
                    "--cohort", demo_dir / "cohort.csv", "--cutoff", "June 2025",
                    "--out", tmp_path / "audit")
    assert_exit(result, 2, "--cutoff 'June 2025' is not a date")


# --- monitor ----------------------------------------------------------------------------


def test_demo_monitoring_finds_the_rising_program(demo_dir, demo_run):
    # Generator truth (casemix.demo.RISE): LV02's hazard doubles from 2023-07-01.
    state = pd.read_csv(demo_dir / "monitoring_state.csv").set_index(["program", "chart"])
    assert state.loc[("LV02", "upper"), "signalled"]
    assert state.loc[("LV02", "upper"), "first_signal"] > "2023-07-01"
    assert "LV02: raised-hazard chart signalled on" in demo_run[1].output
    assert "A signal is a prompt to look closer" in demo_run[1].output


def _monitor_rules(folder: Path, body: str) -> Path:
    path = folder / "monitor_rules.toml"
    path.write_text(f"[verdict]\n[monitoring]\n{body}\n", encoding="utf-8")
    return path


def test_monitor_writes_its_files_and_page(demo_dir, tmp_path):
    rules = _monitor_rules(tmp_path, "replicates = 200\nseed = 5")
    out = tmp_path / "watch"
    result = invoke("monitor", demo_dir / "cohort.csv", "--model", demo_dir / "model.json",
                    "--from", "2024-01-01", "--cutoff", COHORT_CUTOFF, "--rules", rules,
                    "--out", out)
    assert_exit(result, 0, "16 programs monitored from 2024-01-01 to 2025-06-30",
                "not a finding about quality of care")
    for name in ("monitoring_state.csv", "monitoring_signals.csv", "monitoring_series.csv",
                 "monitoring.json", "monitoring.html"):
        assert (out / name).is_file(), name
    state = pd.read_csv(out / "monitoring_state.csv")
    assert len(state) == 32 and set(state["h_source"]) == {"simulated"}
    assert "Read this first" in (out / "monitoring.html").read_text(encoding="utf-8")


@pytest.mark.parametrize(("args", "body", "message"), [
    (("--from", "2025-07-01"), "", "monitoring start 2025-07-01 is after the cut-off"),
    (("--from", "2024-01-01"), "rho_up = 1.0", r"rho_up must be a hazard ratio above 1"),
    (("--from", "2024-01-01"), "level = 1.5", r"level must be a probability strictly"),
    (("--from", "2024-01-01"), "horizon_days = 400", r"horizon is 365 days"),
])
def test_monitor_bad_input_is_a_clear_error(demo_dir, tmp_path, args, body, message):
    result = invoke("monitor", demo_dir / "cohort.csv", "--model", demo_dir / "model.json",
                    *args, "--cutoff", COHORT_CUTOFF, "--rules", _monitor_rules(tmp_path, body),
                    "--out", tmp_path / "watch")
    assert_exit(result, 1, message)


# --- version and help -------------------------------------------------------------------


def test_version_is_the_installed_one():
    result = invoke("--version")
    assert_exit(result, 0)
    assert result.output.strip() == f"casemix {importlib.metadata.version('casemix')}"


def test_top_level_help_lists_every_command_and_points_to_the_demo():
    result = invoke("--help")
    assert_exit(result, 0, "casemix demo")
    for command in COMMANDS:
        assert re.search(rf"^\s+{command}\s", result.output, re.M), command


@pytest.mark.parametrize("command", COMMANDS)
def test_help_of_every_command_shows_an_example_using_its_own_options(command):
    result = invoke(command, "--help")
    assert_exit(result, 0, f"Example: casemix {command}")
    example = result.output.split("Example:", 1)[1].split("\n\n", 1)[0]
    options = set(re.findall(r"--[a-z][a-z-]*", example))
    assert options  # every example shows at least one option
    listing = result.output.split("\nOptions:\n", 1)[1]
    for option in options:  # so that an example never shows an option the command lacks
        assert re.search(rf"^\s+{option}\b", listing, re.M), (command, option)


HEAVY = ("pandas", "scipy", "statsmodels", "matplotlib")


@pytest.mark.parametrize("flag", ["--help", "--version"])
def test_help_and_version_load_no_heavy_library(flag):
    # A fresh interpreter runs the console script's entry point and then reports which of the
    # heavy libraries it loaded: a quick start-up is loading none of them (timing is in the
    # README, measured with `python -X importtime`, never in a test).
    probe = (
        "import sys\n"
        f"sys.argv = ['casemix', {flag!r}]\n"
        "from casemix.cli import main\n"
        "try:\n    main()\nexcept SystemExit:\n    pass\n"
        f"print('LOADED', sorted(m for m in {HEAVY!r} if m in sys.modules))\n"
    )
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                          env=env, timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    assert "casemix" in done.stdout
    assert done.stdout.splitlines()[-1] == "LOADED []"


def test_the_probe_sees_a_heavy_library_when_one_is_loaded():
    # The same probe after a command that needs pandas: the check can fail.
    probe = ("import sys\nimport casemix\ncasemix.read_records\n"
             f"print(sorted(m for m in {HEAVY!r} if m in sys.modules))\n")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                          env=env, timeout=120, check=False)
    assert "pandas" in done.stdout, done.stderr


def test_report_states_the_outcome_definition(demo_dir):
    run = json.loads((demo_dir / "run.json").read_text(encoding="utf-8"))
    assert run["outcome_definition"].endswith("(a death counts as an event: all-cause)")
    html = (demo_dir / "report.html").read_text(encoding="utf-8")
    assert "Outcome: graft failure = the earliest of graft_loss_date" in html


@pytest.mark.parametrize("command", COMMANDS)
def test_usage_lines_name_arguments_in_capitals(command):
    # typer marks a required argument with braces; the name itself is a capitalised metavar
    usage = invoke(command, "--help").output.splitlines()[0]
    assert usage.startswith(f"Usage: casemix {command} [OPTIONS]")
    assert not re.search(r"\{[a-z_]+\}", usage), usage


# --- the study plan -----------------------------------------------------------------------


@pytest.fixture(scope="module")
def plan_models(demo_dir, tmp_path_factory) -> tuple[Path, Result]:
    folder = tmp_path_factory.mktemp("cli") / "models"
    return folder, invoke("fit", demo_dir / "reference.csv", "--spec", demo_dir / "spec.toml",
                          "--cutoff", REFERENCE_CUTOFF, "--out", folder)


def test_fit_without_an_outcome_fits_every_analysis_of_the_plan(plan_models):
    folder, result = plan_models
    assert_exit(result, 0, r"graft_3y: graft_failure at 1095 days, reference 2017-01-01 to "
                           r"2021-12-31, .* -> graft_failure_1095d\.json",
                f"models and index.json written to {re.escape(str(folder))}")
    assert sorted(p.name for p in folder.iterdir()) == sorted(
        ["index.json", *(f"{o}_{h}d.json" for o in ("graft_failure", "death")
                         for h in (30, 365, 1095))])


def test_evaluate_with_a_models_folder_runs_every_analysis(plan_models, demo_dir, tmp_path):
    folder, _ = plan_models
    out = tmp_path / "study"
    result = invoke("evaluate", demo_dir / "cohort.csv", "--model", folder, "--rules",
                    demo_dir / "rules.toml", "--cutoff", COHORT_CUTOFF, "--no-report",
                    "--out", out)
    assert_exit(result, 0, r"graft_30d: graft failure within 30 days, cohort 2023-06-02 to "
                           r"2025-05-31", r"excess: .*LV08", "not a finding about quality")
    assert sorted(p.name for p in out.iterdir()) == sorted(
        [*PLAN, "overview.csv", "recipients.csv", "study.json"])
    for name in PLAN:
        for table in EVALUATION_FILES:
            assert (out / name / table).is_file(), (name, table)
    overview = pd.read_csv(out / "overview.csv")
    assert list(overview["analysis"].unique()) == PLAN
    assert (out / "graft_1y" / "programs.csv").read_bytes() == (
        demo_dir / "programs.csv").read_bytes()


def test_report_of_a_study_folder_writes_the_study_pages(plan_models, demo_dir, tmp_path):
    folder, _ = plan_models
    out = tmp_path / "study"
    assert_exit(invoke("evaluate", demo_dir / "cohort.csv", "--model", folder, "--rules",
                       demo_dir / "rules.toml", "--cutoff", COHORT_CUTOFF, "--out", out), 0,
                re.escape(f"study report: {out / 'report' / 'index.html'}"))
    network = (out / "report" / "network.html").read_text(encoding="utf-8")
    assert all(name in network for name in PLAN)
    (out / "report" / "network.html").unlink()
    assert_exit(invoke("report", out), 0,
                re.escape(f"study report: {out / 'report' / 'index.html'}"))
    assert (out / "report" / "network.html").read_text(encoding="utf-8") == network
    assert_exit(invoke("report", out, "--out", tmp_path / "pages"), 0)
    assert (tmp_path / "pages" / "network.html").read_text(encoding="utf-8") == network


def test_report_of_a_study_folder_refuses_suppression_and_an_audit(plan_models, demo_dir,
                                                                   tmp_path):
    folder, _ = plan_models
    out = tmp_path / "study"
    assert_exit(invoke("evaluate", demo_dir / "cohort.csv", "--model", folder, "--rules",
                       demo_dir / "rules.toml", "--cutoff", COHORT_CUTOFF, "--no-report",
                       "--out", out), 0)
    assert_exit(invoke("report", out, "--suppress-below", 11), 2,
                "--suppress-below is not available for a study report")
    assert_exit(invoke("report", out, "--audit", tmp_path), 2, "--audit belongs to one")
    assert not (out / "report").exists() and not (out / "public").exists()


def test_plan_runs_refuse_options_of_one_analysis(plan_models, demo_dir, tmp_path):
    folder, _ = plan_models
    assert_exit(invoke("fit", demo_dir / "reference.csv", "--spec", demo_dir / "spec.toml",
                       "--horizon", 365, "--out", tmp_path / "m"), 2,
                "--horizon apply to one analysis")
    assert_exit(invoke("evaluate", demo_dir / "cohort.csv", "--model", folder, "--from",
                       "2023-01-01", "--out", tmp_path / "s"), 2,
                "--from/--to apply to one analysis")


def test_fit_without_an_outcome_or_a_plan_says_what_to_add(demo_dir, tmp_path):
    spec = tmp_path / "spec.toml"
    text = (demo_dir / "spec.toml").read_text(encoding="utf-8")
    spec.write_text(text[:text.index("[analyses.")], encoding="utf-8")
    assert_exit(invoke("fit", demo_dir / "reference.csv", "--spec", spec, "--cutoff",
                       REFERENCE_CUTOFF, "--out", tmp_path / "m"), 1,
                r"has no study plan: add \[analyses\.NAME\]")
