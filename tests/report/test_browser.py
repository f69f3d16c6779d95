"""The report in a real browser: headless Chromium renders it with no console message at all.

Console messages (errors, uncaught exceptions, Content-Security-Policy refusals of any outside
request) are read from Chromium's log on stderr, where each one is a line with ``:CONSOLE``.
The report has no scripts, so any console line is a failure. The first tests check that this
detection works on pages that are broken on purpose.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest
from matplotlib.image import imread

from casemix.report import render_page, write_report
from casemix.report.page import Markup, Section


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
