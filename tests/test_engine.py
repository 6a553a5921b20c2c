"""The engine in-process: routing, micro-batches and state round trips."""

from __future__ import annotations

import msgpack
import numpy as np
import pytest
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.ingest.wire import encode


def _engine(text: str) -> Engine:
    return Engine(parse_config(text))


def test_export_then_restore_gives_identical_estimates(latency_and_pair):
    e = _engine(latency_and_pair)
    rng = np.random.default_rng(1)
    for t in range(20):
        e.ingest(b"lat.checkout", encode({"ms": rng.lognormal(2, 0.5, 30)}), now=1000.0 + t)
        e.ingest(b"px.east", encode({"a": rng.normal(size=10), "b": rng.normal(size=10)}),
                 now=1000.0 + t)
        e.flush(1000.0 + t)
    state = msgpack.unpackb(msgpack.packb(e.export_state()))
    fresh = _engine(latency_and_pair)
    assert fresh.restore_state(state, now=2000.0) == []
    assert fresh.snapshot.series.keys() == e.snapshot.series.keys()
    for key, view in e.snapshot.series.items():
        assert fresh.snapshot.series[key] == view   # every read-out equal, field by field


def test_restore_drops_series_whose_stream_changed_and_keeps_the_rest(latency_and_pair):
    e = _engine(latency_and_pair)
    e.ingest(b"lat.checkout", encode({"ms": [1.0, 2.0, 3.0]}), now=10.0)
    e.ingest(b"px.east", encode({"a": [1.0, 2.0, 3.0], "b": [2.0, 4.0, 7.0]}), now=10.0)
    e.flush(10.0)
    changed = latency_and_pair.replace('fields = ["a", "b"]', 'fields = ["a", "b", "c"]').replace(
        'x = ["a"]', 'x = ["a", "c"]')
    fresh = _engine(changed)
    dropped = fresh.restore_state(e.export_state(), now=11.0)
    assert len(dropped) == 1 and dropped[0][0].startswith("pair")
    assert "fields" in dropped[0][1]
    assert [v.stream for v in fresh.snapshot.series.values()] == ["lat"]


@pytest.mark.parametrize("bad", [{"stream": "lat"}, {"stream": 5}, "junk",
                                 {"stream": "lat", "labels": ["x"], "fields": ["ms"],
                                  "kinds": ["moments", "mixture"], "moments": {"kind": "no"}}])
def test_restore_survives_malformed_entries(bad, latency_and_pair):
    fresh = _engine(latency_and_pair)
    dropped = fresh.restore_state([bad], now=1.0)
    assert len(dropped) == 1
    assert fresh.snapshot.series == {}


def test_many_at_once_equals_one_by_one_for_every_message_shape(latency_and_pair):
    # the hot path (ingest_many) must give exactly what the general path gives
    rng = np.random.default_rng(7)
    shapes = [
        encode({"ms": 3.5}), encode(4.5), encode({"ms": 5.5}, weight=2.0, time=1000.5),
        encode({"ms": rng.lognormal(1, .5, 7)}), encode({"ms": list(rng.lognormal(1, .5, 5))},
                                                        binary=False),
        encode({"ms": 6.5}, source="p", seq=1), encode({"ms": 7.5}, source="p", seq=4),
        msgpack.packb({"values": {"ms": True}}), msgpack.packb({"values": {"ms": "x"}}),
        b"\xc1", encode({"ms": -1.0}),
        encode({"ms": rng.lognormal(1, .5, 4)}, weight=rng.uniform(.5, 2, 4)),
        encode({"ms": rng.lognormal(1, .5, 4)}, weight=rng.uniform(.5, 2, 3)),
        encode({"ms": rng.lognormal(1, .5, 4)}, weight=2.0),
        encode({"ms": [1.0, float("nan"), 3.0]}, weight=[1.0, 1.0, 0.0]),
    ]
    pair = [encode({"a": 1.0, "b": 2.0}), encode(3.0), encode([1.0, 2.0]),
            encode({"a": [1.0, 2.0], "b": [3.0, 4.0]}), encode({"a": 1.0}),
            encode({"a": 1.0, "b": [2.0]}), msgpack.packb({"values": {"a": 1, "b": None}})]
    frames = ([(b"lat.a", body) for body in shapes] + [(b"px.east", b) for b in pair]) * 3
    one, many = _engine(latency_and_pair), _engine(latency_and_pair)
    for e in (one, many):   # the series exist in both
        e.ingest(b"lat.a", encode({"ms": 1.0}), now=1000.0)
        e.ingest(b"px.east", encode({"a": 0.5, "b": 1.5}), now=1000.0)
    for topic, body in frames:
        one.ingest(topic, body, now=1001.0)
    many.ingest_many(*zip(*frames, strict=True), now=1001.0)
    one.flush(1002.0)
    many.flush(1002.0)
    assert many.snapshot.series == one.snapshot.series
    assert many.rejected == one.rejected and many.gaps == one.gaps
    assert many.messages == one.messages


def test_the_route_cache_keeps_recent_topics_within_its_byte_budget(latency_and_pair):
    # three times as many distinct 100-byte topics no stream takes as the cache can
    # count, one topic used now and then: the cache stays within ROUTE_CACHE_BYTES (as
    # it counts entries) and the topic in use keeps its cached route (least recently
    # used go first)
    from sigmad.daemon.engine.engine import _ROUTE_ENTRY_BYTES, ROUTE_CACHE_BYTES

    e = _engine(latency_and_pair)
    keep = e.route(b"lat.keep")
    assert keep is not None
    n = 3 * ROUTE_CACHE_BYTES // (2 * 100 + _ROUTE_ENTRY_BYTES)
    for i in range(n):
        assert e.route(b"n.%07d." % i + b"x" * 91) is None
        if i % 1000 == 0:
            assert e.route(b"lat.keep") is keep
    cached = [*e._routes, *e._older_routes]
    assert len(cached) < n // 2
    assert sum(2 * len(t) + _ROUTE_ENTRY_BYTES for t in cached) <= ROUTE_CACHE_BYTES


def test_a_topic_longer_than_max_topic_bytes_is_bad_topic_and_not_cached(latency_and_pair):
    e = _engine(latency_and_pair.replace('topic = "lat.{service}"', 'topic = "lat.{a}.{b}.{c}"'))
    label = "x" * 84                       # label values hold at most 128 characters
    ok = f"lat.{label}.{label}.{label[:-2]}".encode()
    assert len(ok) == 256                  # the default max_topic_bytes: taken
    long = ok + b"x"                       # one byte over: bad_topic
    assert e.ingest(long, encode({"ms": 1.0}), now=1000.0) == 0
    assert e.rejected == {"bad_topic": 1}
    assert long not in e.routes_seen and e.route(long) is None
    assert e.ingest(ok, encode({"ms": 1.0}), now=1000.0) == 1
