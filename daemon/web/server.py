"""The HTTP side: /metrics for Prometheus, / (the status page) and /api/state (JSON).

Runs in its own thread(s) and only ever reads the latest immutable snapshot.
"""

from __future__ import annotations

import contextlib
import errno
import itertools
import json
import logging
import os
import socket
import ssl
import threading
import time
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from prometheus_client import CONTENT_TYPE_LATEST
from sigmad.daemon.config.errors import ConfigError
from sigmad.daemon.config.units import split_host_port

log = logging.getLogger("sigmad.http")

#: Connections served at once; one more is closed at once (and counted).
MAX_CONNECTIONS = 256
#: Seconds a connection gets to finish its TLS handshake and send its request line
#: and headers, in all; a client that dawdles is cut off.
REQUEST_TIMEOUT = 10.0
#: Seconds any one read or write on a connection may wait.
IO_TIMEOUT = 10.0

_BIND_ERRORS = {
    errno.EADDRINUSE: "is already in use by another process; stop that process or "
                      "choose another port",
    errno.EADDRNOTAVAIL: "is not an address of this host; use one it has, e.g. 127.0.0.1",
    errno.EACCES: "cannot be bound by this user (ports below 1024 need privileges)",
}



class _Handler(BaseHTTPRequestHandler):
    server_version = "sigmad"
    routes: dict[str, Callable[[], tuple[bytes, str]]] = {}

    def do_GET(self) -> None:  # noqa: N802 (http.server's naming)
        path = self.path.split("?", 1)[0]
        route = self.routes.get(path)
        if route is None:
            self._send(404, b"not found: try /metrics, / or /api/state\n",
                       "text/plain; charset=utf-8")
            return
        try:
            body, ctype = route()
            if not isinstance(body, bytes | bytearray):   # pieces: the first one made here
                body = itertools.chain((next(body, b""),), body)
        except Exception:  # a reader bug must not kill the server thread
            log.exception("error serving %s", path)
            self._send(500, b"internal error\n", "text/plain; charset=utf-8")
            return
        if isinstance(body, bytes | bytearray):
            self._send(200, body, ctype)
        else:
            self._stream(body, ctype)

    def _stream(self, pieces, ctype: str) -> None:
        """Write a response made piece by piece as it is made (no Content-Length: the
        connection closes at its end, as HTTP/1.0 allows); a failure midway is logged
        and cuts the response short."""
        self.send_response(200)
        self.send_header("Content-Type", ctype)
        self.send_header("Cache-Control", "no-store")
        self.send_header("Connection", "close")
        self.end_headers()
        self.close_connection = True
        try:
            for piece in pieces:
                self.wfile.write(piece)
        except OSError:
            raise
        except Exception:  # a reader bug must not kill the server thread
            log.exception("error serving %s: response cut short", self.path[:200])

    def _send(self, code: int, body: bytes, ctype: str) -> None:
        self.send_response(code)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        self.send_header("Cache-Control", "no-store")
        self.end_headers()
        self.wfile.write(body)

    def parse_request(self) -> bool:
        ok = super().parse_request()
        self.server.request_read(self.connection)   # the request is in: no more deadline
        return ok

    def log_message(self, fmt: str, *args) -> None:
        log.debug("%s %s", self.address_string(), fmt % args)


class _Server(ThreadingHTTPServer):
    """A thread per connection, at most ``MAX_CONNECTIONS`` at once, each with a deadline.

    The listening socket stays plain: a TLS handshake runs in the connection's own
    thread (with the deadline), so a client that connects and never speaks holds
    one connection, never the accept loop. Between requests the accept loop
    (``service_actions``, every half second) cuts off connections past their
    deadline.
    """

    daemon_threads = True
    block_on_close = False
    request_queue_size = 128

    def __init__(self, family: int, address: tuple, handler: type,
                 tls: ssl.SSLContext | None, max_connections: int,
                 request_timeout: float) -> None:
        self.address_family = family
        self.tls = tls
        self.request_timeout = request_timeout
        self.refused = 0
        self._slots = threading.BoundedSemaphore(max_connections)
        self._lock = threading.Lock()
        self._deadlines: dict[int, tuple[float, socket.socket]] = {}
        super().__init__(address, handler)

    def server_bind(self) -> None:
        if self.address_family == socket.AF_INET6:
            self.socket.setsockopt(socket.IPPROTO_IPV6, socket.IPV6_V6ONLY, 1)
        super().server_bind()

    def process_request(self, request, client_address) -> None:
        if not self._slots.acquire(blocking=False):
            self.refused += 1
            self.shutdown_request(request)
            return
        try:
            self._watch(request)
            super().process_request(request, client_address)   # starts the thread
        except BaseException:
            self._forget(request)
            self._slots.release()
            raise

    def process_request_thread(self, request, client_address) -> None:
        conn = request
        try:
            if self.tls is not None:
                request.settimeout(self.request_timeout)
                conn = self.tls.wrap_socket(request, server_side=True,
                                            do_handshake_on_connect=False)
                self._watch(conn, replaces=request)
                conn.do_handshake()
            self.finish_request(conn, client_address)
        except (OSError, ValueError) as exc:   # a handshake or connection that broke off
            log.debug("connection from %s ended: %s", client_address[0], exc)
        finally:
            self._forget(conn)
            self.shutdown_request(conn)
            self._slots.release()

    def _watch(self, conn: socket.socket, replaces: socket.socket | None = None) -> None:
        with self._lock:
            if replaces is not None:
                deadline, _ = self._deadlines.pop(id(replaces), (None, None))
            else:
                deadline = time.monotonic() + self.request_timeout
            if deadline is not None:
                self._deadlines[id(conn)] = (deadline, conn)

    def _forget(self, conn: socket.socket) -> None:
        with self._lock:
            self._deadlines.pop(id(conn), None)

    def request_read(self, conn: socket.socket) -> None:
        self._forget(conn)

    def service_actions(self) -> None:
        now = time.monotonic()
        with self._lock:
            late = [c for key, (t, c) in self._deadlines.items() if t <= now]
            for c in late:
                self._deadlines.pop(id(c), None)
        for c in late:
            # the plain socket's shutdown (an SSLSocket's would drop its state under the
            # thread still using it): the blocked read returns and the thread ends
            with contextlib.suppress(OSError):
                socket.socket.shutdown(c, socket.SHUT_RDWR)

    def handle_error(self, request, client_address) -> None:
        log.debug("error on a connection from %s", client_address[0], exc_info=True)


class HttpServer:
    """A threading HTTP(S) server with fixed routes, bound when constructed.

    At most ``max_connections`` connections are served at once (more are closed
    at once); each gets ``request_timeout`` seconds in all for its TLS handshake
    and request, and ``IO_TIMEOUT`` seconds for any one read or write.

    Parameters
    ----------
    address : str
        "host:port"; port 0 picks a free port (see ``port``).
    metrics, page, state : callables returning bytes, or an iterator of bytes
        The exposition text for /metrics, the status page (HTML) and the JSON state;
        an iterator's pieces are written as they are made (``_Handler._stream``).
    tls_cert, tls_key, tls_client_ca : str or None
        With cert and key: HTTPS. With a client CA too: client certificates required.

    Raises
    ------
    ConfigError
        When the address cannot be bound (in use, not on this host, a host name that
        does not resolve) or a TLS file cannot be used, naming the key
        (``daemon.http``, ``daemon.tls_cert``...) and what to do.
    """

    def __init__(self, address: str, metrics: Callable[[], bytes],
                 page: Callable[[], bytes], state: Callable[[], bytes],
                 tls_cert: str | None = None, tls_key: str | None = None,
                 tls_client_ca: str | None = None, *,
                 max_connections: int = MAX_CONNECTIONS,
                 request_timeout: float = REQUEST_TIMEOUT) -> None:
        handler = type("Handler", (_Handler,), {"timeout": IO_TIMEOUT, "routes": {
            "/metrics": lambda: (metrics(), CONTENT_TYPE_LATEST),
            "/": lambda: (page(), "text/html; charset=utf-8"),
            "/api/state": lambda: (state(), "application/json"),
        }})
        tls = _tls_context(tls_cert, tls_key, tls_client_ca) if tls_cert and tls_key else None
        self.tls = tls is not None
        host, port = split_host_port(address)
        try:
            family, _, _, _, sockaddr = socket.getaddrinfo(
                host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)[0]
        except (socket.gaierror, UnicodeError):
            raise ConfigError("daemon.http", address, f"names the host {host!r}, which does "
                              "not resolve here; use an IP address such as 127.0.0.1") from None
        try:
            self._server = _Server(family, sockaddr, handler, tls, max_connections,
                                   request_timeout)
        except OSError as exc:
            told = _BIND_ERRORS.get(exc.errno)
            if told is None:
                raise
            raise ConfigError("daemon.http", address, told) from None
        self._thread = threading.Thread(target=self._server.serve_forever,
                                        kwargs={"poll_interval": 0.5},
                                        name="sigmad-http", daemon=True)

    @property
    def port(self) -> int:
        return self._server.server_address[1]

    @property
    def refused(self) -> int:
        """Connections closed at once because ``max_connections`` were being served."""
        return self._server.refused

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        """Stop serving and close the socket; never waits on a loop that did not start."""
        if self._thread.is_alive():
            self._server.shutdown()
        self._server.server_close()


def _tls_context(cert: str, key: str, client_ca: str | None) -> ssl.SSLContext:
    """The server's TLS context; a file that cannot be used is a ConfigError naming it."""
    for name, path in (("tls_cert", cert), ("tls_key", key), ("tls_client_ca", client_ca)):
        if path is not None and not os.path.isfile(path):
            raise ConfigError(f"daemon.{name}", path, "does not exist; correct the path "
                              f"(relative paths start at {os.getcwd()})")
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    ctx.minimum_version = ssl.TLSVersion.TLSv1_2
    try:
        ctx.load_cert_chain(cert, key)
    except (ssl.SSLError, OSError) as exc:
        raise ConfigError("daemon.tls_key", key, "cannot be used with tls_cert "
                          f"{cert!r} ({getattr(exc, 'reason', None) or exc}); give a PEM "
                          "certificate and its private key") from None
    if client_ca:
        ctx.verify_mode = ssl.CERT_REQUIRED
        try:
            ctx.load_verify_locations(client_ca)
        except (ssl.SSLError, OSError) as exc:
            raise ConfigError("daemon.tls_client_ca", client_ca, "cannot be read as PEM "
                              f"certificates ({getattr(exc, 'reason', None) or exc})") from None
    return ctx


def json_bytes(obj: object) -> bytes:
    return json.dumps(obj, separators=(",", ":"), allow_nan=False).encode()
