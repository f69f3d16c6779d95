"""The audit page: plain headings and labels, the four figures, scrolling tables."""

from __future__ import annotations

import re
import warnings

import pytest
from markupsafe import escape

from casemix.audit import run_audit
from casemix.data.records import read_records
from casemix.data.spec import load_spec
from casemix.demo import COHORT_CUTOFF, REFERENCE_CUTOFF, REFERENCE_WINDOW, generate
from casemix.model.reference import fit_reference
from casemix.report.audit_page import TABLES, audit_html


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    folder = tmp_path_factory.mktemp("page")
    network = generate()  # the invented demo network, a third of its reference
    (folder / "spec.toml").write_text(network.spec_text, encoding="utf-8")
    network.reference.iloc[::3].to_csv(folder / "reference.csv", index=False)
    network.cohort.to_csv(folder / "cohort.csv", index=False)
    spec = load_spec(folder / "spec.toml")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reference = read_records(folder / "reference.csv", spec, cutoff=REFERENCE_CUTOFF)
        cohort = read_records(folder / "cohort.csv", spec, cutoff=COHORT_CUTOFF)
        model = fit_reference(reference, spec, cutoff=REFERENCE_CUTOFF, window=REFERENCE_WINDOW)
        audit = run_audit(reference, model, cohort, bootstrap=4, seed=2, map_fn=map)
    return audit_html(audit), audit


def test_headings_and_column_labels_are_plain(page, strict_html):
    html, audit = page
    strict_html(html)
    for name, (heading, _) in TABLES.items():
        if name in audit.tables:
            assert f"<h3>{escape(heading)}</h3>" in html, name
    headers = re.findall(r'<th scope="col"[^>]*>([^<]*)</th>', html)
    assert headers and not [h for h in headers if "_" in h]  # no raw column names
    assert "p-value" in headers and "<h3>ph</h3>" not in html


def test_figures_beside_the_tables(page):
    html, _ = page
    for alt in ("beta(t) against time, one panel per model term",
                "Observed against expected events by risk group",
                "Bootstrap distribution of each program&#39;s expected events",
                "Each program&#39;s hazard-ratio interval under each prior"):
        assert f'aria-label="{alt}"' in html, alt
    # every table sits in a box that scrolls sideways
    assert html.count("<table") == html.count('<div class="table-wrap"><table')
