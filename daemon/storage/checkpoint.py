"""Checkpoints: every series' state on disk, written atomically, read back bounded.

File format (version 2), all integers little-endian::

    offset  size  field
    0       8     magic b"SIGMAST\\x01" (ours)
    8       2     format version (2)
    10      6     zero padding
    16      8     payload length in bytes
    24      32    SHA-256 of the payload
    56      n     payload: a msgpack map
                  {"written_at": float, "streams": [{name, fields, kinds, correction}],
                   "blocks": [columns.pack(...), ...], "health": {...}}

A block holds every series of one stream as columns (``storage/columns.py``):
label values as lists of strings, counters and moments as little-endian
binary blobs (one per quantity, n rows each), the counts at thresholds of a
stream kept in columns as blobs too (``threshold_columns``; a stream kept as
objects writes one map per series, ``threshold_counts``), regression and
mixture states as one ``to_dict`` map per series. Version 1 files, whose payload holds
``"series": [engine.series_state(...), ...]`` (one map per series) in place of
``"blocks"``, are still read.

Writing: a temporary file in the same directory is written, flushed, fsynced,
renamed over the old checkpoint with ``os.replace`` (atomic on POSIX) and the
directory is fsynced, so a crash leaves either the old file or the new one,
never a torn one. Reading refuses a file larger than a bound before reading
it, checks the magic, version, length and checksum, and unpacks with
msgpack's length limits set from the payload size; nothing is ever evaluated
as code (no pickle).

Off the hot path: the engine thread only copies each stream's state into
columns (numpy arrays, ``columns.collect``); packing and file I/O happen in a
writer thread.
"""

from __future__ import annotations

import contextlib
import gc
import hashlib
import logging
import os
import struct
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import NamedTuple

import msgpack
import sigmad.daemon.storage.columns as columns
from prometheus_client import CollectorRegistry, Counter, Gauge
from sigmad.daemon.engine.engine import Engine, view_of
from sigmad.daemon.ingest.wire import MsgpackError, unpack_bounded
from sigmad.estimators import IncompatibleError

log = logging.getLogger("sigmad.checkpoint")

MAGIC = b"SIGMAST\x01"
FORMAT_VERSION = 2
#: Format versions this sigmad reads: 1 (one map per series) and 2 (columns per stream).
READABLE_VERSIONS = (1, 2)
_HEADER = struct.Struct("<8sH6xQ32s")
HEADER_SIZE = _HEADER.size
#: Largest checkpoint file read (bytes); a bigger one is treated as corrupt.
MAX_STATE_BYTES = 1 << 30
_LOGGED_DROPS = 20         # dropped series logged one by one at a restore; the rest counted


# A checkpoint nests 8 levels (version 2); anything deeper is malformed, and is refused
# before any reader walks it.
MAX_DEPTH = 32


class CheckpointError(Exception):
    """A checkpoint that cannot be used: names the file and what is wrong with it."""

    def __init__(self, path: str | os.PathLike, problem: str) -> None:
        super().__init__(f"checkpoint {os.fspath(path)}: {problem}")
        self.path = os.fspath(path)
        self.problem = problem


class Checkpoint(NamedTuple):
    """A decoded checkpoint file (its blocks still to be checked: ``columns.unpack``)."""

    version: int
    written_at: float
    streams: list[dict]
    blocks: list          # version 2: one map of columns per stream (``columns.pack``)
    states: list          # version 1: one ``series_state`` map per series
    health: dict

    def series(self) -> list[dict]:
        """Every series as a ``series_state`` map, whatever the version. O(state size).

        Raises IncompatibleError for a malformed block.
        """
        if self.version == 1:
            return list(self.states)
        return [d for block in self.blocks for d in columns.states(columns.unpack(block))]


# ------------------------------------------------------------------ the format
def encode_checkpoint(blocks: list[columns.StreamColumns], streams: list[dict],
                      written_at: float, health: dict | None = None) -> bytes:
    """The bytes of a checkpoint file (header + msgpack payload) of the streams' columns
    (``columns.collect``). O(state size)."""
    payload = msgpack.packb({"written_at": float(written_at), "streams": streams,
                             "blocks": [columns.pack(c) for c in blocks],
                             "health": health or {}}, use_bin_type=True)
    return _HEADER.pack(MAGIC, FORMAT_VERSION, len(payload),
                        hashlib.sha256(payload).digest()) + payload


def decode_checkpoint(data: bytes, path: str | os.PathLike = "<bytes>") -> Checkpoint:
    """Parse checkpoint bytes; raises CheckpointError naming the first problem. O(size)."""
    if len(data) < HEADER_SIZE:
        raise CheckpointError(path, f"truncated: {len(data)} bytes, shorter than the "
                                    f"{HEADER_SIZE}-byte header")
    magic, version, length, digest = _HEADER.unpack_from(data)
    if magic != MAGIC:
        raise CheckpointError(path, "not a sigmad checkpoint (wrong magic bytes)")
    if version not in READABLE_VERSIONS:
        raise CheckpointError(path, f"format version {version}, this sigmad reads "
                                    f"{' and '.join(map(str, READABLE_VERSIONS))}")
    payload = data[HEADER_SIZE:]
    if len(payload) != length:
        raise CheckpointError(path, f"truncated or padded: header says {length} payload "
                                    f"bytes, file holds {len(payload)}")
    if hashlib.sha256(payload).digest() != digest:
        raise CheckpointError(path, "checksum mismatch (the payload is corrupt)")
    try:
        body = unpack_bounded(payload, strict_map_key=False, max_depth=MAX_DEPTH)
    except MsgpackError as exc:
        raise CheckpointError(path, f"payload is not valid msgpack ({exc})") from None
    entries = "series" if version == 1 else "blocks"
    if not isinstance(body, dict) or not isinstance(body.get(entries), list):
        raise CheckpointError(path, f"payload is not a map with a list of {entries}")
    written_at = body.get("written_at")
    if not isinstance(written_at, (int, float)):
        raise CheckpointError(path, f"written_at is {written_at!r}, not a number")
    streams = body.get("streams")
    health = body.get("health")
    return Checkpoint(version, float(written_at), streams if isinstance(streams, list) else [],
                      body["blocks"] if version == 2 else [],
                      body["series"] if version == 1 else [],
                      health if isinstance(health, dict) else {})


def restore_checkpoint(engine: Engine, cp: Checkpoint, now: float) -> tuple[int, list]:
    """Load a decoded checkpoint into ``engine``.

    Returns how many series were restored and (series, reason) for each one
    dropped: its stream is gone or changed incompatibly, its state is
    malformed, or the stream's max_series is reached. A malformed stream block
    is one entry, named for the block. O(state size).
    """
    with _no_cyclic_gc():
        if cp.version == 1:
            dropped = engine.restore_state(cp.states, now)
            return len(cp.states) - len(dropped), dropped
        return _restore_blocks(engine, cp.blocks, now)


@contextlib.contextmanager
def _no_cyclic_gc():
    """The cyclic collector paused while a restore builds its (all live) objects: each
    collection would walk every object built so far, for nothing (3x the restore time
    of 100,000 series here)."""
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def _restore_blocks(engine: Engine, blocks: list, now: float) -> tuple[int, list]:
    restored, dropped = 0, []
    for i, block in enumerate(blocks):
        try:
            c = columns.unpack(block)
        except IncompatibleError as exc:
            name = block.get("stream") if isinstance(block, dict) else None
            dropped.append((f"stream block {i} ({name!r}), all its series", str(exc)))
            continue
        st = engine.stream(c.stream)
        if st is None:
            dropped += [(c.where(k), "its stream is no longer configured") for k in range(c.n)]
            continue
        if st.store is not None:   # a stream in columns takes the columns as they are
            try:
                columns.check_stream(st, c)
            except IncompatibleError as exc:
                dropped += [(c.where(k, st.cfg.topic.labels), str(exc)) for k in range(c.n)]
                continue
            refused, bad = engine.adopt_columns(st, c, now)
            dropped += [(c.where(k, st.cfg.topic.labels), reason) for k, reason in bad]
            dropped += [(c.where(k, st.cfg.topic.labels), "the stream's max_series is "
                         "reached") for k in refused]
            restored += c.n - len(refused) - len(bad)
            continue
        series, bad = columns.restore(st, c)
        refused = engine.adopt(series, [view_of(s) for s in series], now)
        dropped += bad + [(f"{s.stream.name}{list(s.labels)}",
                           "the stream's max_series is reached") for s in refused]
        restored += len(series) - len(refused)
    return restored, dropped


def read_checkpoint(path: str | os.PathLike, max_bytes: int = MAX_STATE_BYTES) -> Checkpoint:
    """Read and verify a checkpoint file, refusing one larger than ``max_bytes``.

    Raises FileNotFoundError when there is none, CheckpointError when it is corrupt.
    """
    with open(path, "rb") as f:
        size = os.fstat(f.fileno()).st_size
        if size > max_bytes:
            raise CheckpointError(path, f"{size} bytes exceeds the {max_bytes}-byte limit")
        data = f.read(max_bytes + 1)
    return decode_checkpoint(data, path)


def write_atomically(path: str | os.PathLike, data: bytes) -> None:
    """Replace ``path`` with ``data`` so that a crash leaves the old file or the new one.

    tmp file in the same directory -> write -> fsync -> os.replace -> fsync(dir).
    The file is created 0600: estimates may be as sensitive as the data.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    dfd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dfd)
    finally:
        os.close(dfd)


def move_aside(path: str | os.PathLike, now: float | None = None) -> Path:
    """Rename a bad checkpoint to ``<name>.corrupt-<UTC timestamp>`` (never overwriting)."""
    path = Path(path)
    stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime(now))
    target = path.with_name(f"{path.name}.corrupt-{stamp}")
    k = 1
    while target.exists():
        target = path.with_name(f"{path.name}.corrupt-{stamp}-{k}")
        k += 1
    os.rename(path, target)
    return target


def collect_columns(engine: Engine) -> list[columns.StreamColumns]:
    """Every stream's series copied into columns (``columns.collect``); streams without
    series are left out. For the engine thread. O(total state)."""
    return [columns.collect(st) for st in engine.streams if st.series]


def stream_definitions(engine: Engine) -> list[dict]:
    """What each configured stream looked like when the checkpoint was written."""
    from sigmad.daemon.engine.engine import _kinds

    return [{"name": st.name, "fields": list(st.fields), "kinds": _kinds(st.cfg),
             "correction": st.cfg.correction} for st in engine.streams]


# ------------------------------------------------------------------ the writer
class Checkpointer:
    """Periodic checkpoints of an Engine, packed and written off the engine thread.

    Parameters
    ----------
    path : str
        The checkpoint file.
    every : float
        Seconds between checkpoints.
    registry : CollectorRegistry
        Where the checkpoint metrics are registered.

    Notes
    -----
    ``maybe_checkpoint`` and ``final`` are called by the engine thread only. A
    failed write is logged, counted and retried at the next interval; ingest
    goes on. When a write is still running at the next interval, that interval
    is skipped (the next one carries newer state anyway).
    """

    def __init__(self, path: str, every: float, registry: CollectorRegistry) -> None:
        self.path = Path(path)
        self.every = every
        self._next = 0.0
        self._job: tuple[list, list, float, dict] | None = None
        self._cond = threading.Condition()
        self._busy = False
        self._closed = False
        self._thread: threading.Thread | None = None
        self.writes = Counter("sigmad_checkpoint_writes", "Checkpoints written.",
                              registry=registry)
        self.failures = Counter("sigmad_checkpoint_failures",
                                "Checkpoint writes that failed (retried at the next interval).",
                                registry=registry)
        self.last_success = Gauge("sigmad_checkpoint_last_success_timestamp_seconds",
                                  "Unix time of the last checkpoint written.", registry=registry)
        self.duration = Gauge("sigmad_checkpoint_duration_seconds",
                              "Time the last checkpoint took to pack and write.",
                              registry=registry)
        self.size = Gauge("sigmad_checkpoint_bytes", "Size of the last checkpoint written.",
                          registry=registry)
        self.restore_failures = Counter(
            "sigmad_checkpoint_restore_failures",
            "Checkpoints found corrupt at start and moved aside.", registry=registry)
        self.restored = Gauge("sigmad_checkpoint_restored_series",
                              "Series restored from the checkpoint at start.", registry=registry)
        self.dropped = Gauge("sigmad_checkpoint_dropped_series",
                             "Series in the checkpoint dropped at start (stream changed).",
                             registry=registry)

    # --------------------------------------------------------------- restore
    def restore(self, engine: Engine, now: float, strict: bool) -> None:
        """Load the checkpoint into ``engine``; a corrupt one is moved aside.

        Raises CheckpointError when ``strict``, leaving the file where and as it is.
        """
        try:
            cp = read_checkpoint(self.path)
        except FileNotFoundError:
            log.info("no checkpoint at %s: starting fresh", self.path)
            return
        except (CheckpointError, OSError) as exc:
            self.restore_failures.inc()
            problem = exc.problem if isinstance(exc, CheckpointError) else str(exc)
            if strict:
                # the file stays where and as it is: every restart refuses again until
                # someone looks at it (strictness that lasts one start is none)
                raise CheckpointError(self.path, f"unreadable ({problem}); left in place; "
                                      "refusing to start because strict_restore is set "
                                      "(move it aside to start fresh)") from None
            aside = None
            try:
                aside = move_aside(self.path, now)
            except OSError as move_exc:
                log.error("could not move the bad checkpoint aside: %s", move_exc)
            log.error("checkpoint %s is unreadable (%s); %s; starting fresh", self.path,
                      problem, f"moved to {aside}" if aside else "left in place")
            return
        restored, dropped = restore_checkpoint(engine, cp, now)
        for where, reason in dropped[:_LOGGED_DROPS]:
            log.warning("checkpoint series %s dropped: %s", where, reason)
        if len(dropped) > _LOGGED_DROPS:
            log.warning("checkpoint: %d more series dropped", len(dropped) - _LOGGED_DROPS)
        self.restored.set(restored)
        self.dropped.set(len(dropped))
        log.info("restored %d series from %s (format %d, written %.1fs ago)",
                 restored, self.path, cp.version, now - cp.written_at)

    # ---------------------------------------------------------------- write
    def collect(self, engine: Engine) -> list[columns.StreamColumns]:
        """Every stream's series copied into columns: the engine thread's share of a
        checkpoint (packing and writing are the writer thread's). O(total state)."""
        return collect_columns(engine)

    def _health(self, engine: Engine) -> dict:
        return {"messages": dict(engine.messages), "rejected": dict(engine.rejected),
                "sequence_gaps": dict(engine.gaps)}

    def maybe_checkpoint(self, engine: Engine, now: float,
                         flush: Callable[[float], object] | None = None) -> bool:
        """At the interval, hand the engine's state to the writer thread.

        ``flush(now)`` is called first when rows are pending, so the checkpoint
        holds everything received. Returns True when a flush was made.
        """
        if now < self._next:
            return False
        self._next = now + self.every
        flushed = False
        if flush is not None and engine.pending_rows:
            flush(now)
            flushed = True
        with self._cond:
            if self._busy or self._job is not None:
                return flushed
            self._job = (self.collect(engine), stream_definitions(engine), now,
                         self._health(engine))
            self._cond.notify()
        if self._thread is None:
            self._thread = threading.Thread(target=self._writer, name="sigmad-checkpoint",
                                            daemon=True)
            self._thread.start()
        return flushed

    def final(self, engine: Engine, now: float, timeout: float = 10.0) -> bool:
        """The last checkpoint (on stop): waits for a running write, then writes in this thread."""
        with self._cond:
            self._closed = True
            self._job = None
            self._cond.notify_all()
            deadline = time.monotonic() + timeout
            while self._busy and time.monotonic() < deadline:
                self._cond.wait(0.05)
        return self._write(self.collect(engine), stream_definitions(engine), now,
                           self._health(engine))

    def _writer(self) -> None:
        while True:
            with self._cond:
                while self._job is None and not self._closed:
                    self._cond.wait()
                if self._closed:
                    return
                blocks, streams, now, health = self._job
                self._job = None
                self._busy = True
            try:
                self._write(blocks, streams, now, health)
            finally:
                with self._cond:
                    self._busy = False
                    self._cond.notify_all()

    def _write(self, blocks: list, streams: list, now: float, health: dict) -> bool:
        t0 = time.perf_counter()
        try:
            data = encode_checkpoint(blocks, streams, now, health)
            write_atomically(self.path, data)
        except OSError as exc:
            self.failures.inc()
            log.error("checkpoint to %s failed: %s; retrying in %gs", self.path, exc,
                      self.every)
            return False
        self.writes.inc()
        self.duration.set(time.perf_counter() - t0)
        self.size.set(len(data))
        self.last_success.set(time.time())
        return True


# ----------------------------------------------------------------- inspection
def _fmt(values: list[float]) -> str:
    return " ".join(f"{v:.6g}" for v in values)


def describe_checkpoint(cp: Checkpoint, path: str | os.PathLike) -> str:
    """Human-readable listing of a checkpoint's series and estimates. O(state size)."""
    from sigmad.estimators import CORRECTIONS

    # a correction this sigmad does not know (a damaged file) falls back to the default
    corrections = {s["name"]: s["correction"] for s in cp.streams
                   if isinstance(s, dict) and isinstance(s.get("name"), str)
                   and s.get("correction") in CORRECTIONS}
    when = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(cp.written_at))
    entries: list = list(cp.states)
    for i, block in enumerate(cp.blocks):
        try:
            entries += columns.states(columns.unpack(block))
        except IncompatibleError as exc:
            entries.append(f"(malformed stream block {i}: {exc})")
    count = sum(isinstance(d, dict) for d in entries)
    lines = [f"{os.fspath(path)}: sigmad checkpoint format {cp.version}, written {when}, "
             f"{count} series"]
    for d in entries:
        if isinstance(d, str):
            lines.append(f"  {d}")
        elif not isinstance(d, dict):
            lines.append(f"  (malformed entry: {type(d).__name__})")
        else:
            lines += _describe_series(d, corrections)
    return "\n".join(lines)


def _describe_series(d: dict, corrections: dict) -> list[str]:
    """The lines of one series of ``describe_checkpoint``; a state that cannot be read
    (a damaged file) is named, never raised."""
    from sigmad.estimators import Mixture, Moments, Regression, Thresholds

    name = d.get("stream")
    labels = d.get("labels") or []
    labels = labels if isinstance(labels, list) else [labels]
    head = f"  {name}" + (f"[{', '.join(map(str, labels))}]" if labels else "")
    try:
        m = Moments.from_dict(d.get("moments"))
    except IncompatibleError as exc:
        return [f"{head}: unreadable moments ({exc})"]
    corr = corrections.get(name, "reliability") if isinstance(name, str) else "reliability"
    fields = d.get("fields")
    fields = fields if isinstance(fields, list) else [f"x{i}" for i in range(m.dim)]
    lines = [f"{head}: observations {d.get('observations')}, weight {m.weight_sum:.6g},"
             f" effective samples {m.effective_samples:.6g}",
             f"    fields  {' '.join(map(str, fields))}",
             f"    mean    {_fmt(m.mean.tolist())}",
             f"    stddev  {_fmt(m.stddev(corr).tolist())}  ({corr})"]
    try:
        if isinstance(d.get("regression"), dict):
            r = Regression.from_dict(d["regression"])
            terms = _fmt(r.coefficients.tolist())
            if r.has_intercept:
                terms += f"  intercept {r.intercept:.6g}"
            lines.append(f"    regression coefficients {terms}")
        if isinstance(d.get("mixture"), dict):
            x = Mixture.from_dict(d["mixture"])
            lines.append(f"    mixture weights {_fmt(x.weights.tolist())}" if x.warm
                         else "    mixture warming up")
        for t in d.get("threshold_counts") or []:
            th = Thresholds.from_dict(t.get("state") if isinstance(t, dict) else t)
            lines.append(f"    {t.get('field')} at or below {_fmt(th.bounds.tolist())}: "
                         f"{_fmt(th.cumulative[:-1].tolist())} of {th.total:.6g}")
    except (ValueError, ArithmeticError) as exc:   # IncompatibleError, LinAlgError among them
        lines.append(f"    unreadable estimator state ({exc})")
    return lines
