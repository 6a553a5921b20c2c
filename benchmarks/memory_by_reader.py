"""Where a running daemon's memory per series goes: the resident growth of a real
``sigmad run`` subprocess after ingest, each scrape, the page and /api/state
(2,000 -> 12,000 scalar series fed 8-row binary batches). Prints bytes per series."""

import gc
import time

from sigmad.daemon.bench.process import RunningDaemon

d = RunningDaemon("scalar")
try:
    d.add_series(2000)
    d.read_everything()
    base = d.rss()
    d.add_series(12000)
    gc.collect()
    time.sleep(1)
    r0 = d.rss()
    d._get("/metrics")
    r1 = d.rss()
    d._get("/metrics")
    r2 = d.rss()
    d._get("/")
    r3 = d.rss()
    d._get("/api/state")
    r4 = d.rss()
    n = 10000
    print(f"ingest only {(r0 - base) / n:,.0f} B/series; +first scrape {(r1 - r0) / n:,.0f}; "
          f"+second {(r2 - r1) / n:,.0f}; +page {(r3 - r2) / n:,.0f}; "
          f"+api/state {(r4 - r3) / n:,.0f}; total {(r4 - base) / n:,.0f}")
finally:
    d.close()
