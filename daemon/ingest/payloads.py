"""MQTT payloads as wire-format v1 bodies: the one place JSON and number text become msgpack.

An MQTT message has a topic and one payload, and IoT devices rarely speak
msgpack. A payload is read as one of:

- a wire-format v1 body (:mod:`sigmad.daemon.ingest.wire`): it starts like a
  msgpack map (fixmap, map 16 or map 32) and passes through unchanged;
- a JSON object of field -> number, with optional ``time`` (unix seconds, or
  an ISO 8601 / RFC 3339 string with a UTC offset) and ``weight``:
  ``{"temperature": 21.4, "humidity": 48, "time": "2026-01-02T03:04:05Z"}``;
- a bare number as text, for a stream with exactly one field: ``21.4``;
- a JSON object with a ``values`` key: a wire-format body written in JSON
  (batches as arrays), as ``sigmad send`` also takes.

JSON and text are turned into the msgpack body a producer would have sent
(``{"values": {...}, "time": t, "weight": w}`` or ``{"values": x}``), so the
engine reads every payload through the same decoder, with the same checks and
counts. Anything else is rejected with a :class:`WireError` whose reason is one
of :data:`PAYLOAD_REASONS` (or ``too_large`` / ``bad_value`` as for any body).
"""

from __future__ import annotations

import json
import re
from datetime import datetime

import msgpack
from sigmad.daemon.ingest.wire import WireError

#: Reasons an MQTT payload is rejected before the wire decoder sees it.
PAYLOAD_REASONS: tuple[str, ...] = ("not_json", "bad_payload", "bad_time", "bad_weight")
# JSON's number grammar (RFC 8259 section 6), surrounding white space allowed
_NUMBER = re.compile(rb"\s*-?(?:0|[1-9][0-9]*)(?:\.[0-9]+)?(?:[eE][+-]?[0-9]+)?\s*")
_MAX_TIME_TEXT = 64        # longest ISO 8601 time string read (ours: a generous bound)
_INT_RANGE = (-(2**63), 2**64)   # what msgpack packs as an integer; other ints become floats
_pack = msgpack.Packer(use_bin_type=True).pack


def is_msgpack_map(payload: bytes) -> bool:
    """Starts like a msgpack map: fixmap (0x80-0x8f), map 16 (0xde) or map 32 (0xdf)."""
    return bool(payload) and (payload[0] & 0xF0 == 0x80 or payload[0] in (0xDE, 0xDF))


def to_body(payload: bytes, max_bytes: int) -> bytes:
    """The wire-format v1 body that carries ``payload``'s reading.

    Parameters
    ----------
    payload : bytes
        A msgpack map, a JSON object or a JSON number as UTF-8 text.
    max_bytes : int
        The daemon's ``max_message_bytes``: longer JSON or text is refused
        before it is parsed (a msgpack body is bounded by the wire decoder).

    Returns
    -------
    bytes

    Raises
    ------
    WireError
        ``too_large``; ``not_json`` (starts with ``{`` but is no JSON object);
        ``bad_value`` (a field holds an array or an object); ``bad_time`` /
        ``bad_weight`` (not a number, or a time string without a UTC offset);
        ``bad_payload`` (neither msgpack, JSON object nor number).

    Notes
    -----
    O(len(payload)).

    Examples
    --------
    >>> msgpack.unpackb(to_body(b'{"t": 21.5, "time": "2026-01-02T00:00:00Z"}', 1024))
    {'values': {'t': 21.5}, 'time': 1767312000.0}
    >>> msgpack.unpackb(to_body(b" 21.5\\n", 1024))
    {'values': 21.5}
    """
    if is_msgpack_map(payload):
        return payload
    if len(payload) > max_bytes:
        raise WireError("too_large", f"payload of {len(payload)} bytes exceeds "
                        f"max_message_bytes {max_bytes}")
    if _NUMBER.fullmatch(payload):
        return _pack({"values": _number(json.loads(payload))})
    if payload.lstrip()[:1] != b"{":
        raise WireError("bad_payload", "payload is neither a msgpack map, a JSON object "
                        "nor a number: " + repr(payload[:40]))
    try:
        obj = json.loads(payload)
    except (ValueError, RecursionError) as exc:   # UnicodeDecodeError is a ValueError
        raise WireError("not_json", f"payload starts like a JSON object but is not one "
                        f"({str(exc)[:80]})") from None
    if type(obj) is not dict:
        raise WireError("not_json", "payload is JSON but not one object")
    if "values" in obj:   # a wire-format body written as JSON (as ``sigmad send`` takes)
        if type(obj.get("time")) is str:
            obj["time"] = _time(obj["time"])
        try:
            return _pack(obj)
        except (OverflowError, ValueError) as exc:   # an integer beyond 64 bits, say
            raise WireError("bad_value", f"the body cannot be a wire body ({exc})") from None
    values: dict = {}
    msg: dict = {"values": values}
    for key, value in obj.items():
        if key == "time":
            msg["time"] = _time(value)
        elif key == "weight":
            if type(value) not in (int, float):
                raise WireError("bad_weight", f"weight is {value!r}, not a number")
            msg["weight"] = _number(value)
        elif type(value) in (list, dict):
            raise WireError("bad_value", f"field {key!r} holds a JSON "
                            f"{'array' if type(value) is list else 'object'}, not a number")
        else:   # numbers; text, true/false and null reach the decoder, which judges them
            values[key] = _number(value) if type(value) is int else value
    return _pack(msg)


def _number(value: int | float) -> int | float:
    """A JSON number as msgpack can pack it (integers beyond 64 bits become floats)."""
    if type(value) is int and not _INT_RANGE[0] <= value < _INT_RANGE[1]:
        try:
            return float(value)
        except OverflowError:
            raise WireError("bad_value", f"{value:.3e} is beyond float64") from None
    return value


def _time(value: object) -> int | float:
    """Unix seconds from a number or an ISO 8601 / RFC 3339 string with a UTC offset."""
    if type(value) in (int, float):
        return _number(value)
    if type(value) is not str or len(value) > _MAX_TIME_TEXT:
        raise WireError("bad_time", f"time {str(value)[:_MAX_TIME_TEXT]!r} is neither unix "
                        "seconds nor an ISO 8601 string")
    try:
        when = datetime.fromisoformat(value)
    except ValueError:
        raise WireError("bad_time", f"time {value!r} is not an ISO 8601 / RFC 3339 "
                        "timestamp") from None
    if when.tzinfo is None or when.utcoffset() is None:
        raise WireError("bad_time", f"time {value!r} has no UTC offset (add Z or +hh:mm)")
    return when.timestamp()
