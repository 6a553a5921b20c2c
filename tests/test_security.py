"""Security end to end: CurveZMQ ingest authentication and HTTPS with client certificates.

Real sockets, a real ``sigmad run`` subprocess, keys made by ``sigmad keygen``
and certificates made by the openssl command line.
"""

from __future__ import annotations

import os
import ssl
import stat
import subprocess
import sys
import time
import urllib.request

import pytest
from conftest import need_binary
from harness import ROOT, Sigmad, free_port, samples, value
from sigmad.daemon.client import DeliveryError, Producer

pytestmark = pytest.mark.slow   # real daemon subprocesses with TLS and CurveZMQ

CURVE_CONFIG = """
[daemon]
http = "{HTTP}"
flush_every = "20ms"

[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:%(port)d"
curve_secret = "%(secret)s"
curve_allow = "%(allow)s"

[[stream]]
name = "k"
topic = "k.{who}"
fields = ["v"]
"""


def keygen(directory, name: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "sigmad.daemon", "keygen", str(directory),
                           "--name", name], capture_output=True, text=True,
                          env=dict(os.environ, PYTHONPATH=str(ROOT)), timeout=30)


def test_keygen_writes_a_private_secret_and_refuses_to_overwrite(tmp_path):
    assert keygen(tmp_path, "srv").returncode == 0
    secret = tmp_path / "srv.key_secret"
    # 0600 on the secret: the requirement
    assert stat.S_IMODE(secret.stat().st_mode) == 0o600
    assert (tmp_path / "srv.key").exists()
    again = keygen(tmp_path, "srv")
    assert again.returncode == 1
    assert "refusing to overwrite" in again.stderr


@pytest.fixture(scope="module")
def curve_daemon(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("curve")
    keys, allow = tmp / "keys", tmp / "allow"
    allow.mkdir()
    for name in ("server", "friend", "stranger"):
        assert keygen(keys, name).returncode == 0
    # only the friend's public key is allowed
    (allow / "friend.key").write_bytes((keys / "friend.key").read_bytes())
    port = free_port()
    d = Sigmad(tmp, CURVE_CONFIG % {"port": port, "secret": keys / "server.key_secret",
                                    "allow": allow})
    d.endpoint = f"tcp://127.0.0.1:{port}"
    d.keys = keys
    yield d
    assert d.stop() == 0


def refused(d: Sigmad, reason: str) -> float:
    return value(d.metrics(), "sigmad_refused_connections_total",
                 endpoint=f"pull {d.endpoint}", reason=reason) or 0.0


def _send_some(d: Sigmad, who: str, refused: bool = False, **curve) -> None:
    p = Producer(d.endpoint, source=who, linger=0.5, **curve)
    for i in range(5):
        p.send(f"k.{who}", {"v": float(i)})
    time.sleep(0.8)
    if refused:   # the producer is told its messages never left
        with pytest.raises(DeliveryError):
            p.close()
    else:
        p.close()


def test_allowed_key_is_accepted(curve_daemon):
    d = curve_daemon
    _send_some(d, "friend", curve_server_key=d.keys / "server.key",
               curve_keypair=d.keys / "friend.key_secret")
    d.wait_for("sigmad_observations_total", 5, stream="k", who="friend")


def test_unknown_key_is_refused_and_counted(curve_daemon):
    d = curve_daemon
    before = refused(d, "auth")
    _send_some(d, "stranger", refused=True, curve_server_key=d.keys / "server.key",
               curve_keypair=d.keys / "stranger.key_secret")
    parsed = d.metrics()
    assert value(parsed, "sigmad_observations_total", stream="k", who="stranger") is None
    assert refused(d, "auth") > before


def test_producer_without_a_key_is_refused_and_counted(curve_daemon):
    d = curve_daemon
    before = refused(d, "protocol") + refused(d, "no_detail")
    _send_some(d, "anon", refused=True)
    parsed = d.metrics()
    assert value(parsed, "sigmad_observations_total", stream="k", who="anon") is None
    assert refused(d, "protocol") + refused(d, "no_detail") > before
    print(f"\nrefused handshakes: {refused(d, 'auth'):.0f} unknown key, "
          f"{refused(d, 'protocol') + refused(d, 'no_detail'):.0f} without a key")


# ------------------------------------------------------------------------ TLS
TLS_CONFIG = """
[daemon]
http = "{HTTP}"
tls_cert = "%(dir)s/server.crt"
tls_key = "%(dir)s/server.key"
tls_client_ca = "%(dir)s/ca.crt"

[[source]]
socket = "pull"
bind = "ipc://%(dir)s/in.ipc"

[[stream]]
name = "k"
topic = "k"
fields = ["v"]
"""


def _openssl(*args: str, cwd) -> None:
    subprocess.run([need_binary("openssl"), *args], cwd=cwd, check=True,
                   capture_output=True, timeout=60)


def make_pki(d) -> None:
    """A throw-away CA, a server certificate for 127.0.0.1 and a client certificate."""
    _openssl("req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2",
             "-keyout", "ca.key", "-out", "ca.crt", "-subj", "/CN=sigmad test CA", cwd=d)
    (d / "san.ext").write_text("subjectAltName=IP:127.0.0.1\n")
    for name, ext in (("server", ["-extfile", "san.ext"]), ("client", [])):
        _openssl("req", "-newkey", "rsa:2048", "-nodes", "-keyout", f"{name}.key",
                 "-out", f"{name}.csr", "-subj", f"/CN=sigmad test {name}", cwd=d)
        _openssl("x509", "-req", "-in", f"{name}.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
                 "-CAcreateserial", "-days", "2", "-out", f"{name}.crt", *ext, cwd=d)


class HttpsSigmad(Sigmad):
    """Readiness and scrapes over HTTPS with the test's client certificate."""

    context: ssl.SSLContext

    def wait_ready(self, timeout: float = 15.0) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(self.log.read_text())
            try:
                self.metrics()
                return
            except OSError:
                time.sleep(0.1)
        raise RuntimeError("sigmad (https) did not answer:\n" + self.log.read_text())

    def metrics(self) -> dict:
        url = f"https://127.0.0.1:{self.port}/metrics"
        with urllib.request.urlopen(url, timeout=5, context=self.context) as r:
            return samples(r.read().decode())


@pytest.fixture(scope="module")
def tls_daemon(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("tls")
    make_pki(tmp)
    ctx = ssl.create_default_context(cafile=str(tmp / "ca.crt"))
    ctx.load_cert_chain(str(tmp / "client.crt"), str(tmp / "client.key"))
    HttpsSigmad.context = ctx
    d = HttpsSigmad(tmp, TLS_CONFIG % {"dir": tmp})
    d.tmp = tmp
    yield d
    assert d.stop() == 0


def test_https_with_a_client_certificate_is_served(tls_daemon):
    parsed = tls_daemon.metrics()
    assert value(parsed, "sigmad_series", stream="k") == 0.0


def test_https_without_a_client_certificate_is_refused(tls_daemon):
    ctx = ssl.create_default_context(cafile=str(tls_daemon.tmp / "ca.crt"))
    url = f"https://127.0.0.1:{tls_daemon.port}/metrics"
    with pytest.raises((ssl.SSLError, ConnectionError, urllib.error.URLError)):
        urllib.request.urlopen(url, timeout=5, context=ctx).read()


def test_plain_http_to_the_tls_port_gets_no_metrics(tls_daemon):
    url = f"http://127.0.0.1:{tls_daemon.port}/metrics"
    with pytest.raises((ConnectionError, urllib.error.URLError, OSError)):
        urllib.request.urlopen(url, timeout=5).read()


SLOWLORIS = 200   # idle connections held open while a normal scrape must answer
PLAIN_CONFIG = "\n".join(line for line in TLS_CONFIG.splitlines() if "tls_" not in line)


def _idle_connections(port: int, n: int) -> list:
    import socket

    held = []
    for _ in range(n):
        s = socket.create_connection(("127.0.0.1", port), timeout=5)
        held.append(s)
    return held


def test_idle_connections_and_an_idle_tls_client_leave_scrapes_answering(tls_daemon):
    # 200 connections that never start TLS, and one that sends half a request line
    held = _idle_connections(tls_daemon.port, SLOWLORIS)
    try:
        held[-1].sendall(b"\x16\x03\x01")   # the first bytes of a TLS record, then nothing
        time.sleep(0.5)   # every connection accepted and waiting
        t0 = time.monotonic()
        parsed = tls_daemon.metrics()
        took = time.monotonic() - t0
    finally:
        for s in held:
            s.close()
    assert value(parsed, "sigmad_series", stream="k") == 0.0
    assert took < 1.0, f"a scrape took {took:.2f} s beside {SLOWLORIS} idle connections"


def test_idle_plain_connections_leave_scrapes_answering(tmp_path):
    d = Sigmad(tmp_path, PLAIN_CONFIG % {"dir": tmp_path})
    try:
        held = _idle_connections(d.port, SLOWLORIS)
        held[0].sendall(b"GET /metr")   # half a request line, then silence
        time.sleep(0.5)
        t0 = time.monotonic()
        parsed = d.metrics()
        took = time.monotonic() - t0
        for s in held:
            s.close()
    finally:
        assert d.stop() == 0
    assert value(parsed, "sigmad_series", stream="k") == 0.0
    assert took < 1.0, f"a scrape took {took:.2f} s beside {SLOWLORIS} idle connections"


def test_connections_are_bounded_and_dawdlers_cut_off():
    import socket

    from sigmad.daemon.web.server import HttpServer

    server = HttpServer("127.0.0.1:0", lambda: b"m\n", bytes, bytes,
                        max_connections=3, request_timeout=0.5)
    server.start()
    try:
        held = _idle_connections(server.port, 3)
        time.sleep(0.3)
        extra = socket.create_connection(("127.0.0.1", server.port), timeout=2)
        assert extra.recv(1) == b""          # over the bound: closed at once
        extra.close()
        assert server.refused == 1
        t0 = time.monotonic()
        for s in held:                       # each cut off after its 0.5 s deadline
            assert s.recv(1) == b""
        assert time.monotonic() - t0 < 2.0
        for s in held:
            s.close()
        time.sleep(0.1)
        with urllib.request.urlopen(f"http://127.0.0.1:{server.port}/metrics", timeout=2) as r:
            assert r.read() == b"m\n"        # the slots are free again
    finally:
        server.stop()
