"""Run the numpydoc examples of cohort.stats as tests (STYLE.md habit 7)."""

from __future__ import annotations

import doctest
import importlib

import pytest

MODULES = [
    "cohort.stats._competing",
    "cohort.stats._cox",
    "cohort.stats._prediction",
    "cohort.stats._rates",
    "cohort.stats._recurrence",
    "cohort.stats._standard_populations",
    "cohort.stats._survival",
]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_run(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0, f"{name} has no examples"
    assert result.failed == 0
