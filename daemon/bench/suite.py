"""``sigmad bench``: end-to-end throughput on this machine, each figure beside the limit it
is measured against in the same run.

Every figure is a ratio to a reference measured in the same process, so the
table travels between machines: a bare Python receive-and-decode loop over
the same messages, numpy's two-pass weighted mean and variance over the same
values, one EM iteration of scikit-learn's GaussianMixture (when installed),
prometheus-client's own renderer over the same samples, and fixed memory and
time budgets. A reference that uses BLAS is measured with OpenBLAS's default
thread count and with the one thread the daemon runs with, and the faster counts.

The socket figures use a real ZeroMQ PUSH producer in a child process; the
messages are queued on loopback tcp before timing starts, so the producer's
speed is not what is measured.
"""

from __future__ import annotations

import gc
import math
import multiprocessing as mp
import os
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass

import msgpack
import numpy as np
import zmq
from sigmad.daemon.config.load import parse_config


@dataclass
class Row:
    what: str
    ours: str
    reference: str
    ratio: float
    target: str
    met: bool | None    # None: not measured here

    def cells(self) -> list[str]:
        verdict = {True: "yes", False: "NO", None: "-"}[self.met]
        ratio = f"{self.ratio:.2f}" if math.isfinite(self.ratio) else "-"
        return [self.what, self.ours, self.reference, ratio, self.target, verdict]


def _free_port() -> int:
    import socket
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _producer(endpoint: str, frames: list[tuple[bytes, bytes]], done, leave) -> None:
    ctx = zmq.Context()
    s = ctx.socket(zmq.PUSH)
    s.setsockopt(zmq.SNDHWM, 0)
    s.connect(endpoint)
    for topic, body in frames:
        s.send(topic, zmq.SNDMORE)
        s.send(body)
    done.set()
    leave.wait(120)
    s.close(linger=0)
    ctx.term()


class _Feed:
    """A child process that queues ``frames`` on a PUSH socket to ``endpoint``."""

    def __init__(self, endpoint: str, frames: list[tuple[bytes, bytes]]) -> None:
        mpc = mp.get_context("fork")
        self.done, self.leave = mpc.Event(), mpc.Event()
        self.proc = mpc.Process(target=_producer, args=(endpoint, frames, self.done, self.leave),
                                daemon=True)
        self.proc.start()
        if not self.done.wait(120):
            raise RuntimeError("the benchmark producer did not finish sending")
        time.sleep(0.3)   # let loopback tcp deliver what is in flight

    def close(self) -> None:
        self.leave.set()
        self.proc.join(5)


def _bare_rate(frames: list[tuple[bytes, bytes]]) -> float:
    """Messages/s of the plainest Python loop: recv, recv, msgpack.unpackb."""
    ctx = zmq.Context()
    pull = ctx.socket(zmq.PULL)
    pull.setsockopt(zmq.RCVHWM, 0)
    port = pull.bind_to_random_port("tcp://127.0.0.1")
    feed = _Feed(f"tcp://127.0.0.1:{port}", frames)
    unpackb, recv = msgpack.unpackb, pull.recv
    t0 = time.perf_counter()
    for _ in range(len(frames)):
        recv()
        unpackb(recv())
    elapsed = time.perf_counter() - t0
    feed.close()
    pull.close(0)
    ctx.term()
    return len(frames) / elapsed


def _daemon_rate(config_text: str, frames: list[tuple[bytes, bytes]], rows: int,
                 clock: Callable[[], float] = time.perf_counter) -> float:
    """Accepted observations/s through a real Daemon (engine thread, sockets, flushes),
    per second of ``clock`` (wall time; ``time.process_time`` counts only this
    process's CPU, which other load on the machine disturbs less)."""
    from sigmad.daemon.app import Daemon

    port = _free_port()
    config = parse_config(config_text.replace("PORT", str(port)), "<bench>")
    daemon = Daemon(config)
    feed = _Feed(f"tcp://127.0.0.1:{port}", frames)
    t0, c0 = time.perf_counter(), clock()
    daemon.start()
    try:
        while True:
            seen = sum(v.observations for v in daemon.engine.snapshot.series.values())
            if seen >= rows:
                break
            if time.perf_counter() - t0 > 120:
                raise RuntimeError(f"the daemon accepted {seen} of {rows} rows in 120 s")
            time.sleep(0.002)
        elapsed = clock() - c0
    finally:
        daemon.stop()
        feed.close()
    return rows / elapsed


_SCALAR = """
[daemon]
http = "127.0.0.1:0"
flush_every = "50ms"
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:PORT"
high_water_mark = 1000000
[[stream]]
name = "bench"
topic = "bench.{k}"
fields = ["v"]
outlier_sigmas = [3.0, 5.0]
quantiles = [0.5, 0.99]
max_series = 200000
"""


def bench_single(n: int, repeat: int = 3) -> Row:
    rng = np.random.default_rng(1)
    frames = [(b"bench.a", msgpack.packb({"values": {"v": float(v)}, "source": "b", "seq": i}))
              for i, v in enumerate(rng.normal(size=n))]
    bare = ours = 0.0
    for _ in range(repeat):   # interleaved, best of each: both sides see the same noise
        bare = max(bare, _bare_rate(frames))
        ours = max(ours, _daemon_rate(_SCALAR, frames, n))
    return Row("single observations, moments + outliers", f"{ours:,.0f} obs/s",
               f"bare recv+decode {bare:,.0f} msg/s", ours / bare, ">= 0.5", ours / bare >= 0.5)


def _batches(n_batches: int, rows: int, seed: int, positive: bool = False):
    rng = np.random.default_rng(seed)
    out, xs, ws = [], [], []
    for i in range(n_batches):
        x = rng.lognormal(2.0, 0.5, rows) if positive else rng.normal(10.0, 2.0, rows)
        w = rng.uniform(0.5, 2.0, rows)
        xs.append(x)
        ws.append(w)
        out.append((b"bench.a", msgpack.packb({"values": {"v": x.astype("<f8").tobytes()},
                                               "weight": w.astype("<f8").tobytes(),
                                               "source": "b", "seq": i})))
    return out, np.concatenate(xs), np.concatenate(ws)


def _fastest_blas(rate: Callable[[], float]) -> float:
    """``rate()`` with OpenBLAS's default thread count and with one thread (what the
    daemon sets), whichever is faster for the reference; the count is put back."""
    from sigmad.daemon.engine.blas import default_threads, set_threads

    counts = {default_threads(), 1} - {None}
    if not counts:
        return rate()
    before = set_threads(1)
    rates = []
    try:
        for k in sorted(counts):
            set_threads(k)
            rates.append(rate())
    finally:
        set_threads(before)
    return max(rates)


def _best(fn: Callable[[], object], repeat: int = 5) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def bench_batches(n_batches: int, repeat: int = 2) -> Row:
    frames, x, w = _batches(n_batches, 1000, 2)

    def numpy_two_pass():
        m = np.average(x, weights=w)
        np.average((x - m) ** 2, weights=w)
    ref = x.size / _best(numpy_two_pass)
    ours = max(_daemon_rate(_SCALAR, frames, x.size) for _ in range(repeat))
    return Row("1,000-row binary batches, moments", f"{ours:,.0f} obs/s",
               f"numpy two-pass weighted mean/var {ref:,.0f} obs/s", ours / ref, ">= 0.25",
               ours / ref >= 0.25)


def bench_mixture(n_batches: int) -> Row:
    config = _SCALAR.replace('quantiles = [0.5, 0.99]',
                             'quantiles = [0.5, 0.99]\nmixture = { components = 3 }')
    frames, x, _ = _batches(n_batches, 1000, 3)
    try:
        from sklearn.mixture import GaussianMixture
    except ImportError:
        return Row("mixture K=3 d=1, 1,000-row batches", "-",
                   "scikit-learn not installed: not measured", 0.0, ">= 1.0", None)
    pts = x[:1000].reshape(-1, 1)
    gm = GaussianMixture(3, random_state=0, max_iter=5).fit(pts)

    def one_em_iteration():   # scikit-learn's own E-step and M-step over the same points
        _, log_resp = gm._e_step(pts)
        gm._m_step(pts, log_resp)
    ref = _fastest_blas(lambda: pts.shape[0] / _best(one_em_iteration, 20))
    ours = _daemon_rate(config, frames, x.size)
    return Row("mixture K=3 d=1, 1,000-row batches", f"{ours:,.0f} obs/s",
               f"scikit-learn 1 EM iteration {ref:,.0f} obs/s", ours / ref, ">= 1.0",
               ours / ref >= 1.0)


def _many_series_engine(n_series: int, bodies: list[tuple[bytes, bytes]] | None = None):
    """An engine holding ``n_series`` scalar series, fed as the daemon would be: messages
    of three rows each, flushed every 1,000 messages."""
    from sigmad.daemon.engine.engine import Engine

    e = Engine(parse_config(_SCALAR.replace("PORT", "1")))
    for i, (topic, body) in enumerate(bodies or _series_messages(n_series)):
        e.ingest(topic, body, 1000.0)
        if i % 1000 == 999:
            e.flush(1000.0)
    e.flush(1000.0)
    return e


def _series_messages(n_series: int):
    """One three-row message per series, made as they are fed (not held in memory)."""
    from sigmad.daemon.ingest.wire import encode

    rng = np.random.default_rng(4)
    for i in range(n_series):
        yield f"bench.s{i}".encode(), encode({"v": rng.normal(size=3)})


def bench_scrape(n_series: int) -> Row:
    from prometheus_client import CollectorRegistry, generate_latest
    from sigmad.daemon.export.metrics_text import SeriesRenderer
    from sigmad.daemon.export.model import families

    e = _many_series_engine(n_series)
    snap = e.snapshot

    class _Families:
        def collect(self):
            return families(snap, 1001.0)
    reg = CollectorRegistry(auto_describe=False)
    reg.register(_Families())
    ref = _best(lambda: generate_latest(reg), 3)
    renderer = SeriesRenderer()
    renderer.render(snap, 1000.5)           # the first scrape fills the cache
    ours = _best(lambda: renderer.render(snap, 1001.0), 3)
    per = len(generate_latest(reg).splitlines()) / n_series
    return Row(f"scrape of {n_series:,} series (~{per:.0f} samples each)",
               f"{ours * 1e3:,.1f} ms", f"generate_latest {ref * 1e3:,.1f} ms", ours / ref,
               "<= 0.3", ours / ref <= 0.3)


def _rss_bytes() -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    return 0


def _memory_child(n_series: int, conn) -> None:
    from sigmad.daemon.engine.engine import Engine  # noqa: F401  (imports are not per-series memory)
    from sigmad.daemon.ingest.wire import encode  # noqa: F401
    gc.collect()
    before = _rss_bytes()
    e = _many_series_engine(n_series)
    gc.collect()
    after = _rss_bytes()
    conn.send((before, after, len(e.snapshot.series)))
    conn.close()


def bench_memory(n_series: int) -> list[Row]:
    if not os.path.exists("/proc/self/status"):
        return [Row("memory per series", "-", "no /proc here: not measured", math.nan, "<= 2 KiB",
                    None)]
    mpc = mp.get_context("spawn")   # a fresh interpreter: nothing of the other benches
    parent, child = mpc.Pipe()
    p = mpc.Process(target=_memory_child, args=(n_series, child))
    p.start()
    before, after, live = parent.recv()
    p.join()
    per = (after - before) / max(live, 1)
    return [
        Row("resident growth per scalar series", f"{per:,.0f} B", "budget 2,048 B",
            per / 2048, "<= 1.0", per <= 2048),
        Row(f"{live:,} series, whole process resident", f"{after / 2**20:,.0f} MiB",
            "budget 400 MiB",
            after / 2**20 / 400, "<= 1.0", after <= 400 * 2**20),
    ]


def bench_checkpoint(n_series: int, repeat: int = 2) -> list[Row]:
    """Write a checkpoint of ``n_series`` series (collect every state on the engine side,
    pack, write atomically) and restore it into a fresh engine; the best of ``repeat``
    of each, as the rates above are."""
    import tempfile

    from prometheus_client import CollectorRegistry
    from sigmad.daemon.engine.engine import Engine
    from sigmad.daemon.storage.checkpoint import (
        Checkpointer,
        encode_checkpoint,
        read_checkpoint,
        restore_checkpoint,
        stream_definitions,
        write_atomically,
    )

    engine = _many_series_engine(n_series)
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "bench.state")
        checkpointer = Checkpointer(path, 30.0, CollectorRegistry())
        wrote = read = math.inf
        for _ in range(repeat):
            t0 = time.perf_counter()
            states = checkpointer.collect(engine)     # what the engine thread does
            data = encode_checkpoint(states, stream_definitions(engine), 1000.0)
            write_atomically(path, data)              # what the writer thread does
            wrote = min(wrote, time.perf_counter() - t0)
            fresh = Engine(engine.config)
            t0 = time.perf_counter()
            _, dropped = restore_checkpoint(fresh, read_checkpoint(path), 2000.0)
            read = min(read, time.perf_counter() - t0)
            if dropped or len(fresh.snapshot.series) != n_series:
                break
    if dropped or len(fresh.snapshot.series) != n_series:
        raise RuntimeError(f"restore kept {len(fresh.snapshot.series)} of {n_series} series")
    size = f"{len(data) / 2**20:.0f} MiB"
    return [Row(f"checkpoint write, {n_series:,} series ({size})", f"{wrote:.2f} s",
                "budget 2 s", wrote / 2.0, "<= 1.0", wrote <= 2.0),
            Row(f"checkpoint restore, {n_series:,} series", f"{read:.2f} s", "budget 2 s",
                read / 2.0, "<= 1.0", read <= 2.0)]


def _engine_seconds(config_text: str, frames: list[tuple[bytes, bytes]],
                    per_flush: int) -> float:
    """CPU seconds for a fresh Engine to ingest ``frames`` (``per_flush`` messages a
    drain) and fold them, flushing after each drain: the engine thread's work alone."""
    from sigmad.daemon.engine.engine import Engine

    e = Engine(parse_config(config_text.replace("PORT", "1"), "<bench>"))
    topics, bodies = [t for t, _ in frames], [b for _, b in frames]
    t0 = time.process_time()
    for i in range(0, len(frames), per_flush):
        e.ingest_many(topics[i:i + per_flush], bodies[i:i + per_flush], 1.0)
        e.flush(1.0)
    return time.process_time() - t0


def bench_thresholds(n_single: int, n_batches: int, repeat: int = 3) -> list[Row]:
    """Three thresholds on the field against none: through a real daemon (sockets,
    decoding, flushes; the daemon process's CPU time, interleaved, best of ``repeat``)
    for single observations and 1,000-row batches, and the engine alone for the
    batches (no target: the fold itself, which sockets and decoding dilute)."""
    with_three = _SCALAR + "thresholds = [8.0, 10.0, 14.0]\n"
    rng = np.random.default_rng(4)
    single = [(b"bench.a", msgpack.packb({"values": {"v": float(v)}, "source": "b",
                                          "seq": i}))
              for i, v in enumerate(rng.normal(10.0, 2.0, n_single))]
    batches = _batches(n_batches, 1000, 5)[0]
    rows = []
    for what, frames, n in (("single observations", single, n_single),
                            ("1,000-row batches", batches, n_batches * 1000)):
        plain = three = 0.0
        for _ in range(repeat):
            plain = max(plain, _daemon_rate(_SCALAR, frames, n, time.process_time))
            three = max(three, _daemon_rate(with_three, frames, n, time.process_time))
        rows.append(Row(f"{what} with 3 thresholds", f"{three:,.0f} obs/CPU-s",
                        f"no thresholds {plain:,.0f} obs/CPU-s", plain / three,
                        "<= 1.15 (time)", plain / three <= 1.15))
    from sigmad.daemon.engine.allocator import keep_freed_blocks
    from sigmad.daemon.engine.blas import set_threads

    keep_freed_blocks()          # as the daemon runs (both are process-wide)
    before = set_threads(1)
    plain = three = math.inf
    try:
        for _ in range(2 * repeat + 1):
            plain = min(plain, _engine_seconds(_SCALAR, batches, 10))
            three = min(three, _engine_seconds(with_three, batches, 10))
    finally:
        if before is not None:
            set_threads(before)
    rows.append(Row("1,000-row batches with 3 thresholds, engine alone",
                    f"{n_batches * 1000 / three:,.0f} obs/s",
                    f"no thresholds {n_batches * 1000 / plain:,.0f} obs/s", three / plain,
                    "- (time)", None))
    return rows


def run(quick: bool = False, out=sys.stdout) -> list[Row]:
    """Measure every figure; ``quick`` uses smaller sizes (for the regression guards)."""
    scale = 0.1 if quick else 1.0
    steps: list[tuple[str, Callable[[], Row | list[Row]]]] = [
        ("single observations", lambda: bench_single(int(200_000 * scale))),
        ("binary batches", lambda: bench_batches(int(10_000 * scale) or 1)),
        ("mixture", lambda: bench_mixture(int(2000 * scale) or 1)),
        ("thresholds", lambda: bench_thresholds(int(200_000 * scale), int(2000 * scale) or 1)),
        ("scrape", lambda: bench_scrape(int(10_000 * scale))),
        ("memory", lambda: bench_memory(int(100_000 * scale))),
        ("checkpoint", lambda: bench_checkpoint(int(100_000 * scale))),
    ]
    rows: list[Row] = []
    tty = out.isatty() if hasattr(out, "isatty") else False
    for i, (name, step) in enumerate(steps, 1):
        if tty:
            print(f"\r[{i}/{len(steps)}] measuring {name}...".ljust(60), end="", file=out,
                  flush=True)
        result = step()
        rows.extend(result if isinstance(result, list) else [result])
    if tty:
        print("\r" + " " * 60 + "\r", end="", file=out)
    return rows


def table(rows: list[Row]) -> str:
    head = ["measure", "sigmad", "measured against", "ratio", "target", "met"]
    cells = [head] + [r.cells() for r in rows]
    widths = [max(len(c[i]) for c in cells) for i in range(len(head))]
    fmt = lambda c: "| " + " | ".join(x.ljust(w) for x, w in zip(c, widths, strict=True)) + " |"  # noqa: E731
    lines = [fmt(head), "|" + "|".join("-" * (w + 2) for w in widths) + "|"]
    lines += [fmt(c) for c in cells[1:]]
    return "\n".join(lines)


def main(quick: bool = False) -> int:
    import platform
    print(f"sigmad bench on {platform.node()} ({os.cpu_count()} cores, Python "
          f"{platform.python_version()}, numpy {np.__version__}); ratios are to references "
          "measured in this run", flush=True)
    rows = run(quick)
    print(table(rows))
    return 0 if all(r.met is not False for r in rows) else 2
