"""The deployment files in configs/ as a site would use them: the systemd unit
checked by ``systemd-analyze verify``, the Prometheus configuration by ``promtool
check config``; and the warning for plain HTTP beyond this host."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import need_binary
from harness import ROOT, Sigmad, free_port

pytestmark = pytest.mark.slow   # systemd-analyze, promtool and a daemon subprocess

UNIT = ROOT / "configs" / "sigmad.service"


def _directives(text: str) -> dict[str, str]:
    out = {}
    for line in text.splitlines():
        if "=" in line and not line.startswith("#"):
            key, _, val = line.partition("=")
            out[key.strip()] = val.strip()
    return out


def test_systemd_unit_verifies_clean(tmp_path):
    analyze = need_binary("systemd-analyze")
    # verify checks that ExecStart's program exists: point it at this install's sigmad
    sigmad = shutil.which("sigmad") or str(Path(sys.executable).parent / "sigmad")
    assert Path(sigmad).exists(), sigmad
    unit = tmp_path / "sigmad.service"
    unit.write_text(UNIT.read_text().replace("/usr/local/bin/sigmad", sigmad))
    r = subprocess.run([analyze, "verify", str(unit)], capture_output=True, text=True,
                       timeout=60)
    # systemd-analyze exits 0 on unknown keys and bad values, only saying so: no output
    assert r.returncode == 0 and r.stdout + r.stderr == "", r.stdout + r.stderr


def test_systemd_unit_sandboxes_and_restarts_as_documented():
    d = _directives(UNIT.read_text())
    assert d["DynamicUser"] == "yes" and d["StateDirectory"] == "sigmad"
    assert d["Restart"] == "on-failure" and d["KillSignal"] == "SIGTERM"
    assert d["RestartPreventExitStatus"] == "1"       # a config mistake is not retried
    assert d["ProtectSystem"] == "strict" and d["NoNewPrivileges"] == "yes"
    assert d["ExecStart"].endswith("run --config /etc/sigmad/sigmad.toml")


def test_prometheus_scrape_config_checks():
    promtool = need_binary("promtool")
    r = subprocess.run([promtool, "check", "config",
                        str(ROOT / "configs" / "prometheus" / "prometheus.yml")],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "SUCCESS" in r.stdout


@pytest.mark.parametrize("host, loopback", [
    ("127.0.0.1", True), ("127.0.0.2", True), ("::1", True), ("localhost", True),
    ("0.0.0.0", False), ("::", False), ("192.0.2.7", False), ("sigmad.example", False),
])
def test_which_http_hosts_count_as_this_host_only(host, loopback):
    from sigmad.daemon.app import _is_loopback

    assert _is_loopback(host) is loopback


def test_no_plain_http_warning_on_loopback(tmp_path):
    d = Sigmad(tmp_path, f"""
[daemon]
http = "{{HTTP}}"
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:{free_port()}"
[[stream]]
name = "v"
topic = "{{s}}"
fields = ["value"]
""")
    assert d.stop() == 0
    log = d.log.read_text()
    assert "sigmad listening" in log and "without TLS" not in log
