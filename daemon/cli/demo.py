"""``sigmad demo``: the daemon plus a built-in producer of an invented scenario.

The scenario is our own. A small online bakery, "Crumb & Co", watches:

- the latency of its checkout in two regions: most requests hit a cache
  (about 8 ms), some miss it (about 60 ms), and after a while the northern
  region slows down;
- a greenhouse gateway's temperature and humidity per bed, where bed 3's
  sensor is flaky (it sometimes sends garbage, which the daemon rejects and
  counts, and its readings are sent with a low trust weight);
- two invented grain contracts, "kestrel" and "heron", each published on its
  own topic, whose price ratio drifts: joined as of each one's latest price,
  with an online hedge ratio (heron regressed on kestrel), the spread's
  z-score, and each contract's log returns and their volatility per day.
"""

from __future__ import annotations

import logging
import math
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
from sigmad.daemon.client import Producer
from sigmad.daemon.config.load import parse_config

CONFIG = """
[daemon]
http = "{http}"
flush_every = "50ms"

[[source]]
socket = "pull"
bind = "{endpoint}"

[[stream]]
name = "checkout_latency"
topic = "shop.checkout.{{region}}"
fields = ["ms"]
half_life = "30s"
quantiles = [0.5, 0.9, 0.99]
outlier_sigmas = [3.0]
mixture = {{ components = 2, log = true, warmup = 300 }}
thresholds = [50.0, 100.0]

[[stream]]
name = "greenhouse"
topic = "greenhouse.{{bed}}"
fields = ["celsius", "humidity"]
half_life = "1m"
outlier_sigmas = [3.0]

[[stream]]
name = "grain_pair"
legs = {{ kestrel = "px.grain.kestrel", heron = "px.grain.heron" }}
max_leg_age = "1s"
half_life = "2000 obs"
regression = {{ y = "heron", x = ["kestrel"] }}

[[stream]]
name = "grain_mid"
topic = "mid.{{contract}}"
fields = ["mid"]
transform = {{ mid = "log_return" }}
volatility_unit = "1d"
half_life = "2000 obs"
quantiles = []
"""


def _produce(endpoint: str, stop: threading.Event, started: float) -> None:
    rng = np.random.default_rng(2026)
    # linger=0: at Ctrl-C the daemon stops first; the invented data still queued is dropped
    with Producer(endpoint, source="demo-producer", linger=0) as p:
        tick = 0
        log_mid = {"kestrel": math.log(100.0), "heron": math.log(150.0)}   # random walks
        while not stop.is_set():
            age = time.monotonic() - started
            for region in ("north", "south"):
                slow = 1.8 if region == "north" and age > 20 else 1.0
                hit = rng.random(40) < 0.8
                ms = np.where(hit, rng.lognormal(math.log(8.0), 0.25, 40),
                              rng.lognormal(math.log(60.0), 0.35, 40)) * slow
                p.send(f"shop.checkout.{region}", {"ms": ms})
            for bed in (1, 2, 3):
                celsius = 22 + bed + 2 * math.sin(age / 30) + rng.normal(0, 0.3)
                humidity = 0.6 - 0.01 * (celsius - 22) + rng.normal(0, 0.02)
                if bed == 3 and rng.random() < 0.05:
                    celsius = float("nan")          # the flaky sensor: rejected, counted
                p.send(f"greenhouse.{bed}", {"celsius": celsius, "humidity": humidity},
                       weight=0.3 if bed == 3 else 1.0)
            kestrel = 100 + 5 * math.sin(age / 15) + rng.normal(0, 0.5, 10)
            heron = (1.5 + 0.002 * age) * kestrel + rng.normal(0, 0.3, 10)
            when = time.time() - 0.02 + 0.002 * np.arange(10)   # ticks, interleaved
            for name, px, at in (("kestrel", kestrel, when), ("heron", heron, when + 0.001)):
                p.send(f"px.grain.{name}", {name: px}, time=at)   # each on its own topic
                # mids: about 7 % a day (1e-5 per 2 ms tick, times sqrt(43.2 million ticks))
                walk = log_mid[name] + np.cumsum(rng.normal(0.0, 1e-5, 10))
                log_mid[name] = float(walk[-1])
                p.send(f"mid.{name}", {"mid": np.exp(walk)}, time=at)
            tick += 1
            stop.wait(0.02)


def _line(v) -> str:
    labels = ",".join(f"{k}={val}" for k, val in v.labels)
    name = f"{v.stream}{{{labels}}}" if labels else v.stream
    if v.regression is not None and v.regression.ok:
        b = v.regression.coefficients[0]
        se = v.regression.stderr[0]
        return (f"  {name:34} n={v.observations:<7} hedge ratio {b:.4f} ± {se:.4f}  "
                f"spread z {v.regression.residual_z:+.2f}")
    if v.volatility:
        return f"  {name:34} n={v.observations:<7} " + "  ".join(
            f"{f} volatility {x:.3f}/day" for f, x in v.volatility)
    parts = [f"{f} {v.mean[i]:.2f}±{v.stddev[i]:.2f}" for i, f in enumerate(v.fields)]
    p99 = [x for i, q, x in v.quantiles if q == 0.99 and i == 0]
    tail = f" p99 {p99[0]:.1f}" if p99 and math.isfinite(p99[0]) else ""
    return f"  {name:34} n={v.observations:<7} " + "  ".join(parts) + tail


def run_demo(duration: float | None, http: str) -> int:
    from sigmad.daemon.app import Daemon
    from sigmad.daemon.cli.main import serve

    # the live lines below show rejections; the per-message warnings would drown them
    logging.getLogger("sigmad.engine").setLevel(logging.ERROR)
    with tempfile.TemporaryDirectory(prefix="sigmad-demo-") as tmp:
        endpoint = f"ipc://{Path(tmp) / 'ingest'}"
        config = parse_config(CONFIG.format(http=http, endpoint=endpoint), "<demo>")
        daemon = Daemon(config)
        stop = threading.Event()
        producer = threading.Thread(target=_produce, args=(endpoint, stop, time.monotonic()),
                                    name="demo-producer", daemon=True)
        host = http.rpartition(":")[0]
        print(f"sigmad demo: status page http://{host}:{daemon.http.port}/  "
              f"metrics http://{host}:{daemon.http.port}/metrics  (Ctrl-C stops)")
        print("Invented data. Statistical estimates are no safety system for equipment "
              "and no trading advice.")
        last = [0.0]

        def tick() -> None:
            if time.monotonic() - last[0] < 2.0:
                return
            last[0] = time.monotonic()
            snap = daemon.engine.snapshot
            rejected = {k: n for k, n in snap.health.rejected if n}   # (all exist, at 0)
            print(f"-- {len(snap.series)} series, rejected {rejected or 'none'}")
            for v in sorted(snap.series.values(), key=lambda v: v.key):
                print(_line(v))
            sys.stdout.flush()

        producer.start()
        try:
            return serve(daemon, duration, tick)
        finally:
            stop.set()
            producer.join(2.0)
