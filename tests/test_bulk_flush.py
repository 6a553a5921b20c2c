"""Plain streams held in columns (``store.ColumnStore``) against series as objects.

Plain means moments, outlier counts and counts at thresholds; the thresholds' reference
is ``Thresholds._fold`` (checked against numpy's exact counts in tests/test_thresholds.py).

The reference is the per-series object path (``Engine._fold`` and ``view_of``, whose
maths ``tests/test_moments.py`` checks against numpy): the same drains fed to an
engine with columns switched off (``Engine(config, columns=False)``) must give the
same views, states, outlier counts and rejections: bit for bit where a series had one
row in a flush, to rounding (1e-9) where it had a batch.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.engine.store import ColumnStore, group_rows
from sigmad.daemon.ingest.wire import encode

BASE = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:7410"
[[stream]]
name = "s"
topic = "s.{k}"
fields = FIELDS
outlier_sigmas = [1.0, 3.0]
outlier_warmup = 3
quantiles = [0.1, 0.5, 0.99]
EXTRA
"""


def _engines(fields: str, extra: str, monkeypatch) -> tuple[Engine, Engine]:
    text = BASE.replace("FIELDS", fields).replace("EXTRA", extra)
    bulk, single = Engine(parse_config(text)), Engine(parse_config(text), columns=False)
    assert bulk.streams[0].store is not None and single.streams[0].store is None
    return bulk, single


def _drains(dim: int, n_series: int, flushes: int, seed: int, timed: bool, weighted: bool,
            bad: bool):
    """Per flush, (topic, body) pairs: mostly one observation per series, a few series
    with two, some with a time or a weight, and (``bad``) rows the flush must reject."""
    rng = np.random.default_rng(seed)
    names = ["a", "b", "c"][:dim]
    for f in range(flushes):
        now = 1000.0 + 3.7 * f
        msgs = []
        for k in range(n_series):
            if rng.random() < 0.15:
                continue                      # quiet this flush
            reps = 2 if rng.random() < 0.1 else 1
            for _ in range(reps):
                v = rng.normal(5.0 * k, 1.0 + k % 3, dim)
                if bad and rng.random() < 0.05:
                    v[0] = math.nan if rng.random() < 0.5 else 1e300
                kw = {}
                if timed and rng.random() < 0.7:
                    kw["time"] = now - rng.uniform(0.0, 5.0)
                if weighted and rng.random() < 0.5:
                    kw["weight"] = float(rng.choice([0.5, 2.0, 1e-40, 3.0]) if bad
                                         else rng.choice([0.5, 2.0, 3.0]))
                msgs.append((f"s.k{k}".encode(),
                             encode({n: float(x) for n, x in zip(names, v, strict=True)},
                                    **kw)))
        yield now, msgs


def _numbers(obj) -> list:
    """Every number in a view or state, flattened, and the rest as text (exact)."""
    if isinstance(obj, dict):
        return [x for k in sorted(obj) for x in [k, *_numbers(obj[k])]]
    if dataclasses.is_dataclass(obj):
        return _numbers(dataclasses.astuple(obj))
    if isinstance(obj, list | tuple):
        return [x for v in obj for x in _numbers(v)]
    return [obj]


def _close(a, b) -> bool:
    """Equal, floats to 1e-9 of the larger (a series folded a batch at a time in
    columns adds its rows in another order than ``Moments``)."""
    x, y = _numbers(a), _numbers(b)
    if len(x) != len(y):
        return False
    for u, v in zip(x, y, strict=True):
        if isinstance(u, float) and isinstance(v, float):
            if not (u == v or (math.isnan(u) and math.isnan(v))
                    or abs(u - v) <= 1e-9 * max(abs(u), abs(v))):
                return False
        elif u != v:
            return False
    return True


def _whole_mean(d: dict) -> dict:
    """A saved Moments with its mean's low-order part added in: that part is rounding
    (about 1e-16 of the mean) and differs with the order of additions, so it is
    compared as part of the mean, not to 1e-9 of itself."""
    d = dict(d)
    lo = d.pop("mean_lo", None)
    if lo is not None:
        d["mean"] = [m + e for m, e in zip(d["mean"], lo, strict=True)]
    return d


def _same(bulk: Engine, single: Engine) -> None:
    assert bulk.snapshot.series.keys() == single.snapshot.series.keys()
    for key, view in single.snapshot.series.items():
        assert _close(bulk.snapshot.series[key], view), key
    for st_b, st_s in zip(bulk.streams, single.streams, strict=True):
        for labels, s in st_s.series.items():
            b = st_b.series[labels]
            assert _close(_whole_mean(b.moments.to_dict()), _whole_mean(s.moments.to_dict()))
            assert _close([t.to_dict() for t in b.thresholds],
                          [t.to_dict() for t in s.thresholds])
    assert bulk.rejected == single.rejected


#: counts at thresholds (the values run from about 0 to 300)
LEVELS = {1: "thresholds = [20.0, 100.0, 200.0]",
          2: "thresholds = { a = [20.0, 100.0, 200.0], b = [50.0] }"}


@pytest.mark.parametrize("dim", [1, 2])
@pytest.mark.parametrize("half_life", ["", 'half_life = "6s"', 'half_life = "4 obs"'])
@pytest.mark.parametrize("weighted,bad", [(False, False), (True, False), (True, True)])
@pytest.mark.parametrize("levels", [False, True], ids=["", "thresholds"])
def test_bulk_flush_equals_series_by_series(dim, half_life, weighted, bad, levels,
                                            monkeypatch):
    fields = '["a"]' if dim == 1 else '["a", "b"]'
    bulk, single = _engines(fields, half_life + ("\n" + LEVELS[dim] if levels else ""),
                            monkeypatch)
    calls = []   # series folded one by one (a state outside the columns' common case)
    real = ColumnStore._fold_one
    monkeypatch.setattr(ColumnStore, "_fold_one",
                        lambda self, r, p, *a: calls.append(len(p)) or real(self, r, p, *a))
    for now, msgs in _drains(dim, 60, 12, seed=dim * 7 + len(half_life),
                             timed=True, weighted=weighted, bad=bad):
        for e in (bulk, single):
            e.ingest_many([t for t, _ in msgs], [b for _, b in msgs], now)
            e.flush(now)
        _same(bulk, single)
    rows = sum(v.observations for v in bulk.snapshot.series.values())
    assert sum(calls) < rows / 20   # (almost) every row was folded in columns


def test_bulk_flush_with_limits_and_untimed_rows(monkeypatch):
    bulk, single = _engines('["a"]', "limits = { a = [-50.0, 250.0] }", monkeypatch)
    for now, msgs in _drains(1, 80, 8, seed=3, timed=False, weighted=False, bad=False):
        for e in (bulk, single):
            e.ingest_many([t for t, _ in msgs], [b for _, b in msgs], now)
            e.flush(now)
        _same(bulk, single)
    assert bulk.rejected   # some rows were outside the limits: both paths counted them


def test_long_silence_takes_the_series_path_and_agrees(monkeypatch):
    # 500 half-lives of silence moves the scale exponent: fold_rows leaves it to Moments
    bulk, single = _engines('["a"]', 'half_life = "1s"', monkeypatch)
    for now in (100.0, 101.0, 600.0, 601.0):
        msgs = [(f"s.k{k}".encode(), encode({"a": float(k)}, time=now)) for k in range(5)]
        for e in (bulk, single):
            e.ingest_many([t for t, _ in msgs], [b for _, b in msgs], now)
            e.flush(now)
        _same(bulk, single)


def test_quiet_series_live_in_columns_not_objects(monkeypatch):
    bulk, _ = _engines('["a"]', "", monkeypatch)
    msgs = [(f"s.k{k}".encode(), encode({"a": float(k)})) for k in range(1000)]
    bulk.ingest_many([t for t, _ in msgs], [b for _, b in msgs], 10.0)
    bulk.flush(10.0)
    store = bulk.streams[0].store
    assert store.n == 1000 and store.observations[:1000].tolist() == [1] * 1000
    assert store.moments.mean[:1000, 0].tolist() == [float(k) for k in range(1000)]
    assert len(bulk.snapshot.series) == 1000
    assert bulk.snapshot.series[("s", (("k", "k7"),))].mean == (7.0,)


@pytest.mark.parametrize("busy", [50, group_rows(2) + 18], ids=["grouped", "own"])
def test_thresholds_on_one_field_of_two_and_a_busy_series(busy, monkeypatch):
    # counts at thresholds of the second field only; one series sends batches of
    # ``busy`` rows beside quiet ones: up to group_rows(2) folded with the others by
    # segment sums, more as a Moments of its own
    bulk, single = _engines('["a", "b"]', 'half_life = "5s"\nthresholds = { b = [4.0] }',
                            monkeypatch)
    rng = np.random.default_rng(8)
    for f in range(6):
        now = 100.0 + f
        msgs = [(f"s.k{k}".encode(), encode({"a": float(k), "b": float(rng.normal(4, 2))}))
                for k in range(30)]
        msgs += [(b"s.busy", encode({"a": rng.normal(0, 1, busy).tolist(),
                                     "b": rng.normal(4, 2, busy).tolist()},
                                    weight=rng.uniform(0.5, 2, busy).tolist()))]
        for e in (bulk, single):
            e.ingest_many([t for t, _ in msgs], [b for _, b in msgs], now)
            e.flush(now)
        _same(bulk, single)
    v = bulk.snapshot.series[("s", (("k", "busy"),))]
    assert v.levels.at == ((1, (4.0,)),) and v.levels.buckets[0][-1] > 200.0


@pytest.mark.parametrize("levels", ["", "thresholds = [20.0, 60.0]"], ids=["", "thresholds"])
def test_expired_series_leave_their_columns_and_come_back_fresh(levels, monkeypatch):
    # idle series leave the store (rows renumbered, cached layout rows forgotten); a
    # message of an expired topic, through a learnt layout, makes a fresh series, and
    # a series with rows still waiting is kept; the object path agrees throughout
    bulk, single = _engines('["a"]', 'idle_expiry = "10s"\n' + levels, monkeypatch)

    def feed(now, ks, value):
        msgs = [(f"s.k{k}".encode(), encode({"a": value + k})) for k in ks]
        for e in (bulk, single):
            e.ingest_many([t for t, _ in msgs], [b for _, b in msgs], now)

    for now in (100.0, 101.0, 102.0):              # 40 series; layouts are learnt
        feed(now, range(40), now)
        for e in (bulk, single):
            e.flush(now)
    feed(120.0, range(0, 40, 2), 5.0)              # even series keep sending
    for e in (bulk, single):
        e.flush(120.0)
    feed(121.0, [1], 7.0)                          # odd k1 has a row waiting: kept
    assert bulk.expire_idle(121.0) == single.expire_idle(121.0) == 19
    assert bulk.streams[0].store.n == 21
    for e in (bulk, single):
        e.flush(121.0)
    _same(bulk, single)
    feed(130.0, range(40), 9.0)                    # the expired come back, fresh
    for e in (bulk, single):
        e.flush(130.0)
    _same(bulk, single)
    v = bulk.snapshot.series[("s", (("k", "k3"),))]
    assert v.observations == 1 and v.mean == (12.0,)
    assert bulk.snapshot.series[("s", (("k", "k1"),))].observations == 5
