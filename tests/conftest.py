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


#: A latency stream with outliers and a log-normal mixture, and a two-field pair with a
#: regression: the configuration the in-process engine, render and page tests share.
LATENCY_AND_PAIR = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:7999"

[[stream]]
name = "lat"
topic = "lat.{service}"
fields = ["ms"]
half_life = "10m"
outlier_sigmas = [3.0]
mixture = { components = 2, log = true, warmup = 50 }
thresholds = [5.0, 10.0]

[[stream]]
name = "pair"
topic = "px.{venue}"
fields = ["a", "b"]
regression = { y = "b", x = ["a"] }
thresholds = { a = [0.0] }
"""


@pytest.fixture
def latency_and_pair() -> str:
    """TOML of :data:`LATENCY_AND_PAIR` (never bound: the tests drive the engine directly)."""
    return LATENCY_AND_PAIR


#: The head of an end-to-end configuration: the harness's HTTP port ("{HTTP}"), quick
#: flushes, and one PULL source on the port the test passes as ``%(pull)d``.
PULL_DAEMON = """[daemon]
http = "{HTTP}"
flush_every = "20ms"

[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:%(pull)d"
"""
