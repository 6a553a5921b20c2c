"""MQTT sources: a broker session (paho-mqtt) whose messages the engine thread drains.

paho's network thread only receives: each message is appended, with its topic,
to a bounded hand-off list. The engine thread drains the list before every
flush, and sooner when a socket pair that its poller watches beside the ZeroMQ
sockets says WAKE_AT messages are waiting. It drains like a ZeroMQ socket
(:meth:`MqttSource.drain`), turns JSON and number-text payloads into wire-format v1 bodies
(:mod:`sigmad.daemon.ingest.payloads`) and hands everything to
``Engine.ingest_many``: no estimator state is touched outside the engine thread.

What the broker session gives, and what it does not (MQTT 5):

- With a ``client_id`` the session is persistent (clean start off, session
  expiry ``session_expiry``): QoS 1 messages published while sigmad is
  down are queued by the broker (within its own limits) and delivered after it
  returns. Subscriptions are made again on every connection, so a broker that
  lost them (or a new session) gets them back.
- Messages are acknowledged when they enter the hand-off list. A clean stop
  (SIGTERM) stops acknowledging QoS 1 messages first, then leaves the session
  with a normal DISCONNECT, folds everything that was acknowledged and writes
  the final checkpoint: nothing acknowledged is lost, and whatever the broker
  still holds comes with the next start.
- A crash (SIGKILL, power loss) loses what was acknowledged after the last
  checkpoint: the broker will not send it again. Messages it had sent but we
  had not acknowledged are sent again to the next session.
- QoS 1 is at least once: a message whose acknowledgement is lost with the
  connection is delivered, and counted, twice.
- A full hand-off list (``high_water_mark`` messages or MAX_QUEUED_BYTES)
  drops the message and counts it as ``queue_full``; retained messages are not
  asked for (each reading is counted once, not again at every subscribe).
"""

from __future__ import annotations

import contextlib
import logging
import socket
import threading
from collections import Counter
from collections.abc import Callable, Iterable

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.subscribeoptions import SubscribeOptions
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily
from sigmad.daemon.config.errors import ConfigError
from sigmad.daemon.config.schema import SourceConfig
from sigmad.daemon.ingest.payloads import is_msgpack_map, to_body
from sigmad.daemon.ingest.wire import WireError

log = logging.getLogger("sigmad.mqtt")

#: Bytes of payload the hand-off list holds at most, whatever high_water_mark says.
MAX_QUEUED_BYTES = 64 << 20
#: Reconnection backoff: paho doubles the wait from the first to the second bound.
RECONNECT_MIN, RECONNECT_MAX = 1, 30
KEEPALIVE = 30   # seconds between pings on a quiet connection
#: The engine is woken when this many messages (or bytes) wait; otherwise it drains
#: the hand-off just before each flush, which is when rows become visible anyway.
#: Waking it for every message cost half the throughput (GIL and thread switches).
WAKE_AT, WAKE_BYTES = 512, 1 << 20
# The broker drops packets above the MQTT 5 maximum packet size we announce:
# max_message_bytes of payload plus room for the longest topic and properties.
_PACKET_OVERHEAD = 65_536 + 1_024
_MAX_PACKET = 268_435_455 + 5   # the protocol's own limit: a 4-byte remaining length + header


def _read_password(cfg: SourceConfig) -> str | None:
    path = cfg.mqtt.password_file
    if path is None:
        return None
    try:
        with open(path, encoding="utf-8") as f:
            return f.readline().rstrip("\r\n")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError("password_file", path, f"cannot be read ({exc})") from None


class MqttSource:
    """One broker session; the engine thread polls ``socket`` and calls ``drain``,
    and drains it before every flush (``drain_before_flush``).

    Parameters
    ----------
    cfg : SourceConfig
        A ``socket = "mqtt"`` source (``cfg.mqtt`` set).
    max_bytes : int
        ``daemon.max_message_bytes``.
    """

    drain_before_flush = True

    def __init__(self, cfg: SourceConfig, max_bytes: int) -> None:
        m = cfg.mqtt
        self.cfg = cfg
        self.label = f"mqtt {cfg.connect[0]}"
        self.guard = None   # no CurveZMQ here (RefusedCollector looks for it)
        self.connected = False
        self.connections = 0
        self._max_bytes = max_bytes
        self._limit = cfg.high_water_mark
        self._wake_at = max(1, min(WAKE_AT, cfg.high_water_mark // 2))   # well before full
        self._lock = threading.Lock()
        self._queue: list[tuple[bytes, bytes]] = []
        self._queued_bytes = 0
        self._dropped: Counter[str] = Counter()
        self._closing = False
        self._closed = False
        self._woke = False
        self._warned = False
        self._subscribed = cfg.mqtt.subscriptions(cfg.topics)
        self._woken, self._wake = socket.socketpair()
        self._woken.setblocking(False)
        self._wake.setblocking(False)
        #: what the engine's poller watches (it reports plain descriptors by number)
        self.socket = self._woken.fileno()
        try:
            self.client = self._client(m, _read_password(cfg))
        except BaseException:
            self._close_wake()
            raise
        self.client.loop_start()

    def _client(self, m, password: str | None) -> paho.Client:
        client = paho.Client(CallbackAPIVersion.VERSION2, client_id=m.client_id or "",
                             protocol=paho.MQTTv5, manual_ack=True)
        if m.username is not None:
            client.username_pw_set(m.username, password)
        if m.tls:
            try:
                client.tls_set(ca_certs=m.tls_ca, certfile=m.tls_cert, keyfile=m.tls_key)
            except (OSError, ValueError) as exc:   # ssl.SSLError is an OSError
                raise ConfigError("tls_ca", m.tls_ca, f"cannot set up TLS ({exc})") from None
        client.reconnect_delay_set(RECONNECT_MIN, RECONNECT_MAX)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_connect_fail = self._on_connect_fail
        client.on_message = self._on_message
        client.on_subscribe = self._on_subscribe
        props = Properties(PacketTypes.CONNECT)
        # without a client_id the broker names the session and forgets it at disconnect
        props.SessionExpiryInterval = int(m.session_expiry) if m.client_id else 0
        props.MaximumPacketSize = min(self._max_bytes + _PACKET_OVERHEAD, _MAX_PACKET)
        client.connect_async(m.host, m.port, keepalive=KEEPALIVE,
                             clean_start=m.client_id is None, properties=props)
        return client

    # ------------------------------------------------------ paho's network thread
    def _on_connect(self, client, userdata, flags, reason_code, properties) -> None:
        if reason_code.is_failure:
            self.connected = False
            log.warning("%s refused the connection: %s", self.label, reason_code)
            return
        self._warned = False
        self.connections += 1
        m = self.cfg.mqtt
        # no retained messages: a reading is counted when it is published, not at every subscribe
        options = SubscribeOptions(qos=m.qos, retainHandling=SubscribeOptions.RETAIN_DO_NOT_SEND)
        client.subscribe([(f, options) for f in self._subscribed])
        log.info("%s connected (session %s); subscribed to %s", self.label,
                 "resumed" if flags.session_present else "new",
                 ", ".join(self._subscribed))

    def _on_subscribe(self, client, userdata, mid, reason_codes, properties) -> None:
        refused = [f"{f} ({rc})" for f, rc in zip(self._subscribed, reason_codes, strict=False)
                   if rc.is_failure]
        if refused:
            log.warning("%s: the broker refused the subscriptions %s", self.label,
                        ", ".join(refused))
        self.connected = True   # connected and subscribed: messages can flow

    def _on_disconnect(self, client, userdata, flags, reason_code, properties) -> None:
        self.connected = False
        if not self._closing:
            log.warning("%s lost the broker (%s); reconnecting with backoff from %ds to %ds",
                        self.label, reason_code, RECONNECT_MIN, RECONNECT_MAX)

    def _on_connect_fail(self, client, userdata) -> None:
        self.connected = False
        if not self._warned:
            self._warned = True
            log.warning("%s: cannot reach the broker; retrying with backoff", self.label)

    def _on_message(self, client, userdata, msg) -> None:
        payload = msg.payload
        try:
            topic = msg.topic.encode("utf-8")
        except UnicodeDecodeError:   # brokers check topics are UTF-8; paho raises if not
            topic = None
        with self._lock:
            if self._closing and msg.qos == 1:
                return   # left unacknowledged: the broker sends it to the next session
            if topic is None:
                self._dropped["bad_payload"] += 1
            elif len(payload) > self._max_bytes:
                self._dropped["too_large"] += 1
            elif len(self._queue) >= self._limit or self._queued_bytes >= MAX_QUEUED_BYTES:
                self._dropped["queue_full"] += 1
            else:
                self._queue.append((topic, payload))
                self._queued_bytes += len(payload)
                if not self._woke and (len(self._queue) >= self._wake_at
                                       or self._queued_bytes >= WAKE_BYTES):
                    self._woke = True
                    with contextlib.suppress(OSError):   # full: the engine is woken already
                        self._wake.send(b"\0")
            if msg.qos:
                client.ack(msg.mid, msg.qos)

    # ----------------------------------------------------------- engine thread
    def drain(self, engine, now: float) -> int:
        """Hand every queued message to the engine; count drops and bad payloads.

        Payloads that start like a msgpack map, and those on topics no stream
        takes (counted as ``no_stream`` there), go to ``Engine.ingest_many`` as
        they are; JSON and number text become wire-format bodies first. Returns
        the messages taken. O(messages + payload bytes).
        """
        with contextlib.suppress(OSError):   # nothing to read: a final drain, or no wake-up
            self._woken.recv(4096)
        with self._lock:
            items, self._queue = self._queue, []
            self._queued_bytes = 0
            self._woke = False
            dropped, self._dropped = self._dropped, Counter()
        label = self.label
        for reason, n in dropped.items():
            engine.messages[label] += n
            engine.reject(reason, n, topic=label, detail="dropped before decoding", now=now)
        topics: list[bytes] = []
        bodies: list[bytes] = []
        routes, route, max_bytes = engine.routes_seen, engine.route, self._max_bytes
        for topic, payload in items:
            if not is_msgpack_map(payload) and (routes.get(topic) is not None
                                                or route(topic) is not None):
                try:
                    payload = to_body(payload, max_bytes)
                except WireError as exc:
                    engine.messages[label] += 1
                    engine.reject(exc.reason, topic=topic, detail=exc.detail, now=now)
                    continue
            topics.append(topic)
            bodies.append(payload)
        if topics:
            engine.ingest_many(topics, bodies, now, label)
        return len(items)

    # -------------------------------------------------------------- lifecycle
    def stop_receiving(self) -> None:
        """Leave the session cleanly: stop acknowledging QoS 1 messages, then DISCONNECT.

        Acknowledgements already queued by paho go out before the DISCONNECT, so
        the broker keeps exactly the messages that were not taken. Joins paho's
        thread; idempotent.
        """
        with self._lock:
            if self._closing:
                return
            self._closing = True
        self.client.disconnect()
        self.client.loop_stop()
        self.connected = False

    def close(self) -> None:
        self.stop_receiving()
        self._close_wake()

    def _close_wake(self) -> None:
        if not self._closed:
            self._closed = True
            self._woken.close()
            self._wake.close()


class ConnectionCollector:
    """``sigmad_source_connected{endpoint}`` (1 once connected and subscribed) and
    ``sigmad_source_connections_total{endpoint}`` (successful connections: more than
    one means the source reconnected)."""

    def __init__(self, sources: Callable[[], Iterable]) -> None:
        self._sources = sources

    def collect(self):
        up = GaugeMetricFamily("sigmad_source_connected",
                               "1 while the source is connected and subscribed, else 0.",
                               labels=["endpoint"])
        count = CounterMetricFamily("sigmad_source_connections",
                                    "Connections the source made to its broker.",
                                    labels=["endpoint"])
        for s in self._sources():
            if isinstance(s, MqttSource):
                up.add_metric([s.label], 1.0 if s.connected else 0.0)
                count.add_metric([s.label], s.connections)
        yield up
        yield count

    def describe(self) -> list:
        return []
