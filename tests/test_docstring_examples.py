"""The Examples sections of public docstrings run and give what they print."""

import doctest
import importlib

import pytest

MODULES = ["cabletree.grid", "cabletree.solver", "cabletree.solver.passive", "cabletree.channels"]


@pytest.mark.parametrize("name", MODULES)
def test_examples(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0, f"{name} has no examples"
    assert result.failed == 0
