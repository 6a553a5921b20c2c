"""The command line's outward contract (DESIGN.md, "Command line")."""

from __future__ import annotations

import glob
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from harness import ROOT, Sigmad, free_port, value
from sigmad.daemon import __version__

pytestmark = pytest.mark.slow   # the sigmad command as a subprocess


def test_python_m_daemon_prints_the_version():
    out = subprocess.run([sys.executable, "-m", "sigmad.daemon", "--version"],
                         capture_output=True, text=True, check=True)
    assert out.stdout.strip() == f"sigmad {__version__}"

ENV = dict(os.environ, PYTHONPATH=str(ROOT))


def _sigmad(*args: str, stdin: str | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "sigmad.daemon", *args], input=stdin,
                          capture_output=True, text=True, env=ENV, timeout=60)


@pytest.mark.parametrize("path", sorted(glob.glob(str(ROOT / "configs" / "*.toml"))))
def test_validate_accepts_every_worked_example(path):
    out = _sigmad("validate", path)
    assert out.returncode == 0, out.stderr
    assert "stream" in out.stdout


def test_validate_names_file_key_and_value_and_exits_1(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[[source]]\nsocket = "pull"\nbind = "tcp://127.0.0.1:1"\n'
                   '[[stream]]\nname = "x"\ntopic = "x"\nfields = ["v"]\nhalf_lif = "1m"\n')
    out = _sigmad("validate", str(bad))
    assert out.returncode == 1
    line = out.stderr.strip()
    assert "\n" not in line and "Traceback" not in line
    assert "bad.toml" in line and "half_lif" in line and "half_life" in line  # did you mean


def test_run_with_a_missing_config_file_is_a_user_error(tmp_path):
    out = _sigmad("run", "--config", str(tmp_path / "nope.toml"))
    assert out.returncode == 1
    assert "nope.toml" in out.stderr and "Traceback" not in out.stderr


def test_no_command_prints_help_and_exits_1():
    out = _sigmad()
    assert out.returncode == 1 and "run" in out.stderr


def test_send_csv_with_weights_reaches_the_daemon(tmp_path):
    pull = free_port()
    d = Sigmad(tmp_path, f"""
[daemon]
http = "{{HTTP}}"
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:{pull}"
[[stream]]
name = "cli"
topic = "cli.{{k}}"
fields = ["ms"]
""")
    try:
        rng = np.random.default_rng(1)
        x, w = rng.normal(10, 2, 2500), rng.integers(1, 4, 2500)
        text = "ms,weight\n" + "".join(f"{float(a)!r},{b}\n" for a, b in zip(x, w, strict=True))
        out = _sigmad("send", "cli.a", "--connect", f"tcp://127.0.0.1:{pull}", stdin=text)
        assert out.returncode == 0, out.stderr
        m = d.wait_for("sigmad_observations_total", 2500, stream="cli", k="a")
        # numpy: weighted mean of the same rows
        assert value(m, "sigmad_mean", stream="cli", k="a", field="ms") == pytest.approx(
            np.average(x, weights=w), rel=1e-12)
    finally:
        d.stop()


def test_send_reports_unreadable_lines_and_exits_1(tmp_path):
    out = _sigmad("send", "cli.a", "--connect", f"ipc://{Path(tmp_path) / 'none'}",
                  stdin="1.0\nabc\n2.0\n")
    assert out.returncode == 1
    assert "line 2" in out.stderr and "abc" in out.stderr
