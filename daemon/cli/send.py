"""``sigmad send``: publish values read from stdin.

Each line is one of:

- a number: one observation of the stream's only field (or of ``--field F``);
- CSV: comma-separated numbers; a first line that is not numeric names the
  columns (``weight`` and ``time`` columns become the weight and event time);
- a JSON object: either a wire-format body (``{"values": ..., "weight": ...}``)
  or a map of field to number.

Numbers and CSV rows are sent in columnar batches of up to ``BATCH`` rows. A
line that cannot be read is reported on stderr with its number and skipped;
the exit code is then 1. On a terminal a progress line shows what was sent.
"""

from __future__ import annotations

import json
import sys
import time

import numpy as np
from sigmad.daemon.client import Producer

BATCH = 1000


class _Batcher:
    def __init__(self, producer: Producer, topic: str) -> None:
        self.producer, self.topic = producer, topic
        self.columns: tuple[str, ...] | None = None
        self.rows: list[list[float]] = []
        self.sent = 0

    def add(self, columns: tuple[str, ...], row: list[float]) -> None:
        if columns != self.columns:
            self.flush()
            self.columns = columns
        self.rows.append(row)
        if len(self.rows) >= BATCH:
            self.flush()

    def flush(self) -> None:
        if not self.rows:
            return
        data = np.asarray(self.rows, dtype=np.float64)
        cols = dict(zip(self.columns, data.T, strict=True))
        weight, when = cols.pop("weight", None), cols.pop("time", None)
        values = cols.pop("") if "" in cols else cols
        self.producer.send(self.topic, values, weight=weight, time=when)
        self.sent += len(self.rows)
        self.rows = []


def _numbers(parts: list[str]) -> list[float] | None:
    try:
        return [float(p) for p in parts]
    except ValueError:
        return None


def send_stdin(topic: str, endpoint: str, field: str | None, bind: bool = False,
               socket: str = "push", stream=None) -> int:
    stream = sys.stdin if stream is None else stream
    progress = sys.stderr.isatty()
    bad = 0
    header: tuple[str, ...] | None = None
    last_report = time.monotonic()
    with Producer(endpoint, socket=socket, bind=bind) as producer:
        batcher = _Batcher(producer, topic)
        for lineno, raw in enumerate(stream, 1):
            line = raw.strip()
            if not line:
                continue
            if line.startswith("{"):
                try:
                    obj = json.loads(line)
                    batcher.flush()
                    if "values" in obj:
                        producer.send(topic, obj["values"], weight=obj.get("weight"),
                                      time=obj.get("time"))
                    else:
                        producer.send(topic, obj)
                    batcher.sent += 1
                except (ValueError, TypeError) as exc:
                    bad += 1
                    print(f"sigmad send: line {lineno}: not a usable JSON object ({exc})",
                          file=sys.stderr)
                continue
            parts = [p.strip() for p in line.split(",")]
            row = _numbers(parts)
            if row is None:
                if header is None and lineno == 1 and len(parts) > 0:
                    header = tuple(parts)
                    continue
                bad += 1
                print(f"sigmad send: line {lineno}: cannot read {line[:60]!r} as numbers",
                      file=sys.stderr)
                continue
            if header is not None:
                if len(row) != len(header):
                    bad += 1
                    print(f"sigmad send: line {lineno}: {len(row)} values for "
                          f"{len(header)} columns", file=sys.stderr)
                    continue
                batcher.add(header, row)
            elif len(row) == 1:
                batcher.add((field or "",), row)
            else:
                bad += 1
                print(f"sigmad send: line {lineno}: {len(row)} values but no header line "
                      "naming the columns", file=sys.stderr)
            if progress and time.monotonic() - last_report > 1.0:
                last_report = time.monotonic()
                print(f"\rsent {batcher.sent + len(batcher.rows)} rows", end="",
                      file=sys.stderr)
        batcher.flush()
    if progress:
        print(f"\rsent {batcher.sent} rows to {topic}", file=sys.stderr)
    return 1 if bad else 0
