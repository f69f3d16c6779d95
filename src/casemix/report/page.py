"""Building blocks of a self-contained HTML page: sections, tables, facts and inline SVG figures.

The report and the audit page share these. A page is one HTML document with inline CSS and
inline SVG, no scripts and a Content-Security-Policy that forbids every outside request, so it
opens offline in any browser and cannot fetch anything even if a value were mis-escaped.
Every value that comes from data is escaped: Jinja2 autoescapes the page template, and the
fragments built here go through :func:`markupsafe.escape` or :meth:`markupsafe.Markup.format`.

The SVG clean-up (:func:`figure_svg`) is hand-written because matplotlib writes a standalone
SVG file, not a fragment for embedding: several figures in one document would otherwise share
element ids, and matplotlib copies label text into XML comments that must not reach the page.
"""

from __future__ import annotations

import hashlib
import io
import math
import numbers
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import jinja2
import matplotlib
import pandas as pd
from markupsafe import Markup, escape

from casemix.errors import InputError

__all__ = [
    "Markup",
    "Section",
    "anchor_for",
    "facts_html",
    "figure_svg",
    "render_page",
    "table_html",
]

_ENV = jinja2.Environment(
    loader=jinja2.PackageLoader("casemix.report", "templates"),
    autoescape=True,
    undefined=jinja2.StrictUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
    keep_trailing_newline=True,
)

MISSING = "–"
"""How a missing value is shown in tables and facts (an en dash)."""


def anchor_for(text: str, prefix: str = "") -> str:
    """Return an HTML id made of ASCII letters, digits and hyphens from ``text``.

    Parameters
    ----------
    text : str
        Any title or code.
    prefix : str, default ""
        Put in front (with a hyphen) so that ids of different kinds cannot collide.
    """
    slug = re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-") or "section"
    return f"{prefix}-{slug}" if prefix else slug


@dataclass(frozen=True)
class Section:
    """One top-level part of a page.

    Parameters
    ----------
    title : str
        Heading, plain text (escaped when rendered).
    html : str
        The body, trusted HTML built from escaped fragments (tables, figures, paragraphs).
    anchor : str, default ""
        The id used by the contents list; derived from ``title`` when empty.
    """

    title: str
    html: str
    anchor: str = ""

    def __post_init__(self) -> None:
        if not self.anchor:
            object.__setattr__(self, "anchor", anchor_for(self.title))


def render_page(
    title: str,
    sections: Sequence[Section],
    *,
    cautions: Sequence[str],
    cautions_at: int = 0,
    cautions_title: str = "Read this first",
    summary: str | None = None,
    footer: str | None = None,
) -> str:
    """Render one self-contained HTML document.

    Parameters
    ----------
    title : str
        Page title and top heading (plain text).
    sections : sequence of Section
        The parts, in order; each gets an entry in the contents list.
    cautions : sequence of str
        Plain sentences shown as their own part, in a box.
    cautions_at : int, default 0
        Position of the cautions among the sections (0 = before the first section).
    cautions_title : str, default "Read this first"
        Heading of the cautions part.
    summary : str, optional
        One line under the title.
    footer : str, optional
        One line at the end (for example the casemix version that made the page).

    Returns
    -------
    str
        The HTML document.
    """
    parts = list(sections)
    if cautions:
        box = Markup('<ul class="cautions">{}</ul>').format(
            Markup("").join(Markup("<li>{}</li>").format(c) for c in cautions)
        )
        position = min(max(cautions_at, 0), len(parts))
        parts.insert(position, Section(cautions_title, box, anchor="cautions"))
    anchors = [p.anchor for p in parts]
    if len(set(anchors)) != len(anchors):
        duplicated = sorted({a for a in anchors if anchors.count(a) > 1})
        raise InputError(
            f"section anchors must be unique on one page; repeated: {', '.join(duplicated)}. "
            "Give those sections distinct anchor= values."
        )
    template = _ENV.get_template("page.html")
    return template.render(
        title=title,
        summary=summary,
        footer=footer,
        sections=[(p.title, p.anchor, Markup(p.html)) for p in parts],
    )


_SVG_HEAD = re.compile(r"\A.*?(?=<svg\b)", re.DOTALL)
_SVG_DROP = re.compile(r"<!--.*?-->|<metadata>.*?</metadata>", re.DOTALL)
_SVG_ID = re.compile(r'(\bid=")([^"]+)(")')
_SVG_REF = re.compile(r'((?:xlink:)?href="#|url\(#)([^")]+)')


def figure_svg(fig: matplotlib.figure.Figure, *, alt: str = "") -> str:
    """Return a matplotlib figure as an ``<svg>`` fragment for inline use in HTML.

    The output is reproducible: the SVG hash salt is fixed and the date is left out. The XML
    prologue, metadata and comments are dropped (matplotlib copies label text into comments),
    and every element id is prefixed with a digest of the figure, so that several figures on
    one page do not share ids.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
        The figure; it is not closed or changed.
    alt : str, default ""
        Text alternative for screen readers (escaped).

    Returns
    -------
    str
        ``<svg ...>...</svg>``.
    """
    buffer = io.StringIO()
    with matplotlib.rc_context({"svg.hashsalt": "casemix", "svg.fonttype": "path"}):
        fig.savefig(buffer, format="svg", metadata={"Date": None})
    svg = _SVG_DROP.sub("", _SVG_HEAD.sub("", buffer.getvalue()))
    prefix = "f" + hashlib.sha256(svg.encode()).hexdigest()[:10] + "-"
    svg = _SVG_ID.sub(lambda m: f"{m[1]}{prefix}{m[2]}{m[3]}", svg)
    svg = _SVG_REF.sub(lambda m: f"{m[1]}{prefix}{m[2]}", svg)
    label = Markup(' role="img" aria-label="{}"').format(alt) if alt else ""
    return svg.replace("<svg ", f'<svg class="figure"{label} ', 1).strip()


Formatter = Callable[[object], str]


def _default_format(value: object) -> str:
    if isinstance(value, numbers.Integral) and not isinstance(value, bool):
        return f"{value:,}"
    if isinstance(value, numbers.Real) and not isinstance(value, bool):
        if math.isnan(value):
            return MISSING
        return f"{value:.4g}" if abs(value) < 1e6 else f"{value:,.0f}"
    return str(value)


def _cell(value: object, formatter: Formatter | str | None) -> Markup:
    """One value as escaped text: a DataFrame cell is always data, never trusted HTML.

    A :class:`markupsafe.Markup` stored in a DataFrame keeps its type in an ``object`` column
    but becomes a plain ``str`` in pandas 3's default string dtype, so trusting it would make
    the page depend on how pandas stores a column; it is escaped like any other text.
    """
    if value is None or (not isinstance(value, str) and pd.isna(value)):
        return Markup(MISSING)
    if isinstance(formatter, str):
        return escape(str(formatter.format(value)))
    return escape(str((formatter or _default_format)(value)))


def _is_numeric(series: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series)


def table_html(
    df: pd.DataFrame,
    *,
    formats: Mapping[str, Formatter | str] | None = None,
    headers: Mapping[str, str] | None = None,
    numeric: Sequence[str] = (),
    caption: str | None = None,
    index: bool = False,
    wide: bool = False,
    html: Mapping[str, Sequence[str]] | None = None,
) -> str:
    """Return a DataFrame as an HTML ``<table>``, every cell escaped.

    Parameters
    ----------
    df : pandas.DataFrame
        The rows, shown in their order.
    formats : mapping of column -> format string or callable, optional
        A format string such as ``"{:.2f}"`` or a function returning text. Other columns:
        integers with thousands separators, floats to 4 significant digits, text as is.
    headers : mapping of column -> str, optional
        Column headings to show instead of the column names.
    numeric : sequence of str, default ()
        Columns to right-align in addition to those with a numeric dtype (for example
        counts that were turned into text by :func:`~casemix.report.suppress_counts`).
    caption : str, optional
        Table caption.
    index : bool, default False
        Show the index as the first column.
    wide : bool, default False
        Let the table take the full width (headings wrap instead of the table scrolling).
    html : mapping of column -> sequence of str, optional
        Trusted HTML fragments (built from escaped parts) shown instead of the values of these
        columns, one per row in row order. They are passed beside the frame, never stored in
        it, so that no pandas dtype can turn them into text; the frame's own values of such a
        column still decide its alignment.

    Returns
    -------
    str
        ``<table>...</table>``. Missing values show as an en dash; every frame value is text
        and is escaped, whatever its type or the column's dtype.
    """
    frame = df.reset_index() if index else df
    formats = dict(formats or {})
    headers = dict(headers or {})
    trusted = {c: [Markup(h) for h in cells] for c, cells in (html or {}).items()}
    for c, cells in trusted.items():
        if c not in frame.columns or len(cells) != len(frame):
            raise ValueError(f"html column {c!r}: needs a frame column of that name and one "
                             f"fragment per row ({len(frame)}), got {len(cells)}")
    right = {c for c in frame.columns if _is_numeric(frame[c]) or c in numeric}
    head = Markup("").join(
        Markup('<th scope="col"{}>{}</th>').format(
            Markup(' class="num"') if c in right else "", headers.get(c, str(c))
        )
        for c in frame.columns
    )
    columns = [(c, formats.get(c), Markup(' class="num"') if c in right else "") for c in frame]
    rows = Markup("").join(
        Markup("<tr>{}</tr>").format(
            Markup("").join(
                Markup("<td{}>{}</td>").format(
                    cls, trusted[c][i] if c in trusted else _cell(value, fmt))
                for value, (c, fmt, cls) in zip(values, columns, strict=True)
            )
        )
        for i, values in enumerate(frame.itertuples(index=False, name=None))
    )
    cap = Markup("<caption>{}</caption>").format(caption) if caption else ""
    return str(
        Markup('<div class="table-wrap"><table{}>{}<thead><tr>{}</tr></thead>'
               "<tbody>{}</tbody></table></div>").format(
            Markup(' class="wide"') if wide else "", cap, head, rows)
    )


def facts_html(items: Sequence[tuple[str, object]]) -> str:
    """Return label/value pairs as a description list (``<dl>``), escaped.

    Parameters
    ----------
    items : sequence of (str, object)
        Labels and values; ``None`` and NaN show as an en dash, Markup values are kept.
    """
    body = Markup("").join(
        Markup("<dt>{}</dt><dd>{}</dd>").format(
            label, value if isinstance(value, Markup) else _cell(value, None))
        for label, value in items
    )
    return str(Markup('<dl class="facts">{}</dl>').format(body))
