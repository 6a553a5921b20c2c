"""The two ZeroMQ ways to split load between daemons, end to end with real processes.

- by topic prefix: one PUB producer, each daemon's SUB source subscribes to some
  prefixes, so each series lives on exactly one daemon (its estimates are complete);
- by PUSH fan-out: one PUSH producer connected to several daemons' PULL binds,
  which ZeroMQ deals round-robin, so every daemon holds a share of the same series
  (pool them: test_prometheus_pooling.py, test_merge.py).

References: numpy on the raw values each daemon should have seen.
"""

from __future__ import annotations

import time

import numpy as np
import pytest
from conftest import PULL_DAEMON
from fleet import fan_out, start_shards, stop_all, total, wait_total
from harness import Sigmad, free_port, value
from sigmad.daemon.client import Producer
from sigmad.daemon.ingest.wire import encode

pytestmark = pytest.mark.slow   # real daemon subprocesses

STREAM = """
[[stream]]
name = "lat"
topic = "lat.{service}.{region}"
fields = ["ms"]
"""
SUB = """
[daemon]
http = "{HTTP}"
flush_every = "20ms"

[[source]]
socket = "sub"
connect = "tcp://127.0.0.1:%(pub)d"
topics = %(topics)s
""" + STREAM


def test_topic_prefix_sharding_puts_each_series_on_one_daemon(tmp_path):
    pub_port = free_port()
    eu = Sigmad(tmp_path, SUB % {"pub": pub_port, "topics": '["lat.checkout.eu", "lat.search."]'},
                name="eu.toml")
    us = Sigmad(tmp_path, SUB % {"pub": pub_port, "topics": '["lat.checkout.us"]'},
                name="us.toml")
    rng = np.random.default_rng(31)
    sent = {t: rng.lognormal(3.0, 0.4, 500) for t in
            ("lat.checkout.eu", "lat.checkout.us", "lat.search.eu", "lat.search.us")}
    try:
        with Producer(f"tcp://127.0.0.1:{pub_port}", socket="pub", bind=True) as p:
            time.sleep(1.0)   # PUB/SUB: subscriptions must reach the publisher first
            for topic, x in sent.items():
                for chunk in np.split(x, 5):
                    p.send(topic, {"ms": chunk})
        owner = {"lat.checkout.eu": eu, "lat.checkout.us": us, "lat.search.eu": eu,
                 "lat.search.us": eu}
        for topic, x in sent.items():
            _, service, region = topic.split(".")
            lab = {"stream": "lat", "service": service, "region": region}
            m = owner[topic].wait_for("sigmad_observations_total", 500, **lab)
            assert value(m, "sigmad_mean", **lab, field="ms") == pytest.approx(
                np.mean(x), rel=1e-12)                                              # numpy
            assert value(m, "sigmad_variance", **lab, field="ms") == pytest.approx(
                np.var(x, ddof=1), rel=1e-10)
            other = us if owner[topic] is eu else eu
            assert value(other.metrics(), "sigmad_observations_total", **lab) is None
    finally:
        stop_all([eu, us])


PULL = PULL_DAEMON + "\n" + STREAM


def test_push_fan_out_deals_every_message_to_exactly_one_daemon(tmp_path):
    shards = start_shards(tmp_path, PULL, 3)
    try:
        push = fan_out([s.pull for s in shards])
        x = np.random.default_rng(32).normal(100.0, 10.0, (300, 10))
        for row in x:
            push.send_multipart([b"lat.checkout.eu", encode({"ms": row})])
        push.close()
        lab = {"stream": "lat", "service": "checkout", "region": "eu"}
        wait_total(shards, "sigmad_observations_total", x.size, **lab)
        counts = [value(s.metrics(), "sigmad_observations_total", **lab) for s in shards]
        assert sum(counts) == x.size == total(shards, "sigmad_weight", **lab)
        # round-robin: each of the three gets a third of the 300 messages, give or take
        assert all(500 <= c <= 1500 for c in counts), counts
    finally:
        stop_all(shards)
