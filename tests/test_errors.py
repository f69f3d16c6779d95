"""Counted messages: one/many agree everywhere ("1 recipient id occurs", "2 ... occur")."""

from __future__ import annotations

import re
from pathlib import Path

from casemix.errors import plural

SRC = Path(__file__).resolve().parents[1] / "src" / "casemix"

# A plural(...) call in an f-string, then a verb that only agrees with a plural subject.
_PLURAL_CALL = r"plural\((?:[^()]|\([^()]*\))*\)"
_PLURAL_VERB = re.compile(_PLURAL_CALL + r"\}\s*(are|were|have|do|occur|lie|hold|fall|differ|"
                          r"remain|need|repeat|exceed)\b")
# A bare count in an f-string right before a plural noun: "{n} rows", "{len(x)} programs".
_BARE_COUNT = re.compile(r"\{(?:len\([^()]*\)|n_\w+|\w+\.n(?:_\w+)?|\w+\.size|n)\}\s+"
                         r"(rows|records|recipients|programs|events|columns|values|terms|times|"
                         r"ids|coefficients|lines|files|levels|covariates)\b")


def _findings(pattern: re.Pattern[str], text: str) -> list[str]:
    return [m.group(0) for m in pattern.finditer(text)]


def test_plural_and_the_verb_that_agrees():
    assert plural(1, "row") == "1 row" and plural(3, "row") == "3 rows"
    assert plural(0, "row") == "0 rows"
    assert plural(1, "recipient id", ("occurs", "occur")) == "1 recipient id occurs"
    assert plural(2, "recipient id", ("occurs", "occur")) == "2 recipient ids occur"


def test_the_scan_catches_a_count_that_does_not_agree():
    # The slip the check exists for, and a bare count; the mended forms pass.
    wrong = (
        "f\"{plural(len(groups), 'recipient id')} occur more than once\"\n"
        'f"{len(result.frame)} records read"\n'
    )
    assert _findings(_PLURAL_VERB, wrong) == ["plural(len(groups), 'recipient id')} occur"]
    assert _findings(_BARE_COUNT, wrong) == ["{len(result.frame)} records"]
    right = "f\"{plural(len(groups), 'recipient id', ('occurs', 'occur'))} more than once\"\n"
    assert _findings(_PLURAL_VERB, right) == _findings(_BARE_COUNT, right) == []


def test_no_message_in_the_package_miscounts():
    found = {}
    for path in sorted(SRC.rglob("*.py")):
        text = path.read_text(encoding="utf-8")
        hits = _findings(_PLURAL_VERB, text) + _findings(_BARE_COUNT, text)
        if hits:
            found[str(path.relative_to(SRC))] = hits
    assert found == {}
