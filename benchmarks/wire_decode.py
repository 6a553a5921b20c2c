"""Micro-benchmark: wire.decode against bare msgpack.unpackb on the same bodies.

Run from the repository root::

    python benchmarks/wire_decode.py [--seconds 0.5]

For each message shape it prints messages and rows per second for
``decode`` and for a bare ``msgpack.unpackb`` of the same bodies in the same
run, and their ratio (decode time / unpackb time; 1.0 would mean validation
and array building cost nothing). The machine is shared, so only the ratio
means much.
"""

from __future__ import annotations

import argparse
import time

import msgpack
import numpy as np
from sigmad.daemon.ingest.wire import decode, encode

MAX_BYTES = 1 << 20
MAX_ROWS = 100_000


def _rate(fn, bodies: list[bytes], seconds: float) -> float:
    """Messages per second of fn over bodies, best of three rounds of ~seconds/3."""
    best = 0.0
    for _ in range(3):
        done = 0
        start = time.perf_counter()
        deadline = start + seconds / 3
        while True:
            for b in bodies:
                fn(b)
            done += len(bodies)
            now = time.perf_counter()
            if now >= deadline:
                break
        best = max(best, done / (now - start))
    return best


def _cases() -> list[tuple[str, tuple[str, ...], list[bytes], int]]:
    rng = np.random.default_rng(7)
    single = [encode({"ms": float(v)}, source="bench:1", seq=i)
              for i, v in enumerate(rng.lognormal(3, 0.5, 256))]
    pair = [encode({"temp": float(a), "rh": float(b)}, time=1.7e9 + i)
            for i, (a, b) in enumerate(rng.normal(20, 2, (256, 2)))]
    bin1 = [encode(rng.lognormal(3, 0.5, 1000), seq=i) for i in range(16)]
    bin2 = [encode({"temp": rng.normal(20, 2, 1000), "rh": rng.normal(40, 5, 1000)},
                   weight=rng.uniform(0.5, 1.5, 1000)) for _ in range(16)]
    list1 = [encode(rng.lognormal(3, 0.5, 1000), binary=False) for _ in range(16)]
    return [
        ("1 observation, 1 field (map)", ("ms",), single, 1),
        ("1 observation, 2 fields + time", ("temp", "rh"), pair, 1),
        ("1000 rows, 1 field, bin", ("value",), bin1, 1000),
        ("1000 rows, 2 fields + weight, bin", ("temp", "rh"), bin2, 1000),
        ("1000 rows, 1 field, msgpack array", ("value",), list1, 1000),
    ]


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=0.6, help="time per measurement")
    args = parser.parse_args(argv)
    print(f"{'message shape':36} {'decode msg/s':>13} {'rows/s':>12} "
          f"{'unpackb msg/s':>14} {'ratio':>6}")
    for name, fields, bodies, rows in _cases():
        def dec(b, fields=fields):
            return decode(b, fields, max_bytes=MAX_BYTES, max_rows=MAX_ROWS)
        ours = _rate(dec, bodies, args.seconds)
        bare = _rate(lambda b: msgpack.unpackb(b, raw=False), bodies, args.seconds)
        print(f"{name:36} {ours:13,.0f} {ours * rows:12,.0f} {bare:14,.0f} {bare / ours:6.2f}")


if __name__ == "__main__":
    main()
