"""The package's public face: every name in ``cohort.__all__`` resolves (STYLE.md habit 2)."""

from __future__ import annotations

import doctest

import cohort


def test_every_public_name_resolves() -> None:
    for name in cohort.__all__:
        assert getattr(cohort, name) is not None, name


def test_package_docstring_example_runs() -> None:
    assert doctest.testmod(cohort).failed == 0
