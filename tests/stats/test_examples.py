"""The Examples sections of the core statistics docstrings run as written."""

from __future__ import annotations

import doctest
import importlib

import pytest

MODULES = ["scores", "calibration", "discrimination", "logistic", "summary"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name: str) -> None:
    module = importlib.import_module(f"plumbwatch.stats.{name}")
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0
