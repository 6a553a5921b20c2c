"""A real browser on the running daemon: headless Chromium loads the status page.

The console check is proven first on a page with a deliberate script error,
served by a tiny local http.server, so a fault in the page could not slip by.
"""

from __future__ import annotations

import http.server
import threading
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from browser import console_messages, run_chromium
from conftest import PULL_DAEMON, need_binary
from harness import Sigmad, free_port, scrape
from sigmad.daemon.client import Producer

pytestmark = pytest.mark.slow   # Chromium

BROKEN = (b"<!DOCTYPE html><html><body><p id='x'>hello</p>"
          b"<script>console.error('deliberate-console-error'); notDefinedAnywhere();"
          b"</script></body></html>")


@pytest.fixture
def broken_server():
    class Handler(http.server.BaseHTTPRequestHandler):
        def do_GET(self):  # noqa: N802 (http.server's naming)
            self.send_response(200)
            self.send_header("Content-Type", "text/html")
            self.send_header("Content-Length", str(len(BROKEN)))
            self.end_headers()
            self.wfile.write(BROKEN)

        def log_message(self, *args):
            pass

    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield f"http://127.0.0.1:{server.server_address[1]}/"
    server.shutdown()
    server.server_close()


def test_console_check_catches_a_script_error(broken_server):
    chromium = need_binary("chromium")
    dom, err = run_chromium(chromium, "--dump-dom", broken_server)
    assert "hello" in dom
    found = console_messages(err)
    assert any("deliberate-console-error" in m for m in found), err[-2000:]
    assert any("Uncaught ReferenceError" in m and "notDefinedAnywhere" in m for m in found)


CONFIG = PULL_DAEMON + """

[[stream]]
name = "lat"
topic = "lat.{region}"
fields = ["ms"]
quantiles = [0.5, 0.99]
outlier_sigmas = [3.0]
mixture = { components = 2, log = true, warmup = 200 }

[[stream]]
name = "pair"
topic = "px.pair"
fields = ["a", "b"]
regression = { y = "b", x = ["a"] }
"""


def test_chromium_renders_every_series_without_console_messages(tmp_path):
    chromium = need_binary("chromium")
    pull = free_port()
    d = Sigmad(tmp_path, CONFIG % {"pull": pull})
    try:
        rng = np.random.default_rng(5)
        with Producer(f"tcp://127.0.0.1:{pull}") as p:
            for region in ("east", "west"):
                p.send(f"lat.{region}", {"ms": rng.lognormal(2.0, 0.3, 600)})
            a = rng.normal(10.0, 1.0, 300)
            p.send("px.pair", {"a": a, "b": 2 * a + rng.normal(0, 0.1, 300)})
            d.wait_for("sigmad_observations_total", 300, stream="pair")
        url = f"http://127.0.0.1:{d.port}/"
        dom, err = run_chromium(chromium, "--dump-dom", url)
        assert console_messages(err) == [], err[-2000:]
        # Chromium's serialised DOM is HTML, not XML: pick the cards with a regular scan
        names = {chunk.split('"', 1)[0] for chunk in dom.split('data-series="')[1:]}
        assert names == {"lat{region=east}", "lat{region=west}", "pair"}
        assert dom.count('class="plot"') == 3
        assert "<script" not in dom
        # the served page itself is strict XML too
        ET.fromstring(scrape(d.port, "/").split("\n", 1)[1])
        shot = tmp_path / "page.png"
        _, err = run_chromium(chromium, f"--screenshot={shot}", "--window-size=1400,1000",
                              url)
        assert console_messages(err) == []
        data = shot.read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000
    finally:
        assert d.stop() == 0
