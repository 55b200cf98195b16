"""The docstring examples of the analyzers run as tests (as shapely's do)."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import latchwatch.analyzers as analyzers

MODULES = sorted(name for _, name, _ in pkgutil.walk_packages(analyzers.__path__, "latchwatch.analyzers."))


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    result = doctest.testmod(importlib.import_module(name), optionflags=doctest.ELLIPSIS)
    assert result.failed == 0, f"{name}: {result.failed} of {result.attempted} docstring examples failed"


def test_the_analyzers_have_docstring_examples():
    attempted = sum(doctest.testmod(importlib.import_module(n)).attempted for n in MODULES)
    assert attempted >= 5
