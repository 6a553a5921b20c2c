"""MQTT sources against a real broker: Debian's ``mosquitto``, started per test on a free
loopback port from a generated configuration file, fed by a paho publisher.

Estimates are compared with numpy on the same values (named beside each check);
counts are compared with what the test published.
"""

from __future__ import annotations

import doctest
import json
import math
import socket
import subprocess
import threading
import time
from pathlib import Path

import msgpack
import numpy as np
import paho.mqtt.client as paho
import pytest
from conftest import need_binary
from harness import Sigmad, free_port, value
from hypothesis import given, settings
from hypothesis import strategies as st
from paho.mqtt.enums import CallbackAPIVersion
from sigmad.daemon.config.errors import ConfigError
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.ingest import payloads
from sigmad.daemon.ingest.payloads import to_body
from sigmad.daemon.ingest.topics import TopicError, TopicTemplate
from sigmad.daemon.ingest.wire import REASONS, WireError, decode, encode

pytestmark = pytest.mark.slow   # a real mosquitto broker and daemon subprocesses

# --------------------------------------------------------------------------- a broker

class Broker:
    """``mosquitto -c FILE`` on a free loopback port; sessions kept in memory only."""

    def __init__(self, tmp: Path, port: int | None = None) -> None:
        self.binary = need_binary("mosquitto")
        self.port = port or free_port()
        self.conf = tmp / "mosquitto.conf"
        # max_queued_messages: room for what a stopped daemon's session collects
        self.conf.write_text(f"listener {self.port} 127.0.0.1\nallow_anonymous true\n"
                             "persistence false\nmax_queued_messages 100000\n")
        self.log = tmp / "mosquitto.log"
        self.proc: subprocess.Popen | None = None
        self.start()

    @property
    def url(self) -> str:
        return f"mqtt://127.0.0.1:{self.port}"

    def start(self) -> None:
        with open(self.log, "ab") as log:
            self.proc = subprocess.Popen([self.binary, "-c", str(self.conf)], stdout=log,
                                         stderr=subprocess.STDOUT)
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError("mosquitto exited:\n" + self.log.read_text())
            try:
                socket.create_connection(("127.0.0.1", self.port), timeout=0.5).close()
                return
            except OSError:
                time.sleep(0.05)
        raise RuntimeError("mosquitto did not listen in time:\n" + self.log.read_text())

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            self.proc.wait(10)


@pytest.fixture
def broker(tmp_path):
    b = Broker(tmp_path)
    yield b
    b.stop()


class Publisher:
    """A paho client that publishes and waits for each acknowledgement (QoS 1)."""

    def __init__(self, broker: Broker) -> None:
        self.client = paho.Client(CallbackAPIVersion.VERSION2, protocol=paho.MQTTv5)
        self.client.connect("127.0.0.1", broker.port)
        self.client.loop_start()

    def send(self, topic: str, payload: bytes | str | float, qos: int = 1) -> None:
        self.client.publish(topic, payload, qos=qos).wait_for_publish(10)

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


@pytest.fixture
def publisher(broker):
    p = Publisher(broker)
    yield p
    p.close()


def config(url: str, client_id: str = "sigmad-test", extra_daemon: str = "",
           extra_source: str = "") -> str:
    return f"""
[daemon]
http = "{{HTTP}}"
flush_every = "20ms"
max_clock_skew = "1h"
{extra_daemon}

[[source]]
socket = "mqtt"
connect = "{url}"
topics = ["greenhouse/+/climate", "tank/#"]
client_id = "{client_id}"
qos = 1
{extra_source}

[[stream]]
name = "climate"
topic = "greenhouse/{{bed}}/climate"
fields = ["temperature", "humidity"]

[[stream]]
name = "level"
topic = "tank/{{tank}}/level"
fields = ["cm"]
"""


def wait_until(check, timeout: float = 15.0, what: str = "condition"):
    deadline = time.monotonic() + timeout
    while True:
        got = check()
        if got:
            return got
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.05)


def start(tmp: Path, text: str, url: str, name: str = "sigmad.toml") -> Sigmad:
    """A daemon whose MQTT source is connected and subscribed (the gauge says so)."""
    d = Sigmad(tmp, text, name=name)
    try:
        wait_until(lambda: value(d.metrics(), "sigmad_source_connected",
                                 endpoint=f"mqtt {url}") == 1, what="the subscription")
    except BaseException:
        d.stop()
        raise
    return d


def observations(d: Sigmad, stream: str, **labels) -> float:
    return value(d.metrics(), "sigmad_observations_total", stream=stream, **labels) or 0.0


# --------------------------------------------------------------------------- end to end

def test_json_msgpack_and_number_payloads_reach_their_series_as_numpy_says(
        tmp_path, broker, publisher):
    d = start(tmp_path, config(broker.url), broker.url)
    try:
        rng = np.random.default_rng(7)
        now = time.time()
        json_rows = rng.normal([20.0, 50.0], [2.0, 5.0], size=(40, 2))
        pack_rows = rng.normal([25.0, 40.0], [1.0, 3.0], size=(40, 2))
        levels = rng.normal(120.0, 10.0, size=40)
        for i, (t, h) in enumerate(json_rows.tolist()):
            # every other reading carries an RFC 3339 time, the rest unix seconds
            when = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(now - 60 + i)) if i % 2 \
                else now - 60 + i
            publisher.send("greenhouse/bed-1/climate",
                           f'{{"temperature": {t!r}, "humidity": {h!r}, "time": "{when}"}}'
                           if i % 2 else
                           f'{{"temperature": {t!r}, "humidity": {h!r}, "time": {when!r}}}')
        for t, h in pack_rows:
            publisher.send("greenhouse/bed-2/climate",
                           encode({"temperature": float(t), "humidity": float(h)}))
        for x in levels.tolist():
            publisher.send("tank/north/level", f"{x!r}\n")
        d.wait_for("sigmad_observations_total", 40, stream="climate", bed="bed-1")
        d.wait_for("sigmad_observations_total", 40, stream="climate", bed="bed-2")
        parsed = d.wait_for("sigmad_observations_total", 40, stream="level", tank="north")
        for bed, rows in (("bed-1", json_rows), ("bed-2", pack_rows)):
            for j, f in enumerate(("temperature", "humidity")):
                got = value(parsed, "sigmad_mean", stream="climate", bed=bed, field=f)
                assert got == pytest.approx(np.mean(rows[:, j]), rel=1e-12)   # numpy.mean
                var = value(parsed, "sigmad_variance", stream="climate", bed=bed, field=f)
                # numpy.var(ddof=1): the reliability correction with unit weights is n - 1
                assert var == pytest.approx(np.var(rows[:, j], ddof=1), rel=1e-9)
            cov = value(parsed, "sigmad_covariance", stream="climate", bed=bed,
                        field="temperature", field_b="humidity")
            assert cov == pytest.approx(np.cov(rows.T)[0, 1], rel=1e-9)   # numpy.cov
        assert value(parsed, "sigmad_mean", stream="level", tank="north", field="cm") == \
            pytest.approx(np.mean(levels), rel=1e-12)   # numpy.mean
        assert value(parsed, "sigmad_messages_total", endpoint=f"mqtt {broker.url}") == 120
        assert value(parsed, "sigmad_source_connected", endpoint=f"mqtt {broker.url}") == 1
    finally:
        d.stop()


BAD_PAYLOADS = [
    (b"hello", "bad_payload"),
    (b"", "bad_payload"),
    (b"\xff\xfe", "bad_payload"),
    (b'{"temperature": 1, ', "not_json"),
    (b'{"temperature": [1, 2], "humidity": 3}', "bad_value"),
    (b'{"temperature": 1, "humidity": 2, "time": "yesterday"}', "bad_time"),
    (b'{"temperature": 1, "humidity": 2, "time": "2026-01-02T03:04:05"}', "bad_time"),
    (b'{"temperature": 1, "humidity": 2, "weight": "high"}', "bad_weight"),
    (b'{"temperature": "warm", "humidity": 2}', "bad_value"),
    (b'{"humidity": 2}', "missing_field"),
    (b"[1, 2]", "bad_payload"),
    (b"\x81\xc1", "not_msgpack"),
    (b"1" * 3000, "too_large"),
    (b"[" * 900 + b"]" * 900, "bad_payload"),
]


def test_malformed_payloads_are_counted_by_reason_and_never_fatal(tmp_path, broker, publisher):
    d = start(tmp_path, config(broker.url, extra_daemon="max_message_bytes = 2048"), broker.url)
    try:
        for payload, _ in BAD_PAYLOADS:
            publisher.send("greenhouse/bad/climate", payload)
        publisher.send("greenhouse/bad/climate", b"7")   # a bare number for two fields
        publisher.send("nowhere/x", b"1")                 # no stream takes it (tank/# does not)
        publisher.send("tank/x/level/deeper", b"1")        # subscribed, but no template
        publisher.send("greenhouse/good/climate", b'{"temperature": 1.5, "humidity": 2.5}')
        parsed = d.wait_for("sigmad_observations_total", 1, stream="climate", bed="good")
        expected: dict[str, int] = {}
        for _, reason in BAD_PAYLOADS:
            expected[reason] = expected.get(reason, 0) + 1
        expected["bad_value"] += 1
        expected["no_stream"] = 1
        for reason, n in expected.items():
            assert value(parsed, "sigmad_rejected_total", reason=reason) == n, reason
        assert value(parsed, "sigmad_messages_total", endpoint=f"mqtt {broker.url}") == \
            len(BAD_PAYLOADS) + 4 - 1   # nowhere/x never reaches sigmad (not subscribed)
        assert d.proc.poll() is None
        assert value(parsed, "sigmad_series", stream="climate") == 1   # bad input adds none
    finally:
        d.stop()


def test_sigterm_then_restart_with_the_same_client_id_counts_every_message_once(
        tmp_path, broker, publisher):
    text = config(broker.url, client_id="gw-restart",
                  extra_daemon='state_file = "gw.state"\ncheckpoint_every = "1h"')
    sent: list[float] = []
    stop_sending = threading.Event()

    def publish() -> None:
        pub = Publisher(broker)
        try:
            for i in range(1500):
                if stop_sending.is_set():
                    break
                x = float(i % 97) + 0.25 * (i % 7)
                pub.send("tank/t1/level", repr(x))
                sent.append(x)
                time.sleep(0.003)
        finally:
            pub.close()

    first = start(tmp_path, text, broker.url, name="first.toml")
    sender = threading.Thread(target=publish)
    sender.start()
    try:
        wait_until(lambda: observations(first, "level", tank="t1") >= 100, what="first readings")
        assert first.stop() == 0
        assert sender.is_alive()   # the publisher is still sending while sigmad is down
        time.sleep(0.3)
        second = Sigmad(tmp_path, text, name="second.toml")
    except BaseException:
        stop_sending.set()
        sender.join()
        raise
    try:
        sender.join(120)
        assert len(sent) == 1500
        wait_until(lambda: observations(second, "level", tank="t1") >= 1500, timeout=30,
                   what="every message")
        time.sleep(1.0)   # nothing more arrives: none counted twice
        parsed = second.metrics()
        assert value(parsed, "sigmad_observations_total", stream="level", tank="t1") == 1500
        # the same values, not only the same count: numpy.mean of what was published
        assert value(parsed, "sigmad_mean", stream="level", tank="t1", field="cm") == \
            pytest.approx(np.mean(sent), rel=1e-12)
    finally:
        second.stop()


def test_two_daemons_in_one_shared_group_split_the_load_and_pool_to_the_whole(
        tmp_path, broker, publisher):
    group = 'shared_group = "sigmad"'
    a = start(tmp_path, config(broker.url, "gw-a", extra_source=group), broker.url, "a.toml")
    b = start(tmp_path, config(broker.url, "gw-b", extra_source=group), broker.url, "b.toml")
    whole = start(tmp_path, config(broker.url, "gw-whole"), broker.url, "whole.toml")
    try:
        xs = np.random.default_rng(3).gamma(2.0, 3.0, size=400)
        for x in xs:
            publisher.send("tank/south/level", repr(float(x)))
        wait_until(lambda: observations(a, "level", tank="south")
                   + observations(b, "level", tank="south") >= 400, what="all 400")
        wait_until(lambda: observations(whole, "level", tank="south") >= 400,
                   what="all 400 at the daemon outside the group")
        lab = dict(stream="level", tank="south")
        parts = []
        for p in (a.metrics(), b.metrics(), whole.metrics()):
            parts.append((value(p, "sigmad_observations_total", **lab),
                          value(p, "sigmad_weight", **lab),
                          value(p, "sigmad_weight_squared", **lab),
                          value(p, "sigmad_mean", field="cm", **lab),
                          value(p, "sigmad_scatter", field="cm", **lab)))
        (na, wa, qa, ma, sa), (nb, wb, qb, mb, sb), (nw, ww, qw, mw, sw) = parts
        assert na + nb == 400 and na > 0 and nb > 0   # each took part, none twice
        # pooled as configs/prometheus/sigmad-pooling.rules.yml does (Chan, Golub &
        # LeVeque 1983 pairwise update), against one daemon that saw every reading
        w = wa + wb
        mean = (wa * ma + wb * mb) / w
        scatter = sa + wa * (ma - mean) ** 2 + sb + wb * (mb - mean) ** 2
        assert nw == 400
        assert w == pytest.approx(ww, rel=1e-12) and qa + qb == pytest.approx(qw, rel=1e-12)
        assert mean == pytest.approx(mw, rel=1e-12)
        assert scatter == pytest.approx(sw, rel=1e-9)
        assert mean == pytest.approx(np.mean(xs), rel=1e-12)                  # numpy.mean
        assert scatter / (w - 1) == pytest.approx(np.var(xs, ddof=1), rel=1e-9)  # numpy.var
    finally:
        a.stop()
        b.stop()
        whole.stop()


def test_a_restarted_broker_is_reconnected_and_resubscribed(tmp_path, broker):
    d = start(tmp_path, config(broker.url, "gw-reconnect"), broker.url)
    endpoint = f"mqtt {broker.url}"
    try:
        pub = Publisher(broker)
        for i in range(50):
            pub.send("tank/east/level", str(i))
        pub.close()
        d.wait_for("sigmad_observations_total", 50, stream="level", tank="east")
        broker.stop()   # in-memory sessions: the restarted broker knows no subscription
        wait_until(lambda: value(d.metrics(), "sigmad_source_connected", endpoint=endpoint) == 0,
                   what="the gauge to show the lost connection")
        broker.start()
        wait_until(lambda: value(d.metrics(), "sigmad_source_connected", endpoint=endpoint) == 1,
                   timeout=30, what="reconnection")
        assert value(d.metrics(), "sigmad_source_connections_total", endpoint=endpoint) == 2
        pub = Publisher(broker)
        for i in range(50, 100):
            pub.send("tank/east/level", str(i))
        pub.close()
        parsed = d.wait_for("sigmad_observations_total", 100, stream="level", tank="east")
        assert value(parsed, "sigmad_observations_total", stream="level", tank="east") == 100
        assert value(parsed, "sigmad_mean", stream="level", tank="east", field="cm") == \
            pytest.approx(np.mean(np.arange(100)), rel=1e-12)   # numpy.mean of 0..99
        assert d.proc.poll() is None
    finally:
        d.stop()


def test_a_daemon_started_before_its_broker_connects_when_the_broker_comes(tmp_path):
    need_binary("mosquitto")
    port = free_port()
    url = f"mqtt://127.0.0.1:{port}"
    d = Sigmad(tmp_path, config(url, "gw-late"))   # starts and serves /metrics with no broker
    try:
        assert value(d.metrics(), "sigmad_source_connected", endpoint=f"mqtt {url}") == 0
        broker = Broker(tmp_path, port)
        try:
            wait_until(lambda: value(d.metrics(), "sigmad_source_connected",
                                     endpoint=f"mqtt {url}") == 1,
                       timeout=40, what="the first connection")
            pub = Publisher(broker)
            pub.send("tank/late/level", b"4.5")
            pub.close()
            d.wait_for("sigmad_observations_total", 1, stream="level", tank="late")
        finally:
            broker.stop()
    finally:
        d.stop()


def test_mqtts_with_a_client_certificate_and_a_password_file(tmp_path):
    import getpass

    from test_security import make_pki
    make_pki(tmp_path)
    subprocess.run([need_binary("mosquitto_passwd"), "-b", "-c", str(tmp_path / "passwd"),
                    "gw", "s3cret"], check=True, capture_output=True, timeout=30)
    broker = Broker(tmp_path)
    broker.stop()
    broker.conf.write_text(
        f"listener {broker.port} 127.0.0.1\nuser {getpass.getuser()}\npersistence false\n"
        f"cafile {tmp_path}/ca.crt\ncertfile {tmp_path}/server.crt\n"
        f"keyfile {tmp_path}/server.key\nrequire_certificate true\n"
        f"allow_anonymous false\npassword_file {tmp_path}/passwd\n")
    broker.start()
    url = f"mqtts://127.0.0.1:{broker.port}"
    tls = (f'tls_ca = "{tmp_path}/ca.crt"\ntls_cert = "{tmp_path}/client.crt"\n'
           f'tls_key = "{tmp_path}/client.key"\nusername = "gw"\n')
    (tmp_path / "good.pw").write_text("s3cret\n")
    (tmp_path / "bad.pw").write_text("guess\n")
    good = start(tmp_path, config(url, "gw-tls", extra_source=tls
                                  + f'password_file = "{tmp_path}/good.pw"'), url, "good.toml")
    bad = Sigmad(tmp_path, config(url, "gw-tls-bad", extra_source=tls
                                  + f'password_file = "{tmp_path}/bad.pw"'), name="bad.toml")
    try:
        pub = paho.Client(CallbackAPIVersion.VERSION2, protocol=paho.MQTTv5)
        pub.tls_set(ca_certs=f"{tmp_path}/ca.crt", certfile=f"{tmp_path}/client.crt",
                    keyfile=f"{tmp_path}/client.key")
        pub.username_pw_set("gw", "s3cret")
        pub.connect("127.0.0.1", broker.port)
        pub.loop_start()
        pub.publish("tank/tls/level", b"2.5", qos=1).wait_for_publish(10)
        pub.disconnect()
        pub.loop_stop()
        parsed = good.wait_for("sigmad_observations_total", 1, stream="level", tank="tls")
        assert value(parsed, "sigmad_mean", stream="level", tank="tls", field="cm") == 2.5
        wait_until(lambda: "refused the connection" in bad.log.read_text(),
                   what="the refusal to be logged")
        assert value(bad.metrics(), "sigmad_source_connected", endpoint=f"mqtt {url}") == 0
        assert bad.proc.poll() is None   # a refused login is retried, not fatal
    finally:
        good.stop()
        bad.stop()
        broker.stop()


# --------------------------------------------------------------------------- the hand-off

class _Message:
    """What paho hands to on_message: topic, payload, QoS 0 (nothing to acknowledge)."""

    def __init__(self, topic: str, payload: bytes) -> None:
        self.topic, self.payload, self.qos, self.mid = topic, payload, 0, 0


def test_a_full_hand_off_drops_and_counts_instead_of_growing(tmp_path):
    from sigmad.daemon.engine.engine import Engine
    from sigmad.daemon.ingest.mqtt import MqttSource

    cfg = parse_config(config(f"mqtt://127.0.0.1:{free_port()}", "gw-full",   # nobody listens
                              extra_daemon="max_message_bytes = 1024",
                              extra_source="high_water_mark = 5").replace("{HTTP}", "127.0.0.1:0"))
    src = MqttSource(cfg.sources[0], cfg.daemon.max_message_bytes)
    try:
        woken = socket.socket(fileno=socket.dup(src.socket))
        woken.setblocking(False)
        for i in range(20):
            src._on_message(src.client, None, _Message("tank/t/level", str(i).encode()))
        src._on_message(src.client, None, _Message("tank/t/level", b"1" * 2000))
        assert woken.recv(16) == b"\0"   # woken once, at half the high-water mark
        woken.close()
        engine = Engine(cfg)
        assert src.drain(engine, time.time()) == 5
        engine.flush(time.time())
        assert engine.messages[src.label] == 21
        assert engine.rejected["queue_full"] == 15 and engine.rejected["too_large"] == 1
        assert sum(v.observations for v in engine.snapshot.series.values()) == 5
    finally:
        src.close()


# --------------------------------------------------------------------------- payloads

def test_payload_examples_run():
    assert doctest.testmod(payloads).failed == 0


def test_rfc3339_times_become_unix_seconds():
    # 1767312000 = 2026-01-02T00:00:00Z, from GNU date: date -u -d 2026-01-02T00:00:00Z +%s
    for text in ("2026-01-02T00:00:00Z", "2026-01-02T01:30:00+01:30", "2026-01-02 00:00:00Z"):
        msg = msgpack.unpackb(to_body(f'{{"v": 1, "time": "{text}"}}'.encode(), 1024))
        assert msg["time"] == 1767312000.0, text


def test_deeply_nested_json_is_refused_not_fatal():
    deep = b'{"a":' * 100_000 + b"1" + b"}" * 100_000
    with pytest.raises(WireError) as exc:
        to_body(deep, 1 << 20)
    assert exc.value.reason == "not_json"


def test_a_json_object_with_values_is_a_wire_body_written_in_json():
    msg = msgpack.unpackb(to_body(b'{"values": {"v": [1.5, 2.5]}, "weight": [1, 2], '
                                  b'"time": "2026-01-02T00:00:00Z", "seq": 7}', 1024))
    assert msg == {"values": {"v": [1.5, 2.5]}, "weight": [1, 2], "time": 1767312000.0,
                   "seq": 7}


@settings(max_examples=400, deadline=None)
@given(st.one_of(st.binary(max_size=300),
                 st.recursive(st.none() | st.booleans() | st.floats() | st.integers()
                              | st.text(max_size=20),
                              lambda c: st.lists(c, max_size=4)
                              | st.dictionaries(st.sampled_from(["v", "time", "weight",
                                                                 "values", "x"]), c,
                                                max_size=4), max_leaves=12).map(
                     lambda o: json.dumps(o).encode())))
def test_any_payload_is_a_body_or_a_counted_reason(payload):
    try:
        body = to_body(payload, 1024)
    except WireError as exc:
        assert exc.reason in payloads.PAYLOAD_REASONS + REASONS
        return
    try:   # what the engine does next: decode it, or reject it by reason
        decode(body, ("v",), max_bytes=1 << 16, max_rows=1000)
    except WireError as exc:
        assert exc.reason in REASONS


def test_a_json_wire_body_msgpack_cannot_carry_is_refused():
    with pytest.raises(WireError) as exc:
        to_body(b'{"values": {"v": 123456789012345678901234567890}}', 1 << 20)
    assert exc.value.reason == "bad_value"


def test_a_msgpack_body_passes_unchanged():
    body = encode({"v": [1.0, 2.0]}, weight=[1.0, 2.0])
    assert to_body(body, 1 << 20) is body


@pytest.mark.parametrize("text", [b"NaN", b"Infinity", b"1_000", b"0x10", b"+1", b"1.", b"--1",
                                  b"true", b"null", b'"1"'])
def test_number_text_follows_json_grammar(text):
    with pytest.raises(WireError) as exc:
        to_body(text, 1024)
    assert exc.value.reason == "bad_payload"


def test_a_json_integer_beyond_64_bits_becomes_a_float():
    msg = msgpack.unpackb(to_body(b'{"v": 123456789012345678901234567890}', 1024))
    assert msg["values"]["v"] == 1.2345678901234568e29


# --------------------------------------------------------------------------- topics

def test_slash_templates_capture_mqtt_levels():
    t = TopicTemplate.parse("greenhouse/{bed}/climate")
    assert t.separator == "/" and t.prefix == "greenhouse/"
    assert t.match("greenhouse/bed-3/climate") == ("bed-3",)
    assert t.match("greenhouse/bed.3/climate") == ("bed.3",)   # a dot is part of a level
    assert t.match("greenhouse//climate") is None
    assert t.match("greenhouse/a/b/climate") is None


def test_dot_templates_keep_their_meaning_with_a_slash_in_a_literal():
    t = TopicTemplate.parse("lat/v1.{service}")
    assert t.separator == "." and t.match("lat/v1.checkout") == ("checkout",)
    assert TopicTemplate.parse("a/b").match("a/b") == ()


def test_a_stream_may_name_its_separator():
    t = TopicTemplate.parse("plant/v1.2/{bed}", separator="/")
    assert t.match("plant/v1.2/b7") == ("b7",)
    with pytest.raises(TopicError):
        TopicTemplate.parse("plant/{bed}", separator=":")


def test_templates_of_two_separators_overlap_only_by_their_prefixes():
    a, b = TopicTemplate.parse("env.{site}"), TopicTemplate.parse("greenhouse/{bed}/climate")
    assert not a.overlaps(b)
    assert TopicTemplate.parse("{x}.y").overlaps(b)   # "greenhouse/z.y" could match both


# --------------------------------------------------------------------------- configuration

def mqtt_config(source: str) -> str:
    return f"""
[[source]]
socket = "mqtt"
{source}
[[stream]]
name = "s"
topic = "a/{{b}}"
fields = ["v"]
"""


@pytest.mark.parametrize("source,key,words", [
    ('connect = "tcp://h:1"\ntopics = ["a/+"]', "connect", "mqtt://"),
    ('connect = "mqtt://u:pw@h"\ntopics = ["a/+"]', "connect", "credentials"),
    ('connect = "mqtt://h:70000"\ntopics = ["a/+"]', "connect", "port"),
    ('connect = ["mqtt://h", "mqtt://g"]\ntopics = ["a/+"]', "connect", "one broker"),
    ('connect = "mqtt://h"\ntopics = ["a/#/b"]', "topics", "# only"),
    ('connect = "mqtt://h"\ntopics = ["a/b+"]', "topics", "whole level"),
    ('connect = "mqtt://h"\ntopics = ["$share/g/a/+"]', "topics", "shared_group"),
    ('connect = "mqtt://h"\ntopics = []', "topics", "at least one"),
    ('connect = "mqtt://h"\ntopics = ["a/+"]\nqos = 3', "qos", "0 to 2"),
    ('connect = "mqtt://h"\ntopics = ["a/+"]\nqos = 2', "qos", "not supported"),
    ('connect = "mqtt://h"\ntopics = ["a/+"]\nshared_group = "a/b"', "shared_group", "without"),
    ('connect = "mqtt://h"\ntopics = ["a/+"]\nusername = "u"\npassword_file = "missing.txt"',
     "password_file", "cannot be read"),
    ('connect = "mqtt://h"\ntopics = ["a/+"]\npassword_file = "/etc/hostname"',
     "password_file", "username"),
    ('connect = "mqtt://h"\ntopics = ["a/+"]\ntls_ca = "/etc/hostname"', "tls_ca", "mqtts://"),
    ('connect = "mqtts://h"\ntopics = ["a/+"]\ntls_cert = "/etc/hostname"', "tls_key",
     "tls_cert needs it"),
    ('connect = "mqtt://h"\ntopics = ["a/+"]\nbind = "mqtt://h"', "bind", "not a known key"),
])
def test_check_config_names_the_bad_mqtt_key(source, key, words):
    with pytest.raises(ConfigError) as exc:
        parse_config(mqtt_config(source), "gw.toml")
    assert exc.value.key == f"source[0].{key}"
    assert words in str(exc.value)


def test_a_shared_group_subscribes_with_the_share_prefix():
    cfg = parse_config(mqtt_config('connect = "mqtts://broker.example:8884"\n'
                                   'topics = ["a/+", "b/#"]\nshared_group = "g"'))
    m = cfg.sources[0].mqtt
    assert (m.host, m.port, m.tls) == ("broker.example", 8884, True)
    assert m.subscriptions(cfg.sources[0].topics) == ("$share/g/a/+", "$share/g/b/#")
    m = parse_config(mqtt_config('connect = "mqtt://[::1]"\ntopics = ["#"]')).sources[0].mqtt
    assert (m.host, m.port, m.tls) == ("::1", 1883, False)   # MQTT's registered port (IANA)


def test_a_stream_names_its_separator_in_the_config():
    text = mqtt_config('connect = "mqtt://h"\ntopics = ["#"]').replace(
        'topic = "a/{b}"', 'topic = "plant/v1.2/{b}"\nseparator = "/"')
    topic = parse_config(text).streams[0].topic
    assert topic.match("plant/v1.2/b7") == ("b7",)
    with pytest.raises(ConfigError) as exc:
        parse_config(text.replace('separator = "/"', 'separator = ":"'))
    assert exc.value.key == "stream[0].separator"


def test_time_text_is_bounded():
    with pytest.raises(WireError) as exc:
        to_body(b'{"v": 1, "time": "' + b"2" * 100 + b'"}', 1024)
    assert exc.value.reason == "bad_time"
    assert math.isfinite(msgpack.unpackb(to_body(b"1e308", 1024))["values"])
