"""Tests of the whole report built from an evaluation folder."""

from __future__ import annotations

import json
import re
import warnings
from pathlib import Path

import pandas as pd
import pytest

from casemix import demo
from casemix.audit import Audit
from casemix.errors import DataWarning, InputError
from casemix.evaluation import Evaluation, evaluate
from casemix.report import render_report, write_report
from casemix.report.build import REPORT_CAUTIONS


def render_folder(folder, *, audit_folder=None, **options):
    """The report of a saved evaluation (and audit), as ``write_report`` renders it."""
    audit = None if audit_folder is None else Audit.load(audit_folder)
    return render_report(Evaluation.load(folder), audit=audit, **options)


HOSTILE = "<script>alert(1)</script>"
PROGRAMS = {"LV01": (150, 1.0), HOSTILE: (120, 1.6), "LV03": (9, 1.0), "LV04": (200, 0.6)}


@pytest.fixture(scope="module")
def report(evaluation_folder):
    return render_folder(evaluation_folder)


@pytest.fixture(scope="module")
def hostile_folder(folder_factory, tmp_path_factory):
    return folder_factory(tmp_path_factory.mktemp("hostile"), PROGRAMS,
                          cautions=("Run caution with <b>markup</b>.",
                                    "Small programs need care (recorded by the run)."))


@pytest.fixture(scope="module")
def hostile_report(hostile_folder):
    return render_folder(hostile_folder)


@pytest.fixture(scope="module")
def small_folder(folder_factory, tmp_path_factory):
    return folder_factory(tmp_path_factory.mktemp("small"), {"LV01": (60, 1.0),
                                                             "LV02": (70, 1.2)})


def test_report_parses_and_has_the_parts_in_order(report, strict_html):
    parser = strict_html(report)
    order = ["evaluated", "cautions", "programs", "scale", "each-program", "data-quality",
             "model"]
    positions = [parser.ids.index(anchor) for anchor in order]
    assert positions == sorted(positions)
    assert "audit" not in parser.ids


def test_report_contains_every_program(report, evaluation_folder):
    codes = pd.read_csv(evaluation_folder / "programs.csv")["program"]
    for position, code in enumerate(sorted(codes)):
        assert f'id="program-{position + 1}-{code.lower()}"' in report
        assert f">{code}</a>" in report  # linked from the table and the program index


def test_report_requests_nothing_from_outside(report):
    assert not re.search(r"""(?:src|href|action)\s*=\s*["']?\s*(?:https?:)?//""", report, re.I)
    assert not re.search(r"url\(\s*['\"]?\s*(?:https?:)?//|@import", report, re.I)
    assert "<script" not in report.lower() and "<link" not in report.lower()


def test_report_states_the_standing_cautions_once(report, hostile_report):
    for _, caution in REPORT_CAUTIONS:
        assert caution.replace("'", "&#39;") in report
    # hostile_folder records a caution about small programs: ours on that topic is left out
    assert "Small programs are uncertain" not in hostile_report
    assert "quality of care" in hostile_report and "clinical review" in hostile_report


def test_report_escapes_a_hostile_program_name(hostile_report, strict_html):
    strict_html(hostile_report)
    assert HOSTILE not in hostile_report and "<b>markup</b>" not in hostile_report
    # in the table, the program index, its sub-section and two figure descriptions
    assert hostile_report.count("&lt;script&gt;alert(1)&lt;/script&gt;") >= 5
    assert "Run caution with &lt;b&gt;markup&lt;/b&gt;." in hostile_report


def test_small_counts_are_suppressed_and_said_so(hostile_folder, hostile_report, tmp_path):
    hidden = render_folder(hostile_folder, suppress_below=11)
    programs = pd.read_csv(hostile_folder / "programs.csv")
    small = programs.loc[programs["program"] == "LV03"].iloc[0]
    cell = f'<td class="num">{int(small["recipients"])}</td>'  # 9 recipients
    assert cell in hostile_report and cell not in hidden
    assert '<td class="num">&lt;11</td>' in hidden
    assert "Public release: counts from 1 to 10 are shown as “&lt;11”" in hidden
    assert "What this public release withholds" in hidden
    assert "withheld" not in hostile_report
    # the public report goes to public/, never over the internal report
    assert write_report(hostile_folder, suppress_below=11) == (
        hostile_folder / "public" / "report.html")
    with pytest.raises(InputError, match=r"cannot replace the internal one"):
        write_report(hostile_folder, hostile_folder / "report.html", suppress_below=11)
    with pytest.raises(InputError, match=r"the audit is not part of a public release"):
        render_report(Evaluation.load(hostile_folder), suppress_below=11,
                      audit=Audit(tables={}, schoenfeld=None, findings=(), facts={}))


def test_report_is_reproducible_and_written_atomically(evaluation_folder, report, tmp_path):
    out = write_report(evaluation_folder, tmp_path / "out" / "r.html")
    assert out.read_text(encoding="utf-8") == report
    assert sorted(p.name for p in out.parent.iterdir()) == ["r.html"]  # no temporary left


def test_default_output_is_report_html_in_the_folder(small_folder):
    assert write_report(small_folder) == small_folder / "report.html"


def test_audit_folder_becomes_a_last_section(small_folder, tmp_path, strict_html):
    audit = tmp_path / "audit"
    audit.mkdir()
    (audit / "findings.json").write_text(json.dumps([f"hazards for {HOSTILE} vary"]),
                                         encoding="utf-8")
    (audit / "audit.json").write_text(json.dumps({"model_fingerprint": "ab12cd34"}))
    pd.DataFrame({"covariate": ["age", "global"], "statistic": [11.45, 17.66]}).to_csv(
        audit / "ph_test.csv", index=False)
    pd.DataFrame({"b": range(250)}).to_csv(audit / "bootstrap_expected.csv", index=False)
    run = json.loads((small_folder / "run.json").read_text(encoding="utf-8"))
    facts = {"model_fingerprint": run["model"]["fingerprint"],
             "evaluation": {"rules": run["rules"], "prior": run["prior"]}}
    (audit / "audit.json").write_text(json.dumps(facts), encoding="utf-8")
    html = render_folder(small_folder, audit_folder=audit)
    parser = strict_html(html)
    assert parser.ids[-1] == "audit"
    assert "hazards for &lt;script&gt;" in html
    assert "<h3>Ph test</h3>" in html and "<h3>Bootstrap expected</h3>" in html
    assert "The first 200 of 250 rows; the rest are in bootstrap_expected.csv." in html
    # an audit that made its verdicts with other rules is not shown beside this evaluation
    other = {**facts, "evaluation": {**facts["evaluation"],
                                     "rules": {**run["rules"], "upper_margin": 1.5}}}
    (audit / "audit.json").write_text(json.dumps(other), encoding="utf-8")
    with pytest.raises(InputError, match="did not make its verdicts with this evaluation's"):
        render_folder(small_folder, audit_folder=audit)


def test_an_empty_or_foreign_audit_folder_is_refused(small_folder, tmp_path):
    audit = tmp_path / "audit"
    audit.mkdir()
    with pytest.raises(InputError, match=r"not a complete audit folder \(findings.json and "
                       r"audit.json missing\), so an empty list of findings would read like"):
        render_folder(small_folder, audit_folder=audit)
    (audit / "findings.json").write_text("[]")
    (audit / "audit.json").write_text(json.dumps({"model_fingerprint": "ffff0000"}))
    with pytest.raises(InputError, match=r"the audit is of another reference model "
                       r"\(fingerprint ffff0000\.\.\., the evaluation's is ab12cd34"):
        render_folder(small_folder, audit_folder=audit)


def test_bad_arguments(evaluation_folder, tmp_path):
    with pytest.raises(InputError, match=r"suppress_below must be a whole number of at least 2"):
        render_folder(evaluation_folder, suppress_below=1)
    with pytest.raises(InputError, match=r"audit folder not found"):
        render_folder(evaluation_folder, audit_folder=tmp_path / "none")


@pytest.fixture(scope="module")
def demo_evaluation(tmp_path_factory):
    """The demo network evaluated with the bundled model, in memory and saved."""
    root = tmp_path_factory.mktemp("demo")
    paths = demo.write_demo(root)
    model = Path(__file__).resolve().parents[2] / "models" / "lorran_valley_graft_failure_365.json"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataWarning)  # the demo's planted record problems
        evaluation = evaluate(paths["cohort"], model, paths["rules"], cutoff=demo.COHORT_CUTOFF,
                              window=demo.COHORT_WINDOW)
    return evaluation, evaluation.save(root / "results")


@pytest.mark.parametrize("suppress_below", [None, 11])
def test_a_saved_evaluation_renders_the_same_bytes_as_in_memory(demo_evaluation, suppress_below):
    evaluation, folder = demo_evaluation
    in_memory = render_report(evaluation, suppress_below=suppress_below)
    loaded = render_report(Evaluation.load(folder), suppress_below=suppress_below)
    assert in_memory.encode("utf-8") == loaded.encode("utf-8")
    written = write_report(folder, suppress_below=suppress_below)
    assert written.read_bytes() == in_memory.encode("utf-8")
