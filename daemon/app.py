"""The running daemon: sources, the engine thread, the HTTP server, and a clean stop."""

from __future__ import annotations

import logging
import threading
import time

import zmq
from prometheus_client import CollectorRegistry, Histogram

from .auth import RefusedCollector, stop_authenticator
from .checkpoint import Checkpointer
from .config import Config, ConfigError
from .engine import Engine
from .export import SnapshotCollector
from .http import HttpServer, json_bytes
from .ingest import Source
from .page import render_page
from .state import snapshot_json

log = logging.getLogger("sigmad")

HOUSEKEEPING_EVERY = 1.0   # seconds between idle-expiry sweeps


class Daemon:
    """sigmad's process: call ``start()``, then ``stop()`` (from any thread).

    The engine thread owns the Engine: it polls the sources, drains them, and
    flushes micro-batches every ``daemon.flush_every`` seconds (or sooner when
    ``daemon.max_batch_rows`` rows are waiting).
    """

    def __init__(self, config: Config) -> None:
        self.config = config
        self.engine = Engine(config)
        self.registry = CollectorRegistry(auto_describe=False)
        self.registry.register(SnapshotCollector(lambda: self.engine.snapshot))
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
        self.http = HttpServer(d.http, self.registry, self._page, self._state,
                               d.tls_cert, d.tls_key, d.tls_client_ca)
        self._ctx = zmq.Context()
        self.sources: list[Source] = []
        try:
            for s in config.sources:
                self.sources.append(Source(self._ctx, s))
        except (zmq.ZMQError, ConfigError):
            self._close_sockets()
            self.http.stop()
            raise
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="sigmad-engine", daemon=True)
        self.failure: BaseException | None = None

    # ----------------------------------------------------------- read side
    def _page(self) -> bytes:
        return render_page(self.engine.snapshot, time.time())

    def _state(self) -> bytes:
        return json_bytes(snapshot_json(self.engine.snapshot, time.time()))

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
        flush_every = cfg.flush_every
        now = time.time()
        next_flush = now + flush_every
        next_housekeeping = now + HOUSEKEEPING_EVERY
        engine.flush(now)
        while not self._stop.is_set():
            wait_ms = max(0.0, min(next_flush - time.time(), 0.1)) * 1000.0
            events = poller.poll(wait_ms) if by_socket else self._stop.wait(wait_ms / 1000)
            now = time.time()
            if events and by_socket:
                for sock, _ in events:
                    by_socket[sock].drain(engine, now)
            if now >= next_flush or engine.pending_rows >= cfg.max_batch_rows:
                self._flush(now)
                next_flush = now + flush_every
            if now >= next_housekeeping:
                engine.expire_idle(now)
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
        if rows:
            self.flush_seconds.observe(time.perf_counter() - t0)
            self.flush_rows.observe(rows)
