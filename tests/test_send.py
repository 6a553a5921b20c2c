"""``sigmad send`` against a real daemon: nothing half sent, nothing lost without a
word, exit 1 when no daemon is there (real processes, loopback sockets)."""

from __future__ import annotations

import os
import subprocess
import sys
import time

import pytest
from harness import ROOT, Sigmad, free_port, value

pytestmark = pytest.mark.slow   # sigmad send and daemons as subprocesses

CONFIG = """
[daemon]
http = "{HTTP}"
flush_every = "20ms"
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:%(pull)d"
[[source]]
socket = "sub"
bind = "tcp://127.0.0.1:%(sub)d"
[[stream]]
name = "v"
topic = "{s}"
fields = ["value"]
"""


def _send(*args: str, stdin: str, timeout: float = 60.0) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "sigmad.daemon", "send", *args],
                          input=stdin, capture_output=True, text=True, timeout=timeout,
                          env=dict(os.environ, PYTHONPATH=str(ROOT)))


@pytest.fixture(scope="module")
def daemon(tmp_path_factory):
    pull, sub = free_port(), free_port()
    d = Sigmad(tmp_path_factory.mktemp("send"), CONFIG % {"pull": pull, "sub": sub})
    d.pull = f"tcp://127.0.0.1:{pull}"
    d.sub = f"tcp://127.0.0.1:{sub}"
    yield d
    assert d.stop() == 0


def _observations(d: Sigmad, series: str) -> float:
    return value(d.metrics(), "sigmad_observations_total", stream="v", s=series) or 0.0


def test_a_bad_line_sends_nothing_so_the_fixed_file_counts_once(daemon):
    out = _send("bad1", "--connect", daemon.pull, stdin="1\n2\nabc\n4\n")
    assert out.returncode == 1
    assert "line 3" in out.stderr and "'abc'" in out.stderr and "nothing was sent" in out.stderr
    time.sleep(0.5)
    assert _observations(daemon, "bad1") == 0.0
    fixed = _send("bad1", "--connect", daemon.pull, stdin="1\n2\n3\n4\n")
    assert fixed.returncode == 0, fixed.stderr
    daemon.wait_for("sigmad_observations_total", 4, stream="v", s="bad1")
    time.sleep(0.3)
    assert _observations(daemon, "bad1") == 4.0


def test_a_lone_word_is_not_a_header(daemon):
    out = _send("word", "--connect", daemon.pull, stdin="hello\n")
    assert out.returncode == 1
    assert "line 1" in out.stderr and "hello" in out.stderr


def test_a_header_needs_rows_of_its_width(daemon):
    out = _send("hdr", "--connect", daemon.pull, stdin="value,weight\n1\n")
    assert out.returncode == 1 and "line 1" in out.stderr
    ok = _send("hdr", "--connect", daemon.pull, stdin="value,weight\n1,2\n3,1\n")
    assert ok.returncode == 0, ok.stderr
    daemon.wait_for("sigmad_observations_total", 2, stream="v", s="hdr")


def test_no_daemon_exits_1_within_the_timeout(tmp_path):
    t0 = time.monotonic()
    out = _send("t", "--connect", f"tcp://127.0.0.1:{free_port()}", "--timeout", "1",
                stdin="1\n")
    assert out.returncode == 1
    assert time.monotonic() - t0 < 10.0
    assert "no daemon reachable" in out.stderr and "nothing was sent" in out.stderr


def test_an_endpoint_without_a_scheme_is_a_user_error():
    out = _send("t", "--connect", "127.0.0.1:7410", stdin="1\n")
    assert out.returncode == 1
    assert "--connect" in out.stderr and "tcp://" in out.stderr


def test_pub_waits_for_the_subscriber_and_loses_nothing(daemon):
    rows = "".join(f"{i}\n" for i in range(300))
    for attempt in range(4):    # the issue saw 0 of 300 in 4 tries
        series = f"pub{attempt}"
        out = _send(series, "--connect", daemon.sub, "--socket", "pub", stdin=rows)
        assert out.returncode == 0, out.stderr
        daemon.wait_for("sigmad_observations_total", 300, stream="v", s=series)


def test_follow_skips_and_counts_bad_lines(daemon):
    out = _send("fol", "--follow", "--connect", daemon.pull, stdin="1\nx\n2\n{bad\n3\n")
    assert out.returncode == 1
    assert "skipped 2 unreadable line(s)" in out.stderr
    assert "line 2" in out.stderr and "line 4" in out.stderr
    daemon.wait_for("sigmad_observations_total", 3, stream="v", s="fol")
