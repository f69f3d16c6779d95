"""Tests of the study report (casemix.report.study) on the invented demo network.

The numbers on the pages are checked against the single run of each analysis (fit_reference
+ evaluate with the same windows), whose own checks against lifelines, statsmodels and scipy
are in tests/model and tests/evaluation; the plan run is checked to equal the single run in
tests/evaluation/test_study.py.
"""

from __future__ import annotations

import re
import warnings
from html.parser import HTMLParser

import pytest

from casemix import demo, evaluate, fit_reference
from casemix.errors import DataWarning, InputError
from casemix.evaluation.study import REPORT_FOLDER, Study
from casemix.report.plots import VERDICT_WORDS
from casemix.report.study import (
    INDEX_PAGE,
    NETWORK_PAGE,
    page_names,
    render_study_report,
    write_study_report,
)

ANALYSES = ["graft_30d", "death_30d", "graft_1y", "death_1y", "graft_3y", "death_3y"]


class _Tables(HTMLParser):
    """The text of every cell of every table inside the <section> with a given id."""

    def __init__(self, section: str) -> None:
        super().__init__(convert_charrefs=True)
        self.section, self.inside, self.svg = section, False, 0
        self.rows: list[list[str]] = []
        self.cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        if tag == "section":
            self.inside = dict(attrs).get("id") == self.section
        elif self.inside and tag == "tr":
            self.rows.append([])
        elif self.inside and tag in ("td", "th"):
            self.cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self.cell is not None and self.inside:
            self.rows[-1].append(" ".join(" ".join(self.cell).split()))
            self.cell = None

    def handle_data(self, data):
        if self.cell is not None:
            self.cell.append(data)


def table_rows(html: str, section: str) -> list[list[str]]:
    parser = _Tables(section)
    parser.feed(html)
    return parser.rows


@pytest.fixture(scope="module")
def pages(demo_study):
    return render_study_report(demo_study[0])


@pytest.fixture(scope="module")
def singles(demo_study):
    """The single run of every analysis of the demo plan."""
    _, paths, reference, cohort, _ = demo_study
    out = {}
    for name in ANALYSES:
        planned = cohort.spec.analyses[name]
        model = fit_reference(reference, reference.spec, planned.outcome, planned.horizon_days,
                              demo.REFERENCE_CUTOFF, window=planned.reference_window)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DataWarning)  # window leaves out most records
            out[name] = evaluate(cohort, model, paths["rules"], cutoff=demo.COHORT_CUTOFF,
                                 window=planned.cohort_window(demo.COHORT_CUTOFF))
    return out


def _interval(row, centre, lower, upper, digits=2):
    return f"{row[centre]:.{digits}f} ({row[lower]:.{digits}f}–{row[upper]:.{digits}f})"


def test_the_network_matrix_shows_the_single_runs_verdicts_and_hazard_ratios(pages, singles):
    rows = table_rows(pages[NETWORK_PAGE], "matrix")
    header, body = rows[0], rows[1:]
    assert header[1:] == [f"{n}: {singles[n].run['outcome'].replace('_', ' ')} within "
                          f"{singles[n].run['horizon_days']} days" for n in ANALYSES]
    cells = {row[0]: dict(zip(ANALYSES, row[1:], strict=True)) for row in body}
    for name, single in singles.items():
        for _, row in single.programs.iterrows():
            expected = (f"{VERDICT_WORDS[row['verdict']]} HR "
                        f"{_interval(row, 'hr_mean', 'hr_lower', 'hr_upper')}")
            assert cells[row["program"]][name] == expected, (name, row["program"])
    assert len(body) == 16


def test_the_network_page_says_what_was_evaluated_for_every_analysis(pages, singles,
                                                                    demo_study):
    rows = table_rows(pages[NETWORK_PAGE], "evaluated")
    by_name = {row[0]: row for row in rows[1:]}
    for name, single in singles.items():
        entry = demo_study[0][name].run["analysis"]
        start, end = entry["cohort_window"]
        row = by_name[name]
        assert row[3] == f"{start} to {end}"
        assert row[4].startswith(f"{entry['reference_window'][0] or 'open'} to ")
        assert row[5].startswith(entry["model_file"])
        assert row[6] == f"{single.run['counts']['kept']:,}"
        network = single.run["network"]
        assert row[7].startswith(f"O/E {network['oe']:.2f} ({network['oe_lower']:.2f}–")


def test_each_program_page_shows_its_row_of_every_single_run(pages, singles):
    names = page_names(singles["graft_1y"].programs["program"])
    for code, page in names.items():
        html = pages[f"programs/{page}"]
        rows = table_rows(html, "glance")[1:]
        assert len(rows) == len(ANALYSES)
        for name, cells in zip(ANALYSES, rows, strict=True):
            row = singles[name].programs.set_index("program").loc[code]
            assert cells[1] == VERDICT_WORDS[row["verdict"]]
            assert cells[2:5] == [f"{int(row['recipients']):,}", f"{int(row['observed']):,}",
                                  f"{row['expected']:.1f}"]
            assert cells[6] == _interval(row, "hr_mean", "hr_lower", "hr_upper")
        assert html.count('<svg class="figure lite"') == 2 * len(ANALYSES)
        assert "Number at risk" in html and "Case mix:" in html


def test_the_late_program_reads_excess_only_at_three_years(pages):
    # Generator truth (casemix.demo.LATE): LV08's graft failures rise a year after transplant.
    html = pages["programs/" + page_names([demo.LATE.program])[demo.LATE.program]]
    verdicts = {row[0].split(":")[0]: row[1] for row in table_rows(html, "glance")[1:]}
    assert verdicts["graft_30d"] == "consistent" and verdicts["graft_3y"] == "excess"


def test_pages_are_strict_self_contained_html_with_working_links(pages, strict_html):
    for path, html in pages.items():
        parsed = strict_html(html)
        assert len(html.encode()) < 2_000_000, path
        assert not re.search(r'(src|href)="(https?:|//)', html), path
        assert "<script" not in html, path
        text = " ".join(parsed.text)
        assert "statistical indicator" in text and "clinical review" in text, path
    linked = set(re.findall(r'href="((?:programs/|\.\./)?[^"#]+\.html)"',
                            pages[NETWORK_PAGE] + pages[INDEX_PAGE]))
    assert linked and linked <= set(pages), linked - set(pages)
    assert NETWORK_PAGE in linked
    program = next(p for p in pages if p.startswith("programs/"))
    assert f'href="../{NETWORK_PAGE}"' in pages[program]


def test_the_same_study_gives_the_same_pages_also_when_loaded(pages, demo_study):
    assert render_study_report(demo_study[0]) == pages
    loaded = render_study_report(Study.load(demo_study[4]))
    assert loaded.keys() == pages.keys()
    assert loaded[NETWORK_PAGE] == pages[NETWORK_PAGE]


def test_page_names_are_safe_distinct_and_stable():
    codes = ["NA", "na", "007", "A/B", "..", "", "Nørre 2", "North 2", "North-2", "x" * 300]
    names = page_names(codes)
    assert list(names) == codes and len(set(names.values())) == len(codes)
    for name in names.values():
        assert re.fullmatch(r"[a-z0-9-]{1,60}\.html", name), name
    assert page_names(["NA"]) == {"NA": names["NA"]}
    with pytest.raises(InputError, match="given twice"):
        page_names(["NA", "NA"])


def test_writing_replaces_the_report_and_saving_the_study_drops_it(demo_study, tmp_path):
    study, *_ = demo_study
    folder = study.save(tmp_path / "study")
    index = write_study_report(study, folder / REPORT_FOLDER)
    assert index == folder / REPORT_FOLDER / INDEX_PAGE and index.is_file()
    stale = folder / REPORT_FOLDER / "programs" / "program-gone-00000000.html"
    stale.write_text("old", encoding="utf-8")
    write_study_report(study, folder / REPORT_FOLDER)
    assert not stale.exists()
    assert len(list((folder / REPORT_FOLDER / "programs").iterdir())) == 16
    study.save(folder)
    assert not (folder / REPORT_FOLDER).exists()
