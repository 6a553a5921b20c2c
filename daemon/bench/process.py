"""Benchmarks of a real ``sigmad run`` as users run it: a subprocess fed through real
sockets, measured from outside.

Memory is read from ``/proc/PID/status`` (VmRSS) of the daemon process after it has
taken every series and answered a scrape of /metrics, the status page and /api/state,
so render caches, snapshot views and the page's history are all in the figure.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

import numpy as np
import zmq
from sigmad.daemon.bench.ports import free_port

_CONFIG = """
[daemon]
http = "127.0.0.1:{http}"
flush_every = "50ms"
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:{pull}"
high_water_mark = 1000000
[[stream]]
name = "bench"
topic = "bench.{{k}}"
fields = {fields}
outlier_sigmas = [3.0, 5.0]
quantiles = [0.5, 0.99]
max_series = 200000
{extra}
"""

#: the kinds of series measured: fields and extra stream keys
KINDS = {
    "scalar": (("v",), ""),
    "two-field": (("a", "b"), ""),
    "regression": (("a", "b"), 'regression = { y = "b", x = ["a"] }'),
    "mixture": (("v",), "mixture = { components = 2 }"),
    "three-threshold": (("v",), "thresholds = [100.0, 300.0, 1000.0]"),
}


def rss_of(pid: int) -> int:
    """Resident bytes of a process (VmRSS), 0 where /proc is missing."""
    try:
        with open(f"/proc/{pid}/status") as f:
            for line in f:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


class RunningDaemon:
    """``python -m sigmad.daemon run`` in a subprocess with a PUSH socket to feed it."""

    def __init__(self, kind: str = "scalar") -> None:
        self.fields, extra = KINDS[kind]
        fields = "[" + ", ".join(f'"{f}"' for f in self.fields) + "]"
        self.http, self.pull = free_port(), free_port()
        self.tmp = tempfile.TemporaryDirectory(prefix="sigmad-bench-")
        config = Path(self.tmp.name) / "bench.toml"
        config.write_text(_CONFIG.format(http=self.http, pull=self.pull, fields=fields,
                                         extra=extra))
        self.log = open(Path(self.tmp.name) / "daemon.log", "wb")  # noqa: SIM115
        self.proc = subprocess.Popen([sys.executable, "-m", "sigmad.daemon", "--log-level",
                                      "warning", "run", "--config", str(config)],
                                     stdout=self.log, stderr=subprocess.STDOUT)
        self.ctx = zmq.Context()
        self.push = self.ctx.socket(zmq.PUSH)
        self.push.setsockopt(zmq.SNDHWM, 0)
        self.push.connect(f"tcp://127.0.0.1:{self.pull}")
        self._wait_http(30.0)
        self.series = 0

    def _get(self, path: str, timeout: float = 300.0) -> bytes:
        with urllib.request.urlopen(f"http://127.0.0.1:{self.http}{path}",
                                    timeout=timeout) as r:
            return r.read()

    def _wait_http(self, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"the daemon exited with {self.proc.returncode}: "
                                   + Path(self.log.name).read_text()[-500:])
            try:
                self._get("/metrics", 2.0)
                return
            except OSError:
                time.sleep(0.1)
        raise RuntimeError("the daemon did not answer on HTTP within 30 s")

    def add_series(self, upto: int, rows: int = 8) -> None:
        """Create series up to ``upto``: one ``rows``-row binary batch each, as a
        producer of small batches would send them."""
        rng = np.random.default_rng(upto)
        for i in range(self.series, upto):
            body = {"values": {f: rng.normal(10.0, 2.0, rows).astype("<f8").tobytes()
                               for f in self.fields}}
            self.push.send(f"bench.s{i}".encode(), zmq.SNDMORE)
            self.push.send(_packb(body))
        self.series = upto
        self._wait_series(upto)

    def _wait_series(self, n: int, timeout: float = 300.0) -> None:
        """Until a scrape shows ``n`` live series; every wait ends with a real scrape."""
        deadline = time.monotonic() + timeout
        want = f'sigmad_series{{stream="bench"}} {float(n)}'.encode()
        while time.monotonic() < deadline:
            time.sleep(0.5)
            if want in self._get("/metrics"):
                return
        raise RuntimeError(f"the daemon did not reach {n} series in {timeout:.0f} s")

    def read_everything(self) -> None:
        """What a user's tools read: /metrics (twice: the cache), the page, /api/state."""
        self._get("/metrics")
        self._get("/metrics")
        self._get("/")
        self._get("/api/state")

    def rss(self) -> int:
        return rss_of(self.proc.pid)

    def close(self) -> None:
        self.push.close(0)
        self.ctx.term()
        self.proc.terminate()
        try:
            self.proc.wait(30)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        self.log.close()
        self.tmp.cleanup()


def _packb(body: dict) -> bytes:
    import msgpack
    return msgpack.packb(body)


def growth_per_series(kind: str, low: int, high: int) -> tuple[float, int]:
    """Resident growth per series of ``kind`` between ``low`` and ``high`` live series
    (each after every reader has been served), and the process's RSS at ``high``.

    Series arrive in steps of ``max(1000, (high - low) // 8)``, each step waited for,
    in both phases alike: so that the figure is the series' own memory, not the
    high-water mark of one flush creating thousands at once. The daemon keeps freed
    flush buffers (``allocator.keep_freed_blocks``), so such a peak stays resident;
    in one burst, one build read 1,229 to 2,927 B a three-threshold series over five
    runs, in steps of 1,000 1,479 to 1,780 (2026-12-02)."""
    step = max(1000, (high - low) // 8)
    d = RunningDaemon(kind)
    try:
        for upto in (*range(step, low, step), low):
            d.add_series(upto)
        d.read_everything()
        before = d.rss()
        for upto in (*range(low + step, high, step), high):
            d.add_series(upto)
        d.read_everything()
        after = d.rss()
    finally:
        d.close()
    return (after - before) / (high - low), after


def have_proc() -> bool:
    return os.path.exists(f"/proc/{os.getpid()}/status")
