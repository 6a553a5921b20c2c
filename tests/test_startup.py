"""Start-up failures: every one exits within 5 s with one sentence naming the key and
the address or file, exit code 1 for a mistake the user can fix (real processes,
real sockets, loopback only)."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import threading
import time

import pytest
import zmq.auth
from harness import ROOT, free_port

pytestmark = pytest.mark.slow   # daemon subprocesses that must fail to start

START_LIMIT = 5.0   # seconds: the start-up rule of issue 14

BASE = """
[daemon]
http = "{http}"
{daemon_extra}
[[source]]
socket = "pull"
bind = "{bind}"
{source_extra}
[[stream]]
name = "v"
topic = "{{s}}"
fields = ["value"]
"""


def _config(tmp_path, http=None, bind=None, daemon_extra="", source_extra="") -> str:
    path = tmp_path / "bad.toml"
    path.write_text(BASE.format(http=http or f"127.0.0.1:{free_port()}",
                                bind=bind or f"tcp://127.0.0.1:{free_port()}",
                                daemon_extra=daemon_extra, source_extra=source_extra))
    return str(path)


def _sigmad(*args: str, cwd=None, timeout: float = 30.0) -> tuple[int, str, float]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    t0 = time.monotonic()
    r = subprocess.run([sys.executable, "-m", "sigmad.daemon", *args], capture_output=True,
                       text=True, env=env, cwd=cwd, timeout=timeout)
    return r.returncode, r.stderr, time.monotonic() - t0


def _run_fails(config: str, *words: str, code: int = 1, cwd=None) -> str:
    try:
        rc, err, took = _sigmad("run", "--config", config, cwd=cwd)
    except subprocess.TimeoutExpired:
        pytest.fail("sigmad run hung instead of refusing to start")
    assert rc == code, err
    assert took < START_LIMIT, f"took {took:.1f} s to refuse"
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("sigmad: "), err
    for w in words:
        assert w in err, (w, err)
    return err


@pytest.fixture
def keys(tmp_path):
    public, secret = zmq.auth.create_certificates(str(tmp_path), "server")
    return public, secret


def test_zmq_port_in_use_names_key_and_address(tmp_path):
    port = free_port()
    with socket.socket() as held:
        held.bind(("127.0.0.1", port))
        held.listen()
        _run_fails(_config(tmp_path, bind=f"tcp://127.0.0.1:{port}"),
                   "source[0].bind", f"tcp://127.0.0.1:{port}", "already in use")


def test_http_port_in_use_names_key_and_address(tmp_path):
    port = free_port()
    with socket.socket() as held:
        held.bind(("127.0.0.1", port))
        held.listen()
        _run_fails(_config(tmp_path, http=f"127.0.0.1:{port}"),
                   "daemon.http", f"127.0.0.1:{port}", "already in use")


@pytest.mark.parametrize("endpoint, words", [
    ("ipc:///missing/dir/x.ipc", ("source[0].bind", "/missing/dir", "does not exist")),
    # 192.0.2.0/24 is TEST-NET-1 (RFC 5737): documentation only, never a host's address
    ("tcp://192.0.2.1:7410", ("source[0].bind", "192.0.2.1", "not an address of this host")),
    ("tcp://256.1.1.1:7410", ("source[0].bind", "tcp://256.1.1.1:7410", "IPv4")),
    ("127.0.0.1:7410", ("source[0].bind", "tcp://")),
])
def test_bad_bind_endpoint_refused_at_once(tmp_path, endpoint, words):
    _run_fails(_config(tmp_path, bind=endpoint), *words)


def test_unresolvable_http_host(tmp_path):
    # .invalid never resolves (RFC 6761)
    _run_fails(_config(tmp_path, http="nosuchhost.invalid:9410"),
               "daemon.http", "nosuchhost.invalid", "does not resolve")


def test_http_with_a_scheme_is_told_so(tmp_path):
    err = _run_fails(_config(tmp_path, http="http://127.0.0.1:9410"),
                     "daemon.http", "without a scheme")
    assert "bracket" not in err


def test_missing_tls_cert_file(tmp_path):
    _run_fails(_config(tmp_path, daemon_extra='tls_cert = "nope.pem"\ntls_key = "nope.key"'),
               "daemon.tls_cert", "nope.pem", "does not exist", cwd=tmp_path)


def test_missing_curve_secret_file(tmp_path):
    _run_fails(_config(tmp_path, source_extra=f'curve_secret = "{tmp_path}/none.key_secret"'),
               "source[0].curve_secret", "none.key_secret", "does not exist")


def test_curve_secret_that_is_the_public_key(tmp_path, keys):
    public, _ = keys
    _run_fails(_config(tmp_path, source_extra=f'curve_secret = "{public}"'),
               "source[0].curve_secret", "server.key", "no secret key")


def test_missing_curve_allow_directory(tmp_path, keys):
    _, secret = keys
    extra = f'curve_secret = "{secret}"\ncurve_allow = "{tmp_path}/producers"'
    _run_fails(_config(tmp_path, source_extra=extra),
               "source[0].curve_allow", "producers", "not an existing directory")


def test_state_directory_without_parent(tmp_path):
    extra = f'state_file = "{tmp_path}/a/b/s.state"'
    _run_fails(_config(tmp_path, daemon_extra=extra), "daemon.state_file", "a/b")


def test_validate_reports_every_problem(tmp_path, keys):
    public, _ = keys
    path = tmp_path / "many.toml"
    path.write_text(f"""
[daemon]
http = "nosuchhost.invalid:9410"
tls_cert = "{tmp_path}/no.pem"
tls_key = "{tmp_path}/no.key"
[[source]]
socket = "pull"
bind = "ipc:///missing/dir/x.ipc"
curve_secret = "{public}"
[[source]]
socket = "pull"
bind = "tcp://192.0.2.1:7410"
[[stream]]
name = "v"
topic = "{{s}}"
fields = ["value"]
""")
    rc, err, _ = _sigmad("validate", str(path))
    assert rc == 1
    for key in ("daemon.http", "daemon.tls_cert", "daemon.tls_key", "source[0].bind",
                "source[0].curve_secret", "source[1].bind"):
        assert key in err, (key, err)


def test_validate_accepts_a_good_file(tmp_path):
    rc, err, _ = _sigmad("validate", _config(tmp_path))
    assert rc == 0, err


def test_http_stop_before_start_does_not_block():
    from sigmad.daemon.web.server import HttpServer

    server = HttpServer("127.0.0.1:0", bytes, bytes, bytes)
    t = threading.Thread(target=server.stop, daemon=True)
    t.start()
    t.join(2.0)
    assert not t.is_alive(), "HttpServer.stop() blocked before start()"


def test_every_rejection_reason_and_source_counter_exist_at_zero(tmp_path):
    from harness import Sigmad, value
    from sigmad.daemon.app import REJECT_REASONS

    port = free_port()
    d = Sigmad(tmp_path, BASE.format(http="{HTTP}", bind=f"tcp://127.0.0.1:{port}",
                                     daemon_extra="", source_extra=""))
    try:
        parsed = d.metrics()
    finally:
        assert d.stop() == 0
    for reason in REJECT_REASONS:
        assert value(parsed, "sigmad_rejected_total", reason=reason) == 0.0, reason
    assert value(parsed, "sigmad_messages_total", endpoint=f"pull tcp://127.0.0.1:{port}") \
        == 0.0


def test_every_reason_in_the_code_is_listed_and_documented():
    import re

    from sigmad.daemon.app import MERGE_REASONS, REJECT_REASONS
    from sigmad.daemon.ingest.curve_auth import _REFUSALS

    code = "".join(p.read_text() for p in (ROOT / "daemon").rglob("*.py"))
    code += "".join(p.read_text() for p in (ROOT / "estimators").rglob("*.py"))
    used = set(re.findall(r'reject(?:ed)?\[?\(?"([a-z_]+)"', code))
    used |= set(re.findall(r'\("([a-z_]+)", bad_', code))   # estimators.validation
    used |= set(re.findall(r'StateError\("([a-z_]+)"', code))
    used |= set(re.findall(r'WireError\("([a-z_]+)"', code))
    known = set(REJECT_REASONS) | set(MERGE_REASONS)
    assert used and used <= known, used - known
    readme = (ROOT / "README.md").read_text()
    for reason in known | set(_REFUSALS.values()):
        assert f"`{reason}`" in readme, reason


def test_the_stop_line_says_what_was_checkpointed(tmp_path):
    from harness import Sigmad

    extra = f'state_file = "{tmp_path}/state/s.state"'
    d = Sigmad(tmp_path, BASE.format(http="{HTTP}", bind=f"tcp://127.0.0.1:{free_port()}",
                                     daemon_extra=extra, source_extra=""))
    assert d.stop() == 0
    log = d.log.read_text()
    assert "created the state directory" in log
    assert f"checkpointed 0 series to {tmp_path}/state/s.state" in log


def test_keygen_into_a_directory_whose_parent_is_missing(tmp_path):
    rc, err, _ = _sigmad("keygen", str(tmp_path / "no" / "such" / "dir"))
    assert rc == 1
    assert "no/such" in err and "does not exist" in err and "Traceback" not in err


def test_inspect_into_a_closed_pipe_is_quiet(tmp_path):
    import numpy as np
    from sigmad.daemon.config.load import parse_config
    from sigmad.daemon.engine.engine import Engine
    from sigmad.daemon.ingest.wire import encode
    from sigmad.daemon.storage.checkpoint import (
        collect_columns,
        encode_checkpoint,
        stream_definitions,
    )

    engine = Engine(parse_config(BASE.format(http="127.0.0.1:0", bind="tcp://127.0.0.1:1",
                                             daemon_extra="", source_extra="")))
    for i in range(3000):   # far more text than a pipe holds
        engine.ingest(f"s{i}".encode(), encode(np.array([1.0, 2.0])), 1.7e9)
    engine.flush(1.7e9)
    state = tmp_path / "big.state"
    state.write_bytes(encode_checkpoint(collect_columns(engine), stream_definitions(engine),
                                        1.7e9, {}))
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run(f"{sys.executable} -m sigmad.daemon inspect {state} | head -1",
                       shell=True, capture_output=True, text=True, env=env, timeout=60)
    assert r.stdout.count("\n") == 1
    assert "Error" not in r.stderr and "Traceback" not in r.stderr, r.stderr


def test_validate_reports_every_problem_of_the_text(tmp_path):
    path = tmp_path / "text.toml"
    path.write_text("""
[daemon]
flush_every = 5
[[source]]
socket = "push"
bind = "tcp://127.0.0.1:7410"
[[stream]]
name = "ok"
topic = "{s}"
fields = ["value"]
[[stream]]
name = "v"
topic = "a.{s}"
fields = ["value"]
half_life = "ten minutes"
""")
    rc, err, _ = _sigmad("validate", str(path))
    assert rc == 1
    for key in ("daemon.flush_every", "source[0].socket", "stream[1].half_life"):
        assert key in err, (key, err)
    assert "3 problem(s)" in err
