"""The ``sigmad bench`` row for MQTT: single JSON readings through a real mosquitto.

Both sides take the same backlog from the broker: N QoS 1 messages published to
a persistent session while its subscriber was away, so the publisher's speed is
not what is measured. The reference is the plainest paho subscriber: it only
receives and ``json.loads`` each payload. Ours is a whole ``Daemon`` (paho's
thread, the hand-off, the engine thread, JSON to wire body, flushes), timed
from construction until the engine has accepted all N observations.
"""

from __future__ import annotations

import json
import shutil
import socket
import subprocess
import tempfile
import threading
import time
from pathlib import Path

from sigmad.daemon.bench.ports import free_port
from sigmad.daemon.config.load import parse_config

_TOPIC = "bench/a/reading"
_CONFIG = """
[daemon]
http = "127.0.0.1:0"
flush_every = "50ms"
max_clock_skew = "1h"
[[source]]
socket = "mqtt"
connect = "mqtt://127.0.0.1:PORT"
topics = ["bench/+/reading"]
client_id = "CLIENT"
qos = 1
high_water_mark = 100000
[[stream]]
name = "bench"
topic = "bench/{k}/reading"
fields = ["v"]
"""


def _broker_binary() -> str | None:
    return shutil.which("mosquitto") or shutil.which("mosquitto", path="/usr/sbin")


class _Broker:
    """mosquitto on a free loopback port, queueing without limit for offline sessions."""

    def __init__(self, binary: str, tmp: Path) -> None:
        self.port = free_port()
        conf = tmp / "mosquitto.conf"
        conf.write_text(f"listener {self.port} 127.0.0.1\nallow_anonymous true\n"
                        "persistence false\nmax_queued_messages 0\nmax_inflight_messages 0\n")
        self.proc = subprocess.Popen([binary, "-c", str(conf)], stdout=subprocess.DEVNULL,
                                     stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 10
        while True:
            try:
                socket.create_connection(("127.0.0.1", self.port), timeout=0.5).close()
                return
            except OSError:
                if time.monotonic() > deadline or self.proc.poll() is not None:
                    self.close()
                    raise RuntimeError("mosquitto did not start for the benchmark") from None
                time.sleep(0.05)

    def close(self) -> None:
        self.proc.terminate()
        self.proc.wait(10)


def _client(client_id: str, port: int, on_message=None, inflight: int = 20):
    import paho.mqtt.client as paho
    from paho.mqtt.enums import CallbackAPIVersion
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    c = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=paho.MQTTv5)
    c.on_message = on_message
    c.max_inflight_messages_set(inflight)
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = 3600
    c.connect("127.0.0.1", port, clean_start=False, properties=props)
    return c


def _backlog(port: int, client_id: str, payloads: list[bytes]) -> None:
    """Make ``client_id``'s session subscribe, leave, and collect ``payloads`` at the broker."""
    sub = _client(client_id, port)
    sub.loop_start()
    sub.subscribe("bench/+/reading", qos=1)
    time.sleep(0.2)
    sub.disconnect()
    sub.loop_stop()
    pub = _client(client_id + "-pub", port, inflight=1000)
    pub.loop_start()
    last = None
    for p in payloads:
        last = pub.publish(_TOPIC, p, qos=1)
    last.wait_for_publish(120)
    pub.disconnect()
    pub.loop_stop()


def _bare_rate(port: int, client_id: str, n: int) -> float:
    """Messages/s of a paho subscriber that only receives and json.loads."""
    done = threading.Event()
    count = [0]
    loads = json.loads

    def on_message(client, userdata, msg) -> None:
        loads(msg.payload)
        count[0] += 1
        if count[0] >= n:
            done.set()

    t0 = time.perf_counter()
    c = _client(client_id, port, on_message)
    c.loop_start()
    if not done.wait(300):
        raise RuntimeError(f"the bare subscriber received {count[0]} of {n} messages")
    elapsed = time.perf_counter() - t0
    c.disconnect()
    c.loop_stop()
    return n / elapsed


def _daemon_rate(port: int, client_id: str, n: int) -> float:
    """Accepted observations/s through a real Daemon with an MQTT source."""
    from sigmad.daemon.app import Daemon
    from sigmad.daemon.bench.suite import wait_accepted

    config = parse_config(_CONFIG.replace("PORT", str(port)).replace("CLIENT", client_id),
                          "<bench>")
    t0 = time.perf_counter()
    daemon = Daemon(config)
    daemon.start()
    try:
        wait_accepted(daemon, n, t0, 300.0, "readings")
        elapsed = time.perf_counter() - t0
    finally:
        daemon.stop()
    return n / elapsed


def bench_mqtt_json(n: int, repeat: int = 2):
    """The row: JSON readings/s through mosquitto, ours / the bare paho subscriber."""
    from sigmad.daemon.bench.suite import Row

    what = "single JSON readings over MQTT (QoS 1)"
    binary = _broker_binary()
    if binary is None:
        return Row(what, "-", "mosquitto not installed: not measured", 0.0, ">= 0.5", None)
    payloads = [json.dumps({"v": round(20.0 + (i % 1000) / 100.0, 2)}).encode()
                for i in range(n)]
    bare = ours = 0.0
    with tempfile.TemporaryDirectory() as tmp:
        broker = _Broker(binary, Path(tmp))
        try:
            for i in range(repeat):   # interleaved, best of each: both sides see the same noise
                _backlog(broker.port, f"bench-bare-{i}", payloads)
                bare = max(bare, _bare_rate(broker.port, f"bench-bare-{i}", n))
                _backlog(broker.port, f"bench-ours-{i}", payloads)
                ours = max(ours, _daemon_rate(broker.port, f"bench-ours-{i}", n))
        finally:
            broker.close()
    return Row(what, f"{ours:,.0f} obs/s", f"bare paho + json.loads {bare:,.0f} msg/s",
               ours / bare, ">= 0.5", ours / bare >= 0.5)


if __name__ == "__main__":
    from sigmad.daemon.bench.suite import table

    print(table([bench_mqtt_json(20_000)]))
