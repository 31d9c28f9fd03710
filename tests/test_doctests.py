"""The examples in public docstrings run and print what they say."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import asof_join

MODULES = sorted(
    name
    for _, name, _ in pkgutil.walk_packages(asof_join.__path__, "asof_join.")
    if not name.endswith(("engines.spark", "cli"))
)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name: str) -> None:
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0
