"""The cached text renderer against prometheus-client's own rendering of the same samples."""

from __future__ import annotations

import numpy as np
import sigmad.daemon.export.metrics_text as render
from harness import samples
from prometheus_client import CollectorRegistry, generate_latest
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.export.model import families
from sigmad.daemon.ingest.wire import encode

CONFIG = """
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


class _Families:
    def __init__(self, snap, now):
        self.snap, self.now = snap, now

    def collect(self):
        return families(self.snap, self.now)


def _reference(snap, now) -> str:
    reg = CollectorRegistry(auto_describe=False)
    reg.register(_Families(snap, now))
    return generate_latest(reg).decode()


def _engine() -> Engine:
    e = Engine(parse_config(CONFIG))
    rng = np.random.default_rng(1)
    for t in range(5):
        for svc in ("cart", 'we"ird\\name'):
            e.ingest(f"lat.{svc}".encode(), encode({"ms": rng.lognormal(2, .5, 40)}), 100.0 + t)
        e.ingest(b"px.east", encode({"a": rng.normal(size=20), "b": rng.normal(size=20)}),
                 100.0 + t)
        e.flush(100.0 + t)
    return e


def test_rendered_text_equals_prometheus_client_rendering_of_the_same_families():
    e = _engine()
    r = render.SeriesRenderer()
    now = 130.0
    ours = r.render(e.snapshot, now).decode()
    # prometheus-client's parser reads both; every sample and value must agree
    assert samples(ours) == samples(_reference(e.snapshot, now))
    assert ours == _reference(e.snapshot, now)   # byte for byte, same order


def test_only_changed_series_are_rendered_again(monkeypatch):
    e = _engine()
    r = render.SeriesRenderer()
    r.render(e.snapshot, 120.0)
    calls = []
    real = render.static_samples
    monkeypatch.setattr(render, "static_samples", lambda v: calls.append(v.key) or real(v))
    again = r.render(e.snapshot, 125.0).decode()
    assert calls == []                                  # nothing changed: all from cache
    assert samples(again) == samples(_reference(e.snapshot, 125.0))  # clock samples moved
    e.ingest(b"px.east", encode({"a": [1.0, 2.0], "b": [2.0, 3.0]}), 126.0)
    e.flush(126.0)
    third = r.render(e.snapshot, 127.0).decode()
    assert calls == [("pair", (("venue", "east"),))]   # only the updated series
    assert samples(third) == samples(_reference(e.snapshot, 127.0))
