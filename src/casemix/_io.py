"""Atomic file writes and file fingerprints shared by every stage that writes output."""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from pathlib import Path
from typing import Any

import pandas as pd


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


def write_csv(path: str | Path, frame: pd.DataFrame) -> Path:
    """Write a DataFrame as CSV without its index, atomically, with a fixed float format."""
    return atomic_write_text(
        path, frame.to_csv(index=False, lineterminator="\n", float_format="%.10g")
    )


def sha256_file(path: str | Path) -> str:
    """Return the hex sha256 of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as source:
        for chunk in iter(lambda: source.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()
