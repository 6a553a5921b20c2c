"""Wire format v1: the msgpack body of a ``[topic, body]`` message.

The body is a msgpack map:

=================  ==========================================================
key                value
=================  ==========================================================
``values``         map field -> number (one observation); map field -> array
                   of numbers or bin of little-endian float64 (a batch, every
                   field the same length n); or, for a stream with exactly one
                   field, a bare number, array or bin
``weight``         optional number, or array/bin of n; default 1
``time``           optional number (unix seconds), or array/bin of n
``source``         optional producer id (string, at most 128 printable chars)
``seq``            optional message sequence number (integer >= 0)
=================  ==========================================================

Anything else in the body is ignored, and so are fields in ``values`` that
the stream does not use (one producer may feed several streams); a field the
stream needs but the message lacks rejects the message.

:func:`decode` rejects a whole message with a :class:`WireError` whose
``reason`` is one of :data:`REASONS`. It does *not* judge single rows: NaN or
infinite values, bad weights and bad times are left for
``estimators.clean_batch``, which drops those rows and counts them.

msgpack extension types (the Timestamp extension included) are refused as
``not_msgpack``: send ``time`` as a number of unix seconds. A ``weight``,
``time``, ``source`` or ``seq`` of nil counts as absent.

Decoding is bounded: the body length is checked before unpacking, and the
unpacker's length limits are set from it (and from ``max_rows`` for arrays),
so a header that claims a 2 GB array fails at the header, before anything is
allocated (:func:`unpack_bounded`, the one bounded unpacker of the daemon).

How a body becomes rows is decided in one place, :meth:`Reader.read`: a typed
msgspec decoder reads the usual shapes (one observation of numbers, or a batch
of bins) straight into structs; any body that does not fit them exactly (an
unknown key, an array of numbers, an ext type, a nil value, bad bytes) is read
by the general decoder (:func:`unpack` then :func:`interpret`), which accepts
it or names the reason for rejecting it.
"""

from __future__ import annotations

import functools
import re
from collections.abc import Mapping
from typing import Annotated, NamedTuple

import msgpack
import msgspec
import numpy as np

#: Reasons a whole message is rejected, as counted in ``sigmad_rejected_total{reason}``.
REASONS: tuple[str, ...] = (
    "too_large", "not_msgpack", "not_a_map", "no_values", "missing_field", "bad_value",
    "length_mismatch", "too_many_rows", "bad_source", "bad_seq",
)
#: Longest accepted ``source`` string (ours: it may become a label value).
MAX_SOURCE = 128
_SEQ_LIMIT = 2**64
_NUMBER = (int, float)
_NUMBER_TYPES = frozenset(_NUMBER)
_ARRAY_TYPES = frozenset((tuple, bytes))
_F8 = np.dtype("<f8")
# msgpack (C and pure-Python unpackers alike) words this error "<n> exceeds max_array_len(<m>)".
_ARRAY_CLAIM = re.compile(r"(\d+) exceeds max_array_len")


class WireError(ValueError):
    """A message that cannot be used at all.

    Attributes
    ----------
    reason : str
        One of :data:`REASONS`.
    detail : str
        One sentence for the rejected-message log.
    """

    def __init__(self, reason: str, detail: str) -> None:
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail


_SHOWN = 60   # characters of a sender's text shown in an error


def _cut(text: str, limit: int = 2 * _SHOWN) -> str:
    return text if len(text) <= limit else text[:limit] + "..."


def show(value: object) -> str:
    """A sender's value for an error message: its msgpack kind and, for a scalar, at
    most ~60 characters of it. Never the repr of a container (it could be 1,000
    levels deep): an array or map shows its length only. O(1)."""
    kind = type(value)
    if kind is tuple or kind is list:
        return f"an array of {len(value)} items"  # type: ignore[arg-type]
    if kind is dict:
        return f"a map of {len(value)} entries"  # type: ignore[arg-type]
    if kind is bytes:
        return f"a bin of {len(value)} bytes"  # type: ignore[arg-type]
    if kind is str:
        text = repr(value[:_SHOWN])  # type: ignore[index]
        return f"str {text}" + (f"... ({len(value)} characters)"  # type: ignore[arg-type]
                                if len(value) > _SHOWN else "")  # type: ignore[arg-type]
    if kind in (int, float, bool) or value is None:
        return f"{kind.__name__} {_cut(repr(value))}"
    return kind.__name__


class Decoded(NamedTuple):
    """A decoded message: n rows of the stream's fields.

    ``values`` is (n, d) float64 in the order of the stream's fields (a
    read-only view of the message buffer for a single-field bin batch);
    ``weights`` and ``times`` are (n,) float64 or None when absent.
    """

    values: np.ndarray
    weights: np.ndarray | None
    times: np.ndarray | None
    source: str | None
    seq: int | None


_new_decoded = tuple.__new__


def _column(value: object, key: str) -> np.ndarray:
    """A msgpack array of numbers or a bin of float64 as a float64 vector."""
    if type(value) is bytes:
        if len(value) % 8:
            raise WireError("length_mismatch",
                            f"{key} is a bin of {len(value)} bytes, not a multiple of 8")
        return np.frombuffer(value, _F8)
    kinds = set(map(type, value))  # type: ignore[arg-type]
    if not kinds <= _NUMBER_TYPES:
        bad = next(v for v in value if type(v) not in _NUMBER_TYPES)  # type: ignore[union-attr]
        raise WireError("bad_value", f"{key} holds {show(bad)}, not a number")
    return np.array(value, dtype=np.float64)


def _per_row(body: dict, key: str, n: int) -> np.ndarray | None:
    """The optional ``weight`` or ``time`` entry as a vector of n."""
    value = body.get(key)
    if value is None:
        return None
    kind = type(value)
    if kind in _NUMBER_TYPES:
        # np.full costs about twice np.array for the usual single row.
        return np.array((value,), dtype=np.float64) if n == 1 else np.full(n, float(value))
    if kind in _ARRAY_TYPES:
        column = _column(value, key)
        if column.shape[0] != n:
            raise WireError("length_mismatch",
                            f"{key} holds {column.shape[0]} entries for {n} rows")
        return column
    raise WireError("bad_value", f"{key} is {show(value)}, not a number or array")


def decode(body: bytes, fields: tuple[str, ...], *, max_bytes: int, max_rows: int) -> Decoded:
    """Decode one message body for a stream with the given fields.

    Parameters
    ----------
    body : bytes
        The second frame of a message.
    fields : tuple of str
        The stream's fields, in the column order wanted.
    max_bytes : int
        Longest accepted body; checked before unpacking.
    max_rows : int
        Most rows accepted in one message; also bounds every msgpack array.

    Returns
    -------
    Decoded

    Raises
    ------
    WireError
        With ``reason`` one of :data:`REASONS`.

    Notes
    -----
    O(len(body)). A single observation sent as a map of numbers takes a short
    path with no per-field array work. A bin batch is read in place with
    ``np.frombuffer``: zero copies for a one-field stream, one
    copy into an (n, d) array for d > 1 (the (n, d) rows must be contiguous).

    Examples
    --------
    >>> d = decode(encode({"ms": 12.5}), ("ms",), max_bytes=1024, max_rows=10)
    >>> d.values.tolist(), d.weights
    ([[12.5]], None)
    """
    return _reader(tuple(fields), max_bytes, max_rows).decode(body)


class MsgpackError(ValueError):
    """Bytes that are not one msgpack object within the limits of :func:`unpack_bounded`.

    ``kind`` names the unpacker's exception type; ``array_claim`` is the length an
    over-long array header claimed, or None.
    """

    def __init__(self, detail: str, kind: str, array_claim: int | None = None) -> None:
        super().__init__(detail)
        self.kind = kind
        self.array_claim = array_claim


def unpack_bounded(data: bytes, *, max_array: int | None = None, strict_map_key: bool = True,
                   use_list: bool = True, max_depth: int | None = None) -> object:
    """Unpack one msgpack object with every length limit derived from ``len(data)``.

    No string, bin, array or map may claim more items than the data has bytes
    (an array also at most ``max_array``), and ext types are refused, so a header
    that claims gigabytes fails at the header, before anything is allocated.
    Strings must be UTF-8; map keys must be strings (or bytes) unless
    ``strict_map_key`` is False. msgpack's unpacker nests at most 1,024 levels,
    on a fixed stack of its own (no recursion); ``max_depth`` refuses an object
    nested deeper than that many levels, checked without recursion, for callers
    whose readers walk the whole object. Raises :class:`MsgpackError`.
    O(len(data)).
    """
    size = len(data)
    arrays = size if max_array is None else min(size, max_array)
    try:
        obj = msgpack.unpackb(data, raw=False, use_list=use_list,
                              strict_map_key=strict_map_key, max_str_len=size,
                              max_bin_len=size, max_ext_len=0, max_array_len=arrays,
                              max_map_len=size // 2)
    except (ValueError, TypeError, msgpack.UnpackException) as exc:
        claim = _ARRAY_CLAIM.match(str(exc))
        raise MsgpackError(_cut(str(exc)), type(exc).__name__,
                           int(claim.group(1)) if claim else None) from None
    if max_depth is not None and not _nested_within(obj, max_depth):
        raise MsgpackError(f"nested deeper than {max_depth} levels", "TooDeep")
    return obj


_CONTAINERS = (list, tuple, dict)


def _nested_within(obj: object, limit: int) -> bool:
    """Whether no array or map in ``obj`` lies more than ``limit`` levels deep (the
    object itself is level 1). Iterative. O(items)."""
    if type(obj) not in _CONTAINERS:
        return True
    stack = [(obj, 1)]
    while stack:
        item, level = stack.pop()
        if level > limit:
            return False
        for v in (item.values() if type(item) is dict else item):  # type: ignore[union-attr]
            if type(v) in _CONTAINERS:
                stack.append((v, level + 1))
    return True


def unpack(body: bytes, *, max_bytes: int, max_rows: int) -> dict:
    """Unpack a body into its top-level map, bounded by its own length and ``max_rows``.

    Raises WireError ``too_large``, ``too_many_rows``, ``not_msgpack`` or
    ``not_a_map``. O(len(body)).
    """
    size = len(body)
    if size > max_bytes:
        raise WireError("too_large", f"body of {size} bytes exceeds max_message_bytes {max_bytes}")
    try:
        msg = unpack_bounded(body, max_array=max_rows, use_list=False)
    except MsgpackError as exc:
        claim = exc.array_claim
        if claim is not None and claim <= size:
            # The array would fit in the body, so it is a real array, just too long.
            raise WireError("too_many_rows",
                            f"an array of {claim} items exceeds max_batch_rows "
                            f"{max_rows}") from None
        raise WireError("not_msgpack",
                        f"body is not one msgpack object ({_cut(str(exc))})") from None
    if type(msg) is not dict:
        raise WireError("not_a_map", f"body is a msgpack {type(msg).__name__}, not a map")
    return msg


class Single(NamedTuple):
    """One observation read by the typed decoder: ``row`` holds the stream's d fields
    as floats, in the stream's order; ``weight`` and ``time`` are floats or None.
    Row values, weight and time may still be non-finite (left for ``clean_batch``)."""

    row: tuple[float, ...]
    weight: float | None
    time: float | None
    source: str | None
    seq: int | None


_new_single = tuple.__new__
_astuple = msgspec.structs.astuple
_SourceText = Annotated[str, msgspec.Meta(min_length=1, max_length=MAX_SOURCE)]
_SeqNumber = Annotated[int, msgspec.Meta(ge=0)]
_CELLS = (float, memoryview)
_FLOAT = {float}
_VIEW = {memoryview}


def _message_struct(fields: tuple[str, ...]) -> type:
    """The struct of a body whose ``values`` holds the stream's fields, each a number
    or a bin (a one-field stream may give the bare value), with weight and time
    numbers or bins. No other key is allowed, in the body or in ``values``: a body
    that has one is left to the general decoder. Bins are decoded as views of the
    body (no copy)."""
    names = [f"f{i}" for i in range(len(fields))]
    cell = float | memoryview
    values = msgspec.defstruct("Values", [(n, cell) for n in names],
                               rename=dict(zip(names, fields, strict=True)),
                               forbid_unknown_fields=True, gc=False)
    return msgspec.defstruct("Message", [
        ("values", values | cell if len(fields) == 1 else values),
        ("weight", cell | None, None), ("time", cell | None, None),
        ("source", _SourceText | None, None), ("seq", _SeqNumber | None, None),
    ], forbid_unknown_fields=True, gc=False)


class Reader:
    """How a body becomes rows, for a stream with the given fields: the one place
    that decides it.

    Parameters
    ----------
    fields : tuple of str
        The stream's fields, in the column order wanted.
    max_bytes, max_rows : int
        As for :func:`decode`.

    Notes
    -----
    A typed msgspec decoder reads the usual bodies without building a dict: one
    observation (``values`` a map of numbers, scalar or absent weight and time)
    and a batch of bins (``values`` a map of bins of little-endian float64,
    weight and time bins or numbers). It accepts only bodies made of the five
    keys of wire format v1, ``values`` holding exactly the stream's fields, with
    a valid source and seq; for those the result equals the general decoder's.
    Every other body (unknown keys, arrays of numbers, nil, ext types, numbers
    mixed with bins, lengths that do not match, anything malformed) is read by
    the general decoder, :func:`unpack` then :func:`interpret`, which accepts it
    or raises the :class:`WireError` naming why not.
    """

    def __init__(self, fields: tuple[str, ...], *, max_bytes: int, max_rows: int) -> None:
        self.fields = tuple(fields)
        self.max_bytes, self.max_rows = max_bytes, max_rows
        self._typed = msgspec.msgpack.Decoder(_message_struct(self.fields)).decode

    def read(self, body: bytes) -> Single | Decoded:
        """A :class:`Single` for one observation read by the typed decoder, else a
        :class:`Decoded` of n rows. Raises WireError. O(len(body))."""
        if len(body) <= self.max_bytes:
            try:
                m = self._typed(body)
            except msgspec.DecodeError:
                pass
            else:
                values, weight, when, source = m.values, m.weight, m.time, m.source
                row = (values,) if type(values) in _CELLS else _astuple(values)
                kinds = set(map(type, row))
                if source is not None and not source.isprintable():
                    pass
                elif kinds == _FLOAT:
                    if type(weight) is not memoryview and type(when) is not memoryview:
                        # tuple.__new__ skips the NamedTuple's Python-level __new__
                        return _new_single(Single, (row, weight, when, source, m.seq))
                elif kinds == _VIEW:
                    batch = self._batch(row, weight, when, source, m.seq)
                    if batch is not None:
                        return batch
        return interpret(unpack(body, max_bytes=self.max_bytes, max_rows=self.max_rows),
                         self.fields, max_rows=self.max_rows)

    def _batch(self, columns: tuple, weight: object, when: object, source: str | None,
               seq: int | None) -> Decoded | None:
        """A batch of bins as rows; None when its lengths do not fit (the general
        decoder then judges it)."""
        size = len(columns[0])
        n = size >> 3
        if (not n or size & 7 or n > self.max_rows
                or (len(columns) > 1 and any(len(c) != size for c in columns))):
            return None
        per_row = []
        for value in (weight, when):
            if value is None or type(value) is float:
                per_row.append(None if value is None else np.full(n, value))
            elif len(value) == size:  # type: ignore[arg-type]
                per_row.append(np.frombuffer(value, _F8))  # type: ignore[call-overload]
            else:
                return None
        if len(columns) == 1:
            x = np.frombuffer(columns[0], _F8).reshape(-1, 1)
        else:
            x = np.empty((n, len(columns)))
            for j, column in enumerate(columns):
                x[:, j] = np.frombuffer(column, _F8)
        return _new_decoded(Decoded, (x, per_row[0], per_row[1], source, seq))

    def decode(self, body: bytes) -> Decoded:
        """:meth:`read` with a single observation given as arrays too (see :func:`decode`)."""
        out = self.read(body)
        if type(out) is Decoded:
            return out
        row, weight, when, source, seq = out
        return _new_decoded(Decoded, (
            np.array((row,), dtype=np.float64),
            None if weight is None else np.array((weight,), dtype=np.float64),
            None if when is None else np.array((when,), dtype=np.float64), source, seq))


@functools.lru_cache(maxsize=64)
def _reader(fields: tuple[str, ...], max_bytes: int, max_rows: int) -> Reader:
    return Reader(fields, max_bytes=max_bytes, max_rows=max_rows)


def origin(msg: dict) -> tuple[str | None, int | None]:
    """The optional ``(source, seq)`` of a message; raises ``bad_source`` / ``bad_seq``."""
    source = msg.get("source")
    if source is not None and not (type(source) is str and 0 < len(source) <= MAX_SOURCE
                                   and source.isprintable()):
        raise WireError("bad_source", f"source {show(source)} is not a printable string of "
                        f"1 to {MAX_SOURCE} characters")
    seq = msg.get("seq")
    if seq is not None and not (type(seq) is int and 0 <= seq < _SEQ_LIMIT):
        raise WireError("bad_seq", f"seq {show(seq)} is not an integer in [0, 2**64)")
    return source, seq


def interpret(msg: dict, fields: tuple[str, ...], *, max_rows: int) -> Decoded:
    """Read an unpacked body (see :func:`decode`). O(n d)."""
    values = msg.get("values")
    if values is None:
        raise WireError("no_values", "body has no 'values' key")

    kind = type(values)
    if kind is dict:
        try:
            row = tuple(map(values.__getitem__, fields))
        except KeyError as exc:
            raise WireError("missing_field", f"values has no field {exc.args[0]!r} (has "
                            f"{[_cut(k, 30) for k in sorted(map(str, values))[:8]]})") from None
        first = type(row[0])
        # Short path for the common single observation: one type test per field.
        if (first is float or first is int) and (
                len(row) == 1 or set(map(type, row)) <= _NUMBER_TYPES):
            x = np.array((row,), dtype=np.float64)
        elif set(map(type, row)) <= _ARRAY_TYPES:
            columns = [_column(v, f"values.{f}") for v, f in zip(row, fields, strict=True)]
            n = columns[0].shape[0]
            for column, f in zip(columns, fields, strict=True):
                if column.shape[0] != n:
                    raise WireError("length_mismatch", f"values.{f} has {column.shape[0]} "
                                    f"rows, values.{fields[0]} has {n}")
            if len(columns) == 1:
                x = columns[0].reshape(-1, 1)
            else:
                # filling an empty (n, d) array column by column beats np.column_stack
                x = np.empty((n, len(columns)))
                for j, column in enumerate(columns):
                    x[:, j] = column
        else:
            bad = [f for v, f in zip(row, fields, strict=True)
                   if type(v) not in _NUMBER_TYPES and type(v) not in _ARRAY_TYPES]
            if not bad:
                raise WireError("length_mismatch", "values mixes single numbers and arrays; "
                                "a batch needs an array for every field")
            raise WireError("bad_value", f"values.{bad[0]} is "
                            f"{show(values[bad[0]])}, not a number or array")
    elif len(fields) != 1:
        raise WireError("bad_value", f"values is a bare {kind.__name__}, allowed only for a "
                        f"one-field stream (this one has {len(fields)}: a map is needed)")
    elif kind in _NUMBER_TYPES:
        x = np.array(((values,),), dtype=np.float64)
    elif kind in _ARRAY_TYPES:
        x = _column(values, "values").reshape(-1, 1)
    else:
        raise WireError("bad_value", f"values is {show(values)}, "
                        "not a number, array or map")

    n = x.shape[0]
    if n > max_rows:
        raise WireError("too_many_rows", f"{n} rows exceed max_batch_rows {max_rows}")
    weights = _per_row(msg, "weight", n)
    times = _per_row(msg, "time", n)

    source, seq = origin(msg)
    # tuple.__new__ skips the NamedTuple's Python-level __new__ (about 200 ns a message).
    return _new_decoded(Decoded, (x, weights, times, source, seq))


def _pack_array(value: object, binary: bool) -> bytes | list[float]:
    a = np.asarray(value, dtype=np.float64)
    if a.ndim != 1:
        raise ValueError(f"an array to send must be one-dimensional, got shape {a.shape}")
    return a.astype(_F8, copy=False).tobytes() if binary else a.tolist()


def _pack(value: object, binary: bool) -> float | bytes | list[float]:
    if value is None or isinstance(value, (bool, str, bytes)):
        raise TypeError(f"cannot send {type(value).__name__} {value!r} as a number")
    if isinstance(value, (int, float, np.integer, np.floating)):
        return float(value)
    return _pack_array(value, binary)


def encode(values: object, *, weight: object = None, time: object = None,
           source: str | None = None, seq: int | None = None, binary: bool = True) -> bytes:
    """Build a message body (the producer side of :func:`decode`).

    Parameters
    ----------
    values : number, array-like or mapping of field -> number or array-like
        A number or a 1-D array is the shorthand for a one-field stream.
    weight, time : number or array-like, optional
    source : str, optional
    seq : int, optional
    binary : bool
        Send arrays as bin of little-endian float64 (compact, decoded without
        copies) rather than msgpack arrays of floats.

    Returns
    -------
    bytes

    Raises
    ------
    TypeError, ValueError
        On a bool, a non-numeric value or an array that is not 1-D.

    Notes
    -----
    O(n d). Lengths are not checked here; the receiver does.

    Examples
    --------
    >>> body = encode({"temp": [20.5, 21.0], "rh": [40.0, 41.0]}, seq=7)
    >>> d = decode(body, ("temp", "rh"), max_bytes=1024, max_rows=10)
    >>> d.values.tolist(), d.seq
    ([[20.5, 40.0], [21.0, 41.0]], 7)
    """
    if isinstance(values, Mapping):
        packed: object = {str(k): _pack(v, binary) for k, v in values.items()}
    else:
        packed = _pack(values, binary)
    msg: dict[str, object] = {"values": packed}
    if weight is not None:
        msg["weight"] = _pack(weight, binary)
    if time is not None:
        msg["time"] = _pack(time, binary)
    if source is not None:
        msg["source"] = source
    if seq is not None:
        msg["seq"] = int(seq)
    return msgpack.packb(msg, use_bin_type=True)
