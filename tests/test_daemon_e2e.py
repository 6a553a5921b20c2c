"""End to end: ``sigmad run`` as a subprocess, real sockets, real HTTP, scraped and parsed.

Every estimate is compared with numpy / pandas / statsmodels / scipy on the same
values (named beside each check). No mocks of zmq or prometheus-client.
"""

from __future__ import annotations

import math
import signal
import subprocess
import time

import msgpack
import numpy as np
import pytest
import zmq
from conftest import need_binary, need_module
from harness import Sigmad, free_port, scrape, value
from sigmad.daemon.client import Producer

pytestmark = pytest.mark.slow   # real daemon subprocesses

CONFIG = """
[daemon]
http = "{HTTP}"
flush_every = "20ms"
max_message_bytes = 200000
max_batch_rows = 5000
max_clock_skew = "1h"

[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:%(pull)d"

[[source]]
socket = "sub"
bind = "ipc://%(ipc)s"
topics = ["lat.", "mix."]

[[stream]]
name = "lat"
topic = "lat.{service}.{region}"
fields = ["ms"]
quantiles = [0.5, 0.99]
outlier_sigmas = [3.0, 5.0]
outlier_warmup = 50

[[stream]]
name = "pair"
topic = "px.pair"
fields = ["alpha", "beta"]
regression = { y = "beta", x = ["alpha"] }

[[stream]]
name = "counted"
topic = "w.{id}"
fields = ["v"]
correction = "frequency"

[[stream]]
name = "recent"
topic = "d.{id}"
fields = ["v"]
half_life = "500 obs"

[[stream]]
name = "limited"
topic = "lim.{k}"
fields = ["v"]
max_series = 2

[[stream]]
name = "idle"
topic = "idle.{k}"
fields = ["v"]
idle_expiry = "1s"

[[stream]]
name = "mix"
topic = "mix.{k}"
fields = ["ms"]
mixture = { components = 2, log = true, warmup = 200 }
"""


@pytest.fixture(scope="module")
def sigmad(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("e2e")
    ports = {"pull": free_port(), "ipc": str(tmp / "sub.ipc")}
    d = Sigmad(tmp, CONFIG % ports)
    d.pull = f"tcp://127.0.0.1:{ports['pull']}"
    d.ipc = f"ipc://{ports['ipc']}"
    yield d
    assert d.stop() == 0


@pytest.fixture(scope="module")
def producer(sigmad):
    with Producer(sigmad.pull, source="e2e") as p:
        yield p


@pytest.fixture(scope="module")
def raw(sigmad):
    ctx = zmq.Context.instance()
    s = ctx.socket(zmq.PUSH)
    s.setsockopt(zmq.LINGER, 1000)
    s.connect(sigmad.pull)
    yield s
    s.close()


def test_single_observations_over_tcp_match_numpy(sigmad, producer):
    stats = need_module("scipy.stats")
    x = np.random.default_rng(1).lognormal(3.0, 0.4, 400)
    for v in x:
        producer.send("lat.checkout.eu", {"ms": float(v)})
    labels = {"stream": "lat", "service": "checkout", "region": "eu"}
    m = sigmad.wait_for("sigmad_observations_total", 400, **labels)
    f = dict(labels, field="ms")
    assert value(m, "sigmad_mean", **f) == pytest.approx(np.mean(x), rel=1e-12)  # numpy
    assert value(m, "sigmad_variance", **f) == pytest.approx(np.var(x, ddof=1), rel=1e-10)
    assert value(m, "sigmad_stddev", **f) == pytest.approx(np.std(x, ddof=1), rel=1e-10)
    assert value(m, "sigmad_weight", **labels) == 400.0
    assert value(m, "sigmad_effective_samples", **labels) == pytest.approx(400.0, rel=1e-12)
    # normal-model quantile: scipy.stats.norm.ppf at the numpy mean and sd
    ref = stats.norm.ppf(0.99, np.mean(x), np.std(x, ddof=1))
    assert value(m, "sigmad_quantile", **f, q="0.99") == pytest.approx(ref, rel=1e-9)


def test_batches_over_ipc_sub_match_numpy(sigmad):
    x = np.random.default_rng(2).normal(50.0, 5.0, 3000)
    with Producer(sigmad.ipc, socket="pub") as p:
        time.sleep(0.5)   # PUB/SUB: let the subscription reach the publisher first
        for chunk in np.split(x, 3):
            p.send("lat.search.us", {"ms": chunk})
    labels = {"stream": "lat", "service": "search", "region": "us"}
    m = sigmad.wait_for("sigmad_observations_total", 3000, **labels)
    f = dict(labels, field="ms")
    assert value(m, "sigmad_mean", **f) == pytest.approx(np.mean(x), rel=1e-12)  # numpy
    assert value(m, "sigmad_variance", **f) == pytest.approx(np.var(x, ddof=1), rel=1e-10)


def test_binary_batch_with_frequency_weights_matches_numpy_cov(sigmad, producer):
    rng = np.random.default_rng(3)
    x, f = rng.normal(size=1000), rng.integers(1, 5, 1000).astype(float)
    producer.send("w.a", {"v": x}, weight=f)
    labels = {"stream": "counted", "id": "a"}
    m = sigmad.wait_for("sigmad_observations_total", 1000, **labels)
    # numpy: np.cov with fweights divides by sum(f) - 1
    assert value(m, "sigmad_variance", **labels, field="v") == pytest.approx(
        float(np.cov(x, fweights=f.astype(int))), rel=1e-10)
    assert value(m, "sigmad_mean", **labels, field="v") == pytest.approx(
        np.average(x, weights=f), rel=1e-12)
    assert value(m, "sigmad_weight", **labels) == f.sum()


def test_count_half_life_matches_pandas_ewm(sigmad, producer):
    pd = need_module("pandas")
    x = np.random.default_rng(4).normal(size=2000).cumsum()
    for chunk in np.split(x, 20):
        producer.send("d.a", chunk)     # bare-array shorthand for a one-field stream
    labels = {"stream": "recent", "id": "a"}
    m = sigmad.wait_for("sigmad_observations_total", 2000, **labels)
    ewm = pd.Series(x).ewm(halflife=500)  # pandas: halflife in observations
    assert value(m, "sigmad_mean", **labels, field="v") == pytest.approx(
        ewm.mean().iloc[-1], rel=1e-10)
    assert value(m, "sigmad_variance", **labels, field="v") == pytest.approx(
        ewm.var(bias=False).iloc[-1], rel=1e-9)


def test_regression_and_covariance_match_statsmodels_and_numpy(sigmad, producer):
    sm = need_module("statsmodels.api")
    rng = np.random.default_rng(5)
    a = rng.normal(100, 3, 300)
    b = 1.7 * a + 4 + rng.normal(0, 0.5, 300)
    producer.send("px.pair", {"alpha": a, "beta": b})
    labels = {"stream": "pair"}
    m = sigmad.wait_for("sigmad_observations_total", 300, **labels)
    fit = sm.OLS(b, sm.add_constant(a)).fit()   # statsmodels OLS
    coef = value(m, "sigmad_regression_coefficient", **labels, term="alpha")
    assert coef == pytest.approx(fit.params[1], rel=1e-9)
    assert value(m, "sigmad_regression_coefficient", **labels, term="intercept") == \
        pytest.approx(fit.params[0], rel=1e-8)
    assert value(m, "sigmad_regression_stderr", **labels, term="alpha") == \
        pytest.approx(fit.bse[1], rel=1e-8)
    assert value(m, "sigmad_regression_residual_stddev", **labels) == \
        pytest.approx(math.sqrt(fit.scale), rel=1e-8)
    pair = dict(labels, field="alpha", field_b="beta")
    # numpy: np.cov with ddof 1 is the reliability correction for unit weights
    assert value(m, "sigmad_covariance", **pair) == pytest.approx(np.cov(a, b)[0, 1], rel=1e-10)
    assert value(m, "sigmad_correlation", **pair) == pytest.approx(
        np.corrcoef(a, b)[0, 1], rel=1e-10)


def test_outliers_are_scored_against_the_state_before_the_update(sigmad, producer):
    base = np.random.default_rng(6).normal(0.0, 1.0, 200)
    base = (base - base.mean()) / base.std(ddof=1)   # exactly mean 0, sd 1
    producer.send("lat.outlier.x", {"ms": base})
    labels = {"stream": "lat", "service": "outlier", "region": "x"}
    sigmad.wait_for("sigmad_observations_total", 200, **labels)
    # |z| = 0.5, 4 and 20 against mean 0, sd 1: two beyond 3 sigma, one beyond 5
    producer.send("lat.outlier.x", {"ms": np.array([0.5, 4.0, -20.0])})
    m = sigmad.wait_for("sigmad_observations_total", 203, **labels)
    assert value(m, "sigmad_outliers_total", **labels, threshold="3") == 2
    assert value(m, "sigmad_outliers_total", **labels, threshold="5") == 1


def test_log_mixture_quantiles_track_the_empirical_ones(sigmad):
    # two lognormal modes (a fast and a slow path); reference: numpy's empirical quantiles
    rng = np.random.default_rng(7)
    x = np.where(rng.random(6000) < 0.8, rng.lognormal(2.0, 0.2, 6000),
                 rng.lognormal(4.0, 0.3, 6000))
    with Producer(sigmad.ipc, socket="pub") as p:
        time.sleep(0.5)
        for chunk in np.split(x, 30):
            p.send("mix.a", chunk)
    labels = {"stream": "mix", "k": "a"}
    m = sigmad.wait_for("sigmad_observations_total", 6000, **labels)
    assert value(m, "sigmad_mixture_warm", **labels) == 1
    for q in ("0.5", "0.9", "0.99"):
        got = value(m, "sigmad_quantile", **labels, field="ms", q=q)
        assert got == pytest.approx(np.quantile(x, float(q)), rel=0.05)


def _rejected(sigmad) -> dict[str, float]:
    return {dict(k[1])["reason"]: v for k, v in sigmad.metrics().items()
            if k[0] == "sigmad_rejected_total"}


def test_every_rejection_reason_is_counted_and_good_rows_stay_exact(sigmad, raw):
    now = time.time()
    pack = msgpack.packb
    crafted = [
        ("no_stream", [b"nowhere.at.all.here", pack({"values": 1.0})]),
        ("not_msgpack", [b"lat.bad.x", b"\xc1"]),
        ("not_a_map", [b"lat.bad.x", pack([1, 2])]),
        ("no_values", [b"lat.bad.x", pack({"weight": 1.0})]),
        ("missing_field", [b"px.pair", pack({"values": {"alpha": 1.0}})]),
        ("bad_value", [b"lat.bad.x", pack({"values": "fast"})]),
        ("length_mismatch", [b"px.pair", pack({"values": {"alpha": [1.0, 2.0], "beta": [1.0]}})]),
        ("too_large", [b"lat.bad.x", pack({"values": {"ms": b"\0" * 300_000}})]),
        ("too_many_rows", [b"lat.bad.x", pack({"values": {"ms": np.zeros(6000).tobytes()}})]),
        ("bad_source", [b"lat.bad.x", pack({"values": 1.0, "source": 7, "seq": 1})]),
        ("bad_seq", [b"lat.bad.x", pack({"values": 1.0, "source": "p", "seq": "one"})]),
        ("bad_frames", [b"lat.bad.x"]),
        ("bad_frames", [b"lat.bad.x", pack({"values": 1.0}), b"extra"]),
        ("not_finite", [b"lat.bad.x", pack({"values": float("nan")})]),
        ("bad_weight", [b"lat.bad.x", pack({"values": 1.0, "weight": 0.0})]),
        ("bad_time", [b"lat.bad.x", pack({"values": 1.0, "time": float("inf")})]),
        ("clock_skew", [b"lat.bad.x", pack({"values": 1.0, "time": now - 1e7})]),
        ("not_positive", [b"mix.b", pack({"values": -3.0})]),
    ]
    before = _rejected(sigmad)
    good = np.random.default_rng(8).normal(7.0, 2.0, len(crafted))
    for g, (_, frames) in zip(good, crafted, strict=True):
        raw.send_multipart(frames)
        raw.send_multipart([b"lat.garbage.x", pack({"values": {"ms": float(g)}})])
    labels = {"stream": "lat", "service": "garbage", "region": "x"}
    m = sigmad.wait_for("sigmad_observations_total", len(good), **labels)
    deadline = time.monotonic() + 5
    while True:
        after = _rejected(sigmad)
        delta = {r: after.get(r, 0) - before.get(r, 0) for r in after}
        expected = {}
        for reason, _ in crafted:
            expected[reason] = expected.get(reason, 0) + 1
        if all(delta.get(r, 0) >= n for r, n in expected.items()) or time.monotonic() > deadline:
            break
        time.sleep(0.05)
    assert {r: delta.get(r, 0) for r in expected} == expected
    f = dict(labels, field="ms")
    assert value(m, "sigmad_mean", **f) == pytest.approx(np.mean(good), rel=1e-12)  # numpy
    assert value(m, "sigmad_variance", **f) == pytest.approx(np.var(good, ddof=1), rel=1e-10)


def test_topic_templates_make_one_series_per_label_set(sigmad, producer):
    for topic in ("lat.cart.eu", "lat.cart.us", "lat.cart.eu"):
        producer.send(topic, {"ms": 1.0})
    m = sigmad.wait_for("sigmad_observations_total", 2, stream="lat", service="cart",
                        region="eu")
    assert value(m, "sigmad_observations_total", stream="lat", service="cart",
                 region="us") == 1


def test_series_limit_rejects_new_label_sets_beyond_max_series(sigmad, producer):
    before = _rejected(sigmad).get("series_limit", 0)
    for k in ("a", "b", "c", "a"):
        producer.send(f"lim.{k}", 1.0)
    m = sigmad.wait_for("sigmad_observations_total", 2, stream="limited", k="a")
    assert value(m, "sigmad_series", stream="limited") == 2
    assert value(m, "sigmad_observations_total", stream="limited", k="c") is None
    assert _rejected(sigmad).get("series_limit", 0) - before == 1


def test_idle_series_expire(sigmad, producer):
    producer.send("idle.once", 1.0)
    sigmad.wait_for("sigmad_series", 1, stream="idle")
    deadline = time.monotonic() + 5
    while value(sigmad.metrics(), "sigmad_series", stream="idle") != 0:
        assert time.monotonic() < deadline, "idle series did not expire"
        time.sleep(0.1)
    assert value(sigmad.metrics(), "sigmad_observations_total", stream="idle", k="once") is None


def test_sequence_gaps_are_counted_per_producer(sigmad, raw):
    pack = msgpack.packb
    for seq in (1, 2, 5, 6):   # 3 and 4 are missing
        raw.send_multipart([b"lat.seq.x", pack({"values": 1.0, "source": "gappy", "seq": seq})])
    sigmad.wait_for("sigmad_sequence_gaps_total", 2, producer="gappy")


def test_status_page_and_state_json_answer(sigmad, producer):
    import json
    producer.send("lat.page.eu", {"ms": 3.0})
    sigmad.wait_for("sigmad_observations_total", 1, stream="lat", service="page", region="eu")
    state = json.loads(scrape(sigmad.port, "/api/state"))
    assert state["schema"] == 1
    assert any(s["labels"] == {"service": "page", "region": "eu"} for s in state["series"])
    assert "lat" in scrape(sigmad.port, "/")


def test_metrics_pass_promtool_check_metrics(sigmad, producer):
    promtool = need_binary("promtool")
    producer.send("px.pair", {"alpha": [1.0, 2.0, 3.0], "beta": [2.0, 4.1, 5.9]})
    text = scrape(sigmad.port)
    out = subprocess.run([promtool, "check", "metrics"], input=text, capture_output=True,
                         text=True, timeout=30)
    assert out.returncode == 0 and not out.stdout.strip() and not out.stderr.strip(), \
        out.stdout + out.stderr


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_signals_stop_the_daemon_cleanly_within_two_seconds(tmp_path, sig):
    config = CONFIG % {"pull": free_port(), "ipc": str(tmp_path / "s.ipc")}
    d = Sigmad(tmp_path, config)
    t0 = time.monotonic()
    d.proc.send_signal(sig)
    rc = d.proc.wait(5)
    elapsed = time.monotonic() - t0
    d.stop()
    assert rc == 0, d.log.read_text()
    assert elapsed < 2.0
