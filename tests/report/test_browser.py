"""The report in a real browser: headless Chromium renders it as a person would see it.

Console messages (errors, uncaught exceptions, Content-Security-Policy refusals of any outside
request) are read from Chromium's log on stderr, where each one is a line with ``:CONSOLE``.
The report has no scripts, so any console line is a failure. What a person reads is taken
from the rendered DOM (``--dump-dom``): the visible text of every section must hold no markup
and must name every program and its verdict in words. The layout is measured at 1280 px
wide on a copy of the page made for the test only (the page's policy forbids scripts): a small
script there lists every element that sticks out to the right, except inside a table that
scrolls on its own. Each check is first shown to fail on a page broken on purpose.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pandas as pd
import pytest
from matplotlib.image import imread

from casemix.report import render_page, write_report
from casemix.report.page import Markup, Section
from casemix.report.plots import VERDICT_WORDS


def _find_chromium() -> str | None:
    found = shutil.which("chromium")
    if found:
        return found
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").is_file() else None


CHROMIUM = _find_chromium()
pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (no `chromium` on "
                       "PATH nor /usr/bin/chromium); install it with apt-get install chromium"),
]
_CONSOLE = re.compile(r":CONSOLE[:(]")


def _chromium(page: Path, profile: Path, *extra: str) -> tuple[str, list[str]]:
    command = [
        CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
        "--no-first-run", "--disable-background-networking", "--disable-component-update",
        "--disable-sync", f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0",
        *extra, page.as_uri(),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout, [line for line in done.stderr.splitlines() if _CONSOLE.search(line)]


def test_detects_a_script_error(tmp_path):
    page = tmp_path / "broken.html"
    page.write_text("<!DOCTYPE html><html><head><title>t</title></head><body>"
                    "<script>console.error('deliberate'); notDefinedAnywhere();</script>"
                    "</body></html>", encoding="utf-8")
    _, messages = _chromium(page, tmp_path / "profile", "--dump-dom")
    assert any("deliberate" in m for m in messages)
    assert any("Uncaught ReferenceError" in m for m in messages)


def test_page_policy_blocks_and_reports_outside_requests_and_scripts(tmp_path):
    # A page made with render_page whose body was (wrongly) given raw outside references.
    body = Markup('<img src="https://example.invalid/a.png" alt="">'
                  "<script>notDefinedAnywhere();</script>")
    page = tmp_path / "leaky.html"
    page.write_text(render_page("t", [Section("Part", body)], cautions=[]), encoding="utf-8")
    _, messages = _chromium(page, tmp_path / "profile", "--dump-dom")
    assert any("example.invalid" in m and "Content Security Policy" in m for m in messages)
    assert any("inline script" in m for m in messages)
    assert not any("ReferenceError" in m for m in messages)  # the script never ran


def test_report_renders_cleanly(evaluation_folder, tmp_path):
    report = write_report(evaluation_folder, tmp_path / "report.html")
    dom, messages = _chromium(report, tmp_path / "profile-dom", "--dump-dom")
    assert messages == []
    for code in ("LV01", "LV02", "LV03", "LV04", "LV05", "LV06"):
        assert f'id="program-{int(code[2:])}-{code.lower()}"' in dom
    assert dom.count("<svg") == 2 + 2 * 6  # funnel, caterpillar, two per program
    shot = tmp_path / "report.png"
    _, messages = _chromium(report, tmp_path / "profile-shot", f"--screenshot={shot}",
                            "--window-size=1280,2000")
    assert messages == []
    image = imread(shot)
    assert image.shape[:2] == (2000, 1280)
    assert image.std() > 0.05  # something was drawn, not a blank page


# -- what a person reads and sees ------------------------------------------------------------

MARKUP_AS_TEXT = ("<span", "<a href", "&lt;", "<td", "<div")
WIDTH = 1280


class _VisibleText(HTMLParser):
    """The text a reader sees in each <section> of a rendered DOM (no style, script, SVG)."""

    _HIDDEN = frozenset({"style", "script", "svg", "head", "title"})

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.sections: dict[str, list[str]] = {}
        self._section: str | None = None
        self._hidden = 0

    def handle_starttag(self, tag, attrs):
        if tag == "section":
            self._section = dict(attrs).get("id", "")
            self.sections[self._section] = []
        if tag in self._HIDDEN:
            self._hidden += 1

    def handle_endtag(self, tag):
        if tag in self._HIDDEN:
            self._hidden -= 1
        if tag == "section":
            self._section = None

    def handle_data(self, data):
        if self._section is not None and not self._hidden:
            self.sections[self._section].append(data)


def visible_text(dom: str) -> dict[str, str]:
    parser = _VisibleText()
    parser.feed(dom)
    return {anchor: " ".join(" ".join(parts).split()) for anchor, parts in parser.sections.items()}


def markup_shown_as_text(dom: str) -> dict[str, list[str]]:
    """Per section, the pieces of markup that a reader would see as text."""
    found = {}
    for anchor, text in visible_text(dom).items():
        hits = [m for m in MARKUP_AS_TEXT if m in text]
        if hits:
            found[anchor] = hits
    return found


# Run in a measuring copy only: every element whose right edge passes the viewport, unless a
# scrolling table wrapper around it holds it in.
_MEASURE = """<script>
addEventListener("load", () => {
  const width = document.documentElement.clientWidth;
  const out = [];
  for (const el of document.body.querySelectorAll("*")) {
    if (el.parentElement && el.parentElement.closest(".table-wrap")) continue;
    const right = el.getBoundingClientRect().right;
    if (right > width + 0.5) {
      const name = `${el.tagName.toLowerCase()}.${el.getAttribute("class") || ""}`;
      out.push(`${name} ${Math.round(right)}`);
    }
  }
  const pre = document.createElement("pre");
  pre.id = "measured";
  pre.textContent = JSON.stringify({width, scroll: document.documentElement.scrollWidth, out});
  document.body.append(pre);
});
</script>"""


def overflow(page: Path, tmp_path: Path) -> dict:
    """Lay ``page`` out at 1280 px in a copy that may run the measuring script."""
    html = page.read_text(encoding="utf-8")
    html = re.sub(r'<meta http-equiv="Content-Security-Policy"[^>]*>', "", html)
    copy = tmp_path / f"measure-{page.name}"
    copy.write_text(html.replace("</body>", _MEASURE + "</body>", 1), encoding="utf-8")
    dom, _ = _chromium(copy, tmp_path / f"profile-{page.stem}", "--dump-dom",
                       f"--window-size={WIDTH},900", "--virtual-time-budget=5000")
    found = re.search(r'<pre id="measured">(.*?)</pre>', dom, re.S)
    assert found, "the measuring script did not run"
    return json.loads(found.group(1).replace("&quot;", '"'))


def _broken_page(tmp_path: Path) -> Path:
    # The slip of issue 9 (a cell's markup escaped into text) and a block wider than the page.
    escaped = ('&lt;a href="#p-1"&gt;LV01&lt;/a&gt; '
               '&lt;span class="verdict"&gt;excess&lt;/span&gt;')
    body = Markup(f"<p>{escaped}</p>") + Markup('<div style="width:1900px">wide</div>')
    page = tmp_path / "broken.html"
    page.write_text(render_page("t", [Section("Programs", body, anchor="programs")],
                                cautions=[]), encoding="utf-8")
    return page


def test_detects_markup_shown_as_text_and_overflow(tmp_path):
    page = _broken_page(tmp_path)
    dom, _ = _chromium(page, tmp_path / "profile", "--dump-dom")
    assert markup_shown_as_text(dom) == {"programs": ["<span", "<a href"]}
    measured = overflow(page, tmp_path)
    assert measured["scroll"] > WIDTH
    assert any(item.startswith("div. ") for item in measured["out"]), measured


def test_report_reads_as_text_and_fits_at_1280_px(evaluation_folder, tmp_path):
    report = write_report(evaluation_folder, tmp_path / "report.html")
    dom, messages = _chromium(report, tmp_path / "profile", "--dump-dom")
    assert messages == []
    text = visible_text(dom)
    assert {"evaluated", "programs", "scale", "each-program", "data-quality",
            "model"} <= set(text)
    assert markup_shown_as_text(dom) == {}
    programs = pd.read_csv(evaluation_folder / "programs.csv", dtype=str,
                           keep_default_na=False)
    glance = text["programs"]
    for code, verdict in zip(programs["program"], programs["verdict"], strict=True):
        assert code in glance and code in text["each-program"], code
        assert VERDICT_WORDS[verdict] in glance, verdict
    # each row of the glance table reads "code verdict-word ..." as in pandas 2
    for code, verdict in zip(programs["program"], programs["verdict"], strict=True):
        assert f"{code} {VERDICT_WORDS[verdict]}" in glance, code
    measured = overflow(report, tmp_path)
    assert measured["width"] <= WIDTH and measured["out"] == [], measured
    assert measured["scroll"] == measured["width"], measured
