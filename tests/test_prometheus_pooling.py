"""Three shards behind one PUSH fan-out, scraped by a real Prometheus running the shipped
recording rules; the pooled series are compared with one daemon that saw every message.

The reference is a separate sigmad fed the same message bodies (whose own estimates are
checked against numpy, pandas and statsmodels in test_daemon_e2e.py), plus numpy on the
raw values here.
"""

from __future__ import annotations

import time

import numpy as np
import pytest
import zmq
from conftest import PULL_DAEMON, need_binary
from fleet import Prometheus, fan_out, start_shards, stop_all, wait_total
from harness import Sigmad, free_port, value
from sigmad.daemon.ingest.wire import encode

pytestmark = pytest.mark.slow   # a real Prometheus

CONFIG = PULL_DAEMON + """

[[stream]]
name = "lat"
topic = "lat.{service}"
fields = ["ms", "bytes"]
correction = "%(correction)s"
"""
SERVICES = ("checkout", "search")


def _sel(**labels: str) -> str:
    return "{" + ",".join(f'{k}="{v}"' for k, v in labels.items()) + "}"

MESSAGES, ROWS = 60, 25   # per service


def _messages(seed: int = 11) -> tuple[list[tuple[bytes, bytes]], dict]:
    """Invented latency/size batches with trust weights; also the raw rows per service."""
    rng = np.random.default_rng(seed)
    out, raw = [], {s: ([], []) for s in SERVICES}
    for _ in range(MESSAGES):
        for s, loc in zip(SERVICES, (120.0, 40.0), strict=True):
            ms = rng.lognormal(np.log(loc), 0.4, ROWS)
            size = 2000.0 + 30.0 * ms + rng.normal(0, 300.0, ROWS)
            w = rng.uniform(0.5, 2.0, ROWS)
            out.append((f"lat.{s}".encode(), encode({"ms": ms, "bytes": size}, weight=w)))
            raw[s][0].append(np.column_stack((ms, size)))
            raw[s][1].append(w)
    return out, {s: (np.concatenate(x), np.concatenate(w)) for s, (x, w) in raw.items()}


@pytest.mark.parametrize("correction", ["reliability", "frequency"])
def test_prometheus_rules_pool_three_shards_exactly(tmp_path, correction):
    prometheus = need_binary("prometheus")
    messages, raw = _messages()
    cfg = dict(correction=correction)
    shards = start_shards(tmp_path, CONFIG, 3, **cfg)
    ref_port = free_port()
    ref = Sigmad(tmp_path, CONFIG % dict(cfg, pull=ref_port), name="reference.toml")
    try:
        push = fan_out([s.pull for s in shards])
        to_ref = zmq.Context.instance().socket(zmq.PUSH)
        to_ref.setsockopt(zmq.LINGER, 2000)
        to_ref.connect(f"tcp://127.0.0.1:{ref_port}")
        for topic, body in messages:
            push.send_multipart([topic, body])
            to_ref.send_multipart([topic, body])
        push.close()
        to_ref.close()
        n = MESSAGES * ROWS
        for s in SERVICES:
            wait_total(shards, "sigmad_observations_total", n, stream="lat", service=s)
            ref.wait_for("sigmad_observations_total", n, stream="lat", service=s)
        # the fan-out really split the load: every shard holds a share of every series
        for d in shards:
            for s in SERVICES:
                assert 0 < value(d.metrics(), "sigmad_observations_total", stream="lat",
                                 service=s) < n
        targets = [f"127.0.0.1:{d.port}" for d in shards]
        t0 = time.monotonic()
        with Prometheus(prometheus, tmp_path, targets) as prom:
            deadline = time.monotonic() + 30
            while not all(prom.one("stream:sigmad_observations:pooled"
                                   + _sel(stream="lat", service=s)) == n
                          for s in SERVICES):
                assert time.monotonic() < deadline, "recording rules never caught up"
                time.sleep(0.25)
            waited = time.monotonic() - t0
            m = ref.metrics()
            for s in SERVICES:
                lab = {"stream": "lat", "service": s}
                one = _sel(**lab)
                pooled_w = prom.one("stream:sigmad_weight:pooled" + one)
                assert pooled_w == pytest.approx(value(m, "sigmad_weight", **lab), rel=1e-12)
                assert prom.one("stream:sigmad_weight_squared:pooled" + one) == pytest.approx(
                    value(m, "sigmad_weight_squared", **lab), rel=1e-12)
                assert prom.one("stream:sigmad_effective_samples:pooled" + one) == \
                    pytest.approx(value(m, "sigmad_effective_samples", **lab), rel=1e-12)
                x, w = raw[s]
                assert pooled_w == pytest.approx(w.sum(), rel=1e-12)   # numpy on the raw rows
                for i, f in enumerate(("ms", "bytes")):
                    lf = dict(lab, field=f)
                    mean = prom.one("stream:sigmad_mean:pooled" + _sel(**lf))
                    var = prom.one("stream:sigmad_variance:pooled"
                                   + _sel(**lf, correction=correction))
                    sd = prom.one("stream:sigmad_stddev:pooled"
                                  + _sel(**lf, correction=correction))
                    # against the one daemon that saw everything
                    assert mean == pytest.approx(value(m, "sigmad_mean", **lf), rel=1e-12)
                    assert var == pytest.approx(value(m, "sigmad_variance", **lf), rel=1e-9)
                    assert sd == pytest.approx(value(m, "sigmad_stddev", **lf), rel=1e-9)
                    # and against numpy: np.cov aweights (reliability); with non-integer
                    # weights "frequency" is sum w (x - mean)^2 / (sum w - 1), by definition
                    if correction == "reliability":
                        ref_var = np.cov(x[:, i], aweights=w)
                    else:
                        mu = np.average(x[:, i], weights=w)
                        ref_var = (w * (x[:, i] - mu) ** 2).sum() / (w.sum() - 1)
                    assert var == pytest.approx(float(ref_var), rel=1e-9)
                    # the classic mistake is measurably wrong here: mean of shard variances
                    naive = np.mean([value(d.metrics(), "sigmad_variance", **lf)
                                     for d in shards])
                    assert abs(naive / var - 1) > 1e-6
        print(f"prometheus caught up {waited:.1f}s after start")
    finally:
        stop_all([*shards, ref])
