"""The merge tier: shards publish state snapshots, a merger pools them.

References: one Engine / one daemon that saw every message (its own estimates are
checked against numpy, pandas, statsmodels and scipy in test_daemon_e2e.py and the
estimator tests), and numpy on the raw rows where the value is a plain formula.
"""

from __future__ import annotations

import time

import msgpack
import numpy as np
import pytest
import zmq
from fleet import fan_out, start_shards, stop_all
from harness import Sigmad, free_port, value
from sigmad.daemon.cluster.merge import Merger, StateError, decode_state, pool
from sigmad.daemon.cluster.publish import STATE_TOPIC, Publisher
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine, view_of
from sigmad.daemon.ingest.wire import encode

STREAMS = """
[[stream]]
name = "lat"
topic = "lat.{service}"
fields = ["ms"]
half_life = "10m"
quantiles = [0.5, 0.9, 0.99]
mixture = { components = 2, log = true, warmup = 200 }

[[stream]]
name = "pair"
topic = "px.pair"
fields = ["alpha", "beta"]
regression = { y = "beta", x = ["alpha"] }
half_life = "30m"
correction = "frequency"

[[stream]]
name = "plain"
topic = "p.{k}"
fields = ["a", "b"]
correction = "none"
"""
HEAD = """
[daemon]
http = "{HTTP}"
flush_every = "20ms"
max_clock_skew = "1h"
max_time_ahead = "1h"
"""
SOURCE = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:%(pull)d"
"""
SHARD = HEAD + SOURCE + """
[publish]
bind = "tcp://127.0.0.1:%(pub)d"
every = "200ms"
""" + STREAMS
REFERENCE = HEAD + SOURCE + STREAMS


def _messages(seed: int = 21, n: int = 90, base: float | None = None) -> list[tuple[bytes, bytes]]:
    """Invented traffic: bimodal latencies (cache hit/miss), a hedged pair, a plain 2-d series.

    Event times start ``base`` (default 10 min ahead of the wall clock) and advance 3 s per
    message: with the clock ahead, ageing to scrape time is a no-op, so two daemons scraped
    a moment apart agree exactly while the half-lives still decay within the data.
    """
    rng = np.random.default_rng(seed)
    t0 = time.time() + 600.0 if base is None else base
    out = []
    for i in range(n):
        t = t0 + 3.0 * i + np.sort(rng.uniform(0, 3.0, 40))
        hit = rng.random(40) < 0.7
        ms = np.where(hit, rng.lognormal(np.log(8.0), 0.25, 40),
                      rng.lognormal(np.log(60.0), 0.3, 40))
        out.append((b"lat.checkout", encode({"ms": ms}, time=t)))
        a = rng.normal(100.0, 3.0, 40)
        out.append((b"px.pair", encode({"alpha": a, "beta": 1.7 * a + 4 + rng.normal(0, .5, 40)},
                                       time=t, weight=rng.uniform(0.5, 2.0, 40))))
        for k in "01":   # four messages a step, so a three-way round-robin mixes them
            out.append((f"p.{k}".encode(), encode({"a": rng.normal(size=40),
                                                   "b": rng.exponential(size=40)})))
    return out


# ------------------------------------------------------------------ in process
def _engine(tail: str = "") -> Engine:
    return Engine(parse_config(SOURCE % {"pull": 7999} + STREAMS + tail))


def _fed(messages, now: float) -> Engine:
    e = _engine()
    for topic, body in messages:
        e.ingest(topic, body, now, "test")
    e.flush(now)
    return e


def test_pooled_moments_and_regression_equal_one_engine_that_saw_everything():
    msgs = _messages(base=1000.0)
    now = 2000.0
    whole = _fed(msgs, now)
    shards = [_fed(msgs[i::3], now) for i in range(3)]
    for key, ref in whole.snapshot.series.items():
        parts = [sh.stream(key[0]).series[tuple(v for _, v in key[1])] for sh in shards]
        got = view_of(pool(parts))
        assert got.observations == ref.observations
        assert got.weight_sum == pytest.approx(ref.weight_sum, rel=1e-12)
        assert got.weight_sq_sum == pytest.approx(ref.weight_sq_sum, rel=1e-12)
        assert got.mean == pytest.approx(ref.mean, rel=1e-12)
        assert got.variance == pytest.approx(ref.variance, rel=1e-10)
        assert [c for *_, c in got.covariance] == pytest.approx(
            [c for *_, c in ref.covariance], rel=1e-10)
        if ref.regression is not None:
            assert got.regression.coefficients == pytest.approx(ref.regression.coefficients,
                                                                rel=1e-10)
            assert got.regression.stderr == pytest.approx(ref.regression.stderr, rel=1e-9)
            assert got.regression.r_squared == pytest.approx(ref.regression.r_squared, rel=1e-10)


def test_pooled_plain_moments_match_numpy():
    msgs = _messages(base=1000.0)
    shards = [_fed(msgs[i::3], 2000.0) for i in range(3)]
    bodies = [msgpack.unpackb(b)["values"] for t, b in msgs if t == b"p.0"]
    rows = np.concatenate([np.column_stack((np.frombuffer(v["a"], "<f8"),
                                            np.frombuffer(v["b"], "<f8"))) for v in bodies])
    m = pool([sh.stream("plain").series[("0",)] for sh in shards]).moments
    assert m.mean == pytest.approx(rows.mean(axis=0), rel=1e-12)                 # numpy
    assert m.covariance("none") == pytest.approx(np.cov(rows.T, bias=True), rel=1e-10)


def test_pooled_mixture_is_reduced_to_k_and_keeps_the_pooled_mean():
    msgs = _messages(base=1000.0)
    shards = [_fed(msgs[i::3], 2000.0) for i in range(3)]
    parts = [sh.stream("lat").series[("checkout",)] for sh in shards]
    merged = parts[0].mixture.copy().merge(parts[1].mixture).merge(parts[2].mixture)
    assert merged.components == 6
    pooled = pool(parts).mixture
    assert pooled.components == 2 and len(pooled.weights) == 2
    # Runnalls' reduction keeps the (log-space) mixture mean: sum pi_k mu_k before and after
    assert float(pooled.weights @ pooled.means[:, 0]) == pytest.approx(
        float(merged.weights @ merged.means[:, 0]), rel=1e-12)


def _state_body(**over) -> bytes:
    msg = {"format": 1, "shard": "s1", "sent_at": 1.0, "seq": 0, "series": []}
    msg.update(over)
    return msgpack.packb(msg)


@pytest.mark.parametrize("body", [
    b"\xc1", msgpack.packb([1, 2]), _state_body(format=2), _state_body(shard=""),
    _state_body(shard="x" * 500), _state_body(shard="a\nb"), _state_body(seq="1"),
    _state_body(series={"a": 1}),
    msgpack.packb({"format": 1, "shard": "s", "seq": 0, "sent_at": 0, "series": [0] * 1000})[:40],
])
def test_malformed_state_messages_are_refused(body):
    with pytest.raises(StateError) as e:
        decode_state(body)
    assert e.value.reason == "state_malformed"


def test_a_merger_counts_refused_series_and_keeps_the_good_ones():
    cfg = parse_config(HEAD.replace("{HTTP}", "127.0.0.1:0")
                       + '[merge]\nconnect = "tcp://127.0.0.1:1"\n' + STREAMS)
    ctx = zmq.Context()
    merger = Merger(ctx, cfg)
    try:
        good = _fed(_messages(base=1000.0, n=5), 2000.0).export_state()
        bad_kind = dict(good[0], kinds=["moments"])
        merger.accept(_state_body(series=[*good, bad_kind, {"stream": "gone"}, 7]), 2000.0)
        snap = merger.rebuild(2000.0)
        assert len(snap.series) == len(good)
        assert dict(snap.health.rejected) == {"state_incompatible": 1,
                                              "state_unknown_stream": 1, "state_malformed": 1}
        merger.expire(2000.0 + cfg.merge.shard_expiry + 1)
        assert merger.rebuild(2040.0).series == {} and merger.status.expired == ("s1",)
    finally:
        merger.close()
        ctx.term()


def test_mergers_stack_and_pool_their_own_sources_exactly():
    msgs = _messages(base=1000.0)
    now = 2000.0
    whole = _fed(msgs, now)
    shards = [_fed(msgs[i::3], now) for i in range(3)]
    cfg = parse_config(HEAD.replace("{HTTP}", "127.0.0.1:0")
                       + '[merge]\nconnect = "tcp://127.0.0.1:1"\n' + STREAMS)
    ctx = zmq.Context()
    lower, upper = Merger(ctx, cfg), Merger(ctx, cfg)
    try:
        for i in (0, 1):
            lower.accept(_state_body(shard=f"s{i}", series=shards[i].export_state()), now)
        lower.rebuild(now)
        # the upper merger pools the lower one's published states with its own engine
        upper.accept(_state_body(shard="lower", series=lower.pooled_states()), now)
        snap = upper.rebuild(now, shards[2].all_series(), shards[2].snapshot.health)
        assert snap.series.keys() == whole.snapshot.series.keys()
        for key, ref in whole.snapshot.series.items():
            got = snap.series[key]
            assert got.observations == ref.observations
            assert got.weight_sum == pytest.approx(ref.weight_sum, rel=1e-12)
            assert got.mean == pytest.approx(ref.mean, rel=1e-12)
            assert got.variance == pytest.approx(ref.variance, rel=1e-10)
            if ref.regression is not None:
                assert got.regression.coefficients == pytest.approx(
                    ref.regression.coefficients, rel=1e-10)
        assert dict(snap.health.messages)["test"] == len(msgs[2::3])   # the engine's own
    finally:
        lower.close()
        upper.close()
        ctx.term()


def test_the_publisher_sends_what_the_merger_decodes():
    cfg = parse_config(SHARD.replace("{HTTP}", "127.0.0.1:0") % {"pull": 7999, "pub": 7998})
    ctx = zmq.Context()
    pub = Publisher(ctx, cfg.publish, shard="me")
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.SUBSCRIBE, STATE_TOPIC)
    sub.connect(cfg.publish.bind[0])
    try:
        states = _fed(_messages(base=1000.0, n=3), 2000.0).export_state()
        deadline = time.monotonic() + 5
        while not sub.poll(50):   # PUB/SUB: resend until the subscription has arrived
            assert time.monotonic() < deadline
            pub.publish(states, 2000.0)
        topic, body = sub.recv_multipart()
        msg = decode_state(body)
        assert topic == STATE_TOPIC and msg["shard"] == "me" and msg["series"] == states
    finally:
        sub.close(0)
        pub.close()
        ctx.term()


# ------------------------------------------------------------------ end to end
@pytest.mark.slow
def test_three_shards_and_a_merger_match_one_daemon_that_saw_everything(tmp_path):
    shards = start_shards(tmp_path, SHARD, 3)
    ref_port, junk_port = free_port(), free_port()
    ref = Sigmad(tmp_path, REFERENCE % {"pull": ref_port}, name="reference.toml")
    connect = [s.pub for s in shards] + [f"tcp://127.0.0.1:{junk_port}"]
    endpoints = ", ".join(f'"{ep}"' for ep in connect)
    merger_cfg = HEAD + f'[merge]\nconnect = [{endpoints}]\nshard_expiry = "2s"\n' + STREAMS
    merger = Sigmad(tmp_path, merger_cfg, name="merger.toml")
    ctx = zmq.Context.instance()
    try:
        msgs = _messages()
        push = fan_out([s.pull for s in shards])
        to_ref = ctx.socket(zmq.PUSH)
        to_ref.setsockopt(zmq.LINGER, 2000)
        to_ref.connect(f"tcp://127.0.0.1:{ref_port}")
        for topic, body in msgs:
            push.send_multipart([topic, body])
            to_ref.send_multipart([topic, body])
        push.close()
        to_ref.close()
        per_series = {"lat": 90 * 40, "pair": 90 * 40}
        for stream, n in per_series.items():
            ref.wait_for("sigmad_observations_total", n, stream=stream, **(
                {"service": "checkout"} if stream == "lat" else {}))
        labels = {"lat": {"service": "checkout"}, "pair": {}}
        for stream, n in per_series.items():
            merger.wait_for("sigmad_observations_total", n, timeout=15, stream=stream,
                            **labels[stream])
        for k in ("0", "1"):
            merger.wait_for("sigmad_observations_total", 90 * 40, stream="plain", k=k)
        m, r = merger.metrics(), ref.metrics()
        assert value(m, "sigmad_merge_shards", state="live") == 3
        for s in shards:   # every shard really took part
            assert 0 < value(s.metrics(), "sigmad_observations_total", stream="pair") < 3600

        def close(name: str, rel: float, **lab: str) -> None:
            got, want = value(m, name, **lab), value(r, name, **lab)
            assert want is not None and got == pytest.approx(want, rel=rel), (name, lab)

        for lab in ({"stream": "lat", "service": "checkout"}, {"stream": "pair"},
                    {"stream": "plain", "k": "0"}, {"stream": "plain", "k": "1"}):
            close("sigmad_weight", 1e-12, **lab)
            close("sigmad_weight_squared", 1e-12, **lab)
            close("sigmad_effective_samples", 1e-12, **lab)
            fields = {"lat": ["ms"], "pair": ["alpha", "beta"], "plain": ["a", "b"]}
            for f in fields[lab["stream"]]:
                close("sigmad_mean", 1e-12, **lab, field=f)
                close("sigmad_variance", 1e-9, **lab, field=f)
                close("sigmad_stddev", 1e-9, **lab, field=f)
                close("sigmad_scatter", 1e-9, **lab, field=f)
            if lab["stream"] != "lat":
                pair = dict(lab, field=fields[lab["stream"]][0], field_b=fields[lab["stream"]][1])
                close("sigmad_covariance", 1e-9, **pair)
                close("sigmad_correlation", 1e-9, **pair)
        for term in ("alpha", "intercept"):
            close("sigmad_regression_coefficient", 1e-9, stream="pair", term=term)
            close("sigmad_regression_stderr", 1e-9, stream="pair", term=term)
        close("sigmad_regression_residual_stddev", 1e-9, stream="pair")
        close("sigmad_regression_r_squared", 1e-9, stream="pair")
        # quantiles from the pooled-then-reduced mixture: approximate, within 5 % here
        errors = {}
        for q in ("0.5", "0.9", "0.99"):
            lab = {"stream": "lat", "service": "checkout", "field": "ms", "q": q}
            got, want = value(m, "sigmad_quantile", **lab), value(r, "sigmad_quantile", **lab)
            errors[q] = abs(got / want - 1)
        print("mixture quantile relative error, merger vs one daemon:", errors)
        assert max(errors.values()) < 0.05, errors

        # a malformed publisher on the fourth endpoint is counted, not pooled
        junk = ctx.socket(zmq.PUB)
        junk.bind(f"tcp://127.0.0.1:{junk_port}")
        deadline = time.monotonic() + 10
        while not value(merger.metrics(), "sigmad_rejected_total", reason="state_malformed"):
            assert time.monotonic() < deadline
            junk.send_multipart([STATE_TOPIC, b"\xc1 not msgpack"])
            time.sleep(0.1)
        junk.close(0)

        # a shard that goes silent ages out, and the pool shrinks to the other two
        left = value(shards[0].metrics(), "sigmad_observations_total", stream="pair")
        assert stop_all(shards[:1]) == [0]
        deadline = time.monotonic() + 10
        while value(merger.metrics(), "sigmad_merge_shards", state="expired") != 1:
            assert time.monotonic() < deadline, "the silent shard never expired"
            time.sleep(0.1)
        m = merger.metrics()
        assert value(m, "sigmad_merge_shards", state="live") == 2
        assert value(m, "sigmad_observations_total", stream="pair") == 3600 - left
        ages = [k for k in m if k[0] == "sigmad_shard_age_seconds"]
        assert len(ages) == 2
    finally:
        stop_all([*shards[1:], ref, merger])
        if shards[0].proc.poll() is None:
            shards[0].stop()
