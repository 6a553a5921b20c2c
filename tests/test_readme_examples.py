"""The README's examples run as written against the configuration each names (the
embedded default unless it names a file in configs/): the "Sending data" ones
against a real daemon with the real `sigmad send` and the Producer, the library
example on its own, and the MQTT ones with the real `mosquitto_pub` against
configs/gateway.toml and a real broker. Only ports are changed, so tests never take
the well-known ones. (The synopsis of verbs and the fragments about other hosts are
not run: they name files and hosts that are placeholders.)"""

from __future__ import annotations

import os
import re
import select
import subprocess
import sys
import time
from importlib import resources
from pathlib import Path

import pytest
from harness import ROOT, Sigmad, free_port

pytestmark = pytest.mark.slow   # README's examples against a daemon subprocess

SECTION = re.search(r"### Sending data\n(.*?)\n### ", (ROOT / "README.md").read_text(),
                    re.S).group(1)
# (language, code, the prose just before it)
BLOCKS = [(m.group(1), m.group(2), SECTION[:m.start()].rstrip().rsplit("\n\n", 1)[-1])
          for m in re.finditer(r"(?m)^```(sh|python)\n(.*?)^```", SECTION, re.S)]
# what each example must leave in the daemon: (stream, labels, observations)
EXPECTED = {"queue_depth": ("value", {"series": "queue_depth"}, 100),
            "ms,weight": ("request_latency", {"service": "checkout", "region": "eu"}, 2),
            "Producer(": ("request_latency", {"service": "checkout", "region": "eu"}, 3)}


def _config_text(name: str | None) -> str:
    if name is None:
        return resources.files("sigmad.daemon.config").joinpath("default.toml").read_text()
    return (ROOT / "configs" / name).read_text()


@pytest.mark.parametrize("lang, code, before", BLOCKS, ids=[b[1][:30] for b in BLOCKS])
def test_sending_example_runs_against_the_config_it_names(tmp_path, lang, code, before):
    named = re.search(r"configs/(\w+\.toml)", code + before)
    config = _config_text(named.group(1) if named else None)
    pull, sub = free_port(), free_port()
    config = config.replace("7410", str(pull)).replace("7412", str(sub))
    config = re.sub(r'(?m)^http = "127\.0\.0\.1:9410"', 'http = "{HTTP}"', config)
    example = code.replace("7410", str(pull))
    if lang == "sh" and "--connect" not in example:
        example = example.replace("sigmad send", f"sigmad send --connect tcp://127.0.0.1:{pull}")
    d = Sigmad(tmp_path, config)
    env = dict(os.environ, PYTHONPATH=str(ROOT),
               PATH=f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}")
    try:
        cmd = ["sh", "-ec", example] if lang == "sh" else [sys.executable, "-c", example]
        r = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=60)
        assert r.returncode == 0, r.stderr
        stream, labels, n = next(v for k, v in EXPECTED.items() if k in code)
        d.wait_for("sigmad_observations_total", n, stream=stream, **labels)
        rejected = [v for (name, _), v in d.metrics().items()
                    if name == "sigmad_rejected_total"]
        assert sum(rejected) == 0
    finally:
        assert d.stop() == 0


def _block_after(heading: str, lang: str) -> str:
    """The first ``lang`` fenced block of the README section under ``heading``."""
    text = (ROOT / "README.md").read_text()
    section = text[text.index(heading):]
    return re.search(rf"(?m)^```{lang}\n(.*?)^```", section, re.S).group(1)


def test_the_library_example_runs_as_written():
    code = _block_after("### The estimators as a library", "python")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       timeout=60)
    assert r.returncode == 0, r.stderr


def test_the_mosquitto_pub_examples_reach_the_gateway_configuration(tmp_path):
    # the README's MQTT examples, as written, against configs/gateway.toml and a real
    # broker (only the broker's and HTTP ports change, and the state file's place)
    from conftest import need_binary
    from test_mqtt import Broker

    pub = need_binary("mosquitto_pub")
    broker = Broker(tmp_path)
    code = _block_after("mosquitto_pub` (Debian package", "sh")
    config = (ROOT / "configs" / "gateway.toml").read_text()
    config = config.replace("mqtt://127.0.0.1:1883", broker.url)
    config = re.sub(r'(?m)^http = "127\.0\.0\.1:9410"', 'http = "{HTTP}"', config)
    config = re.sub(r'(?m)^state_file = "[^"]*"', f'state_file = "{tmp_path}/gw.state"', config)
    d = Sigmad(tmp_path, config)
    try:
        d.wait_for("sigmad_source_connected", 1, endpoint=f"mqtt {broker.url}")
        example = code.replace("mosquitto_pub ", f"{pub} -p {broker.port} ")
        r = subprocess.run(["sh", "-ec", example], capture_output=True, text=True, timeout=60)
        assert r.returncode == 0, r.stderr
        d.wait_for("sigmad_observations_total", 2, stream="environment", bed="bed-3")
        d.wait_for("sigmad_observations_total", 1, stream="tank_level", tank="north")
        rejected = [v for (name, _), v in d.metrics().items() if name == "sigmad_rejected_total"]
        assert sum(rejected) == 0
    finally:
        assert d.stop() == 0
        broker.stop()


def test_the_subscriber_example_prints_the_spread_of_the_trading_configuration(tmp_path):
    # README's push-feed example, as written but for ports, against configs/trading.toml:
    # it prints each change of the pair's series (labels, residual z) as legs tick
    from sigmad.daemon.client import Producer

    code = _block_after("- **Push feed**", "python")
    pull, feed = free_port(), free_port()
    config = (ROOT / "configs" / "trading.toml").read_text()
    config = config.replace("7420", str(pull)).replace("7422", str(feed))
    config = config.replace("ipc:///tmp/sigmad-trading.ipc", f"ipc://{tmp_path}/t.ipc")
    config = re.sub(r'(?m)^http = "127\.0\.0\.1:9411"', 'http = "{HTTP}"', config)
    config = re.sub(r'(?m)^state_file = "[^"]*"', f'state_file = "{tmp_path}/t.state"', config)
    d = Sigmad(tmp_path, config)
    example = subprocess.Popen([sys.executable, "-u", "-c", code.replace("7422", str(feed))],
                               stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        with Producer(f"tcp://127.0.0.1:{pull}") as p:
            deadline, i, ready = time.monotonic() + 20.0, 0, []
            while not ready and time.monotonic() < deadline:   # a live feed keeps ticking
                p.send("px.kappa", {"kappa": 100.0 + 0.01 * i})
                p.send("px.lambda", {"lambda": 50.0 + 0.02 * i + 0.001 * (i % 7)})
                i += 1
                ready = select.select([example.stdout], [], [], 0.02)[0]
        assert ready, "the example printed nothing: " + (example.poll() is not None and
                                                           example.stderr.read() or "")
        line = example.stdout.readline()        # the example's first print
        assert line.startswith("{") and line.rstrip().split()[-1] not in ("", "None"), line
    finally:
        example.kill()
        example.wait(10)
        assert d.stop() == 0
