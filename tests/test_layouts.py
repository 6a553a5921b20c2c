"""Byte layouts: single observations read many at a time must read exactly as msgpack does.

Two references: ``msgpack.unpackb`` (the msgpack project's own Python
implementation of the open msgpack specification) for what a body holds, and
``Engine.ingest`` fed one message at a time (the general path, itself checked
against numpy in test_engine / test_daemon_e2e) for what the engine makes of
it: rows, rejections by reason, sequence gaps and series created.
"""

from __future__ import annotations

import math
import struct
import warnings

import msgpack
import numpy as np
import pytest
import sigmad.daemon.engine.engine as engine_module
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.ingest.layouts import LayoutTable, learn, runs
from sigmad.daemon.ingest.wire import encode
from test_hostile import CONFIG as HOSTILE_CONFIG

# the hostile-input tests' streams (one field, a regression pair, a count-forgetting
# mixture), with a series limit on the one-field stream
CONFIG = HOSTILE_CONFIG.replace("outlier_warmup = 2\n", "outlier_warmup = 2\nmax_series = 3\n")
assert "max_series = 3" in CONFIG
NOW = 1.7e9


def _read_one(body: bytes, fields: tuple[str, ...]):
    layout = learn(body, fields, 64)
    assert layout is not None
    table = LayoutTable(len(fields))
    table.add(b"t", layout, "route")
    return table.read(len(body), np.array([0]), [body])


def _packed(obj: dict, **kw) -> bytes:
    return msgpack.packb(obj, use_bin_type=True, **kw)


# every number encoding msgpack has for a value, built byte by byte from the spec's
# type bytes (0xca float32 ... 0xd3 int64, big-endian payloads; fixints 0x00-0x7f
# and 0xe0-0xff hold the value in the type byte)
ENCODED_NUMBERS = [
    (b"\xcb" + struct.pack(">d", -12.625), -12.625),
    (b"\xca" + struct.pack(">f", 3.5), 3.5),
    (b"\xcc\xfe", 254.0), (b"\xcd\xff\xfe", 65534.0), (b"\xce\xff\xff\xff\xfe", 4294967294.0),
    (b"\xcf\xff\xff\xff\xff\xff\xff\xff\xff", float(2**64 - 1)),
    (b"\xd0\x80", -128.0), (b"\xd1\x80\x00", -32768.0), (b"\xd2\x80\x00\x00\x00", -2.0**31),
    (b"\xd3\x80\x00\x00\x00\x00\x00\x00\x00", -2.0**63),
    (b"\xcb" + struct.pack(">d", math.inf), math.inf),
    (b"\x00", 0.0), (b"\x05", 5.0), (b"\x7f", 127.0), (b"\xe0", -32.0), (b"\xff", -1.0),
]


@pytest.mark.parametrize("encoded,expected", ENCODED_NUMBERS)
def test_every_typed_number_reads_as_msgpack_reads_it(encoded, expected):
    body = b"\x81\xa6values\x81\xa1v" + encoded
    # the reference reading, made float64 as the general path makes it (np.array)
    assert np.array([msgpack.unpackb(body)["values"]["v"]], dtype=np.float64)[0] == expected
    r = _read_one(body, ("v",))
    assert r.ok.tolist() == [True] and r.values[0, 0] == expected


@pytest.mark.parametrize("bits", ["7f800001", "ffbfffff", "7fc00000"],
                         ids=["signalling", "signalling-negative", "quiet"])
def test_a_float32_nan_reads_as_nan_without_a_warning(bits):
    # a NaN sent as float32 (IEEE 754 bit patterns: exponent all ones, a non-zero
    # fraction; the top fraction bit clear marks it signalling): NaN, as msgpack reads
    # it, for the screening to reject by name; widening it must not warn at the bench
    body = b"\x81\xa6values\x81\xa1v\xca" + bytes.fromhex(bits)
    assert math.isnan(msgpack.unpackb(body)["values"]["v"])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        r = _read_one(body, ("v",))
    assert r.ok.tolist() == [True] and math.isnan(r.values[0, 0])


def test_weight_time_source_and_seq_read_as_msgpack_reads_them():
    cases = [
        {"values": {"v": 1.5, "w": "ignored"}, "weight": 3, "time": NOW, "source": "s1",
         "seq": 200},
        {"seq": 70_000, "values": 2.5, "weight": None, "time": -1, "source": "s2"},
        {"extra": [1, {"k": b"\x00"}, True], "values": {"v": -0.0}, "seq": 2**40,
         "time": float("nan")},
        {"values": {"v": 4.0}, "weight": 0.5, "seq": 2**64 - 1},
        {"values": {"v": 7}, "weight": 2, "time": -5, "seq": 0},
        {"values": {"v": -3}, "seq": 127, "source": "s"},
    ]
    for obj in cases:
        body = _packed(obj)
        ref = msgpack.unpackb(body)
        r = _read_one(body, ("v",))
        values = ref["values"]
        v = values["v"] if isinstance(values, dict) else values
        assert r.ok[0] and (r.values[0, 0] == v or math.isnan(v) and math.isnan(r.values[0, 0]))
        assert bool(r.has_weight[0]) == (ref.get("weight") is not None)
        if ref.get("weight") is not None:
            assert r.weight[0] == ref["weight"]
        assert bool(r.has_time[0]) == (ref.get("time") is not None)
        if ref.get("time") is not None:
            assert r.time[0] == ref["time"] or math.isnan(ref["time"])
        assert bool(r.has_seq[0]) == ("seq" in ref) and int(r.seq[0]) == ref.get("seq", 0)
        table_source = learn(body, ("v",), 64).source
        assert table_source == ref.get("source")


def test_a_body_of_the_same_length_with_other_fixed_bytes_does_not_fit():
    body = encode({"v": 1.0}, source="aa", seq=300)
    other = encode({"v": 1.0}, source="ab", seq=300)
    layout = learn(body, ("v",), 64)
    table = LayoutTable(1)
    table.add(b"t", layout, "route")
    r = table.read(len(body), np.array([0, 0]), [body, other])
    assert r.ok.tolist() == [True, False]


def test_a_fixint_slot_fits_only_fixints_of_its_sign():
    # one-byte msgpack objects (the spec's type bytes): 0x05 and 0x7f positive fixints,
    # 0xe0 and 0xff negative fixints, 0xc0 nil, 0xc2 false, 0xc3 true, 0xc1 never used
    one_byte = [b"\x05", b"\x7f", b"\xe0", b"\xff", b"\xc0", b"\xc2", b"\xc3", b"\xc1"]
    bodies = [b"\x81\xa6values\x81\xa1v" + x for x in one_byte]
    for learnt_from, fits in ((b"\x05", [True, True, False, False, False, False, False, False]),
                              (b"\xff", [False, False, True, True, False, False, False, False])):
        layout = learn(b"\x81\xa6values\x81\xa1v" + learnt_from, ("v",), 64)
        table = LayoutTable(1)
        table.add(b"t", layout, "route")
        r = table.read(len(bodies[0]), np.zeros(len(bodies), np.intp), bodies)
        assert r.ok.tolist() == fits
        assert r.values[r.ok, 0].tolist() == [msgpack.unpackb(b)["values"]["v"]
                                              for b, f in zip(bodies, fits, strict=True) if f]


@pytest.mark.parametrize("body", [
    _packed({"values": {"v": True}}),                      # a bool is not a number here
    _packed({"values": {"v": None}}),
    _packed({"values": {"v": "1.0"}}),
    _packed({"values": {"w": 1.0}}),                       # the stream's field is missing
    _packed({"values": {"v": [1.0, 2.0]}}),                # a batch
    _packed({"values": {"v": 1.0}, "weight": True}),
    _packed({"values": {"v": 1.0}, "seq": -200}),          # a signed seq
    _packed({"values": {"v": 1.0}, "seq": -1}),            # a negative fixint seq
    _packed({"values": {"v": 1.0}, "seq": 1.5}),
    _packed({"values": {"v": 1.0}, "source": ""}),
    _packed({"values": {"v": 1.0}, "source": "a\x00b"}),
    _packed({"values": {"v": 1.0}, "source": "x" * 129}),
    _packed({"values": {"v": 1.0}, "source": 7}),
    _packed({"values": {"v": 1.0}, "extra": list(range(65))}),   # longer than max_rows
    _packed({"values": {"v": 1.0}, "extra": msgpack.ExtType(1, b"x")}),
    _packed({"values": {"v": 1.0}, "extra": {1: 2}}),   # an int key
    _packed({"values": {"v": 1.0}}) + b"\x00",             # trailing bytes
    b"\x82\xa6values\x81\xa1v\xcb" + bytes(8) + b"\xa6values\x81\xa1v\xcb" + bytes(8),  # twice
    b"\x81\xa6values\x82\xa1v\xcb" + bytes(8) + b"\xa1v\xcb" + bytes(8),  # a field twice
    b"\x82\xa6values\x81\xa1v\xcb" + bytes(8) + b"\xa2\xff\xfe\xc0",     # key not UTF-8
    b"\x81\xa6values\x81\xa1v\xc1",                         # 0xc1 is never used
    _packed([1.0]),
])
def test_bodies_that_are_not_one_plain_observation_teach_no_layout(body):
    assert learn(body, ("v",), 64) is None


def test_runs_groups_equal_keys_in_order_of_first_arrival():
    keys = np.array([5, 3, 5, 7, 3, 3, 9, 5])
    order, ids, starts, counts = runs(keys)
    assert ids.tolist() == [5, 3, 7, 9] and counts.tolist() == [3, 3, 1, 1]
    assert [order[s:s + c].tolist() for s, c in zip(starts, counts, strict=True)] == \
        [[0, 2, 7], [1, 4, 5], [3], [6]]


# ------------------------------------------------------ the engine: layouts == one by one
def _engine() -> Engine:
    return Engine(parse_config(CONFIG))


def _state(e: Engine) -> list[dict]:
    return sorted(e.export_state(), key=lambda d: (d["stream"], d["labels"]))


def _feed_both(drains: list[list[tuple[bytes, bytes]]]) -> tuple[Engine, Engine]:
    one, many = _engine(), _engine()
    for drain in drains:
        for topic, body in drain:
            one.ingest(topic, body, NOW)
        many.ingest_many([t for t, _ in drain], [b for _, b in drain], NOW)
        one.flush(NOW)
        many.flush(NOW)
    return one, many


def _assert_same(one: Engine, many: Engine) -> None:
    assert _state(many) == _state(one)
    assert many.rejected == one.rejected
    assert many.gaps == one.gaps and many._last_seq == one._last_seq
    assert many.messages == one.messages


number = st.one_of(st.floats(-1e6, 1e6), st.sampled_from([math.nan, math.inf, 0.0]),
                   st.integers(-2**40, 2**40))
single = st.fixed_dictionaries(
    {"values": st.one_of(number, st.fixed_dictionaries({"v": number}),
                         st.fixed_dictionaries({"x": number, "y": number}),
                         st.fixed_dictionaries({"x": number, "y": number, "v": number}))},
    optional={"weight": st.one_of(st.floats(0.1, 5.0), st.integers(0, 3), st.none(),
                                  st.just(math.nan)),
              "time": st.one_of(st.floats(NOW - 10, NOW + 10), st.just(NOW + 7200.0),
                                st.none()),
              "source": st.sampled_from(["p1", "p22", "p1", "", "\x01"]),
              "seq": st.one_of(st.integers(0, 400), st.integers(2**31, 2**31 + 3),
                               st.integers(2**60, 2**60 + 3), st.just(-1)),
              "note": st.one_of(st.text(max_size=3), st.binary(max_size=3))})


@st.composite
def drains(draw):
    """Up to four drains of messages on a few topics; some bodies are repeated shapes
    with new numbers (what layouts are for), some bytes are flipped (a body of a known
    length that does not fit), some numbers are sent as float32."""
    out = []
    for _ in range(draw(st.integers(1, 4))):
        drain = []
        for _ in range(draw(st.integers(1, 24))):
            topic = draw(st.sampled_from([b"a.x", b"a.y", b"a.z", b"a.w", b"p.q", b"m",
                                          b"nowhere"]))
            body = _packed(draw(single), use_single_float=draw(st.booleans()))
            if draw(st.integers(0, 9)) == 0:
                at = draw(st.integers(0, len(body) - 1))
                body = body[:at] + bytes([body[at] ^ draw(st.integers(1, 255))]) + body[at + 1:]
            drain.append((topic, body))
        out.append(drain)
    return out


@pytest.mark.slow
@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(drains())
def test_layouts_read_fuzzed_drains_exactly_as_messages_one_by_one(batch):
    # every drain takes the layout path, however short, and is never left whole to
    # the message-by-message loop
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(engine_module, "LAYOUT_MIN_MESSAGES", 1)
        mp.setattr(engine_module, "MAX_RUNS", 10**9)
        mp.setattr(engine_module, "RETRY_AFTER", 0)
        one, many = _feed_both(batch)
    _assert_same(one, many)


def test_the_steady_state_reads_every_message_through_layouts(monkeypatch):
    seen = []
    each = Engine._decode_each

    def counting(self, topics, bodies, now, endpoint=""):
        seen.append(len(bodies))
        return each(self, topics, bodies, now, endpoint)
    monkeypatch.setattr(Engine, "_decode_each", counting)
    rng = np.random.default_rng(3)
    x = rng.normal(20.0, 4.0, 3000)
    bodies = [encode({"v": float(v)}, source="gw", seq=1000 + i) for i, v in enumerate(x)]
    e = _engine()
    for start in range(0, 3000, 1000):
        e.ingest_many([b"a.x"] * 1000, bodies[start:start + 1000], NOW)
        e.flush(NOW)
    assert seen == []    # every body fitted a layout learnt from the first one
    (view,) = e.snapshot.series.values()
    # reference: numpy mean and ddof=1 variance (reliability correction, unit weights)
    assert math.isclose(view.mean[0], float(np.mean(x)), rel_tol=1e-12)
    assert math.isclose(view.variance[0], float(np.var(x, ddof=1)), rel_tol=1e-12)
    assert e.gaps == {} and e.messages[""] == 3000


def test_sequence_numbers_across_every_width_count_the_same_gaps():
    # seq crosses the fixint / uint8 / uint16 / uint32 / uint64 encodings, with gaps,
    # a restart and two producers interleaved; reference: ingest one by one
    seqs = [*range(120, 130), 140, *range(250, 260), 65_530, 65_540, 2**32 - 2, 2**32 + 5,
            3, 4, 9, 2**53 + 10, 2**53 + 12]
    drain = []
    for i, q in enumerate(seqs):
        drain.append((b"a.x", encode({"v": float(i)}, source="p1", seq=q)))
        drain.append((b"a.y", encode({"v": float(i)}, source="p2", seq=2 * i)))
    one, many = _feed_both([drain, drain])
    _assert_same(one, many)
    assert one.gaps["p1"] > 0 and one.gaps["p2"] > 0


def test_series_beyond_max_series_are_refused_in_order_of_first_arrival():
    drain = [(b"a.%d" % (i % 5), encode({"v": float(i)})) for i in range(40)]
    one, many = _feed_both([drain, drain])
    _assert_same(one, many)
    assert one.rejected["series_limit"] == 32   # a.3 and a.4: 8 messages each, twice


def test_a_full_table_keeps_the_layouts_in_use_and_drops_the_rest(monkeypatch):
    # issue 15: caches keyed by sender bytes are bounded in bytes and evict the least
    # recently used; a flood of one-off layouts must not cost a busy producer its layout
    import sigmad.daemon.ingest.layouts as layouts_module

    monkeypatch.setattr(layouts_module, "_TABLE_LIMIT", 50)
    table = LayoutTable(1)
    hot = encode({"v": 1.0}, source="busy", seq=7)
    table.add(b"hot", learn(hot, ("v",), 64), "route")
    for i in range(500):                     # one-off topics, each a layout of its own
        cold = encode({"v": float(i)}, source="flood")
        table.add(b"cold.%d" % i, learn(cold, ("v",), 64), "route")
        if i % 10 == 0:                      # the busy producer sends now and then
            row = table.find((b"hot",), np.array([len(hot)]))
            assert row[0] >= 0, i           # ...and always finds its layout
            assert table.read(len(hot), row, [hot]).ok.tolist() == [True]
    assert len(table) <= 50
    # a layout not used since the table last filled is gone
    first = encode({"v": 0.0}, source="flood")
    assert table.find((b"cold.0",), np.array([len(first)]))[0] == -1
