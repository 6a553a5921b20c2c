"""Shared test helpers.

With SIGMAD_REQUIRE_ALL=1 (set by .ci/run) a missing reference library or
binary fails the test instead of skipping it, so CI cannot pass by skipping.
"""

from __future__ import annotations

import importlib
import os
import shutil

import pytest

REQUIRE_ALL = os.environ.get("SIGMAD_REQUIRE_ALL") == "1"

# an atheris harness run as a subprocess by test_hostile.py, not a test module
collect_ignore = ["fuzz_ingest.py"]


def need_module(name: str):
    """Import a test-only module, or skip (fail under SIGMAD_REQUIRE_ALL=1)."""
    try:
        return importlib.import_module(name)
    except ImportError as exc:
        if REQUIRE_ALL:
            pytest.fail(f"{name} is required in CI but cannot be imported: {exc}")
        pytest.skip(f"{name} not installed")


def need_binary(name: str) -> str:
    """Path of an external program, or skip (fail under SIGMAD_REQUIRE_ALL=1)."""
    path = shutil.which(name)
    if path is None:
        if REQUIRE_ALL:
            pytest.fail(f"{name} is required in CI but is not on PATH")
        pytest.skip(f"{name} not on PATH")
    return path


def lre(estimate: float, certified: float) -> float:
    """Log relative error: the number of correct significant digits, capped at 15
    (common practice in numerical-accuracy testing, as used with the NIST StRD)."""
    import math

    if estimate == certified:
        return 15.0
    if certified == 0.0:
        return min(15.0, -math.log10(abs(estimate)))
    return min(15.0, -math.log10(abs(estimate - certified) / abs(certified)))
