"""The running daemon: sources, the engine thread, the HTTP server, and a clean stop."""

from __future__ import annotations

import logging
import math
import threading
import time

import zmq
from prometheus_client import (
    CollectorRegistry,
    Histogram,
    disable_created_metrics,
    generate_latest,
)
from sigmad.daemon.cluster.merge import Merger, ShardCollector
from sigmad.daemon.cluster.publish import Publisher
from sigmad.daemon.config.load import Config, ConfigError
from sigmad.daemon.engine.allocator import keep_freed_blocks
from sigmad.daemon.engine.blas import set_threads as set_blas_threads
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.export.api_state import snapshot_json
from sigmad.daemon.export.feed import EstimateFeed
from sigmad.daemon.export.metrics_text import SeriesRenderer
from sigmad.daemon.export.model import HealthCollector
from sigmad.daemon.ingest.curve_auth import RefusedCollector, stop_authenticator
from sigmad.daemon.ingest.source import Source
from sigmad.daemon.storage.checkpoint import Checkpointer
from sigmad.daemon.web.history import History
from sigmad.daemon.web.page import render_page
from sigmad.daemon.web.server import HttpServer, json_bytes

log = logging.getLogger("sigmad")

HOUSEKEEPING_EVERY = 1.0   # seconds between idle-expiry sweeps
IDLE_FLUSH_ROWS = 10_000   # rows waiting that are folded as soon as the sources go quiet


class Daemon:
    """sigmad's process: call ``start()``, then ``stop()`` (from any thread).

    The engine thread owns the Engine: it polls the sources, drains them, and
    flushes micro-batches every ``daemon.flush_every`` seconds (or sooner when
    ``daemon.max_batch_rows`` rows are waiting).
    """

    def __init__(self, config: Config) -> None:
        keep_freed_blocks()
        set_blas_threads(1)          # the engine is one thread: BLAS workers only spin
        disable_created_metrics()   # no *_created samples beside our counters
        self.config = config
        self.engine = Engine(config)
        self.history = History(every=2.0, length=150)    # sparklines: the last 5 minutes
        self.registry = CollectorRegistry(auto_describe=False)
        self.registry.register(HealthCollector(lambda: self.snapshot))
        self.renderer = SeriesRenderer()
        self.registry.register(RefusedCollector(lambda: self.sources))
        self.flush_rows = Histogram(
            "sigmad_flush_rows", "Rows folded into estimators per flush.",
            buckets=(1, 10, 100, 1_000, 10_000, 100_000), registry=self.registry)
        self.flush_seconds = Histogram(
            "sigmad_flush_duration_seconds", "Time spent folding one flush.",
            buckets=(1e-4, 1e-3, 1e-2, 0.1, 1.0), registry=self.registry)
        d = config.daemon
        self.checkpointer = None
        if d.state_file:
            # restore before any socket is open: nothing is ingested into a state
            # that is about to be replaced, and a strict refusal binds nothing
            self.checkpointer = Checkpointer(d.state_file, d.checkpoint_every, self.registry)
            self.checkpointer.restore(self.engine, time.time(), d.strict_restore)
        self.http = HttpServer(d.http, self._metrics, self._page, self._state,
                               d.tls_cert, d.tls_key, d.tls_client_ca)
        self._ctx = zmq.Context()
        self.sources: list[Source] = []
        self.publisher: Publisher | None = None
        self.merger: Merger | None = None
        self.feed: EstimateFeed | None = None
        try:
            for s in config.sources:
                self.sources.append(Source(self._ctx, s))
            if config.publish is not None:
                self.publisher = Publisher(self._ctx, config.publish)
            if config.feed is not None:
                self.feed = EstimateFeed(self._ctx, config.feed.bind)
            if config.merge is not None:
                self.merger = Merger(self._ctx, config)
                self.registry.register(ShardCollector(self.merger, time.time))
        except (zmq.ZMQError, ConfigError):
            self._close_sockets()
            self.http.stop()
            raise
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="sigmad-engine", daemon=True)
        self.failure: BaseException | None = None

    # ----------------------------------------------------------- read side
    @property
    def snapshot(self):
        """What readers see: the pooled snapshot on a merger, else the engine's."""
        return self.merger.snapshot if self.merger is not None else self.engine.snapshot

    def _metrics(self) -> bytes:
        return self.renderer.render(self.snapshot, time.time()) + generate_latest(self.registry)

    def _page(self) -> bytes:
        return render_page(self.snapshot, time.time(), self.history)

    def _state(self) -> bytes:
        return json_bytes(snapshot_json(self.snapshot, time.time(), self.history))

    # ------------------------------------------------------------ lifecycle
    def start(self) -> None:
        self.http.start()
        self._thread.start()
        log.info("sigmad listening: metrics on http://%s:%d/metrics; sources %s",
                 self.config.daemon.http.rpartition(":")[0], self.http.port,
                 ", ".join(s.label for s in self.sources))

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        self._thread.join(timeout)
        self.http.stop()
        self._close_sockets()

    def wait(self, timeout: float | None = None) -> bool:
        """Block until the engine thread ends (stop or failure); True if it has."""
        self._thread.join(timeout)
        return not self._thread.is_alive()

    def _close_sockets(self) -> None:
        for s in self.sources:
            s.close()
        for extra in (self.publisher, self.merger, self.feed):
            if extra is not None:
                extra.close()
        stop_authenticator(self._ctx)
        self._ctx.term()

    # ---------------------------------------------------------- engine loop
    def _loop(self) -> None:
        try:
            self._run()
        except BaseException as exc:   # recorded for the CLI's exit code 2
            self.failure = exc
            log.exception("engine thread failed")

    def _run(self) -> None:
        engine = self.engine
        cfg = self.config.daemon
        poller = zmq.Poller()
        by_socket = {}
        for s in self.sources:
            poller.register(s.socket, zmq.POLLIN)
            by_socket[s.socket] = s
        merger, publisher = self.merger, self.publisher
        if merger is not None:
            poller.register(merger.socket, zmq.POLLIN)
        flush_every = cfg.flush_every
        now = time.time()
        next_flush = now + flush_every
        next_housekeeping = now + HOUSEKEEPING_EVERY
        next_publish = now + publisher.cfg.every if publisher is not None else math.inf
        engine.flush(now)
        polling = bool(by_socket) or merger is not None
        while not self._stop.is_set():
            wait_ms = max(0.0, min(next_flush - time.time(), 0.1)) * 1000.0
            events = poller.poll(wait_ms) if polling else self._stop.wait(wait_ms / 1000)
            now = time.time()
            if events and polling:
                for sock, _ in events:
                    if merger is not None and sock is merger.socket:
                        merger.drain(now)
                    else:
                        by_socket[sock].drain(engine, now)
                        if engine.pending_rows >= cfg.max_batch_rows:
                            self._flush(now)   # keep each flush's arrays bounded
            if (engine.pending_rows >= IDLE_FLUSH_ROWS and by_socket
                    and not poller.poll(0)):
                self._flush(now)   # a backlog waits and the input went quiet: fold it now
            if now >= next_flush or engine.pending_rows >= cfg.max_batch_rows:
                self._flush(now)
                if merger is not None:
                    merger.rebuild(now, engine.all_series(), engine.snapshot.health)
                next_flush = now + flush_every
            if now >= next_publish:
                self._flush(now)   # a snapshot holds folded state only
                publisher.publish(engine.export_state() if merger is None
                                  else merger.pooled_states(), now)
                next_publish = now + publisher.cfg.every
            if now >= next_housekeeping:
                engine.expire_idle(now)
                if merger is not None:
                    merger.expire(now)
                next_housekeeping = now + HOUSEKEEPING_EVERY
            if self.checkpointer is not None and self.checkpointer.maybe_checkpoint(
                    engine, now, self._flush):
                next_flush = now + flush_every
        # drain what is already queued so a clean stop loses nothing that arrived
        for s in self.sources:
            s.drain(engine, time.time())
        self._flush(time.time())
        if self.checkpointer is not None:
            self.checkpointer.final(engine, time.time())

    def _flush(self, now: float) -> None:
        rows = self.engine.pending_rows
        t0 = time.perf_counter()
        self.engine.flush(now)
        if self.feed is not None:
            self.feed.send_changes(self.engine.snapshot, now)
        self.history.record(self.snapshot, now)
        if rows:
            self.flush_seconds.observe(time.perf_counter() - t0)
            self.flush_rows.observe(rows)
