"""The examples in tinyprop's docstrings run and print what they claim."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import tinyprop

MODULES = sorted(
    name for _, name, _ in pkgutil.walk_packages(tinyprop.__path__, prefix="tinyprop.")
    if not name.endswith("__main__")  # running those would start the command or the benchmark
)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE | doctest.ELLIPSIS)
    assert result.failed == 0, f"{result.failed} docstring example(s) failed in {name}"
