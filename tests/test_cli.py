"""The command line's outward contract (DESIGN.md, "Command line")."""

from __future__ import annotations

import subprocess
import sys

from daemon import __version__


def test_python_m_daemon_prints_the_version():
    out = subprocess.run([sys.executable, "-m", "daemon", "--version"],
                         capture_output=True, text=True, check=True)
    assert out.stdout.strip() == f"sigmad {__version__}"
