"""The running daemon: sources, the engine thread, the HTTP server, and a clean stop."""

from __future__ import annotations

import ipaddress
import logging
import math
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import zmq
from prometheus_client import (
    CollectorRegistry,
    Histogram,
    disable_created_metrics,
    generate_latest,
)
from sigmad.daemon.cluster.merge import Merger, ShardCollector
from sigmad.daemon.cluster.publish import Publisher
from sigmad.daemon.config.errors import ConfigError
from sigmad.daemon.config.host import host_problems
from sigmad.daemon.config.schema import Config
from sigmad.daemon.config.units import split_host_port
from sigmad.daemon.engine.allocator import keep_freed_blocks, release_freed
from sigmad.daemon.engine.blas import set_threads as set_blas_threads
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.export.api_state import snapshot_json_chunks
from sigmad.daemon.export.feed import EstimateFeed
from sigmad.daemon.export.metrics_text import SeriesRenderer
from sigmad.daemon.export.model import HealthCollector
from sigmad.daemon.ingest.curve_auth import RefusedCollector, stop_authenticator
from sigmad.daemon.ingest.source import Source
from sigmad.daemon.ingest.wire import REASONS as WIRE_REASONS
from sigmad.daemon.storage.checkpoint import Checkpointer
from sigmad.daemon.web.history import History
from sigmad.daemon.web.page import render_page
from sigmad.daemon.web.server import HttpServer


def _then_release(pieces: Iterator[bytes], over: int = 4 << 20) -> Iterator[bytes]:
    """``pieces``, then freed memory handed back to the OS when they came to more than
    ``over`` bytes (a large scrape's pieces would otherwise stay as the process's
    high-water mark). Process-wide and cheap next to such a response."""
    size = 0
    for piece in pieces:
        size += len(piece)
        yield piece
    if size > over:
        release_freed()


log = logging.getLogger("sigmad")

#: Every reason of ``sigmad_rejected_total`` (README, "Wire format"): the body's
#: (wire.REASONS), the routing's and the rows'; a merger adds MERGE_REASONS.
REJECT_REASONS: tuple[str, ...] = WIRE_REASONS + (
    "bad_frames", "no_stream", "series_limit", "not_finite", "bad_weight", "bad_time",
    "clock_skew", "future_time", "not_positive", "out_of_range", "late", "stale_leg",
    "not_json", "bad_payload", "queue_full")
MERGE_REASONS: tuple[str, ...] = (
    "state_malformed", "state_incompatible", "state_unknown_stream", "state_too_many_shards",
    "state_too_large")

HOUSEKEEPING_EVERY = 1.0   # seconds between idle-expiry sweeps
IDLE_FLUSH_ROWS = 10_000   # rows waiting that are folded as soon as the sources go quiet


def _mqtt_source(cfg, max_bytes: int):
    """An MQTT source: paho is imported only when one is configured."""
    from sigmad.daemon.ingest.mqtt import MqttSource

    return MqttSource(cfg, max_bytes)


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def _with_port(http: str, port: int) -> str:
    host, _ = split_host_port(http, "daemon.http")
    return f"[{host}]:{port}" if ":" in host else f"{host}:{port}"


def _show_seconds(seconds: float) -> str:
    return f"{seconds:g} s" if seconds < 120 else f"{seconds / 60:g} min"


def _make_state_directory(state_file: str) -> None:
    """Create the state file's directory when its parent exists (a ConfigError otherwise)."""
    folder = Path(state_file).parent
    if folder.is_dir():
        return
    try:
        folder.mkdir()
    except OSError as exc:
        raise ConfigError("daemon.state_file", state_file,
                          f"is in {str(folder)!r}, which could not be created "
                          f"({exc.strerror}); create it or correct the path") from None
    log.info("created the state directory %s", folder)


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
        problems = host_problems(config)
        if problems:
            raise problems[0]
        # every socket is bound before anything starts or is read: a failed bind
        # stops the start-up at once, with one sentence naming the key and address
        self._ctx = zmq.Context()
        self.http: HttpServer | None = None
        self.sources: list[Source] = []
        self.publisher: Publisher | None = None
        self.merger: Merger | None = None
        self.checkpointer = None
        self.feed: EstimateFeed | None = None
        try:
            self.http = HttpServer(d.http, self._metrics, self._page, self._state,
                                   d.tls_cert, d.tls_key, d.tls_client_ca)
            for i, s in enumerate(config.sources):
                self.sources.append(Source(self._ctx, s, key=f"source[{i}]") if s.mqtt is None
                                    else _mqtt_source(s, d.max_message_bytes))
            if any(s.mqtt is not None for s in config.sources):
                from sigmad.daemon.ingest.mqtt import ConnectionCollector

                self.registry.register(ConnectionCollector(lambda: self.sources))
            if config.publish is not None:
                self.publisher = Publisher(self._ctx, config.publish)
            if config.feed is not None:
                self.feed = EstimateFeed(self._ctx, config.feed.bind)
            if config.merge is not None:
                self.merger = Merger(self._ctx, config)
                self.registry.register(ShardCollector(self.merger, time.time))
            # every counter an alert may watch exists at 0 from the start
            for s in self.sources:
                self.engine.messages[s.label] += 0
            for reason in REJECT_REASONS:
                self.engine.rejected[reason] += 0
            if self.merger is not None:
                for reason in MERGE_REASONS:
                    self.merger.rejected[reason] += 0
            if d.state_file:
                # restored before the engine thread runs: nothing is ingested into a
                # state that is about to be replaced
                _make_state_directory(d.state_file)
                self.checkpointer = Checkpointer(d.state_file, d.checkpoint_every,
                                                 self.registry)
                self.checkpointer.restore(self.engine, time.time(), d.strict_restore)
        except BaseException as exc:
            self._close_sockets()
            if self.http is not None:
                self.http.stop()
            if isinstance(exc, ConfigError) and exc.origin is None:
                raise exc.with_origin(config.origin) from None
            raise
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="sigmad-engine", daemon=True)
        self.failure: BaseException | None = None
        self.checkpoint_written = False
        self.checkpointed_series = 0

    # ----------------------------------------------------------- read side
    @property
    def snapshot(self):
        """What readers see: the pooled snapshot on a merger, else the engine's."""
        return self.merger.snapshot if self.merger is not None else self.engine.snapshot

    def _metrics(self) -> Iterator[bytes]:
        """/metrics, written as it is made; freed memory goes back to the OS after it."""
        yield from _then_release(self.renderer.chunks(self.snapshot, time.time(),
                                                      generate_latest(self.registry)))

    def _page(self) -> bytes:
        return render_page(self.snapshot, time.time(), self.history)

    def _state(self) -> Iterator[bytes]:
        yield from _then_release(snapshot_json_chunks(self.snapshot, time.time(),
                                                      self.history))

    # ------------------------------------------------------------ lifecycle
    def start(self) -> None:
        self.http.start()
        self._thread.start()
        d = self.config.daemon
        scheme = "https" if self.http.tls else "http"
        log.info("sigmad listening: metrics on %s://%s/metrics; sources %s", scheme,
                 _with_port(d.http, self.http.port), ", ".join(s.label for s in self.sources))
        if not self.http.tls and not _is_loopback(d.http_host):
            log.warning("daemon.http = %r is reachable beyond this host without TLS: anyone "
                        "who can reach it reads every estimate; set tls_cert and tls_key, or "
                        "listen on 127.0.0.1 behind a proxy", d.http)

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        self._thread.join(timeout)
        self.http.stop()
        self._close_sockets()
        if self.checkpointer is None:
            log.info("sigmad stopped; no state_file, so the estimates were not kept")
        elif self.checkpoint_written:
            log.info("sigmad stopped; checkpointed %d series to %s",
                     self.checkpointed_series, self.checkpointer.path)
        else:
            log.error("sigmad stopped; the final checkpoint to %s was NOT written (see the "
                      "error above): the last %s of estimates are lost",
                      self.checkpointer.path, _show_seconds(self.config.daemon.checkpoint_every))

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
        before_flush = [s for s in self.sources if s.drain_before_flush]
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
                for s in before_flush:   # hand-offs that wake the engine only when full
                    s.drain(engine, now)
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
        # stop taking messages (an MQTT broker keeps the rest for the session), then
        # drain what is already queued so a clean stop loses nothing that arrived
        for s in self.sources:
            s.stop_receiving()
        for s in self.sources:
            s.drain(engine, time.time())
        self._flush(time.time())
        if self.checkpointer is not None:
            self.checkpointed_series = engine.series_count()
            self.checkpoint_written = self.checkpointer.final(engine, time.time())

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
