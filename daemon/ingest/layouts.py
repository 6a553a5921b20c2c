"""Byte layouts of recurring single-observation messages, read many at a time with numpy.

A producer sends the same shape of message again and again: the same keys in
the same order, the same number encodings; only the numbers change. Between
two such bodies of one topic and one length, every byte that is not part of a
number is equal. A :class:`Layout` records those bytes and where each number
sits (a *slot*: offset and msgpack type). :class:`LayoutTable` keeps one
layout per (topic, body length); :meth:`LayoutTable.read` checks a whole
drain's bodies of one length against their layouts in a few numpy operations
and pulls every slot out at once, so a single observation costs no msgpack
call and no Python bytecode of its own.

A layout is learnt only from a body that the stream's
:class:`~sigmad.daemon.ingest.wire.Reader` reads as one observation of plain
numbers (a ``Single``) and that :func:`learn` also reads so, and reading a body
that fits a layout gives exactly the values, weight, time, source and seq that
the reader gives: anything else (batches, booleans, a negative seq, a map key
the general decoder refuses, an ext type, extra bytes) is simply not learnt and
is read message by message, which judges it. A fixint (an integer from -32 to 127, held in its type
byte) is a slot too: its layout asks only for the type bits. ``tests/test_layouts.py``
checks that equivalence on fuzzed bodies.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import repeat

import numpy as np
from sigmad.daemon.ingest.wire import MAX_SOURCE

# Slot codes: how a number is encoded in a body (big-endian, after its type byte).
ABSENT, F8, F4, U1, U2, U4, U8, I1, I2, I4, I8, FIXPOS, FIXNEG = range(13)
_SLOT_TYPES = {0xCB: (F8, 8), 0xCA: (F4, 4), 0xCC: (U1, 1), 0xCD: (U2, 2), 0xCE: (U4, 4),
               0xCF: (U8, 8), 0xD0: (I1, 1), 0xD1: (I2, 2), 0xD2: (I4, 4), 0xD3: (I8, 8)}
# A fixint is its own type byte: FIXPOS 0x00-0x7f (the slot starts at the type byte,
# whose top bit must be 0), FIXNEG 0xe0-0xff (top three bits 1).
_FIXINT_MASK = {FIXPOS: (0x80, 0x00), FIXNEG: (0xE0, 0xE0)}   # code -> (mask, bits)
_UNSIGNED = (U1, U2, U4, U8, FIXPOS)
_WIDTH = {F8: 8, F4: 4, U1: 1, U2: 2, U4: 4, U8: 8, I1: 1, I2: 2, I4: 4, I8: 8, FIXPOS: 1,
          FIXNEG: 1}
_SIGNED_VIEW = {I1: np.int8, I2: np.int16, I4: np.int32, I8: np.int64, FIXNEG: np.int8}
_UNSIGNED_VIEW = {I1: np.uint8, I2: np.uint16, I4: np.uint32, I8: np.uint64,
                  FIXNEG: np.uint8}
_MAX_DEPTH = 32          # nesting accepted inside ignored keys
# layouts kept (one per topic and body length: enough for 100,000 quiet series of one
# shape); a full table keeps only those used since it last filled
_TABLE_LIMIT = 1 << 17
_TABLE_BYTES = 32 << 20  # ... or bytes of layouts (each keeps its fixed bytes and mask)


class _NotLearnt(Exception):
    """The body is not a plain single observation: leave it to the general decoder."""


@dataclass(frozen=True, slots=True)
class Layout:
    """The fixed bytes of a body and where its numbers sit.

    ``slots`` holds one ``(offset, code)`` per role: the stream's fields in
    order, then weight, time and seq. ``offset`` is where the number's payload
    starts (after its type byte; at the type byte itself for a fixint);
    ``code`` is one of the slot codes above, ``ABSENT`` for a weight, time or
    seq the body does not carry.
    """

    fixed: bytes          # the body with every slot payload zeroed
    mask: bytes           # the bits of each byte that must equal ``fixed``
    slots: tuple[tuple[int, int], ...]
    source: str | None


# ------------------------------------------------------------------ learning
def _length(buf: bytes, p: int, size: int) -> tuple[int, int]:
    """A big-endian length of ``size`` bytes at p, and where its data starts."""
    if p + size > len(buf):
        raise _NotLearnt
    return int.from_bytes(buf[p:p + size], "big"), p + size


def _text(buf: bytes, p: int) -> tuple[str, int]:
    """A msgpack str at p (it must be valid UTF-8, as the general decoder asks)."""
    b = buf[p] if p < len(buf) else 0xC1
    if 0xA0 <= b <= 0xBF:
        n, start = b & 0x1F, p + 1
    elif 0xD9 <= b <= 0xDB:
        n, start = _length(buf, p + 1, 1 << (b - 0xD9))
    else:
        raise _NotLearnt
    end = start + n
    if end > len(buf):
        raise _NotLearnt
    try:
        return buf[start:end].decode("utf-8"), end
    except UnicodeDecodeError:
        raise _NotLearnt from None


def _map_header(buf: bytes, p: int) -> tuple[int, int]:
    b = buf[p] if p < len(buf) else 0xC1
    if 0x80 <= b <= 0x8F:
        return b & 0x0F, p + 1
    if b == 0xDE:
        return _length(buf, p + 1, 2)
    if b == 0xDF:
        return _length(buf, p + 1, 4)
    raise _NotLearnt


def _skip(buf: bytes, p: int, max_rows: int, depth: int = 0) -> int:
    """The end of the msgpack object at p; refuses what the general decoder refuses."""
    if p >= len(buf) or depth > _MAX_DEPTH:
        raise _NotLearnt
    b = buf[p]
    if b <= 0x7F or b >= 0xE0 or b in (0xC0, 0xC2, 0xC3):
        return p + 1
    if b in _SLOT_TYPES:
        return p + 1 + _SLOT_TYPES[b][1]
    if 0xA0 <= b <= 0xBF or 0xD9 <= b <= 0xDB:
        return _text(buf, p)[1]
    if 0xC4 <= b <= 0xC6:
        n, start = _length(buf, p + 1, 1 << (b - 0xC4))
        return start + n
    if 0x80 <= b <= 0x8F or b in (0xDE, 0xDF):
        n, q = _map_header(buf, p)
        for _ in range(n):
            _, q = _text(buf, q)     # the general decoder's strict keys: text only here
            q = _skip(buf, q, max_rows, depth + 1)
        return q
    if 0x90 <= b <= 0x9F or b in (0xDC, 0xDD):
        n, q = (b & 0x0F, p + 1) if b <= 0x9F else _length(buf, p + 1, 2 if b == 0xDC else 4)
        if n > max_rows:
            raise _NotLearnt
        for _ in range(n):
            q = _skip(buf, q, max_rows, depth + 1)
        return q
    raise _NotLearnt   # 0xc1 and the ext types


def _number(buf: bytes, p: int) -> tuple[tuple[int, int], int]:
    """A slot for the number at p (a typed payload or a fixint) and where it ends."""
    b = buf[p] if p < len(buf) else 0xC1
    if b in _SLOT_TYPES:
        code, width = _SLOT_TYPES[b]
        if p + 1 + width > len(buf):
            raise _NotLearnt
        return (p + 1, code), p + 1 + width
    if b <= 0x7F:
        return (p, FIXPOS), p + 1
    if b >= 0xE0:
        return (p, FIXNEG), p + 1
    raise _NotLearnt


def _origin_or_other(body: bytes, p: int, key: str,
                     max_rows: int) -> tuple[tuple[int, int] | str | None, int]:
    """The value of a top-level key other than values, weight and time, and where it
    ends: seq as a slot (an unsigned integer), source as its string (valid as a
    source), None for nil or for any other key (skipped, kept as fixed bytes)."""
    if key not in ("seq", "source") or (p < len(body) and body[p] == 0xC0):
        return None, _skip(body, p, max_rows)
    if key == "seq":
        slot, p = _number(body, p)
        if slot[1] not in _UNSIGNED:
            raise _NotLearnt
        return slot, p
    source, p = _text(body, p)
    if not (0 < len(source) <= MAX_SOURCE and source.isprintable()):
        raise _NotLearnt
    return source, p


def learn(body: bytes, fields: tuple[str, ...], max_rows: int) -> Layout | None:
    """The layout of ``body`` for a stream with ``fields``, or None when the body is not
    one observation of plain numbers (the general decoder then reads or rejects it).

    Values, weight and time must be numbers (floats or integers; not booleans);
    seq a non-negative integer; source a valid source string. O(len(body)).

    >>> from sigmad.daemon.ingest.wire import encode
    >>> lay = learn(encode({"ms": 12.5}, source="a", seq=300), ("ms",), 10)
    >>> [code for _, code in lay.slots], lay.source     # ms: float64, seq: uint16
    ([1, 0, 0, 4], 'a')
    """
    try:
        return _learn(body, fields, max_rows)
    except (_NotLearnt, IndexError):
        return None


def _learn(body: bytes, fields: tuple[str, ...], max_rows: int) -> Layout | None:
    absent = (0, ABSENT)
    found: dict[str, object] = {}
    count, p = _map_header(body, 0)
    for _ in range(count):
        key, p = _text(body, p)
        if key in found:
            raise _NotLearnt   # a repeated key: leave the general decoder to judge
        if key == "values":
            if p < len(body) and (0x80 <= body[p] <= 0x8F or body[p] in (0xDE, 0xDF)):
                inner: dict[str, tuple[int, int]] = {}
                n, p = _map_header(body, p)
                for _ in range(n):
                    name, p = _text(body, p)
                    if name in inner:
                        raise _NotLearnt
                    if name in fields:
                        inner[name], p = _number(body, p)
                    else:
                        inner[name] = absent
                        p = _skip(body, p, max_rows)
                if not set(fields) <= inner.keys():
                    raise _NotLearnt
                found[key] = tuple(inner[f] for f in fields)
            elif len(fields) == 1:
                slot, p = _number(body, p)
                found[key] = (slot,)
            else:
                raise _NotLearnt
        elif key in ("weight", "time"):
            if p < len(body) and body[p] == 0xC0:
                found[key], p = absent, p + 1
            else:
                found[key], p = _number(body, p)
        else:
            found[key], p = _origin_or_other(body, p, key, max_rows)
    if p != len(body) or "values" not in found:
        raise _NotLearnt
    slots = (*found["values"], found.get("weight", absent), found.get("time", absent),
             found.get("seq") or absent)
    mask = bytearray(b"\xff" * len(body))
    fixed = bytearray(body)
    for offset, code in slots:
        if code in _FIXINT_MASK:
            mask[offset], fixed[offset] = _FIXINT_MASK[code]
        elif code != ABSENT:
            width = _WIDTH[code]
            mask[offset:offset + width] = bytes(width)
            fixed[offset:offset + width] = bytes(width)
    return Layout(bytes(fixed), bytes(mask), slots, found.get("source"))  # type: ignore[arg-type]


# ------------------------------------------------------------------- reading
class Readout:
    """What :meth:`LayoutTable.read` found in bodies of one length.

    ``ok[i]`` says body i fits its layout. For those: ``values[i, :d]`` are its
    fields; ``weight``/``time`` are NaN where absent (``has_weight``/``has_time``
    tell absent from a NaN that was sent); ``seq`` is 0 where absent
    (``has_seq``); ``route``/``source`` index :attr:`LayoutTable.routes` and
    :attr:`LayoutTable.sources` (-1: no source).
    """

    __slots__ = ("ok", "values", "weight", "has_weight", "time", "has_time", "seq",
                 "has_seq", "route", "source")

    def __init__(self, **parts: np.ndarray) -> None:
        for name, value in parts.items():
            setattr(self, name, value)


def _decode(raw: np.ndarray, code: np.ndarray) -> np.ndarray:
    """Numbers from left-aligned payload words ``raw`` (native uint64) by slot code."""
    out = np.empty(raw.shape[0])
    uniform = bool((code == code[0]).all())
    for c in (int(code[0]),) if uniform else runs(code)[1].tolist():
        sel = slice(None) if uniform else code == c
        r = raw[sel]
        if c == F8:
            out[sel] = r.view(np.float64)
        elif c == F4:   # a signalling NaN sent as float32 warns as it widens; the
            # screening rejects it as not finite, named, like any other NaN
            with np.errstate(invalid="ignore"):
                out[sel] = (r >> np.uint64(32)).astype(np.uint32).view(np.float32)
        elif c in _UNSIGNED:
            out[sel] = r >> np.uint64(64 - 8 * _WIDTH[c])
        elif c in _SIGNED_VIEW:
            shifted = (r >> np.uint64(64 - 8 * _WIDTH[c])).astype(_UNSIGNED_VIEW[c])
            out[sel] = shifted.view(_SIGNED_VIEW[c])
        else:   # ABSENT: NaN, told apart from a sent NaN by the caller
            out[sel] = np.nan
    return out


def runs(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Group equal ``keys`` keeping arrival order: ``(order, ids, starts, counts)`` such
    that ``order[starts[k]:starts[k] + counts[k]]`` are the positions of ``ids[k]`` in
    arrival order, the groups listed by their first arrival. O(n log n); O(n) when all
    keys are equal.
    """
    n = keys.shape[0]
    if n and (keys == keys[0]).all():
        return np.arange(n), keys[:1], np.zeros(1, np.intp), np.array([n])
    order = np.argsort(keys, kind="stable")
    sorted_keys = keys[order]
    starts = np.flatnonzero(np.r_[True, sorted_keys[1:] != sorted_keys[:-1]])
    counts = np.diff(np.r_[starts, n])
    by_arrival = np.argsort(order[starts], kind="stable")    # groups by first arrival
    rank = np.empty_like(by_arrival)
    rank[by_arrival] = np.arange(by_arrival.shape[0])
    group_of = np.cumsum(np.r_[True, sorted_keys[1:] != sorted_keys[:-1]]) - 1
    new_order = order[np.argsort(rank[group_of], kind="stable")]
    counts = counts[by_arrival]
    return new_order, sorted_keys[starts][by_arrival], np.cumsum(counts) - counts, counts


class _Group:
    """Every layout of one body length, stacked for numpy (capacity doubles)."""

    _ARRAYS = ("fixed", "mask", "offset", "code", "route", "source")

    def __init__(self, length: int, roles: int) -> None:
        self.n = 0
        self.fixed = np.zeros((4, length), np.uint8)
        self.mask = np.zeros((4, length), np.uint8)
        self.offset = np.zeros((4, roles), np.intp)
        self.code = np.zeros((4, roles), np.intp)
        self.route = np.zeros(4, np.intp)
        self.source = np.zeros(4, np.intp)

    def add_block(self, layout: Layout, slots: tuple, routes: list[int], source: int) -> int:
        """Rows for ``layout`` once per route in ``routes``; returns the first. O(k)."""
        k = len(routes)
        if self.n + k > self.route.shape[0]:
            cap = max(2 * self.route.shape[0], self.n + k)
            for name in self._ARRAYS:
                old = getattr(self, name)
                new = np.zeros((cap, *old.shape[1:]), old.dtype)
                new[:self.n] = old[:self.n]
                setattr(self, name, new)
        i, j = self.n, self.n + k
        self.fixed[i:j] = np.frombuffer(layout.fixed, np.uint8)
        self.mask[i:j] = np.frombuffer(layout.mask, np.uint8)
        offset, code = zip(*slots, strict=True)
        self.offset[i:j], self.code[i:j] = offset, code
        self.route[i:j], self.source[i:j] = routes, source
        self.n = j
        return i


class LayoutTable:
    """Layouts by (topic, body length), and the numpy reader of bodies that fit them.

    Parameters
    ----------
    width : int
        The most fields any stream has (the width of ``Readout.values``).

    Attributes
    ----------
    routes : list
        What :meth:`add` was given as each layout's route, by ``Readout.route``.
    sources : list of str
        Source strings by ``Readout.source``.
    """

    def __init__(self, width: int) -> None:
        self.width = width
        self.routes: list = []
        self.sources: list[str] = []
        self._groups: dict[int, _Group] = {}
        self._topic_ids: dict[bytes, int] = {}
        self._rows: dict[int, int] = {}     # topic id << 32 | length -> row in its group
        self._route_ids: dict = {}
        self._source_ids: dict[str, int] = {}
        self._keys = self._values = np.zeros(0, np.int64)   # _rows, sorted, for numpy
        self._bytes = 0                     # fixed bytes and masks kept, forgotten included
        # what each kept layout was added with, and whether it was found since the table
        # last filled: a full table keeps those (least recently used go first)
        self._added: dict[int, tuple[bytes, Layout, object]] = {}
        self._used: set[int] = set()        # keys found, from earlier sorted arrays
        self._hits = np.zeros(0, bool)      # found, beside the sorted keys (no Python per hit)

    def __len__(self) -> int:
        return len(self._rows)

    def add(self, topic: bytes, layout: Layout, route: object) -> None:
        """Keep ``layout`` for ``topic`` (replacing an older one of the same length).
        Amortised O(len(layout) + layouts kept), as the lookup arrays are rebuilt."""
        self.add_many([(topic, layout, route)])

    def add_many(self, items: list[tuple[bytes, Layout, object]]) -> None:
        """``add`` for many (topic, layout, route) at once: the items that share a layout
        (many topics of one shape) are written to their group's arrays together, and
        the lookup arrays are rebuilt once. A table that would overflow first keeps
        only the layouts used since it last filled; items beyond what it can hold then
        are not kept (their bodies are decoded the general way).
        O(items + sum of distinct layouts' lengths + layouts kept)."""
        need = len(items)
        size = sum(3 * len(layout.fixed) for _, layout, _ in items)
        if sum(g.n for g in self._groups.values()) + need > _TABLE_LIMIT \
                or self._bytes + size > _TABLE_BYTES:
            self._keep_used()
            room = _TABLE_LIMIT - sum(g.n for g in self._groups.values())
            items = items[:max(0, room)]
            while items and self._bytes + sum(3 * len(lay.fixed) for _, lay, _ in items) \
                    > _TABLE_BYTES:
                items = items[:len(items) // 2]
        shapes: dict[int, list] = {}
        for item in items:
            shapes.setdefault(id(item[1]), []).append(item)
        route_ids, topic_ids, rows, added = self._route_ids, self._topic_ids, self._rows, \
            self._added
        for same in shapes.values():
            layout = same[0][1]
            length = len(layout.fixed)
            self._bytes += 3 * length * len(same)   # fixed bytes, mask, the Layout to re-add
            group = self._groups.get(length)
            if group is None:
                group = self._groups[length] = _Group(length, self.width + 3)
            d = len(layout.slots) - 3
            # field slots first, padded with ABSENT to the widest stream, then weight,
            # time, seq
            slots = layout.slots[:d] + ((0, ABSENT),) * (self.width - d) + layout.slots[d:]
            source_id = -1
            if layout.source is not None:
                source_id = self._source_ids.setdefault(layout.source, len(self.sources))
                if source_id == len(self.sources):
                    self.sources.append(layout.source)
            routes = []
            for _, _, route in same:
                route_id = route_ids.setdefault(route, len(self.routes))
                if route_id == len(self.routes):
                    self.routes.append(route)
                routes.append(route_id)
            first = group.add_block(layout, slots, routes, source_id)
            for k, (topic, _, route) in enumerate(same):
                key = topic_ids.setdefault(topic, len(topic_ids)) << 32 | length
                rows[key] = first + k
                added[key] = (topic, layout, route)
        self._stale()

    def _keep_used(self) -> None:
        """Start the table afresh with only the layouts found since it last filled (all
        of them dropped when those alone would fill it). O(layouts kept)."""
        self._fold_hits()
        kept = [self._added[k] for k in self._used if k in self._rows]
        self.__init__(self.width)    # type: ignore[misc]
        if kept and sum(3 * len(layout.fixed) for _, layout, _ in kept) * 2 <= _TABLE_BYTES \
                and len(kept) * 2 <= _TABLE_LIMIT:
            self.add_many(kept)

    def forget(self, topic: bytes, length: int) -> None:
        """Drop the layout of ``topic`` at ``length`` (the next body of it is learnt anew)."""
        topic_id = self._topic_ids.get(topic)
        if topic_id is not None and self._rows.pop(topic_id << 32 | length, None) is not None:
            self._added.pop(topic_id << 32 | length, None)
            self._stale()

    def _fold_hits(self) -> None:
        if self._keys is not None and self._hits.any():
            self._used.update(self._keys[self._hits].tolist())
            self._hits[:] = False

    def _stale(self) -> None:
        """The sorted arrays no longer match the kept layouts: keep what they found."""
        self._fold_hits()
        self._keys = None

    def find(self, topics: tuple[bytes, ...], lengths: np.ndarray) -> np.ndarray:
        """Each message's layout row in its length's group, -1 for none. O(n log L)."""
        if self._keys is None:
            keys = np.fromiter(self._rows, np.int64, len(self._rows))
            order = np.argsort(keys)
            self._keys = keys[order]
            self._values = np.fromiter(self._rows.values(), np.int64, len(self._rows))[order]
            self._hits = np.zeros(self._keys.size, bool)
        if not self._keys.size:
            return np.full(lengths.shape[0], -1, np.int64)
        ids = np.fromiter(map(self._topic_ids.get, topics, repeat(-1)), np.int64, len(topics))
        code = ids << 32 | lengths
        at = np.minimum(np.searchsorted(self._keys, code), self._keys.size - 1)
        hit = (self._keys[at] == code) & (ids >= 0)
        self._hits[at[hit]] = True
        return np.where(hit, self._values[at], -1)

    def read(self, length: int, rows: np.ndarray, bodies: list[bytes]) -> Readout:
        """Check ``bodies`` (each ``length`` bytes, with layout rows ``rows`` of that
        length's group) against their layouts and read every slot.

        O(total bytes) in a fixed number of numpy operations: no Python per body.
        """
        g = self._groups[length]
        m = len(bodies)
        raw = np.frombuffer(b"".join(bodies), np.uint8).reshape(m, length)
        ok = ~((raw ^ g.fixed[rows]) & g.mask[rows]).any(axis=1)
        # each payload left-aligned in a big-endian 8-byte word: pad bodies with 8 zeros
        stride = length + 8
        padded = np.zeros((m, stride), np.uint8)
        padded[:, :length] = raw
        offset, code = g.offset[rows], g.code[rows]

        def words(role: int) -> np.ndarray:
            at = offset[:, role]
            if (at == at[0]).all():
                chosen = padded[:, at[0]:at[0] + 8]
            else:
                chosen = padded.ravel()[(np.arange(m) * stride + at)[:, None] + _EIGHT]
            return np.ascontiguousarray(chosen).view(">u8").ravel().astype(np.uint64)

        def number(role: int) -> tuple[np.ndarray, np.ndarray]:
            c = code[:, role]
            has = c != ABSENT
            if not has.any():
                return np.full(m, np.nan), has
            return _decode(words(role), c), has

        w = self.width
        values = np.empty((m, w))
        for r in range(w):
            values[:, r] = number(r)[0]
        weight, has_weight = number(w)
        when, has_time = number(w + 1)
        has_seq = code[:, w + 2] != ABSENT
        seq = np.zeros(m, np.uint64)
        if has_seq.any():
            seq = np.where(has_seq, words(w + 2) >> _SHIFT[code[:, w + 2]], np.uint64(0))
        return Readout(ok=ok, values=values, weight=weight, has_weight=has_weight,
                       time=when, has_time=has_time, seq=seq, has_seq=has_seq,
                       route=g.route[rows], source=g.source[rows])


_EIGHT = np.arange(8)
# right shifts that turn a left-aligned payload word into its unsigned value, by code
_SHIFT = np.array([0] + [64 - 8 * _WIDTH[c] for c in range(F8, FIXNEG + 1)], np.uint64)
