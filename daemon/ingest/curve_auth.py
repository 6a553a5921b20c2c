"""CurveZMQ authentication for ingest sockets, and counting the handshakes refused.

A source with ``curve_secret`` becomes a CURVE server with the daemon's key
pair; with ``curve_allow`` only producers whose public key is in that
directory of certificate files get in (zmq.auth's ZAP handler, one per
context). A socket monitor counts every refused handshake: an unknown key
(ZAP denial, ``auth``), a producer without CURVE (``protocol``) or one whose
handshake broke off (``no_detail``).
"""

from __future__ import annotations

import contextlib
import logging
import os
import threading
import weakref
from collections import Counter
from collections.abc import Callable, Iterable

import zmq
import zmq.auth
from prometheus_client.core import CounterMetricFamily
from sigmad.daemon.config.errors import ConfigError
from sigmad.daemon.config.schema import SourceConfig
from sigmad.daemon.ingest.curve_keys import load_server_keys
from zmq.auth.thread import ThreadAuthenticator
from zmq.utils.monitor import recv_monitor_message

log = logging.getLogger("sigmad.auth")

_REFUSALS = {
    zmq.EVENT_HANDSHAKE_FAILED_AUTH: "auth",
    zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL: "protocol",
    zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL: "no_detail",
}
_MONITORED = 0
for _event in _REFUSALS:
    _MONITORED |= _event

# one ZAP handler per context: libzmq allows a single inproc://zeromq.zap.01 binding
_AUTHENTICATORS: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()
_LOCK = threading.Lock()


def _authenticator(ctx: zmq.Context) -> ThreadAuthenticator:
    with _LOCK:
        auth = _AUTHENTICATORS.get(ctx)
        if auth is None:
            auth = ThreadAuthenticator(ctx, log=logging.getLogger("sigmad.zap"))
            auth.start()
            _AUTHENTICATORS[ctx] = auth
        return auth


def stop_authenticator(ctx: zmq.Context) -> None:
    """Stop the context's ZAP handler, if any (before ``ctx.term()``)."""
    with _LOCK:
        auth = _AUTHENTICATORS.pop(ctx, None)
    if auth is not None:
        auth.stop()


class Guard:
    """CURVE on one server socket plus a monitor thread counting refused handshakes.

    Parameters
    ----------
    ctx : zmq.Context
    socket : zmq.Socket
        Not yet bound or connected.
    cfg : SourceConfig
        ``curve_secret`` (required) and ``curve_allow`` (optional directory).
    domain : str
        ZAP domain of this socket (one per source, so allow-lists stay apart).

    Raises
    ------
    ConfigError
        When the key file cannot be read or the allow directory does not exist
        (naming the key ``{key}.curve_secret`` or ``{key}.curve_allow``).
    """

    def __init__(self, ctx: zmq.Context, socket: zmq.Socket, cfg: SourceConfig,
                 domain: str, key: str = "source") -> None:
        public, secret = load_server_keys(cfg.curve_secret, f"{key}.curve_secret")
        if cfg.curve_allow and not os.path.isdir(cfg.curve_allow):
            # zmq.auth would refuse every producer, saying so only in a log line
            raise ConfigError(f"{key}.curve_allow", cfg.curve_allow,
                              "is not an existing directory; create it and put the "
                              "producers' public .key files in it")
        auth = _authenticator(ctx)
        location = cfg.curve_allow if cfg.curve_allow else zmq.auth.CURVE_ALLOW_ANY
        auth.configure_curve(domain=domain, location=location)
        socket.zap_domain = domain.encode()
        socket.curve_secretkey = secret
        socket.curve_publickey = public
        socket.curve_server = True
        self.refused: Counter[str] = Counter()
        self._monitor = socket.get_monitor_socket(_MONITORED)
        self._socket = socket
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._watch, name="sigmad-auth-monitor",
                                        daemon=True)
        self._thread.start()

    def _watch(self) -> None:
        mon = self._monitor
        try:
            while not self._stop.is_set():
                if not mon.poll(100):
                    continue
                try:
                    event = recv_monitor_message(mon)
                except zmq.ZMQError:
                    break
                reason = _REFUSALS.get(event["event"])
                if reason is not None:
                    self.refused[reason] += 1
                    log.debug("refused a producer at %s: %s", event.get("endpoint"), reason)
        finally:
            mon.close(0)

    def close(self) -> None:
        """Stop the monitor (call before closing the socket)."""
        self._stop.set()
        self._thread.join(2.0)
        with contextlib.suppress(zmq.ZMQError):
            self._socket.disable_monitor()


class RefusedCollector:
    """``sigmad_refused_connections_total{endpoint, reason}`` from the sources' guards."""

    def __init__(self, sources: Callable[[], Iterable]) -> None:
        self._sources = sources

    def collect(self):
        fam = CounterMetricFamily("sigmad_refused_connections",
                                  "Producer handshakes refused by CurveZMQ authentication.",
                                  labels=["endpoint", "reason"])
        for s in self._sources():
            guard = getattr(s, "guard", None)
            if guard is None:
                continue
            for reason in _REFUSALS.values():
                fam.add_metric([s.label, reason], guard.refused[reason])
        yield fam
