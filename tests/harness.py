"""Running a real ``sigmad`` process for end-to-end tests: free ports, scraping, waiting."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

from prometheus_client.parser import text_string_to_metric_families
from sigmad.daemon.bench.ports import free_port  # noqa: F401 (every test takes ports here)

ROOT = Path(__file__).resolve().parent.parent


def scrape(port: int, path: str = "/metrics", timeout: float = 5.0) -> str:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=timeout) as r:
        return r.read().decode()


def samples(text: str) -> dict[tuple[str, frozenset], float]:
    """Parse exposition text with prometheus-client's own parser: {(name, labels): value}."""
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, frozenset(s.labels.items()))] = s.value
    return out


def value(parsed: dict, name: str, **labels: str) -> float | None:
    return parsed.get((name, frozenset(labels.items())))


class Sigmad:
    """``sigmad run --config FILE`` as a subprocess, stopped with SIGTERM."""

    def __init__(self, tmp: Path, config_text: str, http_port: int | None = None,
                 name: str = "sigmad.toml") -> None:
        self.port = http_port or free_port()
        self.config = tmp / name
        self.config.write_text(config_text.replace("{HTTP}", f"127.0.0.1:{self.port}"))
        self.log = tmp / (name + ".log")
        env = dict(os.environ, PYTHONPATH=str(ROOT))
        self._log = open(self.log, "wb")  # noqa: SIM115 (closed in stop)
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "sigmad.daemon", "run", "--config", str(self.config)],
            stdout=self._log, stderr=subprocess.STDOUT, env=env, cwd=tmp)
        self.wait_ready()

    def wait_ready(self, timeout: float = 15.0) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"sigmad exited {self.proc.returncode}:\n"
                                   + self.log.read_text())
            try:
                scrape(self.port, timeout=1.0)
                return
            except OSError:
                time.sleep(0.05)
        raise RuntimeError("sigmad did not answer in time:\n" + self.log.read_text())

    def metrics(self) -> dict:
        return samples(scrape(self.port))

    def wait_for(self, name: str, expected: float, timeout: float = 10.0, **labels) -> dict:
        """Scrape until a sample reaches ``expected``; returns the last parse."""
        deadline = time.monotonic() + timeout
        while True:
            parsed = self.metrics()
            got = value(parsed, name, **labels)
            if got is not None and got >= expected:
                return parsed
            if time.monotonic() > deadline:
                raise AssertionError(f"{name}{labels} = {got}, waited for {expected}")
            time.sleep(0.05)

    def stop(self, sig: int = signal.SIGTERM, timeout: float = 10.0) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(sig)
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self._log.close()
        return self.proc.returncode
