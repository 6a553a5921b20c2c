"""The examples in docstrings (estimators and daemon) run and give what they show."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest
import sigmad.daemon
import sigmad.estimators

MODULES = sorted(m.name for pkg in (sigmad.estimators, sigmad.daemon)
                 for m in pkgutil.walk_packages(pkg.__path__, pkg.__name__ + ".")
                 if not m.name.endswith("__main__"))


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name: str) -> None:
    result = doctest.testmod(importlib.import_module(name), optionflags=doctest.ELLIPSIS)
    assert result.failed == 0


def test_every_public_estimator_shows_an_example() -> None:
    finder = doctest.DocTestFinder()
    for name in ("Moments", "Regression", "Mixture"):
        tests = finder.find(getattr(sigmad.estimators, name))
        assert any(t.examples for t in tests), name
