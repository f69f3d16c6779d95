"""Write a public release: its tables, its run.json and its report, in a folder of its own.

The folder never holds a recipient-level file and is never the evaluation folder itself, so
the internal files (and the internal report, which keeps every figure) are not touched.
"""

from __future__ import annotations

from pathlib import Path

from casemix._io import atomic_write_text, write_csv, write_json
from casemix.errors import InputError
from casemix.evaluation.evaluate import Evaluation
from casemix.report.disclosure import make_release
from casemix.report.public_report import render_public_report

__all__ = ["PUBLIC_FOLDER", "write_public_release"]

PUBLIC_FOLDER = "public"
"""Default folder of a public release, inside the evaluation folder."""

def _check_target(folder: Path, out: Path) -> None:
    if out.resolve() == folder.resolve() or (out / "recipients.csv").is_file():
        raise InputError(
            f"{out}: holds (or is) an evaluation's internal files; a public release must go "
            f"to a folder of its own (default {folder / PUBLIC_FOLDER})."
        )


def write_public_release(folder: str | Path, n: int, out: str | Path | None = None,
                         *, log_expected: bool = False) -> Path:
    """Apply the disclosure rule to an evaluation folder and write the public release.

    Parameters
    ----------
    folder : str or Path
        The evaluation folder.
    n : int
        The threshold N (at least 2): counts from 1 to N - 1 are hidden, with every figure
        that gives them back (docs/disclosure.md).
    out : str or Path, optional
        The folder to write (created if missing); default ``folder / "public"``.
    log_expected : bool, default False
        Logarithmic E axis in the report's funnel plot.

    Returns
    -------
    Path
        ``out``, holding the files of :data:`~casemix.report.disclosure.PUBLIC_FILES`,
        ``withheld.csv`` (what was withheld and why), ``run.json`` and ``report.html``.

    Raises
    ------
    InputError
        For a bad folder or threshold, or an ``out`` that holds internal files.
    """
    folder = Path(folder)
    target = folder / PUBLIC_FOLDER if out is None else Path(out)
    _check_target(folder, target)
    release = make_release(Evaluation.load(folder), n)
    for name, table in release.tables.items():
        write_csv(target / name, table)
    write_csv(target / "withheld.csv", release.withheld)
    write_json(target / "run.json", release.run)
    atomic_write_text(target / "report.html",
                      render_public_report(release, log_expected=log_expected))
    return target
