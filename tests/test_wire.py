"""Wire format v1 decoding and encoding.

Expected behaviour comes from DESIGN.md, "Wire format v1": the keys values / weight /
time / source / seq, the shapes each may take (map of numbers, map of arrays or bins of
little-endian float64, a bare value for a one-field stream), and "anything else in the
body is ignored". Expected arrays are built with numpy from the same inputs; msgpack
bodies are crafted with msgpack.packb or by hand from the msgpack specification's byte
layout (array32 = 0xdd, bin32 = 0xc6, map32 = 0xdf, str32 = 0xdb, each followed by a
big-endian uint32 length).
"""

import math
import struct
import time
import tracemalloc

import msgpack
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sigmad.daemon.ingest.wire import (
    REASONS,
    Decoded,
    Reader,
    Single,
    WireError,
    decode,
    encode,
    interpret,
    unpack,
)
from sigmad.estimators import clean_batch

LIMITS = {"max_bytes": 1 << 20, "max_rows": 1000}
ONE = ("ms",)
TWO = ("temp", "rh")


def dec(body, fields=ONE, **limits):
    return decode(body, fields, **{**LIMITS, **limits})


def pack(obj):
    return msgpack.packb(obj, use_bin_type=True)


def f8(values):
    return np.asarray(values, dtype="<f8").tobytes()


def reason_of(body, fields=ONE, **limits):
    with pytest.raises(WireError) as info:
        dec(body, fields, **limits)
    assert str(info.value).startswith(info.value.reason + ": ")
    assert info.value.detail
    return info.value.reason


# ------------------------------------------------------------------ accepted shapes

def test_single_observation_map_of_numbers():
    d = dec(pack({"values": {"ms": 12.5}}))
    assert isinstance(d, Decoded)
    assert d.values.dtype == np.float64 and d.values.shape == (1, 1)
    assert d.values[0, 0] == 12.5
    assert d.weights is None and d.times is None and d.source is None and d.seq is None


def test_columns_follow_the_streams_field_order_not_the_maps():
    d = dec(pack({"values": {"rh": 40.0, "temp": 21}}), TWO)
    np.testing.assert_array_equal(d.values, [[21.0, 40.0]])


def test_fields_the_stream_does_not_use_are_ignored():
    d = dec(pack({"values": {"ms": 3.0, "bytes": 512, "note": "x"}}))
    np.testing.assert_array_equal(d.values, [[3.0]])


def test_other_body_keys_are_ignored():
    d = dec(pack({"values": {"ms": 3.0}, "trace_id": "abc", "extra": {"nested": [1]}}))
    np.testing.assert_array_equal(d.values, [[3.0]])


def test_batch_as_map_of_arrays():
    d = dec(pack({"values": {"temp": [20.0, 21.0, 22.0], "rh": [40, 41, 42]}}), TWO)
    np.testing.assert_array_equal(d.values, np.column_stack([[20.0, 21, 22], [40.0, 41, 42]]))


def test_batch_as_map_of_bins_is_little_endian_float64():
    temp, rh = np.array([20.5, -1e300, 5e-324]), np.array([40.0, 0.0, -0.0])
    d = dec(pack({"values": {"temp": f8(temp), "rh": f8(rh)}}), TWO)
    np.testing.assert_array_equal(d.values, np.column_stack([temp, rh]))
    # bitwise: the sign of -0.0 survives (IEEE 754 bytes read as-is)
    assert math.copysign(1.0, d.values[2, 1]) == -1.0


def test_a_big_endian_reader_would_see_other_numbers():
    # guards the byte order: the same 8 bytes read big-endian differ (numpy dtype '>f8')
    body = pack({"values": f8([1.5])})
    assert dec(body).values[0, 0] == 1.5
    assert np.frombuffer(f8([1.5]), ">f8")[0] != 1.5


def test_one_field_bin_batch_is_read_without_copying():
    x = np.arange(1000, dtype=np.float64)
    body = pack({"values": f8(x)})
    d = dec(body)
    np.testing.assert_array_equal(d.values[:, 0], x)
    assert not d.values.flags.owndata
    base = d.values
    while isinstance(base, np.ndarray):
        base = base.base
    assert isinstance(base, memoryview) and base.obj is body   # a view of the body itself
    assert len(base) == 8000


@pytest.mark.parametrize(("values", "expected"), [
    (7, [[7.0]]),
    (2.5, [[2.5]]),
    ([1.0, 2, 3.5], [[1.0], [2.0], [3.5]]),
    (f8([4.0, 5.0]), [[4.0], [5.0]]),
])
def test_bare_values_are_shorthand_for_a_one_field_stream(values, expected):
    np.testing.assert_array_equal(dec(pack({"values": values})).values, expected)


def test_integers_up_to_uint64_max_are_numbers():
    big = 2**64 - 1  # the largest msgpack integer (msgpack spec: uint 64)
    d = dec(pack({"values": {"ms": big}}))
    assert d.values[0, 0] == float(big)


def test_scalar_weight_and_time_apply_to_every_row():
    d = dec(pack({"values": [1.0, 2.0, 3.0], "weight": 2, "time": 1.7e9}))
    np.testing.assert_array_equal(d.weights, [2.0, 2.0, 2.0])
    np.testing.assert_array_equal(d.times, [1.7e9] * 3)


def test_weight_and_time_arrays_and_bins():
    d = dec(pack({"values": f8([1, 2]), "weight": [0.5, 1.5], "time": f8([10.0, 11.0])}))
    np.testing.assert_array_equal(d.weights, [0.5, 1.5])
    np.testing.assert_array_equal(d.times, [10.0, 11.0])


def test_source_and_seq_are_returned():
    d = dec(pack({"values": 1.0, "source": "host-a:4711", "seq": 2**64 - 1}))
    assert d.source == "host-a:4711" and d.seq == 2**64 - 1


def test_row_level_problems_pass_decode_and_are_dropped_by_clean_batch():
    # DESIGN.md: observations that fail validation are dropped one by one and counted.
    body = pack({"values": [1.0, math.nan, 3.0, 4.0, 5.0],
                 "weight": [1.0, 1.0, 0.0, math.inf, 1.0],
                 "time": [1.0, 2.0, 3.0, 4.0, math.nan]})
    d = dec(body)
    assert d.values.shape == (5, 1)
    batch, counts = clean_batch(d.values, 1, d.weights, d.times)
    assert counts == {"not_finite": 1, "bad_weight": 2, "bad_time": 1}
    np.testing.assert_array_equal(batch.x, [[1.0]])


# ------------------------------------------------------------------ rejections

HUGE_ARRAY = b"\xdd" + struct.pack(">I", 2**31 - 1)   # array32 claiming 2**31-1 items
HUGE_BIN = b"\xc6" + struct.pack(">I", 2**31 - 1)     # bin32 claiming 2 GiB
HUGE_MAP = b"\xdf" + struct.pack(">I", 2**31 - 1)     # map32 claiming 2**31-1 pairs
HUGE_STR = b"\xdb" + struct.pack(">I", 2**31 - 1)     # str32 claiming 2 GiB
# {"values": <array32 claiming 2**31-1>}: a hostile header inside a valid map
HUGE_VALUES = pack({"values": 0})[:-1] + HUGE_ARRAY

CASES = [
    ("too_large", b"\x80" + b"\x00" * 100, ONE, {"max_bytes": 100}),
    ("not_msgpack", b"\xc1", ONE, {}),                       # 0xc1 is never used (spec)
    ("not_msgpack", b"", ONE, {}),
    ("not_msgpack", pack({"values": 1}) + pack(1), ONE, {}),  # extra data
    ("not_msgpack", pack({"values": 1})[:-1], ONE, {}),       # truncated
    ("not_msgpack", b"\xd4\x01\x00", ONE, {}),                # ext type
    ("not_msgpack", b"\x81\xa1\xff\x01", ONE, {}),            # invalid UTF-8 key
    ("not_msgpack", pack({1: 2}), ONE, {}),                   # non-string map key
    ("not_msgpack", HUGE_BIN, ONE, {}),
    ("not_msgpack", HUGE_MAP, ONE, {}),
    ("not_msgpack", HUGE_STR, ONE, {}),
    ("not_msgpack", HUGE_ARRAY, ONE, {}),                     # claims more items than bytes
    ("not_a_map", pack([1.0, 2.0]), ONE, {}),
    ("not_a_map", pack(3.5), ONE, {}),
    ("no_values", pack({"value": 1.0}), ONE, {}),
    ("no_values", pack({"values": None}), ONE, {}),
    ("missing_field", pack({"values": {"temp": 1.0}}), TWO, {}),
    ("bad_value", pack({"values": {"ms": "12"}}), ONE, {}),
    ("bad_value", pack({"values": {"ms": True}}), ONE, {}),
    ("bad_value", pack({"values": {"ms": None}}), ONE, {}),
    ("bad_value", pack({"values": {"ms": {"p": 1}}}), ONE, {}),
    ("bad_value", pack({"values": {"ms": [1.0, "2"]}}), ONE, {}),
    ("bad_value", pack({"values": {"ms": [1.0, False]}}), ONE, {}),
    ("bad_value", pack({"values": {"ms": [[1.0]]}}), ONE, {}),
    ("bad_value", pack({"values": "12"}), ONE, {}),
    ("bad_value", pack({"values": False}), ONE, {}),
    ("bad_value", pack({"values": 1.0}), TWO, {}),            # shorthand needs one field
    ("bad_value", pack({"values": 1.0, "weight": "heavy"}), ONE, {}),
    ("bad_value", pack({"values": 1.0, "time": {"s": 1}}), ONE, {}),
    ("bad_value", pack({"values": [1.0], "weight": [True]}), ONE, {}),
    ("length_mismatch", pack({"values": {"temp": [1.0, 2.0], "rh": [1.0]}}), TWO, {}),
    ("length_mismatch", pack({"values": {"temp": f8([1, 2]), "rh": f8([1, 2, 3])}}), TWO, {}),
    ("length_mismatch", pack({"values": {"temp": 1.0, "rh": [1.0]}}), TWO, {}),
    ("length_mismatch", pack({"values": b"\x00" * 12}), ONE, {}),  # 12 is not a multiple of 8
    ("length_mismatch", pack({"values": [1.0, 2.0], "weight": [1.0]}), ONE, {}),
    ("length_mismatch", pack({"values": [1.0, 2.0], "time": f8([1.0, 2.0, 3.0])}), ONE, {}),
    ("length_mismatch", pack({"values": [1.0], "time": b"\x00" * 7}), ONE, {}),
    ("too_many_rows", pack({"values": f8(np.zeros(11))}), ONE, {"max_rows": 10}),
    ("too_many_rows", pack({"values": [0.0] * 11}), ONE, {"max_rows": 10}),
    ("too_many_rows", pack({"values": 1.0, "weight": [1.0] * 11}), ONE, {"max_rows": 10}),
    ("bad_source", pack({"values": 1.0, "source": 17}), ONE, {}),
    ("bad_source", pack({"values": 1.0, "source": ""}), ONE, {}),
    ("bad_source", pack({"values": 1.0, "source": "x" * 129}), ONE, {}),
    ("bad_source", pack({"values": 1.0, "source": "a\nb"}), ONE, {}),
    ("bad_source", pack({"values": 1.0, "source": b"bytes"}), ONE, {}),
    ("bad_seq", pack({"values": 1.0, "seq": -1}), ONE, {}),
    ("bad_seq", pack({"values": 1.0, "seq": 1.0}), ONE, {}),
    ("bad_seq", pack({"values": 1.0, "seq": "7"}), ONE, {}),
    ("bad_seq", pack({"values": 1.0, "seq": True}), ONE, {}),
]


@pytest.mark.parametrize(("reason", "body", "fields", "limits"), CASES,
                         ids=[f"{c[0]}-{i}" for i, c in enumerate(CASES)])
def test_rejected_message_reasons(reason, body, fields, limits):
    assert reason_of(body, fields, **limits) == reason


def test_every_documented_reason_has_a_crafted_message():
    assert {c[0] for c in CASES} == set(REASONS)


def test_too_large_is_decided_before_unpacking():
    # a body one byte over the limit is refused even though it is valid msgpack
    body = pack({"values": 1.0})
    assert reason_of(body, max_bytes=len(body) - 1) == "too_large"
    assert dec(body, max_bytes=len(body)).values[0, 0] == 1.0


def test_array_header_longer_than_max_rows_but_inside_the_body_is_too_many_rows():
    body = pack({"values": [0.0] * 50})
    assert reason_of(body, max_rows=49) == "too_many_rows"
    assert dec(body, max_rows=50).values.shape == (50, 1)


@pytest.mark.parametrize("body", [HUGE_ARRAY, HUGE_BIN, HUGE_MAP, HUGE_STR, HUGE_VALUES,
                                  HUGE_VALUES + b"\x00" * 1000])
def test_hostile_length_headers_fail_without_allocating(body):
    tracemalloc.start()
    try:
        start = time.perf_counter()
        with pytest.raises(WireError):
            decode(body, ONE, max_bytes=1 << 20, max_rows=100_000)
        elapsed = time.perf_counter() - start
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 256 * 1024   # the headers claim 2 GiB or 2**31 items
    assert elapsed < 1.0       # generous: the real figure is microseconds


def test_the_allocation_probe_would_see_a_real_allocation():
    # control for the test above: the same tracemalloc probe sees a genuine 4 MB array
    # (a bin would be read in place, with no allocation at all)
    body = pack({"values": [0.5] * (1 << 19)})
    tracemalloc.start()
    try:
        decode(body, ONE, max_bytes=8 << 20, max_rows=1 << 20)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak >= 4 << 20


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=256))
def test_random_bytes_raise_nothing_but_wire_error(body):
    try:
        d = decode(body, TWO, max_bytes=1 << 16, max_rows=64)
    except WireError as exc:
        assert exc.reason in REASONS
    else:
        assert d.values.shape[1] == 2


_leaf = (st.none() | st.booleans() | st.integers(-2**63, 2**64 - 1) | st.floats()
         | st.text(max_size=8) | st.binary(max_size=24))
_tree = st.recursive(_leaf, lambda inner: st.lists(inner, max_size=4)
                     | st.dictionaries(st.sampled_from(["ms", "temp", "rh", "x"]), inner,
                                       max_size=3), max_leaves=12)
_body = st.fixed_dictionaries({}, optional={
    "values": _tree, "weight": _tree, "time": _tree, "source": _tree, "seq": _tree})


@settings(max_examples=300, deadline=None)
@given(_body, st.sampled_from([ONE, TWO, ("ms", "temp", "rh")]))
def test_random_well_formed_bodies_raise_nothing_but_wire_error(obj, fields):
    try:
        d = decode(pack(obj), fields, max_bytes=1 << 16, max_rows=64)
    except WireError as exc:
        assert exc.reason in REASONS
    else:
        n = d.values.shape[0]
        assert d.values.shape == (n, len(fields))
        assert d.weights is None or d.weights.shape == (n,)
        assert d.times is None or d.times.shape == (n,)


# ---------------------------------------- Reader: typed shapes == the general decoder
# Reader.read decodes the usual shapes with typed msgspec structs and leaves every
# other body to the general decoder (unpack + interpret, checked against the
# wire-format table above). Bodies drawn near the typed shapes must read exactly as
# the general decoder reads them, or be rejected for the same reason.
_num = (st.floats() | st.integers(-2**63, 2**64 - 1) | st.booleans() | st.none()
        | st.sampled_from([math.nan, math.inf]))
_bins = st.integers(0, 5).map(lambda n: f8(np.arange(n) * 1.5)) | st.binary(max_size=20)
_cell = _num | _bins | st.lists(st.floats(), max_size=3)
_near = st.fixed_dictionaries(
    {"values": st.dictionaries(st.sampled_from(["temp", "rh", "x"]), _cell, max_size=3)
     | _cell},
    optional={"weight": _cell, "time": _cell,
              "source": st.sampled_from(["p1", "", "a\x00", "p" * 129, 7, None]),
              "seq": st.sampled_from([0, 5, -1, 2**64 - 1, 1.5, None, "3"]),
              "other": st.just(1)})


def _general(body, fields):
    return interpret(unpack(body, max_bytes=1 << 16, max_rows=4), fields, max_rows=4)


@settings(max_examples=500, deadline=None)
@given(_near, st.sampled_from([("temp",), TWO]), st.booleans())
def test_the_reader_reads_every_body_as_the_general_decoder_does(obj, fields, single_float):
    try:
        body = msgpack.packb(obj, use_bin_type=True, use_single_float=single_float)
    except OverflowError:   # a double beyond float32's range: not sendable as float32
        body = msgpack.packb(obj, use_bin_type=True)
    reader = Reader(fields, max_bytes=1 << 16, max_rows=4)
    try:
        want = _general(body, fields)
    except WireError as exc:
        with pytest.raises(WireError) as info:
            reader.decode(body)
        assert (info.value.reason, info.value.detail) == (exc.reason, exc.detail)
        return
    got = reader.decode(body)
    np.testing.assert_array_equal(got.values, want.values)
    for a, b in ((got.weights, want.weights), (got.times, want.times)):
        assert (a is None) == (b is None)
        if a is not None:
            np.testing.assert_array_equal(a, b)
    assert (got.source, got.seq) == (want.source, want.seq)


def test_a_binary_batch_reads_as_its_little_endian_doubles():
    # reference: numpy's reading of the same bytes as little-endian float64
    x, y, w = np.array([1.5, -2.0, 3.25]), np.array([4.0, 5.0, 6.0]), np.array([.5, 1., 2.])
    body = pack({"values": {"temp": f8(x), "rh": f8(y)}, "weight": f8(w), "time": 5.0,
                 "source": "gw-7", "seq": 70_000})
    d = Reader(TWO, max_bytes=1 << 16, max_rows=4).read(body)
    np.testing.assert_array_equal(d.values, np.column_stack([x, y]))
    np.testing.assert_array_equal(d.weights, w)
    np.testing.assert_array_equal(d.times, [5.0, 5.0, 5.0])
    assert (d.source, d.seq) == ("gw-7", 70_000)


def test_a_single_observation_is_read_as_one_plain_row():
    d = Reader(TWO, max_bytes=1 << 16, max_rows=4).read(
        pack({"values": {"rh": 40, "temp": 21.5}, "weight": 2, "seq": 3, "source": "s"}))
    assert isinstance(d, Single)
    assert d == ((21.5, 40.0), 2.0, None, "s", 3)
    assert all(type(v) is float for v in (*d.row, d.weight))


# ------------------------------------------------------------------ encode

def test_encode_sends_numpy_arrays_as_bin_and_numbers_as_floats():
    raw = msgpack.unpackb(encode({"ms": np.array([1.0, 2.0]), "n": 3}, weight=[1, 2]))
    assert raw["values"]["ms"] == f8([1.0, 2.0])
    assert raw["values"]["n"] == 3.0 and type(raw["values"]["n"]) is float
    assert raw["weight"] == f8([1.0, 2.0])


def test_encode_without_binary_sends_lists_of_floats():
    raw = msgpack.unpackb(encode([1, 2.5], binary=False))
    assert raw == {"values": [1.0, 2.5]}


def test_encode_leaves_out_absent_keys():
    assert msgpack.unpackb(encode(1.0)) == {"values": 1.0}


@pytest.mark.parametrize("bad", [True, "12", [[1.0, 2.0]], {"ms": None}])
def test_encode_refuses_what_decode_would_reject(bad):
    with pytest.raises((TypeError, ValueError)):
        encode(bad)


@pytest.mark.parametrize("binary", [True, False])
def test_round_trip_batch_with_weights_times_source_and_seq(binary):
    rng = np.random.default_rng(1)
    temp, rh = rng.normal(20, 2, 50), rng.normal(40, 5, 50)
    w, t = rng.uniform(0.1, 2, 50), 1.7e9 + np.arange(50.0)
    body = encode({"temp": temp, "rh": rh, "unused": np.zeros(50)}, weight=w, time=t,
                  source="gw-1:99", seq=12, binary=binary)
    d = dec(body, TWO)
    np.testing.assert_array_equal(d.values, np.column_stack([temp, rh]))
    np.testing.assert_array_equal(d.weights, w)
    np.testing.assert_array_equal(d.times, t)
    assert (d.source, d.seq) == ("gw-1:99", 12)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=1, max_size=40),
       st.booleans())
def test_round_trip_preserves_every_double(xs, binary):
    d = dec(encode(np.array(xs), seq=0, binary=binary))
    # assert_array_equal counts NaNs in the same places as equal (numpy documentation)
    np.testing.assert_array_equal(d.values[:, 0], np.array(xs))
