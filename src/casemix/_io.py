"""Atomic file writes, file fingerprints and CSV reading shared by the stages that use files."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import Any

import pandas as pd

__all__ = [
    "atomic_write_bytes",
    "atomic_write_text",
    "read_csv_as_written",
    "replace_folder",
    "sha256_file",
    "write_csv",
    "write_json",
]

# The strings read_csv takes as missing by default (pandas documentation of `na_values`).
_DEFAULT_NA = ("", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND",
               "1.#QNAN", "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null")


def atomic_write_bytes(path: str | Path, data: bytes) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder, then rename.

    A reader never sees a half-written file, and a failed write leaves the old file in place.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(handle, "wb") as out:
            out.write(data)
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp creates 0600; give the usual permissions
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def _umask() -> int:
    current = os.umask(0)
    os.umask(current)
    return current


def atomic_write_text(path: str | Path, text: str) -> Path:
    """Write UTF-8 text atomically (see :func:`atomic_write_bytes`)."""
    return atomic_write_bytes(path, text.encode("utf-8"))


def write_json(path: str | Path, obj: Any) -> Path:
    """Write ``obj`` as indented, key-sorted JSON (stable bytes for the same content)."""
    return atomic_write_text(
        path, json.dumps(obj, indent=2, sort_keys=True, allow_nan=False) + "\n"
    )


def write_csv(path: str | Path, frame: pd.DataFrame, *, exact: bool = False) -> Path:
    """Write a DataFrame as CSV without its index, atomically.

    Floats are written with 10 significant digits, or with ``exact`` as the shortest text
    that reads back to the same float (so that a file read back gives the same numbers, and
    what is computed from them the same results).
    """
    return atomic_write_text(
        path, frame.to_csv(index=False, lineterminator="\n",
                           float_format=None if exact else "%.10g")
    )


# pandas < 3 parses floats round-trip only when asked; pandas 3 does by default.
_ROUND_TRIP = {"float_precision": "round_trip"} if int(pd.__version__.split(".")[0]) < 3 else {}


def read_csv_as_written(path: str | Path, text_columns: Sequence[str]) -> pd.DataFrame:
    """Read a CSV file, keeping ``text_columns`` exactly as written.

    A program coded ``NA`` or an empty code stays that text; the other columns are read as
    ``read_csv`` reads them by default, except that floats are parsed round-trip (pandas'
    default parser can be one unit in the last place off, and a loaded evaluation would then
    render different bytes; pandas 3 parses round-trip by default and deprecates the option).
    ``converters={column: str}`` is not enough: from
    pandas 3 on the missing-value check also runs on converted values, so ``NA`` and ``""``
    would become NaN there and a program would vanish from the report.

    Parameters
    ----------
    path : str or Path
        The CSV file.
    text_columns : sequence of str
        Columns read as text with no value taken as missing (absent ones are ignored).
    """
    header = pd.read_csv(path, nrows=0).columns
    text = [c for c in header if c in text_columns]
    return pd.read_csv(path, dtype=dict.fromkeys(text, str), keep_default_na=False,
                       **_ROUND_TRIP,
                       na_values={c: list(_DEFAULT_NA) for c in header if c not in text})


def sha256_file(path: str | Path) -> str:
    """Return the hex sha256 of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as source:
        for chunk in iter(lambda: source.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def replace_folder(folder: str | Path, write: Callable[[Path], None], *, owned: Iterable[str],
                   allowed: Iterable[str] = ()) -> Path:
    """Write a folder's files as a whole: into a temporary sibling folder, then swap it in.

    ``write(tmp)`` writes every file into ``tmp``. An existing ``folder`` is accepted when it
    is empty, holds ``run.json`` (written by casemix), or holds only names in ``owned`` or
    ``allowed``; otherwise it is refused, so that files of another kind are never mixed with
    new results. On the swap, every ``owned`` entry of the old folder (including stale ones
    the new run did not write, such as a report of another outcome) is replaced by the new
    folder's; other entries (inputs kept beside the results) are moved over unchanged. A
    failed ``write`` leaves the old folder as it was and no temporary folder behind.

    Raises
    ------
    InputError
        ``folder`` is a file, or a non-empty folder that casemix did not write.
    """
    from casemix.errors import InputError

    folder = Path(folder).absolute()
    owned, allowed = set(owned), set(allowed)
    if folder.exists() and not folder.is_dir():
        raise InputError(f"output folder '{folder}' is a file; choose a folder.")
    present = sorted(p.name for p in folder.iterdir()) if folder.is_dir() else []
    foreign = [n for n in present if n not in owned | allowed]
    if foreign and "run.json" not in present:
        shown = ", ".join(foreign[:5]) + (" ..." if len(foreign) > 5 else "")
        raise InputError(
            f"output folder '{folder}' is not empty ({shown}) and is not a casemix folder "
            "(it has no run.json); choose a new or empty folder so that results are not "
            "mixed with other files."
        )
    folder.parent.mkdir(parents=True, exist_ok=True)
    new = Path(tempfile.mkdtemp(dir=folder.parent, prefix=f".{folder.name}.", suffix=".new"))
    try:
        write(new)
        for name in present:
            if name not in owned:  # inputs kept beside the results move over unchanged
                os.replace(folder / name, new / name)
        if folder.is_dir():
            old = Path(tempfile.mkdtemp(dir=folder.parent, prefix=f".{folder.name}.",
                                        suffix=".old"))
            os.replace(folder, old / folder.name)
            os.replace(new, folder)
            shutil.rmtree(old)
        else:
            os.replace(new, folder)
    except BaseException:
        if new.is_dir():
            for name in present:  # give back what was moved before the failure
                if name not in owned and (new / name).exists():
                    os.replace(new / name, folder / name)
            shutil.rmtree(new, ignore_errors=True)
        raise
    return folder
