"""A bounded fuzz loop with an oracle: each generated message's outcome is predicted from
the README's rules (wire format v1 and its rejection reasons), then the engine is fed
the messages in drains of random size, as the daemon feeds it, and must agree exactly:
every rejection counted under the predicted reason, and every series' weighted mean
and variance equal to numpy's over the rows predicted to be accepted.

Run as a script for large counts (figures for the closing note)::

    python tests/fuzz_oracle.py --messages 1000000 [--seed 1]

``tests/test_fuzz_oracle.py`` runs 100,000 messages.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from collections import Counter, defaultdict

import msgpack
import numpy as np

CONFIG = """
[daemon]
max_message_bytes = 4096
max_batch_rows = 64
max_clock_skew = "1h"
max_time_ahead = "10s"

[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:1"

[[stream]]
name = "one"
topic = "a.{k}"
fields = ["v"]
quantiles = []

[[stream]]
name = "two"
topic = "p.{k}"
fields = ["x", "y"]
quantiles = []
"""
NOW = 1.7e9
MAX_BYTES, MAX_ROWS = 4096, 64
NEST = b"\x91" * 600 + b"\x01"


def _pack(obj) -> bytes:
    return msgpack.packb(obj, use_bin_type=True)


class Oracle:
    """Generates messages and predicts each one's outcome from the README's rules."""

    def __init__(self, seed: int) -> None:
        self.rng = np.random.default_rng(seed)
        self.rejected: Counter[str] = Counter()
        self.rows: dict[tuple[str, str], list] = defaultdict(list)   # (stream, k) -> rows
        self.kinds: Counter[str] = Counter()

    def _values(self, n: int | None, two: bool, binary: bool):
        """A values map (and the rows it holds) for a single observation (n None) or a
        batch of n rows."""
        rng = self.rng
        fields = ("x", "y") if two else ("v",)
        if n is None:
            row = [float(rng.normal(10, 3)) for _ in fields]
            if rng.random() < 0.2:
                row = [float(int(v)) for v in row]   # integers are numbers too
                return dict(zip(fields, map(int, row), strict=True)), [row]
            return dict(zip(fields, row, strict=True)), [row]
        cols = [rng.normal(10, 3, n) for _ in fields]
        enc = [c.astype("<f8").tobytes() if binary else c.tolist() for c in cols]
        return dict(zip(fields, enc, strict=True)), np.column_stack(cols).tolist()

    def message(self) -> tuple[bytes, bytes]:
        rng = self.rng
        two = bool(rng.random() < 0.4)
        k = f"s{int(rng.integers(0, 6))}"
        topic = (f"p.{k}" if two else f"a.{k}").encode()
        key = ("two" if two else "one", k)
        kind = str(rng.choice([
            "single", "single", "single", "single", "batch_bin", "batch_list",
            "too_large", "not_msgpack", "not_a_map", "no_values", "missing_field",
            "bad_value", "deep", "length_mismatch", "too_many_rows", "bad_source",
            "bad_seq", "no_stream", "bad_topic", "future_time", "clock_skew",
            "not_finite", "bad_weight", "extra_keys"]))
        self.kinds[kind] += 1
        single = kind in ("single", "future_time", "clock_skew", "not_finite", "bad_weight",
                          "extra_keys", "bad_source", "bad_seq")
        n = None if single else int(rng.integers(1, 9))
        values, rows = self._values(n, two, kind != "batch_list")
        body: dict = {"values": values}
        weights = None
        if rng.random() < 0.3:
            if n is None:
                weights = [float(rng.uniform(0.5, 2.0))]
                body["weight"] = weights[0]
            else:
                weights = rng.uniform(0.5, 2.0, n).tolist()
                body["weight"] = np.asarray(weights).astype("<f8").tobytes()
        if rng.random() < 0.3:
            body["time"] = NOW - float(rng.uniform(0, 5))
        if rng.random() < 0.3:
            body["source"] = f"p{int(rng.integers(0, 3))}"
            body["seq"] = int(rng.integers(0, 2**64, dtype=np.uint64))
        reason = None
        if kind == "too_large":
            body["pad"] = "x" * MAX_BYTES
            reason = "too_large"
        elif kind == "not_msgpack":
            return topic, b"\xc1" + rng.bytes(int(rng.integers(0, 8))), self._reject("not_msgpack")
        elif kind == "not_a_map":
            return topic, _pack([1, 2]), self._reject("not_a_map")
        elif kind == "no_values":
            body = {"value": 1.0}
            reason = "no_values"
        elif kind == "missing_field":
            body["values"] = {"w": 1.0}
            reason = "missing_field"
        elif kind == "bad_value":
            body["values"] = dict.fromkeys(values, "text")
            reason = "bad_value"
        elif kind == "deep":   # every field nested 600 levels deep
            inner = b"".join(_pack(f) + NEST for f in values)
            raw = b"\x81\xa6values" + bytes([0x80 | len(values)]) + inner
            return topic, raw, self._reject("bad_value")
        elif kind == "length_mismatch":
            body["weight"] = np.ones(n + 1).astype("<f8").tobytes()
            reason = "length_mismatch"
        elif kind == "too_many_rows":
            body["values"] = dict.fromkeys(values, [1.0] * (MAX_ROWS + 1))
            reason = "too_many_rows"
        elif kind == "bad_source":
            body["source"] = str(rng.choice(["", "a\x00b", "p" * 129]))
            reason = "bad_source"
        elif kind == "bad_seq":
            body["source"], body["seq"] = "p0", -int(rng.integers(1, 2**63))
            reason = "bad_seq"
        elif kind == "no_stream":
            topic = b"nowhere." + k.encode()
            reason = "no_stream"
        elif kind == "bad_topic":
            topic = topic + b"." + b"z" * 300
            reason = "bad_topic"
        elif kind == "future_time":
            body["time"] = NOW + float(rng.uniform(11, 1e6))
            reason = "future_time"
        elif kind == "clock_skew":
            body["time"] = NOW - float(rng.uniform(3601, 1e6))
            reason = "clock_skew"
        elif kind == "extra_keys":
            body["trace"] = {"id": "abc", "nested": [1, [2, [3]]]}
        if reason is not None:
            return topic, _pack(body), self._reject(reason)
        if kind == "not_finite":   # the row is dropped at the flush, the message accepted
            body["values"] = dict.fromkeys(values, math.nan)
            return topic, _pack(body), self._reject("not_finite")
        if kind == "bad_weight":
            body["weight"] = 0.0
            return topic, _pack(body), self._reject("bad_weight")
        w = weights or [1.0] * len(rows)
        self.rows[key] += [(r, wi) for r, wi in zip(rows, w, strict=True)]
        return topic, _pack(body), None

    def _reject(self, reason: str) -> str:
        self.rejected[reason] += 1
        return reason


def run(messages: int, seed: int = 1, out=None) -> dict:
    """Feed ``messages`` fuzzed messages; raise AssertionError on any disagreement."""
    from sigmad.daemon.config.load import parse_config
    from sigmad.daemon.engine.engine import Engine

    oracle = Oracle(seed)
    engine = Engine(parse_config(CONFIG))
    rng = np.random.default_rng(seed + 1)
    t0 = time.perf_counter()
    sent = 0
    while sent < messages:
        size = int(min(messages - sent, rng.choice([1, 3, 17, 200, 1000])))
        drain = [oracle.message()[:2] for _ in range(size)]
        engine.ingest_many([t for t, _ in drain], [b for _, b in drain], NOW)
        engine.flush(NOW)
        sent += size
    elapsed = time.perf_counter() - t0
    assert engine.rejected == oracle.rejected, (engine.rejected, oracle.rejected)
    views = {(v.stream, dict(v.labels)["k"]): v for v in engine.snapshot.series.values()}
    assert set(views) == set(oracle.rows)
    worst = 0.0
    for key, rows in oracle.rows.items():
        x = np.array([r for r, _ in rows])
        w = np.array([wi for _, wi in rows])
        mean = np.average(x, axis=0, weights=w)                 # numpy is the reference
        v = views[key]
        assert v.observations == len(rows)
        got = np.array(v.mean)
        worst = max(worst, float(np.max(np.abs(got - mean) / np.abs(mean))))
        np.testing.assert_allclose(got, mean, rtol=1e-9)
    figures = {"messages": messages, "seconds": round(elapsed, 1),
               "rejected": dict(sorted(engine.rejected.items())),
               "series": len(views), "worst_mean_rel_error": worst}
    if out is not None:
        print(figures, file=out)
    return figures


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--messages", type=int, default=1_000_000)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args(argv)
    import logging
    logging.disable(logging.WARNING)
    run(args.messages, args.seed, out=sys.stdout)
    return 0


if __name__ == "__main__":
    sys.exit(main())
