"""The README's commands, run as written, so that they never go stale.

The two Quick-start commands are compared with what .ci/run and a fresh machine run; the
casemix part of the main-job command and every command under "Using it on your own extract"
run through the installed ``casemix`` console script of this environment, in a folder made
by ``casemix demo``. Nothing here computes; the checks are exit codes, output and files.
"""

from __future__ import annotations

import fnmatch
import os
import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10 only
    import tomli as tomllib

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")
CI_RUN = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
# The console script installed next to this interpreter (.venv/bin or .ci-venv/bin).
CASEMIX = Path(sys.executable).parent / "casemix"
TIMEOUT = 300  # seconds per command; the demo and each step take seconds


def section(title: str) -> str:
    """The text of the README section ``## title``, up to the next ``## `` heading."""
    match = re.search(rf"^## {re.escape(title)}\n(.*?)(?=^## |\Z)", README, re.M | re.S)
    assert match, f"README.md has no section '## {title}'"
    return match.group(1)


def bash_blocks(text: str) -> list[str]:
    return re.findall(r"^```bash\n(.*?)^```", text, re.M | re.S)


def commands(block: str) -> list[str]:
    """The commands of a bash block, with backslash continuations joined."""
    joined = re.sub(r"\\\n\s*", "", block)
    return [line.strip() for line in joined.splitlines() if line.strip()]


QUICK_START = [commands(block) for block in bash_blocks(section("Quick start"))]
OWN_EXTRACT = [
    command
    for block in bash_blocks(section("Using it on your own extract"))
    for command in commands(block)
]


def steps(command: str) -> list[list[str]]:
    """A one-line ``a && b && c`` command as a list of argument lists."""
    return [shlex.split(part) for part in command.split(" && ")]


def run(args: list[str], cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(
        args, cwd=cwd, capture_output=True, text=True, timeout=TIMEOUT, check=False,
        env={**os.environ, "COLUMNS": "200"},
    )


def _ci_command(tokens: list[str]) -> list[list[str]]:
    """Every line of .ci/run that starts with ``tokens``, split into arguments."""
    lines = [shlex.split(line, comments=True) for line in commands(CI_RUN)]
    return [line for line in lines if line[: len(tokens)] == tokens]


# --- Quick start: what the two commands say ------------------------------------------------


def test_quick_start_has_two_one_line_commands():
    assert [len(block) for block in QUICK_START] == [1, 1]


def test_main_job_command_is_what_a_fresh_machine_runs():
    (main,) = QUICK_START[0]
    venv, install, demo = steps(main)
    assert venv == ["python3", "-m", "venv", ".venv"]
    # a plain (not editable) install of the repository, then the venv's console script
    assert install == [".venv/bin/pip", "install", "-q", "."]
    assert demo[:2] == [".venv/bin/casemix", "demo"]
    out = demo[demo.index("--out") + 1]
    assert f"writes `{out}/report.html`" in section("Quick start")
    assert PYPROJECT["project"]["scripts"] == {"casemix": "casemix.cli:main"}


def test_a_plain_install_ships_every_data_file_the_package_reads():
    # `pip install .` copies only .py files and the package-data patterns: any other file
    # under src/casemix (report templates, demo spec and rules) must match a pattern.
    patterns = PYPROJECT["tool"]["setuptools"]["package-data"]["casemix"]
    package = ROOT / "src" / "casemix"
    data = [
        path.relative_to(package).as_posix()
        for path in package.rglob("*")
        if path.is_file() and path.suffix not in (".py", ".pyc")
    ]
    assert data, "the package reads templates and demo files"
    missing = [name for name in data if not any(fnmatch.fnmatch(name, p) for p in patterns)]
    assert not missing, f"not shipped by a plain install: {missing}"


def test_test_command_is_what_ci_runs():
    (tests,) = QUICK_START[1]
    venv, install, pytest_run = steps(tests)
    assert venv == ["python3", "-m", "venv", ".venv"]
    assert install[0] == ".venv/bin/pip" and pytest_run[0] == ".venv/bin/python"
    # .ci/run activates its venv and calls `python -m pip ...` / `python -m pytest ...`
    assert _ci_command(["python3", "-m", "venv"]), "CI builds a clean virtual environment"
    assert _ci_command(["python", "-m", "pip", *install[1:]]) == [
        ["python", "-m", "pip", *install[1:]]]
    assert pytest_run[1:] == ["-m", "pytest", "-q"]
    # the whole suite twice: in the README's environment, then in the plain install's
    assert _ci_command(["python", "-m", "pytest"]) == [["python", "-m", "pytest", "-q"]] * 2
    extra = re.fullmatch(r"\.\[(\w+)\]", install[-1])
    assert extra and extra.group(1) in PYPROJECT["project"]["optional-dependencies"]


def test_ci_also_runs_the_suite_in_a_plain_install_without_lifelines():
    extras = PYPROJECT["project"]["optional-dependencies"]
    assert _ci_command(["python", "-m", "pip", "install", "-q", ".[test-core]"])
    assert not any(d.startswith("lifelines") for d in extras["test-core"])
    assert sorted(extras["test"]) == ["casemix[test-core]", "lifelines>=0.27"]
    venvs = [line[-1] for line in _ci_command(["python3", "-m", "venv"])]
    assert len(set(venvs)) == 2, "each suite in its own fresh virtual environment"


# --- Quick start: the main job, run --------------------------------------------------------


@pytest.fixture(scope="module")
def demo_folder(tmp_path_factory) -> tuple[Path, subprocess.CompletedProcess]:
    """The README's main-job command, its casemix part, run in a fresh folder."""
    (main,) = QUICK_START[0]
    demo = steps(main)[-1]
    assert CASEMIX.is_file(), f"no casemix console script next to {sys.executable}"
    cwd = tmp_path_factory.mktemp("readme")
    done = run([str(CASEMIX), *demo[1:]], cwd)
    return cwd / demo[demo.index("--out") + 1], done


@pytest.mark.slow
def test_main_job_command_writes_the_demo_report(demo_folder):
    folder, done = demo_folder
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stdout + done.stderr
    report = folder / "report.html"
    assert report.is_file()
    assert report.read_text(encoding="utf-8").lstrip().lower().startswith("<!doctype html")
    assert "report.html" in done.stdout


# --- Using it on your own extract ----------------------------------------------------------


def test_own_extract_commands_are_casemix_commands():
    assert [shlex.split(c)[:2] for c in OWN_EXTRACT] == [
        ["casemix", "check"], ["casemix", "fit"], ["casemix", "evaluate"],
        ["casemix", "report"], ["casemix", "audit"], ["casemix", "monitor"]]


@pytest.fixture(scope="module")
def own_extract_runs(demo_folder) -> dict[str, subprocess.CompletedProcess]:
    """Each README command, in order, in the demo folder (later ones use earlier outputs)."""
    folder, done = demo_folder
    assert done.returncode == 0, done.stderr
    runs = {}
    for command in OWN_EXTRACT:
        args = shlex.split(command)
        runs[args[1]] = run([str(CASEMIX), *args[1:]], folder)
    return runs


def _option(command: str, name: str) -> str:
    args = shlex.split(command)
    return args[args.index(name) + 1]


def _products(command: str) -> list[str]:
    """The files a README command must leave behind, relative to the demo folder."""
    args = shlex.split(command)
    verb = args[1]
    if verb == "fit":
        return [_option(command, "--out")]
    if verb == "evaluate":
        out = _option(command, "--out")
        return [f"{out}/{name}" for name in ("programs.csv", "run.json", "report.html")]
    if verb == "report":
        return [f"{args[2]}/report.html", f"{args[2]}/public/programs.csv"]
    if verb == "audit":
        return [f"{_option(command, '--out')}/findings.json"]
    if verb == "monitor":
        out = _option(command, "--out")
        return [f"{out}/{name}" for name in ("monitoring_state.csv", "monitoring.html")]
    return []


@pytest.mark.slow
@pytest.mark.parametrize("command", OWN_EXTRACT, ids=[shlex.split(c)[1] for c in OWN_EXTRACT])
def test_own_extract_command_runs_on_the_demo_files(own_extract_runs, demo_folder, command):
    done = own_extract_runs[shlex.split(command)[1]]
    assert "Traceback" not in done.stdout + done.stderr, done.stderr
    assert done.returncode == 0, done.stdout + done.stderr
    for product in _products(command):
        assert (demo_folder[0] / product).is_file(), product


PLAN = "A whole periodic evaluation: the study plan"


@pytest.mark.slow
def test_plan_commands_run_on_the_demo_files(demo_folder):
    folder, done = demo_folder
    assert done.returncode == 0, done.stderr
    (block,) = bash_blocks(section(PLAN))
    ran = [run([str(CASEMIX), *shlex.split(c)[1:]], folder) for c in commands(block)]
    assert [shlex.split(c)[:2] for c in commands(block)] == [["casemix", "fit"],
                                                             ["casemix", "evaluate"]]
    for done in ran:
        assert done.returncode == 0 and "Traceback" not in done.stderr, done.stderr
    out = folder / _option(commands(block)[1], "--out")
    assert (folder / _option(commands(block)[0], "--out") / "index.json").is_file()
    for product in ("overview.csv", "recipients.csv", "study.json", "graft_3y/programs.csv",
                    "report/index.html", "report/network.html"):
        assert (out / product).is_file(), product


def test_plan_python_section_runs(demo_folder, tmp_path):
    (block,) = python_blocks(section(PLAN))
    _run_beside_the_demo_inputs(block, demo_folder, tmp_path)
    for product in ("models/index.json", "study/overview.csv", "study/death_3y/run.json"):
        assert (tmp_path / product).is_file(), product


def _run_beside_the_demo_inputs(block: str, demo_folder, tmp_path) -> None:
    """Run a README Python block in ``tmp_path`` holding a copy of the demo's inputs."""
    folder, done = demo_folder
    assert done.returncode == 0, done.stderr
    for name in ("reference.csv", "cohort.csv", "spec.toml", "rules.toml"):
        (tmp_path / name).write_bytes((folder / name).read_bytes())
    ran = run([sys.executable, "-c", block], tmp_path)
    assert ran.returncode == 0, ran.stderr


def python_blocks(text: str) -> list[str]:
    return re.findall(r"^```python\n(.*?)^```", text, re.M | re.S)


def test_python_section_evaluates_audits_and_reports(demo_folder, tmp_path):
    (block,) = python_blocks(section("Using it on your own extract"))
    assert "write_report(" in block and "run_audit(" in block
    _run_beside_the_demo_inputs(block, demo_folder, tmp_path)
    for product in ("results/programs.csv", "results/corrections.csv", "audit/findings.json"):
        assert (tmp_path / product).is_file(), product
    assert 'id="audit"' in (tmp_path / "results" / "report.html").read_text(encoding="utf-8")
