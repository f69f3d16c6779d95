"""Tests of the page building blocks: sections, tables, facts and inline SVG figures."""

from __future__ import annotations

import re

import pandas as pd
import pytest
from matplotlib.figure import Figure

from casemix.errors import InputError
from casemix.report.page import (
    Markup,
    Section,
    anchor_for,
    facts_html,
    figure_svg,
    render_page,
    table_html,
)

HOSTILE = "<script>alert(1)</script>"


def _figure(label: str) -> Figure:
    fig = Figure(figsize=(2, 1.5))
    ax = fig.add_subplot()
    ax.plot([0, 1], [1, 0], label=label)
    ax.set_title(label)
    ax.legend()
    return fig


def test_section_anchor_defaults_to_a_slug_of_the_title():
    assert Section("Data quality", "<p>x</p>").anchor == "data-quality"
    assert Section("Data quality", "", anchor="dq").anchor == "dq"
    assert anchor_for("<LV 01>", prefix="program-3") == "program-3-lv-01"


def test_render_page_has_contents_cautions_in_place_and_parses(strict_html):
    sections = [Section("First part", "<p>one</p>"), Section("Second part", "<p>two</p>")]
    html = render_page("A title", sections, cautions=["Be careful."], cautions_at=1)
    parser = strict_html(html)
    assert parser.ids == ["first-part", "cautions", "second-part"]
    first, second = html.index('id="first-part"'), html.index('id="second-part"')
    assert first < html.index("Be careful.") < second
    assert html.count('href="#') == 3  # one contents entry per part
    assert "<script" not in html
    assert "default-src 'none'" in html  # the page may fetch nothing at all


def test_render_page_escapes_title_and_cautions():
    html = render_page(HOSTILE, [], cautions=[HOSTILE])
    assert HOSTILE not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html


def test_render_page_refuses_repeated_anchors():
    sections = [Section("Part", ""), Section("Part", "")]
    with pytest.raises(InputError, match=r"anchors must be unique.*repeated: part"):
        render_page("t", sections, cautions=[])


def test_table_html_escapes_formats_and_shows_trusted_html_given_beside_the_frame():
    frame = pd.DataFrame({
        "name": [HOSTILE, "plain"],
        "count": [1234, 5],
        "ratio": [0.123456, float("nan")],
        "chip": ["ok", "x"],
    })
    html = table_html(frame, formats={"ratio": "{:.2f}"}, headers={"count": "Count <n>"},
                      html={"chip": [Markup("<b>{}</b>").format(HOSTILE), Markup("<i>x</i>")]})
    assert HOSTILE not in html and "&lt;script&gt;" in html
    assert "Count &lt;n&gt;" in html
    assert "1,234" in html and "0.12" in html and "–" in html
    assert "<b>&lt;script&gt;" in html and "<i>x</i>" in html
    assert ">ok<" not in html  # the trusted fragment replaces the frame's value
    assert html.count('class="num"') == 2 + 2 * 2  # two numeric headings, four numeric cells


@pytest.mark.parametrize("dtype", [object, "string", "str"])
def test_table_html_treats_markup_in_a_frame_the_same_whatever_the_dtype(dtype):
    # pandas 3 stores text in a string dtype that turns Markup into plain str; an object
    # column keeps it. Either way a frame cell is data: escaped, never trusted.
    column = pd.Series([Markup("<b>ok</b>"), "plain"], dtype=object).astype(dtype)
    html = table_html(pd.DataFrame({"chip": column}))
    assert "<b>ok</b>" not in html and "&lt;b&gt;ok&lt;/b&gt;" in html


def test_table_html_refuses_trusted_html_that_does_not_fit_the_frame():
    frame = pd.DataFrame({"a": [1, 2]})
    with pytest.raises(ValueError, match="one fragment per row"):
        table_html(frame, html={"a": [Markup("<b>1</b>")]})
    with pytest.raises(ValueError, match="needs a frame column"):
        table_html(frame, html={"b": [Markup("1"), Markup("2")]})


def test_facts_html_escapes_values():
    html = facts_html([("Program", HOSTILE), ("Missing", None)])
    assert HOSTILE not in html and "<dd>–</dd>" in html


def test_figure_svg_is_reproducible_clean_and_ids_do_not_clash(strict_html):
    first = figure_svg(_figure(HOSTILE), alt="a plot")
    assert first == figure_svg(_figure(HOSTILE), alt="a plot")
    assert first.startswith("<svg ") and 'aria-label="a plot"' in first
    # No prologue, metadata, dates or comments (matplotlib copies label text into comments).
    for text in ("<?xml", "<!DOCTYPE", "<metadata", "<!--", "Date", HOSTILE):
        assert text not in first
    assert not re.search(r"""(?:src|href)\s*=\s*["']?(?:https?:)?//""", first)
    second = figure_svg(_figure("another"))
    page = render_page("t", [Section("a", first), Section("b", second)], cautions=[])
    strict_html(page)  # every id unique on the page and every #reference resolves
