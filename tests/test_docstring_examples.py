"""The Examples sections of every docstring in the package run and print what they show."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import volrecon

MODULES = sorted(info.name for info in pkgutil.walk_packages(volrecon.__path__, "volrecon.")
                 if not info.name.endswith("__main__"))


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name: str) -> None:
    module = importlib.import_module(name)
    # Reference: the doctest module of the standard library compares each example's output
    # with the text written beneath it in the docstring.
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE,
                             report=True)
    assert result.failed == 0, f"{result.failed} docstring example(s) of {name} failed"


def test_the_package_has_docstring_examples() -> None:
    finder = doctest.DocTestFinder()
    examples = sum(len(test.examples) for name in MODULES
                   for test in finder.find(importlib.import_module(name)))
    assert examples >= 18
