"""Every docstring example in the package runs and gives what it shows."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import livematch

MODULES = sorted(m.name for m in pkgutil.walk_packages(livematch.__path__, "livematch."))


@pytest.mark.parametrize("name", MODULES)
def test_doctests_module_examples_hold(name: str) -> None:
    """The examples in the module's docstrings are correct."""
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0, f"{name}: {result.failed} of {result.attempted} examples failed"
