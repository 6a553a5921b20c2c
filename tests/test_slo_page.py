"""Thresholds on the status page and in /api/state: both shares shown, thresholds drawn.

The shares shown are the snapshot's own (checked against numpy in
test_slo_engine.py); here they must reach the page and the JSON unchanged."""

from __future__ import annotations

import re

import numpy as np
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.export.api_state import snapshot_json
from sigmad.daemon.ingest.wire import encode
from sigmad.daemon.web.page import render_page
from sigmad.daemon.web.plots import THRESHOLD, density_figure

NOW = 1000.0
CONFIG = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:7999"

[[stream]]
name = "checkout"
topic = "lat"
fields = ["ms"]
thresholds = [150.0, 300.0]
"""


def snapshot():
    e = Engine(parse_config(CONFIG))
    x = np.random.default_rng(3).normal(200.0, 40.0, 2000)
    e.ingest(b"lat", encode({"ms": x}), NOW)
    return e.flush(NOW), x


def test_the_page_shows_the_model_and_the_observed_share_of_each_threshold():
    snap, x = snapshot()
    v = next(iter(snap.series.values()))
    html = render_page(snap, NOW)
    html = html.decode() if isinstance(html, bytes) else html
    model = [float(s) for s in re.findall(
        r'class="exceedance">model <b data-value="([^"]+)"', html)]
    seen = [float(s) for s in re.findall(
        r'class="exceedance-observed">data <b data-value="([^"]+)"', html)]
    assert model == list(v.exceedance[0]) and seen == list(v.exceedance_observed[0])
    assert seen == [float(np.mean(x > 150.0)), float(np.mean(x > 300.0))]   # numpy


def test_thresholds_inside_the_axis_are_drawn_on_the_density_plot():
    snap, _ = snapshot()
    svg = density_figure(next(iter(snap.series.values())))
    drawn = re.findall(rf'fill="{THRESHOLD}" text-anchor="middle">([^<]+)</text>', svg)
    assert drawn == ["150", "300"]


def test_api_state_carries_bounds_counts_and_both_shares():
    snap, x = snapshot()
    t = snapshot_json(snap, NOW)["series"][0]["thresholds"]
    assert [d["field"] for d in t] == ["ms"] and t[0]["bounds"] == [150.0, 300.0]
    assert t[0]["cumulative"] == [float(np.sum(x <= 150.0)), float(np.sum(x <= 300.0)), 2000.0]
    assert len(t[0]["exceedance"]) == len(t[0]["exceedance_observed"]) == 2
