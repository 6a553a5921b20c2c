"""Thresholds in the engine: folded at flush, read out in views, checkpointed, pooled.

Reference values: numpy's exact counts (``np.sum(x <= b)``) and weighted sums;
explicit numpy decayed weights w * 2**(-age/h) (DESIGN.md's forgetting rule);
``Thresholds.merge`` is checked against one engine that saw every row.
"""

from __future__ import annotations

import numpy as np
import pytest
import sigmad.daemon.storage.columns as columns
from sigmad.daemon.cluster.merge import pool
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine, restore_series, series_state
from sigmad.daemon.ingest.wire import encode
from sigmad.daemon.storage.checkpoint import (
    collect_columns,
    decode_checkpoint,
    encode_checkpoint,
    restore_checkpoint,
    stream_definitions,
)
from sigmad.estimators.model_tail import nominal_rate
from sigmad.estimators.thresholds import normal_exceedance

NOW = 1.7e9
CONFIG = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:1"

[[stream]]
name = "lat"
topic = "lat.{svc}"
fields = ["ms"]
half_life = "1m"
thresholds = [100.0, 300.0]

[[stream]]
name = "io"
topic = "io"
fields = ["ms", "bytes"]
thresholds = { bytes = [1000.0] }
"""
BOUNDS = [100.0, 300.0]


def engine(text: str = CONFIG) -> Engine:
    return Engine(parse_config(text))


def rows(seed=2, n=3000):
    rng = np.random.default_rng(seed)
    return (rng.lognormal(5.0, 0.7, n), rng.uniform(0.5, 2.0, n),
            NOW - 600 + np.sort(rng.uniform(0, 600, n)))


def feed(e: Engine, x, w, t, topic=b"lat.api", parts=6):
    for idx in np.array_split(np.arange(x.size), parts):
        e.ingest(topic, encode({"ms": x[idx]}, weight=w[idx], time=t[idx]), NOW)
        e.flush(NOW)


def view(e: Engine, svc="api"):
    return e.snapshot.series[("lat", (("svc", svc),))]


def test_a_flush_gives_numpy_exact_weighted_buckets_and_sum():
    e = engine()
    x, w, t = rows()
    feed(e, x, w, t)
    v = view(e)
    assert v.threshold_at == ((0, (100.0, 300.0)),)
    want = [w[x <= b].sum() for b in BOUNDS] + [w.sum()]      # numpy, exact
    np.testing.assert_allclose(v.buckets[0], want, rtol=1e-12)
    assert v.value_sums[0] == pytest.approx(float(w @ x), rel=1e-12)


def test_the_observed_share_is_the_explicit_decayed_share():
    e = engine()
    x, w, t = rows()
    feed(e, x, w, t)
    f = w * 2.0 ** (-(t.max() - t) / 60.0)
    want = [f[x > b].sum() / f.sum() for b in BOUNDS]
    np.testing.assert_allclose(view(e).exceedance_observed[0], want, rtol=1e-9)


def test_the_model_share_without_a_mixture_is_the_normal_models():
    e = engine()
    x, w, t = rows()
    feed(e, x, w, t)
    v = view(e)
    want = normal_exceedance(BOUNDS, v.mean[0], v.stddev[0])
    np.testing.assert_allclose(v.exceedance[0], want, rtol=1e-12)


def test_only_the_configured_field_of_a_two_field_stream_is_counted():
    e = engine()
    b = np.array([10.0, 999.0, 1000.0, 5000.0])
    e.ingest(b"io", encode({"ms": [1.0, 2.0, 3.0, 4.0], "bytes": b}), NOW)
    e.flush(NOW)
    v = e.snapshot.series[("io", ())]
    assert v.threshold_at == ((1, (1000.0,)),)
    assert v.buckets == ((3.0, 4.0),) and v.value_sums == (float(b.sum()),)


def test_a_stream_without_thresholds_has_none():
    text = CONFIG.replace("thresholds = [100.0, 300.0]\n", "")
    e = engine(text)
    e.ingest(b"lat.api", encode({"ms": [1.0, 2.0]}), NOW)
    e.flush(NOW)
    v = view(e)
    assert v.threshold_at == () and v.buckets == () and e.streams[0].series[("api",)] \
        .thresholds == ()


def checkpoint_round_trip(e: Engine, config: str = CONFIG, strip: bool = False) -> Engine:
    blocks = collect_columns(e)
    if strip:   # a checkpoint written before thresholds existed
        blocks = [b._replace(threshold_counts=None, threshold_columns=None) for b in blocks]
    cp = decode_checkpoint(encode_checkpoint(blocks, stream_definitions(e), NOW))
    fresh = engine(config)
    restored, dropped = restore_checkpoint(fresh, cp, NOW)
    assert dropped == [] and restored == len(e.export_state())
    return fresh


def test_counters_resume_after_a_checkpoint_restore():
    e = engine()
    x, w, t = rows()
    feed(e, x[:1000], w[:1000], t[:1000])
    fresh = checkpoint_round_trip(e)
    feed(fresh, x[1000:], w[1000:], t[1000:])
    want = [w[x <= b].sum() for b in BOUNDS] + [w.sum()]
    np.testing.assert_allclose(view(fresh).buckets[0], want, rtol=1e-12)
    f = w * 2.0 ** (-(t.max() - t) / 60.0)
    np.testing.assert_allclose(view(fresh).exceedance_observed[0],
                               [f[x > b].sum() / f.sum() for b in BOUNDS], rtol=1e-9)


@pytest.mark.parametrize("k", [4, 5])
def test_bounds_that_hold_the_same_rows_keep_cumulative_counts_across_a_restore(k):
    # weighted batches whose every row is below every bound: the counts at the bounds
    # and the total are sums of the same rows by different kernels, and may differ in
    # the last bit; the counts must stay cumulative, or the restore refuses the block
    # (seen with four and five bounds). Reference: numpy's sums of the weights
    bounds = [400.0 + 100.0 * j for j in range(k)]
    text = CONFIG.replace("[100.0, 300.0]", str(bounds))
    e = engine(text)
    rng = np.random.default_rng(k)
    total = 0.0
    for _ in range(20):
        n = int(rng.integers(2, 4000))
        x, w = rng.uniform(1.0, 399.0, n), rng.uniform(0.1, 3.0, n)
        e.ingest(b"lat.api", encode({"ms": x}, weight=w), NOW)
        e.flush(NOW)
        total += float(np.sum(w))
        assert (np.diff(view(e).buckets[0]) >= 0.0).all()
    fresh = checkpoint_round_trip(e, text)
    np.testing.assert_allclose(view(fresh).buckets[0], [total] * (k + 1), rtol=1e-12)


def test_an_older_checkpoint_without_counts_restores_with_fresh_counters():
    e = engine()
    x, w, t = rows()
    feed(e, x[:1000], w[:1000], t[:1000])
    fresh = checkpoint_round_trip(e, strip=True)
    assert view(fresh).observations == 1000
    assert fresh.streams[0].series[("api",)].thresholds[0].total == 0.0


def test_changed_bounds_restart_the_counters_and_keep_the_series():
    e = engine()
    x, w, t = rows()
    feed(e, x[:500], w[:500], t[:500])
    changed = CONFIG.replace("[100.0, 300.0]", "[100.0, 250.0]")
    fresh = checkpoint_round_trip(e, changed)
    s = fresh.streams[0].series[("api",)]
    assert s.observations == 500 and s.thresholds[0].bounds.tolist() == [100.0, 250.0]
    assert s.thresholds[0].total == 0.0


def test_series_state_round_trip_keeps_the_counts_and_refuses_damage():
    e = engine()
    x, w, t = rows()
    feed(e, x, w, t)
    st = e.streams[0]
    d = series_state(st.series[("api",)])
    again = restore_series(st, d)
    assert again.thresholds[0].to_dict() == st.series[("api",)].thresholds[0].to_dict()
    d["threshold_counts"][0]["state"]["cumulative"] = [1.0]
    with pytest.raises(ValueError, match="cumulative"):
        restore_series(st, d)


def test_a_damaged_count_block_drops_only_that_stream_block_with_the_field():
    e = engine()
    x, w, t = rows()
    feed(e, x[:100], w[:100], t[:100])
    block = columns.pack(collect_columns(e)[0])
    block["threshold_counts"] = "junk"
    with pytest.raises(ValueError, match="threshold_counts"):
        columns.unpack(block)


def test_pooled_shards_equal_one_engine_that_saw_everything():
    x, w, t = rows()
    whole, a, b = engine(), engine(), engine()
    feed(whole, x, w, t)
    odd = np.arange(x.size) % 2 == 1
    feed(a, x[odd], w[odd], t[odd])
    feed(b, x[~odd], w[~odd], t[~odd])
    key = ("api",)
    pooled = pool([a.streams[0].series[key], b.streams[0].series[key]])
    one = whole.streams[0].series[key].thresholds[0]
    np.testing.assert_allclose(pooled.thresholds[0].cumulative, one.cumulative, rtol=1e-12)
    np.testing.assert_allclose(pooled.thresholds[0].observed_share, one.observed_share,
                               rtol=1e-9)


MIXED = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:1"

[[stream]]
name = "lat"
topic = "lat.{svc}"
fields = ["ms"]
outlier_sigmas = [3.0]
mixture = { components = 2, log = true, warmup = 500 }
thresholds = [60.0]
"""


def test_a_two_mode_stream_is_scored_by_its_mixture_at_the_nominal_rate():
    """hit/miss latencies: log-normal 80/20 mixture; the rate beyond k = 3 is within a
    factor 2 of 2 Phi(-3) = 0.27 % (scipy.stats.norm.sf(3) * 2, from memory 0.0026998)."""
    rng = np.random.default_rng(4)
    e = engine(MIXED)
    n = 100_000
    hit = rng.random(n) < 0.8
    x = np.where(hit, rng.lognormal(3.0, 0.25, n), rng.lognormal(5.0, 0.3, n))
    warm = 20_000
    for idx in np.array_split(np.arange(warm), 20):
        e.ingest(b"lat.api", encode({"ms": x[idx]}), NOW)
        e.flush(NOW)
    s = e.streams[0].series[("api",)]
    assert s.mixture.warm
    before = s.outliers[0]
    for idx in np.array_split(np.arange(warm, n), 80):
        e.ingest(b"lat.api", encode({"ms": x[idx]}), NOW)
        e.flush(NOW)
    rate = (s.outliers[0] - before) / (n - warm)
    assert nominal_rate(3.0) / 2 < rate < 2 * nominal_rate(3.0), rate


def test_inspect_shows_the_counts_at_the_bounds():
    from sigmad.daemon.storage.checkpoint import describe_checkpoint
    e = engine()
    e.ingest(b"lat.api", encode({"ms": [50.0, 150.0, 400.0, 90.0]}), NOW)
    e.flush(NOW)
    cp = decode_checkpoint(encode_checkpoint(collect_columns(e), stream_definitions(e), NOW))
    assert "ms at or below 100 300: 2 3 of 4" in describe_checkpoint(cp, "s.state")


def test_the_demos_latency_stream_is_no_longer_noisy_at_3_sigma():
    """The issue's reproducer: the demo's checkout stream (80 % log-normal at 8 ms, 20 % at
    60 ms, as daemon/cli/demo.py draws it) showed 3.75-3.9 % of rows beyond 3 sigma. Scored
    by its mixture, the rate is within a factor 2 of 2 Phi(-3) = 0.27 %."""
    import math

    from sigmad.daemon.cli.demo import CONFIG as DEMO
    e = Engine(parse_config(DEMO.format(http="127.0.0.1:0", endpoint="tcp://127.0.0.1:1")))
    rng = np.random.default_rng(2026)
    for _ in range(2000):     # the demo's batches of 40, flushed about every 50 ms
        hit = rng.random(40) < 0.8
        ms = np.where(hit, rng.lognormal(math.log(8.0), 0.25, 40),
                      rng.lognormal(math.log(60.0), 0.35, 40))
        e.ingest(b"shop.checkout.south", encode({"ms": ms}), NOW)
        e.flush(NOW)
    v = e.snapshot.series[("checkout_latency", (("region", "south"),))]
    rate = v.outlier_counts[0] / v.observations
    assert nominal_rate(3.0) / 2 < rate < 2 * nominal_rate(3.0), rate
    assert v.threshold_at == ((0, (50.0, 100.0)),)


def test_the_merge_tier_refuses_a_shard_of_other_bounds_rather_than_pool_zeros():
    e = engine()
    e.ingest(b"lat.api", encode({"ms": [50.0, 150.0]}), NOW)
    e.flush(NOW)
    d = series_state(e.streams[0].series[("api",)])
    other = engine(CONFIG.replace("[100.0, 300.0]", "[100.0, 250.0]"))
    with pytest.raises(ValueError, match="threshold_counts"):
        restore_series(other.streams[0], d, exact_thresholds=True)
    del d["threshold_counts"]       # a shard without thresholds
    with pytest.raises(ValueError, match="threshold_counts"):
        restore_series(e.streams[0], d, exact_thresholds=True)
    assert restore_series(e.streams[0], d).thresholds[0].total == 0.0   # a checkpoint: fresh


TWIN = CONFIG.replace('thresholds = { bytes = [1000.0] }',
                      'thresholds = { ms = [1000.0], bytes = [1000.0] }')


def test_two_fields_with_equal_bounds_restore_their_own_counts():
    e = engine(TWIN)
    e.ingest(b"io", encode({"ms": [10.0, 2000.0, 3000.0], "bytes": [5.0, 6.0, 7e3]}), NOW)
    e.flush(NOW)
    fresh = checkpoint_round_trip(e, TWIN)
    ms, size = fresh.streams[1].series[()].thresholds
    assert ms is not size
    assert ms.cumulative.tolist() == [1.0, 3.0] and size.cumulative.tolist() == [2.0, 3.0]


def test_a_field_that_gains_thresholds_keeps_the_others_counts():
    e = engine()
    e.ingest(b"io", encode({"ms": [10.0, 2000.0], "bytes": [5.0, 6e3]}), NOW)
    e.flush(NOW)
    fresh = checkpoint_round_trip(e, TWIN)
    ms, size = fresh.streams[1].series[()].thresholds
    assert ms.total == 0.0 and size.cumulative.tolist() == [1.0, 2.0]


def test_a_two_field_mixture_stream_scores_outliers_at_the_nominal_rate():
    """Two well-separated two-dimensional normal clusters: with the chi-square tail of each
    row's own component (model_tail), the rate at k = 3 is within a factor 2 of 0.27 %."""
    text = MIXED.replace('fields = ["ms"]', 'fields = ["ms", "kb"]').replace(
        "components = 2, log = true, warmup = 500", "components = 2, warmup = 500").replace(
        "thresholds = [60.0]\n", "")
    e = engine(text)
    rng = np.random.default_rng(6)
    n = 60_000
    hit = rng.random(n) < 0.7
    x = np.where(hit[:, None], rng.multivariate_normal([0, 0], [[1, 0.5], [0.5, 2]], n),
                 rng.multivariate_normal([20, 30], [[4, -1], [-1, 3]], n))
    for idx in np.array_split(np.arange(n), 60):
        e.ingest(b"lat.api", encode({"ms": x[idx, 0], "kb": x[idx, 1]}), NOW)
        e.flush(NOW)
    s = e.streams[0].series[("api",)]
    assert s.mixture.warm
    rate = s.outliers[0] / n
    assert nominal_rate(3.0) / 2 < rate < 2 * nominal_rate(3.0), rate
