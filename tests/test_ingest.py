"""Framing on a real ZeroMQ socket: malformed messages never cost a good message."""

from __future__ import annotations

import time

import msgpack
import numpy as np
import pytest
import zmq
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.ingest.source import Source

CONFIG = """
[[source]]
socket = "pull"
bind = "inproc://framing-%d"

[[stream]]
name = "lat"
topic = "lat.{a}"
fields = ["ms"]
"""


def _junk(rng) -> list[bytes]:
    """A message with the wrong frame count, made of topic-like, body-like or random frames."""
    pick = [b"lat.good", b"lat.junk", msgpack.packb({"values": 9e9}), b"", b"\x81\xa1x\x01",
            bytes(rng.integers(0, 256, 12, dtype=np.uint8))]
    count = int(rng.choice([1, 3, 4, 5]))
    return [pick[int(rng.integers(len(pick)))] for _ in range(count)]


@pytest.mark.parametrize("seed", range(8))
def test_good_messages_survive_any_interleaving_of_bad_frame_counts(seed):
    rng = np.random.default_rng(seed)
    cfg = parse_config(CONFIG % seed)
    engine = Engine(cfg)
    ctx = zmq.Context.instance()
    source = Source(ctx, cfg.sources[0])
    push = ctx.socket(zmq.PUSH)
    push.connect(f"inproc://framing-{seed}")
    good = rng.normal(50.0, 5.0, 300)
    bad_messages = 0
    for value in good:
        while rng.random() < 0.3:
            push.send_multipart(_junk(rng))
            bad_messages += 1
        push.send_multipart([b"lat.good", msgpack.packb({"values": {"ms": float(value)}})])
    time.sleep(0.05)
    while source.drain(engine, 1000.0, limit=37):   # small drains: boundaries fall anywhere
        pass
    engine.flush(1000.0)
    push.close(0)
    source.close()
    view = engine.snapshot.series[("lat", (("a", "good"),))]
    # every good message arrived as itself: count, mean and variance as numpy's
    assert view.observations >= 300
    got = [v for k, v in engine.snapshot.series.items() if k[1] == (("a", "good"),)]
    assert len(got) == 1
    # junk whose first two frames imitate a message may add rows of 9e9 to lat.good
    # (its only body-like frame); every good row is there exactly once
    expected = np.concatenate([good, np.full(view.observations - 300, 9e9)])
    assert view.mean[0] == pytest.approx(np.mean(expected), rel=1e-12)   # numpy
    assert view.variance[0] == pytest.approx(np.var(expected, ddof=1), rel=1e-9)
    assert engine.rejected["bad_frames"] >= bad_messages


def test_one_frame_then_good_message_loses_nothing():
    cfg = parse_config(CONFIG % 99)
    engine = Engine(cfg)
    ctx = zmq.Context.instance()
    source = Source(ctx, cfg.sources[0])
    push = ctx.socket(zmq.PUSH)
    push.connect("inproc://framing-99")
    for v in (1.0, 2.0, 3.0):
        push.send_multipart([b"lat.good"])                                       # one frame
        push.send_multipart([b"lat.good", msgpack.packb({"values": v}), b"x"])   # three
        push.send_multipart([b"lat.good", msgpack.packb({"values": v})])         # good
    time.sleep(0.05)
    source.drain(engine, 1000.0)
    engine.flush(1000.0)
    push.close(0)
    source.close()
    view = engine.snapshot.series[("lat", (("a", "good"),))]
    # each good message once, and each three-frame message's first two frames once
    assert view.observations == 6
    assert view.mean[0] == pytest.approx(2.0, rel=1e-15)
    assert engine.rejected["bad_frames"] == 6   # 3 lone frames + 3 third frames
