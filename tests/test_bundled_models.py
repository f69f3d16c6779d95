"""The bundled demo models in models/ load, and regenerating them gives identical bytes."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import pytest

from casemix import ReferenceModel

MODELS = Path(__file__).resolve().parents[1] / "models"


def _regenerate_module():
    spec = importlib.util.spec_from_file_location("regenerate", MODELS / "regenerate.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.mark.slow
def test_regenerating_gives_byte_identical_files(tmp_path):
    regenerate = _regenerate_module()
    written = regenerate.regenerate(tmp_path)
    assert sorted(p.name for p in written) == sorted(regenerate.MODELS)
    for path in written:
        assert path.read_bytes() == (MODELS / path.name).read_bytes(), path.name


def test_bundled_models_load_with_their_outcome_and_horizon():
    regenerate = _regenerate_module()
    for name, (outcome, horizon) in regenerate.MODELS.items():
        model = ReferenceModel.load(MODELS / name)
        assert (model.outcome, model.horizon_days) == (outcome, horizon)
        assert model.fit.converged
        assert model.fit.n_events > 0
