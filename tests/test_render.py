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


class _Families:
    def __init__(self, snap, now):
        self.snap, self.now = snap, now

    def collect(self):
        return families(self.snap, self.now)


def _reference(snap, now) -> str:
    reg = CollectorRegistry(auto_describe=False)
    reg.register(_Families(snap, now))
    return generate_latest(reg).decode()


def _engine(config_text: str) -> Engine:
    e = Engine(parse_config(config_text))
    rng = np.random.default_rng(1)
    for t in range(5):
        for svc in ("cart", 'we"ird\\name'):
            e.ingest(f"lat.{svc}".encode(), encode({"ms": rng.lognormal(2, .5, 40)}), 100.0 + t)
        e.ingest(b"px.east", encode({"a": rng.normal(size=20), "b": rng.normal(size=20)}),
                 100.0 + t)
        e.flush(100.0 + t)
    return e


def test_rendered_text_equals_prometheus_client_rendering_of_the_families(latency_and_pair):
    e = _engine(latency_and_pair)
    r = render.SeriesRenderer()
    now = 130.0
    ours = r.render(e.snapshot, now).decode()
    # prometheus-client's parser reads both; every sample and value must agree
    assert samples(ours) == samples(_reference(e.snapshot, now))
    assert ours == _reference(e.snapshot, now)   # byte for byte, same order


def test_only_changed_series_are_rendered_again(monkeypatch, latency_and_pair):
    e = _engine(latency_and_pair)
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


COLUMNS = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:7411"
[[stream]]
name = "cols"
topic = "c.{zone}.{app}"
fields = ["x", "y"]
half_life = "30s"
quantiles = [0.05, 0.5, 0.999]
outlier_sigmas = [2.0, 3.5]
outlier_warmup = 2
thresholds = { x = [-1.0, 0.5, 1e7], y = [5.0] }
[[stream]]
name = "one"
topic = "o.{a}"
fields = ["v"]
half_life = "5 obs"
thresholds = [1e7]
[[stream]]
name = "plain"
topic = "p.{k}"
fields = ["v"]
"""


def test_series_in_columns_render_as_prometheus_client_renders_their_views():
    # streams in columns are rendered from their columns, never from views: the text
    # must still be prometheus-client's for the same samples, byte for byte; label
    # names that sort before and after "field" and "stream", odd label values, big
    # values (Go's exponent form), one-row series (variance NaN: left out), aging
    e = Engine(parse_config(COLUMNS))
    assert all(st.store is not None for st in e.streams)
    rng = np.random.default_rng(3)
    names = ["eu", 'q"uote', "back\\slash", "per%cent", "sp ace"]
    for t in range(6):
        topics, bodies = [], []
        for k in range(300):
            if rng.random() < 0.3:
                continue
            zone, app = names[k % 5], f"a{k}"
            scale = 10.0 ** rng.integers(-3, 9)
            topics.append(f"c.{zone}.{app}".encode())
            bodies.append(encode({"x": float(rng.normal(0, scale)),
                                  "y": float(rng.normal(5, 1))}, time=100.0 + t))
            topics.append(f"o.{app}".encode())
            bodies.append(encode({"v": float(rng.normal(1e7, 1e6))}))
            topics.append(f"p.{k % 7}".encode())
            bodies.append(encode({"v": float(rng.normal(0, 1))}))
        e.ingest_many(topics, bodies, 100.0 + t)
        e.flush(100.0 + t)
    assert sum(b.n for b in e.snapshot.series.blocks) > 500
    for now in (105.0, 190.0):
        ours = render.SeriesRenderer().render(e.snapshot, now).decode()
        assert ours == _reference(e.snapshot, now)
        assert 'zone="q\\"uote"' in ours and "e+07" in ours
        # counts at thresholds, from the columns too: histogram and both shares
        assert 'sigmad_value_bucket{app="a1",field="x",le="1e+07"' in ours
        assert "sigmad_exceedance_observed{" in ours and "sigmad_value_sum{" in ours
