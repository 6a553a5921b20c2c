"""Three sigmad shards behind one PUSH fan-out, scraped by a real Prometheus running the
shipped SLO rules: the buckets pooled with ``sum by (le)`` are numpy's exact counts of
every row sent, and the recorded error ratio over 5 minutes is, within 0.1 percentage
point, numpy's share of the rows sent after Prometheus's first scrape that took longer
than 300 ms."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pytest
from conftest import PULL_DAEMON, need_binary
from fleet import Prometheus, fan_out, start_shards, stop_all, wait_total
from sigmad.daemon.ingest.wire import encode

pytestmark = pytest.mark.slow   # a real Prometheus

SLO_RULES = Path(__file__).resolve().parent.parent / "configs" / "prometheus" \
    / "sigmad-slo.rules.yml"
CONFIG = PULL_DAEMON + """

[[stream]]
name = "request_latency"
topic = "lat.{service}.{region}"
fields = ["ms"]
thresholds = [100.0, 300.0, 1000.0]
"""
LE = {"100.0": 100.0, "300.0": 300.0, "1000.0": 1000.0, "+Inf": np.inf}


def batches(rng, n_messages, rows=50):
    out, values = [], []
    for i in range(n_messages):
        x = rng.lognormal(5.0, 0.6, rows)
        region = ("eu", "us")[i % 2]
        out.append((f"lat.checkout.{region}".encode(), encode({"ms": x})))
        values.append(x)
    return out, np.concatenate(values)


def test_prometheus_pools_three_shards_buckets_and_records_the_error_ratio(tmp_path):
    prometheus = need_binary("prometheus")
    rng = np.random.default_rng(17)
    first, x1 = batches(rng, 40)
    second, x2 = batches(rng, 60)
    shards = start_shards(tmp_path, CONFIG, 3)
    try:
        push = fan_out([s.pull for s in shards])
        for topic, body in first:
            push.send_multipart([topic, body])
        for region in ("eu", "us"):   # the messages alternate between the two regions
            wait_total(shards, "sigmad_value_count", x1.size / 2, stream="request_latency",
                       service="checkout", region=region, field="ms")
        with Prometheus(prometheus, tmp_path, [f"127.0.0.1:{d.port}" for d in shards],
                        rules=(SLO_RULES,)) as prom:
            count = 'sum(sigmad_value_count{stream="request_latency"})'
            deadline = time.monotonic() + 30
            while prom.one(count) != x1.size:      # scraped before the second part
                assert time.monotonic() < deadline, "prometheus never scraped the shards"
                time.sleep(0.25)
            for topic, body in second:
                push.send_multipart([topic, body])
            push.close()
            x = np.concatenate([x1, x2])
            while prom.one(count) != x.size:
                assert time.monotonic() < deadline + 30, "prometheus never saw every row"
                time.sleep(0.25)
            pooled = dict((s["le"], v) for s, v in prom.query(
                'sum by (le) (sigmad_value_bucket{stream="request_latency", field="ms"})'))
            assert pooled == {le: float(np.sum(x <= b)) for le, b in LE.items()}   # numpy
            want = float(np.mean(x2 > 300.0))    # only the second part was an increase
            deadline = time.monotonic() + 30
            while True:
                got = prom.one('service:sigmad_latency_slo_errors:ratio_rate5m'
                               '{service="checkout"}')
                # rate() extrapolates each shard by its own scrape timing, so the pooled
                # ratio is a weighted mean of the shards' ratios: equal within 0.1 point
                if got is not None and abs(got - want) < 1e-3:
                    break
                assert time.monotonic() < deadline, f"error ratio {got}, numpy {want}"
                time.sleep(0.25)
    finally:
        stop_all(shards)
