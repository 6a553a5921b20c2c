"""Service-level objectives end to end: ``sigmad run``, real sockets, a real scrape.

Reference values: numpy's exact counts and weighted sums; explicit numpy decayed
weights w * 2**(-(t_max - t)/h) (DESIGN.md's forgetting rule); scipy.stats.lognorm
for the true share of a known log-normal mixture; 2 * scipy.stats.norm.sf(3) for the
nominal outlier rate; ``promtool check metrics`` (Debian package prometheus) for the
exposition format.
"""

from __future__ import annotations

import subprocess
import time

import numpy as np
import pytest
from conftest import need_binary, need_module
from harness import Sigmad, free_port, scrape, value
from sigmad.daemon.client import Producer

pytestmark = pytest.mark.slow   # real daemon subprocesses and promtool

CONFIG = """
[daemon]
http = "{HTTP}"
flush_every = "20ms"
max_batch_rows = 5000
max_clock_skew = "1h"
state_file = "sigmad.state"
checkpoint_every = "1h"

[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:%(pull)d"

[[stream]]
name = "checkout"
topic = "lat.{region}"
fields = ["ms"]
half_life = "30s"
thresholds = [100.0, 300.0, 1000.0]

[[stream]]
name = "mixed"
topic = "mix"
fields = ["ms"]
outlier_sigmas = [3.0]
outlier_warmup = 0
mixture = { components = 2, log = true, warmup = 2000 }
thresholds = [60.0, 300.0]
"""
BOUNDS = (100.0, 300.0, 1000.0)
LE = ("100.0", "300.0", "1000.0", "+Inf")


@pytest.fixture
def daemon(tmp_path):
    pull = free_port()
    d = Sigmad(tmp_path, CONFIG % {"pull": pull})
    d.pull = f"tcp://127.0.0.1:{pull}"
    yield d
    d.stop()


def weighted_rows(seed=8, n=6000):
    rng = np.random.default_rng(seed)
    x = rng.lognormal(5.0, 0.8, n)
    x[:5] = 300.0                        # on a bound: counted in its "le" bucket
    return x, rng.uniform(0.2, 3.0, n), time.time() - 120.0 + np.sort(rng.uniform(0, 60, n))


def send_rows(d, topic, x, w=None, t=None, chunk=1000):
    with Producer(d.pull) as p:
        for i in range(0, x.size, chunk):
            p.send(topic, {"ms": x[i:i + chunk]},
                   weight=None if w is None else w[i:i + chunk],
                   time=None if t is None else t[i:i + chunk])


def test_buckets_count_and_sum_are_numpys_exact_weighted_counts(daemon):
    x, w, t = weighted_rows()
    send_rows(daemon, "lat.eu", x, w, t)
    lab = {"stream": "checkout", "region": "eu", "field": "ms"}
    got = daemon.wait_for("sigmad_value_count", float(w.sum()) * (1 - 1e-12), **lab)
    want = [w[x <= b].sum() for b in BOUNDS] + [w.sum()]          # numpy, exact
    buckets = [value(got, "sigmad_value_bucket", le=le, **lab) for le in LE]
    np.testing.assert_allclose(buckets, want, rtol=1e-12)
    assert value(got, "sigmad_value_sum", **lab) == pytest.approx(float(w @ x), rel=1e-12)


def test_unweighted_buckets_are_integer_counts(daemon):
    x, _, _ = weighted_rows(seed=9, n=3000)
    send_rows(daemon, "lat.us", x)
    lab = {"stream": "checkout", "region": "us", "field": "ms"}
    got = daemon.wait_for("sigmad_value_count", 3000.0, **lab)
    assert [value(got, "sigmad_value_bucket", le=le, **lab) for le in LE] == \
        [float(np.sum(x <= b)) for b in BOUNDS] + [3000.0]


def test_the_observed_share_is_the_explicit_decayed_share(daemon):
    x, w, t = weighted_rows()
    send_rows(daemon, "lat.ap", x, w, t)
    lab = {"stream": "checkout", "region": "ap", "field": "ms"}
    got = daemon.wait_for("sigmad_value_count", float(w.sum()) * (1 - 1e-12), **lab)
    f = w * 2.0 ** (-(t.max() - t) / 30.0)
    for le, b in zip(LE, BOUNDS, strict=False):
        share = value(got, "sigmad_exceedance_observed", above=le, **lab)
        assert share == pytest.approx(f[x > b].sum() / f.sum(), rel=1e-9)


TRUE_W, TRUE_MU, TRUE_SD = (0.8, 0.2), (3.4, 5.2), (0.3, 0.35)


def mixture_rows(rng, n):
    hit = rng.random(n) < TRUE_W[0]
    return np.where(hit, rng.lognormal(TRUE_MU[0], TRUE_SD[0], n),
                    rng.lognormal(TRUE_MU[1], TRUE_SD[1], n))


def test_model_share_and_outlier_rate_of_a_two_mode_log_normal_stream(daemon):
    """The fitted mixture's share above each threshold is within 0.5 percentage points of
    the true mixture's (scipy.stats.lognorm), and its outlier rate at k = 3 within a
    factor 2 of 2 Phi(-3) = 0.27 % (scipy.stats.norm.sf)."""
    stats = need_module("scipy.stats")
    rng = np.random.default_rng(12)
    n = 100_000
    send_rows(daemon, "mix", mixture_rows(rng, n), chunk=2000)
    lab = {"stream": "mixed", "field": "ms"}
    got = daemon.wait_for("sigmad_value_count", float(n), timeout=60.0, **lab)
    for le, b in (("60.0", 60.0), ("300.0", 300.0)):
        true = sum(wk * stats.lognorm.sf(b, s=sk, scale=np.exp(mk))
                   for wk, mk, sk in zip(TRUE_W, TRUE_MU, TRUE_SD, strict=True))
        model = value(got, "sigmad_exceedance", above=le, **lab)
        assert abs(model - true) < 0.005, (b, model, true)
    before = value(got, "sigmad_outliers_total", stream="mixed", threshold="3")
    m = 200_000
    send_rows(daemon, "mix", mixture_rows(rng, m), chunk=2000)
    got = daemon.wait_for("sigmad_value_count", float(n + m), timeout=60.0, **lab)
    rate = (value(got, "sigmad_outliers_total", stream="mixed", threshold="3") - before) / m
    nominal = 2 * stats.norm.sf(3.0)
    assert nominal / 2 < rate < 2 * nominal, rate


def test_promtool_finds_the_exposition_clean(daemon):
    promtool = need_binary("promtool")
    x, w, t = weighted_rows(n=500)
    send_rows(daemon, "lat.eu", x, w, t)
    daemon.wait_for("sigmad_value_count", float(w.sum()) * (1 - 1e-12), stream="checkout",
                    region="eu", field="ms")
    text = scrape(daemon.port)
    out = subprocess.run([promtool, "check", "metrics"], input=text.encode(),
                         capture_output=True, timeout=30)
    assert out.returncode == 0 and out.stdout.strip() == b"" and out.stderr.strip() == b"", \
        out.stdout + out.stderr
    assert "# TYPE sigmad_value histogram" in text


def test_counters_resume_after_a_restart(tmp_path):
    pull = free_port()
    x, w, t = weighted_rows(n=2000)
    lab = {"stream": "checkout", "region": "eu", "field": "ms"}
    d = Sigmad(tmp_path, CONFIG % {"pull": pull})
    d.pull = f"tcp://127.0.0.1:{pull}"
    try:
        send_rows(d, "lat.eu", x[:1000], w[:1000], t[:1000])
        d.wait_for("sigmad_value_count", float(w[:1000].sum()) * (1 - 1e-12), **lab)
    finally:
        assert d.stop() == 0          # SIGTERM writes the final checkpoint
    d = Sigmad(tmp_path, CONFIG % {"pull": pull})
    d.pull = f"tcp://127.0.0.1:{pull}"
    try:
        send_rows(d, "lat.eu", x[1000:], w[1000:], t[1000:])
        got = d.wait_for("sigmad_value_count", float(w.sum()) * (1 - 1e-12), **lab)
        want = [w[x <= b].sum() for b in BOUNDS] + [w.sum()]
        np.testing.assert_allclose([value(got, "sigmad_value_bucket", le=le, **lab)
                                    for le in LE], want, rtol=1e-12)
    finally:
        d.stop()
