"""The bundled demo models in models/: they load, a fresh fit gives the same numbers, and
regenerating twice on one machine gives identical bytes."""

from __future__ import annotations

import importlib.util
import json
import math
import warnings
from pathlib import Path

import pytest

from casemix import ReferenceModel
from casemix.errors import ModelVersionWarning

MODELS = Path(__file__).resolve().parents[1] / "models"

# Numbers, not bytes, across machines. An independent check on two machines found the fit
# converges to the rounding floor: coefficients differ by at most 6e-12 relative; the largest
# relative differences (up to 9e-9) are in near-zero covariance entries and small case-mix
# offsets, where the absolute difference is at the rounding level of the larger entries
# beside them. So: a relative tolerance well above 9e-9, with an absolute floor for entries
# near 0. Any real change of the data or the fit moves these numbers far more (the first
# baseline step is 2.7e-4, coefficients are 1e-3 and up).
RTOL, ATOL = 1e-7, 1e-9
# Written from the running package, not from the fit: the version (an uninstalled tree says
# 0.0.0+unknown) and the checksum over every byte of the content.
NOT_NUMBERS = {"casemix_version", "checksum"}


def _regenerate_module():
    spec = importlib.util.spec_from_file_location("regenerate", MODELS / "regenerate.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _differences(ours: object, theirs: object, where: str = "") -> list[str]:
    """Every place where two JSON values differ beyond the tolerance (floats) or at all."""
    if isinstance(ours, dict) and isinstance(theirs, dict):
        if ours.keys() != theirs.keys():
            return [f"{where}: keys {sorted(ours)} != {sorted(theirs)}"]
        return [d for k in ours if where or k not in NOT_NUMBERS  # skipped at the top only
                for d in _differences(ours[k], theirs[k], f"{where}/{k}")]
    if isinstance(ours, list) and isinstance(theirs, list):
        if len(ours) != len(theirs):
            return [f"{where}: length {len(ours)} != {len(theirs)}"]
        return [d for i, (a, b) in enumerate(zip(ours, theirs, strict=True))
                for d in _differences(a, b, f"{where}[{i}]")]
    if isinstance(ours, float) and isinstance(theirs, float):
        same = math.isclose(ours, theirs, rel_tol=RTOL, abs_tol=ATOL)
        return [] if same else [f"{where}: {ours!r} != {theirs!r}"]
    return [] if (type(ours), ours) == (type(theirs), theirs) else [f"{where}: {ours!r} != "
                                                                     f"{theirs!r}"]


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory):
    """Two regenerations on this machine, in two folders."""
    regenerate = _regenerate_module()
    return [regenerate.regenerate(tmp_path_factory.mktemp(run)) for run in ("first", "second")]


@pytest.mark.slow
def test_regenerating_gives_the_bundled_numbers(regenerated):
    names = sorted(_regenerate_module().MODELS)
    assert sorted(p.name for p in regenerated[0]) == names
    for path in regenerated[0]:
        ours = json.loads(path.read_text(encoding="utf-8"))
        theirs = json.loads((MODELS / path.name).read_text(encoding="utf-8"))
        assert _differences(ours, theirs) == [], path.name


@pytest.mark.slow
def test_regenerating_twice_on_one_machine_gives_identical_bytes(regenerated):
    first, second = regenerated
    for a, b in zip(first, second, strict=True):
        assert a.name == b.name and a.read_bytes() == b.read_bytes(), a.name


def test_the_comparison_catches_a_changed_number_but_not_rounding():
    model = json.loads((MODELS / "lorran_valley_death_365.json").read_text(encoding="utf-8"))
    coef = model["coefficients"]["coef"]
    rounding = json.loads(json.dumps(model))
    rounding["coefficients"]["coef"][0] = coef[0] * (1 + 1e-9)  # the cross-machine size
    rounding["casemix_version"], rounding["checksum"] = "9.9", "0" * 40
    assert _differences(rounding, model) == []
    changed = json.loads(json.dumps(model))
    changed["coefficients"]["coef"][0] = coef[0] * (1 + 1e-5)
    changed["fit"]["events"] += 1
    assert _differences(changed, model) == [
        f"/coefficients/coef[0]: {coef[0] * (1 + 1e-5)!r} != {coef[0]!r}",
        f"/fit/events: {model['fit']['events'] + 1} != {model['fit']['events']}",
    ]


def test_bundled_models_load_with_their_outcome_and_horizon():
    regenerate = _regenerate_module()
    for name, (outcome, horizon) in regenerate.MODELS.items():
        with warnings.catch_warnings():
            # the file names the version that wrote it; a source tree or a newer release
            # differs, which is what this warning says and not under test here
            warnings.simplefilter("ignore", ModelVersionWarning)
            model = ReferenceModel.load(MODELS / name)
        assert (model.outcome, model.horizon_days) == (outcome, horizon)
        assert model.fit.converged
        assert model.fit.n_events > 0
