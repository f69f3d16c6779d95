"""Refit the bundled demo reference models from the invented Lorran Valley network.

Run from the repository root: ``python models/regenerate.py``. The data are generated with a
fixed seed and the fit is deterministic, so the files come out byte-identical each time
(tests/test_bundled_models.py checks that).
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

from casemix import demo, fit_reference, read_records

MODELS = {
    "lorran_valley_graft_failure_365.json": ("graft_failure", 365),
    "lorran_valley_graft_failure_1095.json": ("graft_failure", 1095),
    "lorran_valley_death_365.json": ("death", 365),
}


def regenerate(folder: Path) -> list[Path]:
    """Fit every bundled model on the demo reference population and write it into ``folder``."""
    with tempfile.TemporaryDirectory() as scratch:
        paths = demo.write_demo(scratch)
        records = read_records(paths["reference"], paths["spec"], cutoff=demo.REFERENCE_CUTOFF)
        written = []
        for name, (outcome, horizon) in MODELS.items():
            model = fit_reference(
                records,
                records.spec,
                outcome,
                horizon,
                demo.REFERENCE_CUTOFF,
                window=demo.REFERENCE_WINDOW,
            )
            written.append(model.save(folder / name))
    return written


if __name__ == "__main__":
    target = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).parent
    for path in regenerate(target):
        print(path)
