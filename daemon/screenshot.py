"""Regenerate ``status-page.png``: run ``sigmad demo``, let it warm up, photograph the page.

    python -m daemon.screenshot [--out status-page.png] [--warmup 25]

Needs a headless Chromium (Debian package ``chromium``). The same command line
(``chromium_command``) and console scan (``console_messages``) serve the browser
tests, so what the tests check is what this script photographs.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

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


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_http(url: str, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            urllib.request.urlopen(url, timeout=1.0).close()
            return
        except OSError:
            time.sleep(0.1)
    raise RuntimeError(f"{url} did not answer within {timeout:g} s")


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m daemon.screenshot", description=__doc__)
    p.add_argument("--out", default=str(ROOT / "status-page.png"))
    p.add_argument("--warmup", type=float, default=25.0,
                   help="seconds of demo traffic before the picture")
    p.add_argument("--size", default="1400,1250", help="window WIDTH,HEIGHT")
    args = p.parse_args(argv)
    binary = shutil.which("chromium")
    if binary is None:
        print("chromium not found (Debian: apt-get install chromium)", file=sys.stderr)
        return 1
    port = _free_port()
    url = f"http://127.0.0.1:{port}/"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    demo = subprocess.Popen([sys.executable, "-m", "daemon", "demo", "--duration",
                             str(args.warmup + 30), "--http", f"127.0.0.1:{port}"],
                            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        _wait_http(url, 15.0)
        time.sleep(args.warmup)
        _, err = run_chromium(binary, f"--screenshot={args.out}",
                              f"--window-size={args.size}", url)
    finally:
        demo.terminate()
        demo.wait(10)
    problems = console_messages(err)
    if problems or not Path(args.out).exists():
        print("screenshot failed:", *problems, err[-2000:], sep="\n", file=sys.stderr)
        return 1
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
