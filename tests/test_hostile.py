"""Hostile and absurd input: a fuzz of the decoder and router, and extreme values.

Properties (hypothesis): no exception escapes ``Engine.ingest`` / ``flush``;
a rejected message changes no series state; allocation stays within the
configured limits (a msgpack header claiming a 2**31-item array or map is
refused at the header). Extreme but valid numbers give a counted rejection or
a finite state, never NaN or inf in ``export_state``.
"""

from __future__ import annotations

import math
import os
import struct
import subprocess
import sys
import tracemalloc

import msgpack
import numpy as np
import pytest
from conftest import need_module
from harness import ROOT
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.ingest.wire import encode

CONFIG = """
[daemon]
max_message_bytes = 4096
max_batch_rows = 64
max_clock_skew = "1h"

[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:1"

[[stream]]
name = "one"
topic = "a.{k}"
fields = ["v"]
quantiles = [0.5, 0.99]
outlier_sigmas = [3.0]
outlier_warmup = 2

[[stream]]
name = "pair"
topic = "p.{k}"
fields = ["x", "y"]
regression = { y = "y", x = ["x"] }
half_life = "10s"

[[stream]]
name = "mix"
topic = "m"
fields = ["v"]
mixture = { components = 2, warmup = 8 }
half_life = "50 obs"

[[stream]]
name = "lvl"
topic = "t.{k}"
fields = ["v", "z"]
thresholds = { v = [0.0, 1.0, 1e3, 1e90], z = [-5.0] }
half_life = "30s"
"""

NOW = 1.7e9
TOPICS = [b"a.x", b"a.y", b"p.z", b"m", b"t.q", b"nowhere", b"a", b"\xff\xfe", b""]


def engine() -> Engine:
    return Engine(parse_config(CONFIG))


def finite_everywhere(obj) -> bool:
    """True when every float inside a nested state dict is finite."""
    if isinstance(obj, float):
        return math.isfinite(obj)
    if isinstance(obj, dict):
        return all(finite_everywhere(v) for v in obj.values())
    if isinstance(obj, (list, tuple)):
        return all(finite_everywhere(v) for v in obj)
    return True


def state(e: Engine) -> list[dict]:
    return sorted(e.export_state(), key=lambda d: (d["stream"], d["labels"]))


numbers = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-2**63, 2**64 - 1))
scalars = st.one_of(numbers, st.text(max_size=5), st.binary(max_size=24), st.none(),
                    st.booleans())
values = st.one_of(
    scalars,
    st.lists(numbers, max_size=70),
    st.dictionaries(st.sampled_from(["v", "x", "y", "z"]),
                    st.one_of(numbers, st.lists(numbers, max_size=70),
                              st.binary(max_size=80)), max_size=4))
bodies_as_maps = st.fixed_dictionaries(
    {"values": values},
    optional={"weight": st.one_of(numbers, st.lists(numbers, max_size=70)),
              "time": st.one_of(numbers, st.floats(NOW - 1e4, NOW + 1e4),
                                st.lists(st.floats(NOW - 1e4, NOW + 1e4), max_size=70)),
              "source": scalars, "seq": st.one_of(st.integers(-5, 2**64 - 1), scalars)})
bodies = st.one_of(
    bodies_as_maps.map(lambda b: msgpack.packb(b, use_bin_type=True)),
    st.binary(max_size=300),
    # headers that claim huge containers: array32 / map32 / bin32 / str32 of 2**31 - 1
    st.sampled_from([b"\xdd", b"\xdf", b"\xc6", b"\xdb"]).map(
        lambda h: h + struct.pack(">I", 2**31 - 1) + b"\x00" * 8),
    st.binary(max_size=40).map(lambda tail: b"\x81\xa6values\xdd\x7f\xff\xff\xff" + tail),
)
messages = st.lists(st.tuples(st.sampled_from(TOPICS), bodies), min_size=1, max_size=12)

@pytest.mark.slow
@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(messages)
def test_fuzzed_messages_never_escape_and_rejections_change_nothing(batch):
    e = engine()
    # a little real history first, so a bad message has state to spoil
    e.ingest(b"a.x", encode({"v": [1.0, 2.0, 4.0]}), NOW)
    e.ingest(b"p.z", encode({"x": [1.0, 2.0, 3.0], "y": [2.0, 4.1, 5.9]}), NOW)
    e.ingest(b"t.q", encode({"v": [0.5, 2.0, 5e3], "z": [-9.0, 0.0, 1.0]},
                            weight=[1.0, 2.0, 0.5]), NOW)
    e.flush(NOW)
    for topic, body in batch:
        before = state(e)
        queued = e.ingest(topic, body, NOW)
        e.flush(NOW)
        after = state(e)
        if queued == 0:        # rejected (or an empty batch): no series changed or appeared
            assert after == before
        assert finite_everywhere(after)


def test_huge_container_headers_are_refused_without_allocating():
    e = engine()
    tracemalloc.start()
    try:
        for header in (b"\xdd", b"\xdf", b"\xc6", b"\xdb"):
            # msgpack spec: 0xdd array32, 0xdf map32, 0xc6 bin32, 0xdb str32
            body = header + struct.pack(">I", 2**31 - 1) + b"\x00" * 16
            assert e.ingest(b"a.x", body, NOW) == 0
            nested = b"\x81\xa6values" + body
            assert e.ingest(b"a.x", nested, NOW) == 0
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 1_000_000        # far below the 2 GB the headers claim
    assert e.export_state() == []


def test_extreme_values_are_rejected_by_reason_or_kept_finite():
    e = engine()
    tiny = 5e-324                      # the smallest subnormal float64 (IEEE 754)
    cases = [
        (b"a.x", {"v": [1e308, -1e308, 1e100, -1e100, 3.0]}, None, None),
        (b"a.x", {"v": [tiny, -tiny, 2.2e-308, 0.0]}, None, None),
        (b"a.w", {"v": [1.0, 2.0, 3.0, 4.0, 5.0]}, [1e300, 1e-320, 1e30, 1e30, 1e30], None),
        (b"a.x", {"v": [5.0, 6.0]}, None, [NOW + 1e12, NOW - 1e12]),
        (b"p.z", {"x": [1e308, 1e100, 2.0, tiny], "y": [1.0, -1e100, 1e99, tiny]},
         [1.0, 1e30, 1e30, 1e30], None),
        (b"p.z", {"x": [1.0, 2.0], "y": [3.0, 4.0]}, None, [NOW + 3000, NOW - 3000]),
        (b"m", {"v": [1e100, -1e100, 1e99, tiny, 0.0, 1.0, 2.0, 3.0, 1e308]}, None, None),
        (b"m", {"v": list(np.linspace(-1e100, 1e100, 20))}, [1e30] * 20, None),
    ]
    for topic, vals, w, t in cases:
        e.ingest(topic, encode(vals, weight=w, time=t), NOW)
        e.flush(NOW)
    # 1e308 twice in a.x, once in p.z and once in m: 4 values beyond the 1e100 bound
    assert e.rejected["out_of_range"] == 4
    assert e.rejected["bad_weight"] == 2          # 1e300 and 1e-320 in a.w
    assert e.rejected["clock_skew"] == 1          # -1e12 s, beyond the 1h bound
    assert e.rejected["future_time"] == 2         # +1e12 s and +3000 s, beyond 10 s ahead
    exported = e.export_state()
    assert {(d["stream"], tuple(d["labels"])) for d in exported} == {
        ("one", ("x",)), ("one", ("w",)), ("pair", ("z",)), ("mix", ())}
    assert finite_everywhere(exported)
    for view in e.snapshot.series.values():
        assert all(math.isfinite(v) for v in view.mean)
        # NaN only where the variance is undefined (Kish n_eff of 1: one row outweighs
        # the decayed rest), never an overflow to inf
        assert all(math.isfinite(v) or (math.isnan(v) and view.effective_samples < 1 + 1e-9)
                   for v in view.variance)
        assert math.isfinite(view.effective_samples) and view.effective_samples > 0
    w = next(v for v in e.snapshot.series.values() if v.labels == (("k", "w"),))
    # reference: numpy on the rows kept (3, 4, 5 with equal weights): mean 4, ddof=1 var 1
    assert math.isclose(w.mean[0], float(np.mean([3.0, 4.0, 5.0])), rel_tol=1e-12)
    assert math.isclose(w.variance[0], float(np.var([3.0, 4.0, 5.0], ddof=1)), rel_tol=1e-12)


def test_a_dwarfed_state_keeps_its_share_of_the_mean():
    from sigmad.estimators import Moments

    a = Moments()
    a.update([3e99], weights=[1e-60])
    a.update([1.0])
    # reference: numpy.average with the same weights (1e-60 * 3e99 + 1) / (1 + 1e-60)
    assert math.isclose(a.mean[0], float(np.average([3e99, 1.0], weights=[1e-60, 1.0])),
                        rel_tol=1e-12)


def test_largest_accepted_values_keep_numpy_moments():
    e = engine()
    x = np.array([1e100, -1e100, 5e99, 0.0])
    e.ingest(b"a.x", encode({"v": x}), NOW)
    e.flush(NOW)
    (view,) = e.snapshot.series.values()
    # reference: numpy mean and ddof=1 variance (reliability correction with unit weights)
    assert math.isclose(view.mean[0], float(np.mean(x)), rel_tol=1e-12)
    assert math.isclose(view.variance[0], float(np.var(x, ddof=1)), rel_tol=1e-12)


@pytest.mark.slow
def test_atheris_fuzz_of_ingest_finds_nothing(tmp_path):
    need_module("atheris")
    # seeds: a valid single observation, a batch, and a huge-header body
    corpus = tmp_path / "corpus"
    corpus.mkdir()
    (corpus / "one").write_bytes(b"\x00" + encode({"v": 1.5}))
    (corpus / "batch").write_bytes(b"\x01" + encode({"x": [1.0, 2.0], "y": [3.0, 4.0]}))
    (corpus / "huge").write_bytes(b"\x02\x81\xa6values\xdd\x7f\xff\xff\xff")
    r = subprocess.run([sys.executable, str(ROOT / "tests" / "fuzz_ingest.py"),
                        "-atheris_runs=20000", "-max_total_time=60", str(corpus)],
                       capture_output=True, text=True, timeout=180, cwd=tmp_path,
                       env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert r.returncode == 0, r.stderr[-3000:]
    assert "Done" in r.stderr


@pytest.mark.slow
@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(messages)
def test_the_hot_path_judges_fuzzed_messages_exactly_as_the_general_path(batch):
    # Engine.ingest_many (the daemon's drain) must never raise and must end in the
    # same state, counts and rejections as feeding the same messages one by one
    one, many = engine(), engine()
    for e in (one, many):
        e.ingest(b"a.x", encode({"v": [1.0, 2.0, 4.0]}), NOW)
        e.ingest(b"p.z", encode({"x": [1.0, 2.0, 3.0], "y": [2.0, 4.1, 5.9]}), NOW)
        e.flush(NOW)
    for topic, body in batch:
        one.ingest(topic, body, NOW)
    many.ingest_many(*zip(*batch, strict=True), NOW)
    one.flush(NOW)
    many.flush(NOW)
    assert state(many) == state(one)
    assert many.rejected == one.rejected and many.gaps == one.gaps
