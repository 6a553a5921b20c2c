"""The push feed of estimates: EstimateFeed in the daemon, Subscriber in the client."""

from __future__ import annotations

import time

import msgpack
import pytest
import zmq
from harness import Sigmad, free_port
from sigmad.daemon.client import Producer, Subscriber
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.export.feed import EstimateFeed
from sigmad.daemon.ingest.wire import encode

STREAMS = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:%(pull)d"

[[stream]]
name = "pair"
topic = "pair"
fields = ["alpha", "beta"]
regression = { y = "beta", x = ["alpha"] }

[[stream]]
name = "pair2"
topic = "pair2"
fields = ["x"]
"""


def _connected(sub: Subscriber, feed: EstimateFeed, e: Engine) -> None:
    """Publish until the SUB socket's subscription has reached the PUB (slow joiner)."""
    deadline = time.monotonic() + 5.0
    while time.monotonic() < deadline:
        feed._last, feed._blocks = {}, {}
        feed.send_changes(e.snapshot, 1.0)
        if sub.receive(timeout=0.05) is not None:
            while sub.receive(timeout=0.05) is not None:
                pass
            return
    raise AssertionError("the subscription never reached the feed")


def test_feed_sends_changed_series_only_and_the_subscriber_filters_by_stream():
    ctx = zmq.Context()
    port = free_port()
    e = Engine(parse_config(STREAMS % {"pull": free_port()}))
    e.ingest(b"pair", encode({"alpha": [1.0, 2.0, 3.0, 4.0], "beta": [2.0, 4.1, 5.9, 8.2]}),
             now=1.0)
    e.ingest(b"pair2", encode({"x": [1.0, 2.0]}), now=1.0)
    e.flush(1.0)
    feed = EstimateFeed(ctx, (f"tcp://127.0.0.1:{port}",))
    with Subscriber(f"tcp://127.0.0.1:{port}", ["pair"], context=ctx) as sub:
        _connected(sub, feed, e)
        e.ingest(b"pair", encode({"alpha": 5.0, "beta": 9.0}), now=2.0)
        e.ingest(b"pair2", encode({"x": 3.0}), now=2.0)
        e.flush(2.0)
        assert feed.send_changes(e.snapshot, 2.0) == 2
        got = sub.receive(timeout=2.0)
        assert got.stream == "pair" and got.series["observations"] == 5
        assert got.series["mean"] == [3.0, pytest.approx(5.84)]
        assert got.series["regression"]["latest"] == [5.0, 9.0]
        assert sub.receive(timeout=0.2) is None       # pair2 is filtered out
        assert feed.send_changes(e.snapshot, 2.5) == 0   # nothing changed
    feed.close()
    ctx.term()


def test_series_in_columns_are_sent_when_they_change_and_not_otherwise():
    # 500 series of a plain stream (kept in columns): each flush sends exactly the
    # series it changed, found by their versions; series that expire and come back
    # are sent again
    ctx = zmq.Context()
    e = Engine(parse_config(STREAMS.replace('topic = "pair2"', 'topic = "pair2.{k}"')
                            .replace('fields = ["x"]', 'fields = ["x"]\nidle_expiry = "5s"')
                            % {"pull": free_port()}))
    feed = EstimateFeed(ctx, (f"tcp://127.0.0.1:{free_port()}",))

    def send(ks, now):
        topics = [f"pair2.k{k}".encode() for k in ks]
        e.ingest_many(topics, [encode({"x": float(now)})] * len(topics), now)
        e.flush(now)
        return feed.send_changes(e.snapshot, now)

    assert e.stream("pair2").store is not None
    assert send(range(500), 1.0) == 500
    assert send([], 2.0) == 0
    assert send([3, 7, 499], 3.0) == 3
    assert send(range(0, 40, 2), 8.0) == 20
    assert e.expire_idle(9.0) == 480
    e.flush(9.0)
    assert feed.send_changes(e.snapshot, 9.0) == 20   # rows renumbered: all sent again
    assert send([1], 10.0) == 1
    feed.close()
    ctx.term()


def test_subscriber_refuses_another_format():
    ctx = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    port = pub.bind_to_random_port("tcp://127.0.0.1")
    with Subscriber(f"tcp://127.0.0.1:{port}", context=ctx) as sub:
        body = msgpack.packb({"format": 2, "sent_at": 0.0, "series": {}})
        with pytest.raises(ValueError, match="format 2 is not 1"):
            deadline = time.monotonic() + 5.0
            while time.monotonic() < deadline:
                pub.send_multipart([b"sigmad.estimates.x.", body])
                sub.receive(timeout=0.05)
    pub.close(0)
    ctx.term()


@pytest.mark.slow
def test_a_subscriber_receives_estimates_within_two_flush_intervals(tmp_path):
    flush = 0.25
    pull, feed = free_port(), free_port()
    config = (f'[daemon]\nhttp = "{{HTTP}}"\nflush_every = "{int(flush * 1000)}ms"\n'
              + STREAMS % {"pull": pull} + f'\n[feed]\nbind = "tcp://127.0.0.1:{feed}"\n')
    d = Sigmad(tmp_path, config)
    try:
        with Producer(f"tcp://127.0.0.1:{pull}") as p, \
                Subscriber(f"tcp://127.0.0.1:{feed}", ["pair"]) as sub:
            deadline = time.monotonic() + 10.0
            while sub.receive(timeout=0.1) is None:   # until the subscription is live
                assert time.monotonic() < deadline, "no estimates arrived at all"
                p.send("pair", {"alpha": 1.0, "beta": 2.0})
            time.sleep(2 * flush)
            while sub.receive(timeout=0.01) is not None:
                pass
            latencies = []
            for k in range(5):
                sent = time.time()
                p.send("pair", {"alpha": 100.0 + k, "beta": 7.0})
                got = sub.receive(timeout=5.0)
                while got is not None and got.series["regression"]["latest"][0] != 100.0 + k:
                    got = sub.receive(timeout=5.0)
                assert got is not None
                latencies.append(time.time() - sent)
                time.sleep(0.1)
            print(f"feed latency: {[round(x * 1000) for x in latencies]} ms, "
                  f"flush interval {flush * 1000:g} ms")
            assert max(latencies) <= 2 * flush
    finally:
        assert d.stop() == 0
