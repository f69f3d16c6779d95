"""Strict HTML parsing for the report tests."""

from __future__ import annotations

from collections import Counter
from html.parser import HTMLParser

import pytest

_VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
         "track", "wbr"}


class StrictHTML(HTMLParser):
    """Stdlib HTML parser that records unbalanced tags, repeated ids and broken #links."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.problems: list[str] = []
        self.ids: list[str] = []
        self.links: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self._attrs(attrs)
        if tag not in _VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self._attrs(attrs)

    def _attrs(self, attrs):
        for name, value in attrs:
            if name == "id":
                self.ids.append(value)
            if name in ("href", "xlink:href") and value and value.startswith("#"):
                self.links.append(value[1:])

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.problems.append(f"</{tag}> closes <{self.stack[-1] if self.stack else ''}>")
            return
        self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


def parse_strict(html: str) -> StrictHTML:
    """Parse ``html`` and fail the test on unbalanced tags, repeated ids or broken links."""
    parser = StrictHTML()
    parser.feed(html)
    parser.close()
    repeated = sorted(i for i, n in Counter(parser.ids).items() if n > 1)
    broken = sorted(set(parser.links) - set(parser.ids))
    assert not parser.problems, parser.problems[:5]
    assert parser.stack == [], parser.stack
    assert not repeated, repeated[:5]
    assert not broken, broken[:5]
    return parser


@pytest.fixture(scope="session")
def strict_html():
    """A function that parses HTML strictly (see :func:`parse_strict`)."""
    return parse_strict


@pytest.fixture(scope="session")
def demo_study(tmp_path_factory):
    """The demo's study plan run (casemix.demo, six analyses) and its inputs, saved.

    Returns (study, paths, reference records, cohort records, study folder).
    """
    import warnings

    from casemix import demo, read_records
    from casemix.errors import CasemixWarning
    from casemix.evaluation.study import evaluate_plan
    from casemix.model.plan import fit_plan

    paths = demo.write_demo(tmp_path_factory.mktemp("demo-study"))
    reference = read_records(paths["reference"], paths["spec"], cutoff=demo.REFERENCE_CUTOFF)
    cohort = read_records(paths["cohort"], paths["spec"], cutoff=demo.COHORT_CUTOFF)
    with warnings.catch_warnings():
        warnings.simplefilter("error", CasemixWarning)  # the demo plan warns of nothing
        study = evaluate_plan(cohort, fit_plan(reference), paths["rules"])
    folder = study.save(tmp_path_factory.mktemp("demo-study-out") / "study")
    return study, paths, reference, cohort, folder
