"""Micro-benchmark: the engine's ingest of single observations, in process.

Run from the repository root::

    python benchmarks/engine_ingest.py [--messages 200000]

For one scalar series and for 5,000 series (one message each per drain of
5,000), it prints nanoseconds per message for ``Engine.ingest_many`` (byte
layouts), for ``Engine._decode_each`` (message by message, through the
stream's ``wire.Reader``) and for the fastest bare decode loop over the same
bodies (``msgpack.unpackb`` or a typed msgspec decoder), each best of three,
and the ratios to the bare loop. The flush is not timed here; ``sigmad bench``
measures the whole path through a real socket.
"""

from __future__ import annotations

import argparse
import logging
import time

import msgpack
import numpy as np
from sigmad.daemon.bench.suite import _SCALAR, _bare_decoders
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine

DRAIN = 5_000


def _bodies(n: int, series: int) -> tuple[list[bytes], list[bytes]]:
    rng = np.random.default_rng(1)
    topics = [b"bench.s%d" % (i % series) for i in range(n)]
    bodies = [msgpack.packb({"values": {"v": float(v)}, "source": "b", "seq": 1000 + i})
              for i, v in enumerate(rng.normal(size=n))]
    return topics, bodies


def _engine_ns(topics: list[bytes], bodies: list[bytes], each: bool) -> float:
    """ns per message of ingesting drains of DRAIN messages, after a warm-up pass that
    creates the series (and, for ingest_many, learns their layouts)."""
    e = Engine(parse_config(_SCALAR.replace("PORT", "1")))
    ingest = e._decode_each if each else e.ingest_many
    for start in range(0, len(bodies), DRAIN):          # warm-up: series, layouts
        ingest(topics[start:start + DRAIN], bodies[start:start + DRAIN], 999.0)
    e.flush(999.0)
    t0 = time.perf_counter()
    for start in range(0, len(bodies), DRAIN):
        ingest(topics[start:start + DRAIN], bodies[start:start + DRAIN], 1000.0)
    elapsed = time.perf_counter() - t0
    e.flush(1000.0)
    return elapsed / len(bodies) * 1e9


def _bare_ns(bodies: list[bytes]) -> float:
    """The faster of msgpack.unpackb and msgspec's typed decoder (the bench's own)."""
    best = float("inf")
    for decode in _bare_decoders().values():
        t0 = time.perf_counter()
        for b in bodies:
            decode(b)
        best = min(best, time.perf_counter() - t0)
    return best / len(bodies) * 1e9


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--messages", type=int, default=200_000)
    args = parser.parse_args(argv)
    logging.disable(logging.INFO)
    print(f"{'series':>7} {'layouts ns':>11} {'each ns':>9} {'bare ns':>11} "
          f"{'layouts/bare':>16} {'each/bare':>13}")
    for series in (1, 5_000):
        topics, bodies = _bodies(args.messages, series)
        bare = min(_bare_ns(bodies) for _ in range(3))
        fast = min(_engine_ns(topics, bodies, each=False) for _ in range(3))
        each = min(_engine_ns(topics, bodies, each=True) for _ in range(3))
        print(f"{series:>7,} {fast:>11.0f} {each:>9.0f} {bare:>11.0f} {fast / bare:>16.2f} "
              f"{each / bare:>13.2f}")


if __name__ == "__main__":
    main()
