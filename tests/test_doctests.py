"""The examples in the docstrings run as tests (each module listed must hold at least one)."""

import doctest
import importlib

import pytest

MODULES = ["pooling.stats", "pooling.model", "pooling.asked", "pooling.report.numbers"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE, verbose=False)
    assert result.attempted > 0, f"{name} has no docstring examples"
    assert result.failed == 0, f"{result.failed} of {result.attempted} docstring examples in {name} failed"
