"""``sigmad send``: publish values read from stdin.

Each line is one of:

- a number: one observation of the stream's only field (or of ``--field F``);
- CSV: comma-separated numbers; a first line that is not numeric names the
  columns (``weight`` and ``time`` columns become the weight and event time),
  but only when the lines after it have as many columns as it has;
- a JSON object: either a wire-format body (``{"values": ..., "weight": ...}``)
  or a map of field to number.

Nothing is half sent. By default the whole input (at most ``MAX_INPUT_BYTES``)
is read and checked first: one unreadable line is reported with its number,
nothing is sent and the exit code is 1, so the corrected input can be sent again
without counting anything twice. Then ``send`` waits up to ``--timeout`` seconds
for the daemon (a PUSH handshake; with ``--socket pub`` a subscriber), exits 1
if none is there, sends numbers and CSV rows in columnar batches of up to
``BATCH`` rows, and exits 0 only once every message has left (else 2).

``--follow`` is for endless input (``tail -f``): each line is sent as it comes;
unreadable lines are reported, skipped and counted, and the count is printed
at the end (exit code 1 when any were skipped). On a terminal a progress line
shows what was sent.
"""

from __future__ import annotations

import contextlib
import json
import sys
import time
from collections.abc import Iterable, Iterator
from dataclasses import dataclass

import numpy as np
from sigmad.daemon.client import DeliveryError, Producer
from sigmad.daemon.config.units import check_endpoint
from sigmad.daemon.ingest.wire import encode

BATCH = 1000
#: Largest input read whole before sending (bytes); more needs ``--follow``.
MAX_INPUT_BYTES = 64 << 20
#: Unreadable lines reported one by one; the rest are only counted.
REPORTED = 20


class InputError(ValueError):
    """A line that cannot be sent: ``line`` is its number, ``str()`` says why."""

    def __init__(self, line: int, why: str) -> None:
        super().__init__(f"line {line}: {why}")
        self.line = line


@dataclass
class Message:
    values: object
    weight: object = None
    time: object = None
    rows: int = 1


def _numbers(parts: list[str]) -> list[float] | None:
    try:
        return [float(p) for p in parts]
    except ValueError:
        return None


class _Reader:
    """Turns lines into messages; keeps the header and the pending CSV rows."""

    def __init__(self, field: str | None) -> None:
        self.field = field
        self.header: tuple[str, ...] | None = None
        self.candidate: tuple[int, str, tuple[str, ...]] | None = None   # a possible header
        self.columns: tuple[str, ...] | None = None
        self.rows: list[list[float]] = []
        self.seen = False   # a header may only be the first non-empty line

    def batch(self) -> Message | None:
        if not self.rows:
            return None
        data = np.asarray(self.rows, dtype=np.float64)
        cols = dict(zip(self.columns, data.T, strict=True))
        weight, when = cols.pop("weight", None), cols.pop("time", None)
        values = cols.pop("") if "" in cols else cols
        self.rows = []
        return Message(values, weight, when, len(data))

    def _add(self, columns: tuple[str, ...], row: list[float]) -> Iterator[Message]:
        if columns != self.columns:
            done = self.batch()
            if done is not None:
                yield done
            self.columns = columns
        self.rows.append(row)
        if len(self.rows) >= BATCH:
            yield self.batch()

    def line(self, lineno: int, line: str) -> Iterator[Message]:
        """The messages one line completes (rows wait for their batch). Raises InputError."""
        first, self.seen = not self.seen, True
        if line.startswith("{"):
            yield from self._json(lineno, line)
            return
        parts = [p.strip() for p in line.split(",")]
        row = _numbers(parts)
        if row is None:
            if first:
                self.candidate = (lineno, line, tuple(parts))   # judged by the next line
                return
            raise InputError(lineno, f"cannot read {line[:60]!r} as numbers")
        if self.candidate is not None:
            first, text, names = self.candidate
            self.candidate = None
            if len(names) != len(row):
                raise InputError(first, f"cannot read {text[:60]!r} as numbers (nor as a "
                                 f"header: it names {len(names)} columns, line {lineno} "
                                 f"has {len(row)})")
            self.header = names
        if self.header is not None:
            if len(row) != len(self.header):
                raise InputError(lineno, f"{len(row)} values for {len(self.header)} columns")
            yield from self._add(self.header, row)
        elif len(row) == 1:
            yield from self._add((self.field or "",), row)
        else:
            raise InputError(lineno, f"{len(row)} values but no header line naming the "
                             "columns")

    def _json(self, lineno: int, line: str) -> Iterator[Message]:
        try:
            obj = json.loads(line)
        except ValueError as exc:
            raise InputError(lineno, f"not valid JSON ({exc})") from None
        if not isinstance(obj, dict):
            raise InputError(lineno, "a JSON line must be an object")
        msg = Message(obj["values"], obj.get("weight"), obj.get("time")) if "values" in obj \
            else Message(obj)
        try:   # what the producer would encode: refused here, before anything is sent
            encode(msg.values, weight=msg.weight, time=msg.time)
        except (TypeError, ValueError) as exc:
            raise InputError(lineno, f"not a usable JSON object ({exc})") from None
        done = self.batch()
        if done is not None:
            yield done
        yield msg

    def end(self) -> Iterator[Message]:
        if self.candidate is not None:
            first, text, _ = self.candidate
            self.candidate = None
            raise InputError(first, f"cannot read {text[:60]!r} as numbers (a header "
                             "needs rows after it)")
        done = self.batch()
        if done is not None:
            yield done


def _lines(stream: Iterable[str]) -> Iterator[tuple[int, str]]:
    for lineno, raw in enumerate(stream, 1):
        line = raw.strip()
        if line:
            yield lineno, line


def read_all(stream, field: str | None) -> tuple[list[Message], list[InputError]]:
    """Every message of a bounded input, or every problem in it (then nothing is sent)."""
    reader = _Reader(field)
    messages: list[Message] = []
    problems: list[InputError] = []
    size = 0
    for lineno, line in _lines(stream):
        size += len(line) + 1
        if size > MAX_INPUT_BYTES:
            problems.append(InputError(lineno, f"the input is over {MAX_INPUT_BYTES >> 20} "
                                       "MiB; send it in parts, or use --follow"))
            return messages, problems
        try:
            messages.extend(reader.line(lineno, line))
        except InputError as exc:
            problems.append(exc)
    try:
        messages.extend(reader.end())
    except InputError as exc:
        problems.append(exc)
    problems.sort(key=lambda e: e.line)
    return messages, problems


def _connect(endpoint: str, socket: str, bind: bool, timeout: float) -> Producer:
    check_endpoint(endpoint, "--bind" if bind else "--connect", bind)
    producer = Producer(endpoint, socket=socket, bind=bind, linger=max(timeout, 10.0))
    if not producer.wait_ready(timeout):
        producer.linger = 0.0
        with contextlib.suppress(DeliveryError):   # nothing was sent
            producer.close()
        who = "subscriber" if socket == "pub" else "daemon"
        print(f"sigmad send: no {who} reachable at {endpoint} within {timeout:g} s; nothing "
              "was sent (is `sigmad run` running with a source there? --timeout S waits "
              "longer)", file=sys.stderr)
        raise SystemExit(1)
    return producer


def _send(producer: Producer, topic: str, msg: Message) -> None:
    producer.send(topic, msg.values, weight=msg.weight, time=msg.time)


def _finish(producer: Producer, endpoint: str) -> bool:
    try:
        producer.close()
    except DeliveryError as exc:
        print(f"sigmad send: {exc}", file=sys.stderr)
        return False
    return True


def send_stdin(topic: str, endpoint: str, field: str | None, bind: bool = False,
               socket: str = "push", stream=None, follow: bool = False,
               timeout: float = 5.0) -> int:
    """``sigmad send``: exit code 0 sent, 1 bad input or no daemon, 2 not delivered."""
    stream = sys.stdin if stream is None else stream
    if follow:
        return _follow(topic, endpoint, field, bind, socket, stream, timeout)
    messages, problems = read_all(stream, field)
    if problems:
        for p in problems[:REPORTED]:
            print(f"sigmad send: {p}", file=sys.stderr)
        more = f" ({len(problems) - REPORTED} more not shown)" if len(problems) > REPORTED \
            else ""
        print(f"sigmad send: {len(problems)} unreadable line(s){more}; nothing was sent",
              file=sys.stderr)
        return 1
    if not messages:
        print("sigmad send: no values in the input; nothing was sent", file=sys.stderr)
        return 1
    producer = _connect(endpoint, socket, bind, timeout)
    rows = 0
    try:
        for msg in messages:
            _send(producer, topic, msg)
            rows += msg.rows
    finally:
        delivered = _finish(producer, endpoint)
    if sys.stderr.isatty():
        print(f"sent {rows} rows to {topic}", file=sys.stderr)
    return 0 if delivered else 2


def _follow(topic: str, endpoint: str, field: str | None, bind: bool, socket: str,
            stream, timeout: float) -> int:
    producer = _connect(endpoint, socket, bind, timeout)
    reader = _Reader(field)
    bad = rows = 0
    progress = sys.stderr.isatty()
    last_report = time.monotonic()
    try:
        for lineno, line in _lines(stream):
            try:
                for msg in reader.line(lineno, line):
                    _send(producer, topic, msg)
                    rows += msg.rows
                done = reader.batch()   # nothing waits for a batch: the input may pause
                if done is not None:
                    _send(producer, topic, done)
                    rows += done.rows
            except InputError as exc:
                bad += 1
                if bad <= REPORTED:
                    print(f"sigmad send: {exc} (skipped)", file=sys.stderr)
            if progress and time.monotonic() - last_report > 1.0:
                last_report = time.monotonic()
                print(f"\rsent {rows} rows", end="", file=sys.stderr)
        try:
            for msg in reader.end():
                _send(producer, topic, msg)
                rows += msg.rows
        except InputError as exc:
            bad += 1
            print(f"sigmad send: {exc} (skipped)", file=sys.stderr)
    except KeyboardInterrupt:
        pass
    finally:
        delivered = _finish(producer, endpoint)
    print(f"sigmad send: sent {rows} rows to {topic}; skipped {bad} unreadable line(s)",
          file=sys.stderr)
    if not delivered:
        return 2
    return 1 if bad else 0
