"""The package's public surface: every name of __all__ resolves, loaded on first use."""

from __future__ import annotations

import importlib

import pytest

import casemix


def test_every_public_name_comes_from_its_module():
    for name in casemix.__all__:
        value = getattr(casemix, name)
        if name != "__version__":
            module = importlib.import_module(casemix._PUBLIC[name])
            assert value is getattr(module, name), name
    assert set(casemix.__all__) <= set(dir(casemix))
    assert casemix.evaluation.evaluate is casemix.evaluate  # the subpackage, as the README


def test_unknown_names_raise_attribute_error():
    with pytest.raises(AttributeError, match="no attribute 'fit_cox'"):
        casemix.fit_cox  # noqa: B018
