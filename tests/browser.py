"""Headless Chromium for the browser tests and tools/screenshot.py: one command line
(``chromium_command``) and one console scan (``console_messages``), so what the tests
check is what the screenshot photographs."""

from __future__ import annotations

import re
import subprocess
import tempfile

# quiet, offline, single-shot: nothing but the page itself touches the network
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars", "--enable-logging=stderr", "--v=0")
_CONSOLE = re.compile(r":CONSOLE(?:\(\d+\))?\] (.*)$|:CONSOLE:\d+\] (.*)$")


def chromium_command(binary: str, user_dir: str, *args: str) -> list[str]:
    return [binary, *FLAGS, f"--user-data-dir={user_dir}", *args]


def run_chromium(binary: str, *args: str, timeout: float = 60.0) -> tuple[str, str]:
    """Run one headless Chromium action (``--dump-dom URL``, ``--screenshot=F URL``) in a
    throw-away profile; (stdout, stderr)."""
    with tempfile.TemporaryDirectory(prefix="sigmad-chromium-") as user_dir:
        done = subprocess.run(chromium_command(binary, user_dir, *args), capture_output=True,
                              text=True, timeout=timeout, check=False)
    return done.stdout, done.stderr


def console_messages(stderr: str) -> list[str]:
    """Every message the page wrote to its console (errors, uncaught exceptions, logs).
    The page has no script, so any is a fault."""
    out = []
    for row in stderr.splitlines():
        m = _CONSOLE.search(row)
        if m:
            out.append(m.group(1) or m.group(2))
    return out
