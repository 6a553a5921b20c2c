"""Several sigmad processes for the scale-out tests: shards, a PUSH fan-out, a Prometheus server."""

from __future__ import annotations

import contextlib
import json
import subprocess
import time
import urllib.parse
import urllib.request
from pathlib import Path

import zmq
from harness import Sigmad, free_port, value

ROOT = Path(__file__).resolve().parent.parent
RULES = ROOT / "configs" / "prometheus" / "sigmad-pooling.rules.yml"


def start_shards(tmp: Path, config: str, n: int, **extra: object) -> list[Sigmad]:
    """n daemons from ``config % {"pull": port, "pub": port, "index": i, **extra}``, each
    with its own PULL port (``.pull``) and a port for ``[publish]`` (``.pub``)."""
    shards: list[Sigmad] = []
    try:
        for i in range(n):
            port, pub = free_port(), free_port()
            d = Sigmad(tmp, config % {"pull": port, "pub": pub, "index": i, **extra},
                       name=f"shard{i}.toml")
            d.pull = f"tcp://127.0.0.1:{port}"
            d.pub = f"tcp://127.0.0.1:{pub}"
            shards.append(d)
    except BaseException:
        stop_all(shards)
        raise
    return shards


def stop_all(daemons: list[Sigmad]) -> list[int]:
    return [d.stop() for d in daemons]


def fan_out(endpoints: list[str]) -> zmq.Socket:
    """One PUSH socket connected to every endpoint: ZeroMQ deals messages round-robin."""
    s = zmq.Context.instance().socket(zmq.PUSH)
    s.setsockopt(zmq.LINGER, 2000)
    for ep in endpoints:
        s.connect(ep)
    time.sleep(0.5)   # let every connection come up, or early messages go to the first peers
    return s


def total(daemons: list[Sigmad], name: str, **labels: str) -> float:
    return sum(value(d.metrics(), name, **labels) or 0.0 for d in daemons)


def wait_total(daemons: list[Sigmad], name: str, expected: float, timeout: float = 15.0,
               **labels: str) -> None:
    deadline = time.monotonic() + timeout
    while (got := total(daemons, name, **labels)) < expected:
        if time.monotonic() > deadline:
            raise AssertionError(f"sum of {name}{labels} over shards = {got}, waited for "
                                 f"{expected}")
        time.sleep(0.05)


class Prometheus:
    """A real Prometheus server in a temporary directory on a loopback port.

    Scrapes ``targets`` (host:port) every second as one job and evaluates the
    shipped recording rules every second. Always ``stop()`` it (a context manager).
    """

    def __init__(self, binary: str, tmp: Path, targets: list[str], job: str = "sigmad-shards",
                 rules: tuple[Path, ...] = (RULES,)):
        self.port = free_port()
        self.dir = tmp / "prometheus"
        self.dir.mkdir()
        cfg = self.dir / "prometheus.yml"
        cfg.write_text(json.dumps({   # JSON is YAML
            "global": {"scrape_interval": "1s", "evaluation_interval": "1s"},
            "rule_files": [str(r) for r in rules],
            "scrape_configs": [{"job_name": job, "static_configs": [{"targets": targets}]}],
        }))
        self.log = self.dir / "prometheus.log"
        self._log = open(self.log, "wb")  # noqa: SIM115 (closed in stop)
        self.proc = subprocess.Popen(
            [binary, f"--config.file={cfg}", f"--storage.tsdb.path={self.dir / 'data'}",
             f"--web.listen-address=127.0.0.1:{self.port}"],
            stdout=self._log, stderr=subprocess.STDOUT, cwd=self.dir)
        try:
            self._wait_ready()
        except BaseException:
            self.stop()
            raise

    def __enter__(self) -> Prometheus:
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def _wait_ready(self, timeout: float = 20.0) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError("prometheus exited:\n" + self.log.read_text())
            url = f"http://127.0.0.1:{self.port}/-/ready"
            with contextlib.suppress(OSError), urllib.request.urlopen(url, timeout=1.0) as r:
                if r.status == 200:
                    return
            time.sleep(0.1)
        raise RuntimeError("prometheus did not become ready:\n" + self.log.read_text())

    def query(self, expr: str) -> list[tuple[dict, float]]:
        """Instant query through the HTTP API: [(labels, value)]."""
        url = (f"http://127.0.0.1:{self.port}/api/v1/query?"
               + urllib.parse.urlencode({"query": expr}))
        with urllib.request.urlopen(url, timeout=5.0) as r:
            body = json.load(r)
        assert body["status"] == "success", body
        return [(s["metric"], float(s["value"][1])) for s in body["data"]["result"]]

    def one(self, expr: str) -> float | None:
        got = self.query(expr)
        assert len(got) <= 1, got
        return got[0][1] if got else None

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self._log.close()
