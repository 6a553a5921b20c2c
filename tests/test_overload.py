"""A producer faster than the daemon: memory stays bounded, drops are counted, scrapes answer.

A PUB producer floods the daemon's SUB source (high_water_mark = 100) for a few
seconds; ZeroMQ drops what does not fit, and the daemon counts the holes in
the producer's sequence numbers. Afterwards every message sent is accounted for:
folded in, or counted as a gap.
"""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest
from harness import Sigmad, free_port, scrape, value
from sigmad.daemon.client import Producer

pytestmark = pytest.mark.slow   # a flood against a real daemon

CONFIG = """
[daemon]
http = "{HTTP}"
flush_every = "50ms"

[[source]]
socket = "sub"
bind = "tcp://127.0.0.1:%(port)d"
high_water_mark = 100

[[stream]]
name = "flood"
topic = "flood"
fields = ["v"]
mixture = { components = 2 }
"""

ROWS = 200              # rows per message
FLOOD_SECONDS = 4.0
RSS_LIMIT_MB = 200      # bounded, not growing with the backlog (a fresh daemon is ~45 MB here)


def rss_mb(pid: int) -> float:
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    raise AssertionError("no VmRSS")


def test_flood_keeps_memory_bounded_counts_drops_and_answers_scrapes(tmp_path):
    port = free_port()
    d = Sigmad(tmp_path, CONFIG % {"port": port})
    start_rss = rss_mb(d.proc.pid)
    peak = [start_rss]
    slowest = [0.0]
    stop = threading.Event()

    def watch() -> None:
        while not stop.is_set():
            peak[0] = max(peak[0], rss_mb(d.proc.pid))
            t0 = time.monotonic()
            scrape(d.port, timeout=2.0)        # raises if /metrics does not answer in 2 s
            slowest[0] = max(slowest[0], time.monotonic() - t0)
            time.sleep(0.1)

    watcher = threading.Thread(target=watch)
    batch = np.random.default_rng(5).lognormal(2.0, 0.3, ROWS)
    try:
        with Producer(f"tcp://127.0.0.1:{port}", socket="pub", source="flood",
                      high_water_mark=100, linger=1.0) as p:
            time.sleep(0.5)                    # let the subscription reach the PUB
            watcher.start()
            deadline = time.monotonic() + FLOOD_SECONDS
            while time.monotonic() < deadline:
                for _ in range(100):
                    p.send("flood", {"v": batch})
            time.sleep(1.0)                    # the daemon catches up
            p.send("flood", {"v": batch})      # a last message after the flood: closes the gap
            sent = p.seq
            stop.set()
            watcher.join()
            parsed = None
            for _ in range(100):
                parsed = d.metrics()
                got = value(parsed, "sigmad_observations_total", stream="flood") or 0.0
                gaps = value(parsed, "sigmad_sequence_gaps_total", producer="flood") or 0.0
                if got / ROWS + gaps >= sent:
                    break
                time.sleep(0.1)
    finally:
        stop.set()
        code = d.stop()
    assert code == 0
    got = value(parsed, "sigmad_observations_total", stream="flood")
    gaps = value(parsed, "sigmad_sequence_gaps_total", producer="flood")
    folded = got / ROWS
    print(f"\noverload: {FLOOD_SECONDS:.0f} s, {sent} messages sent, {folded:.0f} folded, "
          f"{gaps:.0f} dropped and counted; RSS {start_rss:.0f} -> peak {peak[0]:.0f} MB; "
          f"slowest scrape {slowest[0] * 1000:.0f} ms")
    assert gaps > 0                            # the producer was faster: drops happened
    assert folded + gaps == sent               # and every one of them is visible
    assert peak[0] < RSS_LIMIT_MB
    assert slowest[0] < 2.0
