"""MomentsColumns: many Moments states as arrays, against Moments itself and numpy/scipy.

Two kinds of check: the stacked read-outs equal each ``Moments``' own read-out
bit for bit (the same IEEE operations; compared through ``tobytes`` so that
NaNs and -0.0 count), and they agree with numpy's (scipy's) weighted
statistics of the raw rows each state saw.
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import need_module
from sigmad.estimators import HalfLife, IncompatibleError, Moments
from sigmad.estimators.moments_columns import MomentsColumns, put_rows, take_rows

HL = HalfLife(50.0)


def _states(dim: int, n: int = 40, seed: int = 1):
    """n states of dimension ``dim`` with the rows and weights each one saw; among them
    an empty state, a one-row state and a decayed-to-nothing state."""
    rng = np.random.default_rng(seed)
    states, data = [], []
    for i in range(n):
        m = Moments(dim, HL)
        if i == 0:                        # empty: W = 0, no clock
            states.append(m)
            data.append(None)
            continue
        rows = 1 if i == 1 else int(rng.integers(2, 30))
        x = rng.normal(rng.normal(0, 100), 10.0 ** rng.integers(-3, 4), (rows, dim))
        w = rng.uniform(0.1, 3.0, rows)
        m.update(x, weights=w, times=np.full(rows, 1000.0))
        if i == 2:
            m.decay_to(1000.0 + 1e6)      # every weight decays to nothing: W = 0
            data.append(None)
        else:
            data.append((x, w))
        states.append(m)
    return states, data


def _same_bits(a, b) -> bool:
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    return a.shape == b.shape and a.tobytes() == b.tobytes()


@pytest.mark.parametrize("dim", [1, 3])
def test_stacking_and_unstacking_is_exact(dim):
    states, _ = _states(dim)
    cols = MomentsColumns.of(states, dim, HL)
    for round_trip in (cols, MomentsColumns.from_dict(cols.to_dict())):
        back = round_trip.states()
        assert [m.to_dict() for m in back] == [m.to_dict() for m in states]
        for a, b in zip(back, states, strict=True):   # the dicts compare NaN-blind: bits too
            assert _same_bits(a._mean, b._mean) and _same_bits(a._scatter, b._scatter)
            assert (a.clock, a.count, a.W, a.W2) == (b.clock, b.count, b.W, b.W2)
            assert type(a.W) is float and type(a.count) is int


@pytest.mark.parametrize("dim", [1, 3])
@pytest.mark.parametrize("correction", ["none", "frequency", "reliability"])
def test_read_outs_equal_each_state_bit_for_bit(dim, correction):
    states, _ = _states(dim)
    cols = MomentsColumns.of(states, dim, HL)
    qs = (0.01, 0.5, 0.99)
    for i, m in enumerate(states):
        # reference: the same state's own Moments read-outs
        assert _same_bits(cols.means()[i], m.mean)
        assert _same_bits(cols.variances(correction)[i], m.variance(correction))
        assert _same_bits(cols.covariances(correction)[i], m.covariance(correction))
        assert _same_bits(cols.scatters()[i], m.scatter)
        assert _same_bits(cols.effective_samples()[i], m.effective_samples)
        assert _same_bits(cols.quantiles(qs, correction)[i], m.quantiles(qs, correction))
        with np.errstate(invalid="ignore"):
            assert _same_bits(cols.correlations()[i], m.correlation())


@pytest.mark.parametrize("dim", [1, 3])
def test_read_outs_agree_with_numpy_weighted_statistics(dim):
    states, data = _states(dim, seed=4)
    cols = MomentsColumns.of(states, dim, HL)
    checked = 0
    for i, rows in enumerate(data):
        if rows is None:
            continue
        x, w = rows
        # reference: numpy.average with weights
        np.testing.assert_allclose(cols.means()[i], np.average(x, axis=0, weights=w),
                                   rtol=1e-12, atol=1e-12 * np.abs(x).max())
        if x.shape[0] < 2:
            continue
        # reference: numpy.cov with aweights (ddof=1 divides by W - W2/W, the
        # "reliability" divisor) and with bias=True (divides by W: "none")
        cov = np.cov(x.T, aweights=w, ddof=1).reshape(dim, dim)
        np.testing.assert_allclose(cols.covariances("reliability")[i], cov, rtol=1e-9,
                                   atol=1e-12 * np.abs(cov).max())
        biased = np.cov(x.T, aweights=w, bias=True).reshape(dim, dim)
        np.testing.assert_allclose(cols.variances("none")[i], np.diag(biased), rtol=1e-9)
        # reference: Kish's effective sample size from numpy sums, (sum w)**2 / sum w**2
        np.testing.assert_allclose(cols.effective_samples()[i], w.sum() ** 2 / (w @ w),
                                   rtol=1e-12)
        if dim > 1:
            # reference: numpy.corrcoef's formula on the weighted covariance
            sd = np.sqrt(np.diag(cov))
            np.testing.assert_allclose(cols.correlations()[i], cov / np.outer(sd, sd),
                                       rtol=1e-9, atol=1e-12)
        checked += 1
    assert checked >= 30


def test_quantiles_agree_with_scipy_normal_ppf():
    stats = need_module("scipy.stats")
    states, _ = _states(2, seed=6)
    cols = MomentsColumns.of(states, 2, HL)
    qs = (0.05, 0.5, 0.9)
    got = cols.quantiles(qs, "reliability")
    mean, sd = cols.means(), np.sqrt(cols.variances("reliability"))
    for k, q in enumerate(qs):
        # reference: scipy.stats.norm.ppf(q, loc=mean, scale=sd)
        want = stats.norm.ppf(q, loc=mean, scale=sd)
        ok = np.isfinite(want)
        np.testing.assert_allclose(got[:, k][ok], want[ok], rtol=1e-12, atol=1e-9)
        assert np.isnan(got[:, k][~ok]).all()


def test_frequency_divisor_matches_numpy_fweights():
    # integer repeat counts: "frequency" divides by W - 1, as numpy.cov with fweights
    x = np.array([[1.0], [4.0], [6.0]])
    f = np.array([2, 1, 3])
    m = Moments()
    m.update(x, weights=f.astype(float))
    cols = MomentsColumns.of([m], 1, None)
    want = np.cov(x.T, fweights=f, ddof=1)    # reference: numpy.cov
    np.testing.assert_allclose(cols.variances("frequency")[0, 0], want, rtol=1e-14)


def test_states_of_another_shape_are_refused_by_index():
    states = [Moments(2, HL), Moments(2, HL), Moments(3, HL)]
    with pytest.raises(IncompatibleError) as err:
        MomentsColumns.of(states, 2, HL)
    assert err.value.field == "states[2]"
    with pytest.raises(IncompatibleError) as err:
        MomentsColumns.of([Moments(2, HL), Moments(2, HalfLife(60.0))], 2, HL)
    assert err.value.field == "states[1]"


def _saved() -> dict:
    states, _ = _states(2, n=5)
    return MomentsColumns.of(states, 2, HL).to_dict()


@pytest.mark.parametrize("field,value", [
    ("kind", "moments"), ("version", 2), ("dim", 0), ("dim", "2"), ("n", -1), ("n", 2**62),
    ("half_life", {"length": -1.0, "unit": "seconds"}), ("has_clock", b"\x02" * 5),
    ("clock", b"\0" * 39), ("count", [1, 2, 3, 4, 5]), ("W", None), ("mean", b"\0" * 8),
    ("scatter", b"\0" * 8 * 4 * 6)])
def test_a_malformed_saved_form_is_refused_naming_the_field(field, value):
    d = _saved()
    d[field] = value
    with pytest.raises(IncompatibleError) as err:
        MomentsColumns.from_dict(d)
    # a huge count is refused by the first blob too short to hold it
    assert err.value.field == ("has_clock" if value == 2**62 else field)


def test_the_saved_form_is_little_endian_blobs():
    m = Moments()
    m.update([1.0, 2.0])
    d = MomentsColumns.of([m], 1, None).to_dict()
    # reference: IEEE 754 binary64 of 1.5, little-endian (common practice: struct.pack("<d"))
    assert d["mean"] == bytes.fromhex("000000000000f83f")
    assert d["count"] == (2).to_bytes(8, "little")


@pytest.mark.parametrize("shape", [(30,), (30, 1), (30, 4), (30, 2, 2), (30, 3, 0)])
@pytest.mark.parametrize("which", ["sorted", "repeated", "empty", "mask", "slice"])
def test_rows_taken_and_put_are_numpys_fancy_indexing_byte_for_byte(shape, which):
    # reference: numpy's own a[idx] and a[idx] = values; compared through tobytes so
    # that NaN payloads and -0.0 count, with a repeated row (the last write wins)
    rng = np.random.default_rng(2)
    a = rng.normal(size=shape)
    a.reshape(-1)[:min(3, a.size)] = [np.nan, -0.0, np.inf][:min(3, a.size)]
    idx = {"sorted": np.array([0, 3, 4, 17, 29]), "repeated": np.array([5, 2, 5, 9]),
           "empty": np.array([], np.int64), "mask": rng.random(30) < 0.4,
           "slice": slice(4, 11)}[which]
    want = a[idx]
    assert take_rows(a, idx).tobytes() == want.tobytes()
    assert take_rows(a, idx).shape == want.shape
    values = rng.normal(size=want.shape)
    ours, theirs = a.copy(), a.copy()
    put_rows(ours, idx, values)
    theirs[idx] = values
    assert ours.tobytes() == theirs.tobytes()


def test_rows_put_into_a_non_contiguous_array_fall_back_to_numpy():
    # a strided view (every other row): the opaque-row write needs C order
    base = np.zeros((20, 3))
    view = base[::2]
    put_rows(view, np.array([1, 4]), np.ones((2, 3)))
    assert base[[2, 8]].tolist() == [[1.0] * 3] * 2 and base.sum() == 6.0


def test_the_arrays_follow_the_shared_fields_in_the_order_take_and_copy_rely_on():
    # take() and copy() build each kind by position: its arrays must be the fields
    # after the first two, in _ARRAYS order; a copy shares no memory and equals the
    # original, and take() gives numpy's rows
    from sigmad.estimators import ThresholdColumns
    from sigmad.estimators import moments_columns as mc
    from sigmad.estimators import threshold_columns as tc

    assert MomentsColumns._fields[2:] == mc._ARRAYS
    assert ThresholdColumns._fields[2:] == tc._ARRAYS
    m = MomentsColumns.of(_states(2, 10)[0], 2, HL)
    t = ThresholdColumns.zeros(10, [1.0, 2.0], HL)
    for cols in (m, t):
        for n in (None, 4):
            got = cols.copy(n)
            assert got[:2] == cols[:2]
            for name in got._fields[2:]:
                a, b = getattr(got, name), getattr(cols, name)[:n]
                assert a.tobytes() == b.tobytes() and not np.shares_memory(a, b)
        rows = np.array([7, 1, 1])
        got = cols.take(rows)
        for name in got._fields[2:]:
            assert getattr(got, name).tobytes() == getattr(cols, name)[rows].tobytes()
