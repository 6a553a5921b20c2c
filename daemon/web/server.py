"""The HTTP side: /metrics for Prometheus, / (the status page) and /api/state (JSON).

Runs in its own thread(s) and only ever reads the latest immutable snapshot.
"""

from __future__ import annotations

import json
import logging
import ssl
import threading
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from prometheus_client import CONTENT_TYPE_LATEST
from sigmad.daemon.config.load import split_host_port

log = logging.getLogger("sigmad.http")



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
        except Exception:  # a reader bug must not kill the server thread
            log.exception("error serving %s", path)
            self._send(500, b"internal error\n", "text/plain; charset=utf-8")
            return
        self._send(200, body, ctype)

    def _send(self, code: int, body: bytes, ctype: str) -> None:
        self.send_response(code)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        self.send_header("Cache-Control", "no-store")
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, fmt: str, *args) -> None:
        log.debug("%s %s", self.address_string(), fmt % args)


class HttpServer:
    """A threading HTTP(S) server with fixed routes.

    Parameters
    ----------
    address : str
        "host:port"; port 0 picks a free port (see ``port``).
    metrics, page, state : callables returning bytes
        The exposition text for /metrics, the status page (HTML) and the JSON state.
    tls_cert, tls_key, tls_client_ca : str or None
        With cert and key: HTTPS. With a client CA too: client certificates required.
    """

    def __init__(self, address: str, metrics: Callable[[], bytes],
                 page: Callable[[], bytes], state: Callable[[], bytes],
                 tls_cert: str | None = None, tls_key: str | None = None,
                 tls_client_ca: str | None = None) -> None:
        handler = type("Handler", (_Handler,), {"routes": {
            "/metrics": lambda: (metrics(), CONTENT_TYPE_LATEST),
            "/": lambda: (page(), "text/html; charset=utf-8"),
            "/api/state": lambda: (state(), "application/json"),
        }})
        host, port = split_host_port(address)
        self._server = ThreadingHTTPServer((host, port), handler)
        self._server.daemon_threads = True
        if tls_cert and tls_key:
            ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
            ctx.minimum_version = ssl.TLSVersion.TLSv1_2
            ctx.load_cert_chain(tls_cert, tls_key)
            if tls_client_ca:
                ctx.verify_mode = ssl.CERT_REQUIRED
                ctx.load_verify_locations(tls_client_ca)
            self._server.socket = ctx.wrap_socket(self._server.socket, server_side=True)
        self._thread = threading.Thread(target=self._server.serve_forever,
                                        name="sigmad-http", daemon=True)

    @property
    def port(self) -> int:
        return self._server.server_address[1]

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._server.shutdown()
        self._server.server_close()


def json_bytes(obj: object) -> bytes:
    return json.dumps(obj, separators=(",", ":"), allow_nan=False).encode()
