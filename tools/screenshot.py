"""Regenerate ``status-page.png``: run ``sigmad demo``, let it warm up, photograph the page.

    python tools/screenshot.py [--out status-page.png] [--warmup 25]

Needs a headless Chromium (Debian package ``chromium``). It drives Chromium through
``tests/browser.py``, the same helpers the browser tests use, so what the tests check
is what this script photographs.
"""

from __future__ import annotations

import argparse
import os
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from browser import console_messages, run_chromium  # noqa: E402  (tests/browser.py)


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
    p = argparse.ArgumentParser(prog="python tools/screenshot.py", description=__doc__)
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
    demo = subprocess.Popen([sys.executable, "-m", "sigmad.daemon", "demo", "--duration",
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
