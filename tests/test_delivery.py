"""Nothing a producer sent is lost at exit: a script sends with
``daemon.client.Producer`` and exits, and the daemon counts every message (real
processes, loopback TCP)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading

import pytest
from harness import ROOT, Sigmad, free_port

pytestmark = pytest.mark.slow   # scripts and daemons as subprocesses

CONFIG = """
[daemon]
http = "{HTTP}"
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:%d"
[[stream]]
name = "v"
topic = "{s}"
fields = ["value"]
"""

SCRIPT = """
import sys
import numpy as np
from sigmad.daemon.client import Producer
n, rows = int(sys.argv[2]), int(sys.argv[3])
batch = np.arange(rows, dtype=np.float64) if rows > 1 else 1.0
with Producer(sys.argv[1], source="exit-test") as p:
    for i in range(n):
        p.send("q", batch)
"""


@pytest.mark.parametrize("messages, rows, paused", [
    (100_000, 1, 0.0),     # the script: 100,000 single values, then exit
    # 5,000 batches of 1,000 values (40 MB) while the daemon is stopped for 3 s:
    # more than the kernel's socket buffers hold, so at the script's end most
    # messages still wait in the producer's queue
    (5_000, 1_000, 3.0),
])
def test_a_script_that_sends_and_exits_loses_nothing(tmp_path, messages, rows, paused):
    port = free_port()
    d = Sigmad(tmp_path, CONFIG % port)
    endpoint = f"tcp://127.0.0.1:{port}"
    try:
        if paused:
            d.proc.send_signal(signal.SIGSTOP)
            threading.Timer(paused, d.proc.send_signal, (signal.SIGCONT,)).start()
        r = subprocess.run([sys.executable, "-c", SCRIPT, endpoint, str(messages), str(rows)],
                           capture_output=True, text=True, timeout=120,
                           env=dict(os.environ, PYTHONPATH=str(ROOT)))
        assert r.returncode == 0, r.stderr
        d.wait_for("sigmad_observations_total", messages * rows, timeout=60,
                   stream="v", s="q")
        parsed = d.metrics()
    finally:
        d.proc.send_signal(signal.SIGCONT)
        assert d.stop() == 0
    assert parsed[("sigmad_messages_total",
                   frozenset({"endpoint": f"pull {endpoint}"}.items()))] == messages
