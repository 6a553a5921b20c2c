"""Read-outs built in parts to bound the memory they need, against the whole-document form."""

from __future__ import annotations

import numpy as np
import pytest
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.export.api_state import snapshot_json, snapshot_json_bytes
from sigmad.daemon.ingest.wire import encode
from sigmad.daemon.web.history import History
from sigmad.daemon.web.server import json_bytes

CONFIG = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:7410"
[[stream]]
name = "lat"
topic = "lat.{svc}"
fields = ["ms"]
quantiles = [0.5, 0.99]
outlier_sigmas = [3.0]
[[stream]]
name = "pair"
topic = "px.{venue}"
fields = ["a", "b"]
"""


@pytest.mark.parametrize("n_series,block", [(0, 3), (1, 3), (7, 3), (9, 3), (40, 500)])
def test_api_state_in_blocks_is_byte_for_byte_the_whole_document(n_series, block):
    e = Engine(parse_config(CONFIG))
    rng = np.random.default_rng(n_series)
    for k in range(n_series):
        # one row only for some series: variance undefined, written as null
        e.ingest(f"lat.s{k}".encode(), encode({"ms": rng.normal(size=1 + k % 3)}), now=10.0)
        e.ingest(f"px.v{k}".encode(), encode({"a": rng.normal(size=4), "b": rng.normal(size=4)}),
                 now=10.0)
    snap = e.flush(10.0)
    history = History()
    history.record(snap, 10.0)
    want = json_bytes(snapshot_json(snap, 12.5, history))
    assert snapshot_json_bytes(snap, 12.5, history, block=block) == want


def test_cached_metrics_text_is_byte_for_byte_prometheus_clients(latency_and_pair):
    # the cache keeps one text per series and splits it by line counts at each scrape
    import sigmad.daemon.export.metrics_text as render
    from test_render import _engine, _reference

    e = _engine(latency_and_pair)
    r = render.SeriesRenderer()
    r.render(e.snapshot, 120.0)
    assert r.render(e.snapshot, 125.0).decode() == _reference(e.snapshot, 125.0)
    e.ingest(b"px.east", encode({"a": [1.0, 2.0], "b": [2.0, 3.0]}), 126.0)
    e.flush(126.0)
    assert r.render(e.snapshot, 127.0).decode() == _reference(e.snapshot, 127.0)
