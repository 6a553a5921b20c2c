"""The trading-desk features in the daemon: transforms, volatility, the live spread,
legs from several topics, sessions.

References are named beside each check: numpy for returns, pandas for the
weighted means and the as-of join, statsmodels OLS for the spread.
"""

from __future__ import annotations

import math
from datetime import UTC

import msgpack
import numpy as np
import pytest
from conftest import need_module
from sigmad.daemon.config.errors import ConfigError
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.export.api_state import snapshot_json
from sigmad.daemon.export.metrics_text import SeriesRenderer
from sigmad.daemon.ingest.wire import encode
from sigmad.daemon.storage import checkpoint as cpmod

SOURCE = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:7999"
"""

RETURNS = SOURCE + """
[[stream]]
name = "px"
topic = "px.{sym}"
fields = ["mid", "size"]
transform = { mid = "log_return" }
volatility_unit = "1d"
"""


def _engine(text: str) -> Engine:
    return Engine(parse_config(text))


def _view(e: Engine, sym: str):
    return e.snapshot.series[("px", (("sym", sym),))]


# ------------------------------------------------------------------ configuration

@pytest.mark.parametrize("extra, words", [
    ('transform = { mid = "sqrt" }', ["stream[0].transform.mid", "'sqrt'", "'px'"]),
    ('transform = { bid = "difference" }', ["stream[0].transform.bid", "names no field"]),
    ('volatility_unit = "1d"', ["stream[0].volatility_unit", "needs a transform"]),
    ('transform = { mid = "log_return" }\nvolatility_unit = "soon"', ["volatility_unit"]),
    ('transform = {}', ["stream[0].transform", "at least one field"]),
    ('transform = { mid = "log_return" }\nmixture = { components = 2, log = true }',
     ["mixture.log", "returns"]),
])
def test_bad_transform_keys_name_stream_field_and_value(extra, words):
    text = SOURCE + f'[[stream]]\nname = "px"\ntopic = "px"\nfields = ["mid"]\n{extra}\n'
    with pytest.raises(ConfigError) as err:
        parse_config(text)
    for w in words:
        assert w in str(err.value)


# ------------------------------------------------------------------ transforms

def test_engine_log_returns_per_series_equal_numpy_whatever_the_arrival_order():
    e = _engine(RETURNS)
    rng = np.random.default_rng(4)
    n = 400
    t0 = 1.7e9
    sym = rng.choice(["aaa", "bbb"], n)
    t = t0 + np.cumsum(rng.exponential(0.3, n))
    mid = 100.0 * np.exp(np.cumsum(rng.normal(0, 0.001, n)))
    order = np.arange(n)
    for part in np.array_split(order, 10):       # ten flushes, each shuffled
        for i in rng.permutation(part):
            e.ingest(f"px.{sym[i]}".encode(), encode({"mid": float(mid[i]), "size": 1.0},
                                                     time=float(t[i])), now=t[-1])
        e.flush(t[-1])   # arrival after the last tick: no event time lies in the future
    for s in ("aaa", "bbb"):
        r = np.diff(np.log(mid[sym == s]))       # numpy
        v = _view(e, s)
        assert v.observations == r.size
        assert v.mean[0] == pytest.approx(float(r.mean()), rel=1e-9, abs=1e-15)
        assert v.variance[0] == pytest.approx(float(r.var(ddof=1)), rel=1e-9)
        assert v.mean[1] == 1.0                   # size passes through
    assert e.rejected.get("late", 0) == 0


def test_late_and_non_positive_rows_are_rejected_by_reason():
    e = _engine(RETURNS)
    e.ingest(b"px.aaa", encode({"mid": [100.0, 101.0], "size": [1.0, 1.0]},
                               time=[10.0, 20.0]), now=15.0)
    e.flush(15.0)
    e.ingest(b"px.aaa", encode({"mid": [99.0, 0.0, 102.0], "size": [1.0, 1.0, 1.0]},
                               time=[5.0, 21.0, 22.0]), now=25.0)
    e.flush(25.0)
    assert e.rejected["late"] == 1
    assert e.rejected["not_positive"] == 1
    v = _view(e, "aaa")
    assert v.observations == 2
    np.testing.assert_allclose(v.mean[0], np.mean(np.diff(np.log([100.0, 101.0, 102.0]))))


def test_a_series_first_price_is_kept_for_its_first_return():
    e = _engine(RETURNS)
    e.ingest(b"px.aaa", encode({"mid": 100.0, "size": 1.0}, time=10.0), now=10.0)
    e.flush(10.0)
    assert e.snapshot.series == {}              # no return yet
    e.ingest(b"px.aaa", encode({"mid": 110.0, "size": 1.0}, time=11.0), now=11.0)
    e.flush(11.0)
    assert _view(e, "aaa").mean[0] == pytest.approx(math.log(1.1), rel=1e-14)


def test_volatility_is_exported_per_unit_and_in_api_state():
    e = _engine(RETURNS)
    mids = [100.0, 101.0, 99.0, 100.5]
    times = [0.0, 60.0, 120.0, 240.0]
    e.ingest(b"px.aaa", encode({"mid": mids, "size": [1.0] * 4}, time=times), now=240.0)
    e.flush(240.0)
    r, dt = np.diff(np.log(mids)), np.diff(times)
    want = math.sqrt(float(np.mean(r * r / dt)) * 86400.0)   # numpy, the definition
    text = SeriesRenderer().render(e.snapshot, 200.0).decode()
    line = [ln for ln in text.splitlines() if ln.startswith("sigmad_volatility{")]
    assert line == [f'sigmad_volatility{{field="mid",stream="px",sym="aaa"}} '
                    f'{float(line[0].split()[-1])!r}']
    assert float(line[0].split()[-1]) == pytest.approx(want, rel=1e-12)
    doc = snapshot_json(e.snapshot, 200.0)
    assert doc["series"][0]["volatility"]["mid"] == pytest.approx(want, rel=1e-12)


def test_transform_state_survives_a_checkpoint_and_old_checkpoints_still_load():
    e = _engine(RETURNS)
    e.ingest(b"px.aaa", encode({"mid": [100.0, 101.0, 100.5], "size": [1.0, 2.0, 4.0]},
                               time=[1.0, 2.0, 2.5]), now=2.0)
    e.flush(2.0)
    blob = cpmod.encode_checkpoint(cpmod.collect_columns(e), cpmod.stream_definitions(e),
                                   2.0, {})
    fresh = _engine(RETURNS)
    cpmod.restore_checkpoint(fresh, cpmod.decode_checkpoint(blob), now=3.0)
    for eng in (e, fresh):
        eng.ingest(b"px.aaa", encode({"mid": 103.0, "size": 1.0}, time=3.0), now=3.0)
        eng.flush(3.0)
    assert _view(fresh, "aaa") == _view(e, "aaa")
    assert _view(fresh, "aaa").observations == 3   # 100.5 -> 103 used the restored price
    # a checkpoint written before the stream had a transform restores with fresh state
    plain = RETURNS.replace('transform = { mid = "log_return" }\nvolatility_unit = "1d"\n', "")
    old = _engine(plain)
    old.ingest(b"px.aaa", encode({"mid": 5.0, "size": 1.0}, time=1.0), now=1.0)
    old.flush(1.0)
    blob = cpmod.encode_checkpoint(cpmod.collect_columns(old), cpmod.stream_definitions(old),
                                   1.0, {})
    again = _engine(RETURNS)
    count, dropped = cpmod.restore_checkpoint(again, cpmod.decode_checkpoint(blob), now=2.0)
    assert dropped == [] and count == 1


# ------------------------------------------------------------------ the spread

PAIR = SOURCE + """
[[stream]]
name = "pair"
topic = "pair"
fields = ["alpha", "beta"]
regression = { y = "beta", x = ["alpha"] }
"""


def _statsmodels_spread(a: np.ndarray, b: np.ndarray) -> tuple[float, float]:
    """OLS of b on a over every row but the last; the last row's residual and
    residual / prediction standard error (statsmodels, se_obs)."""
    sm = need_module("statsmodels.api")
    fit = sm.OLS(b[:-1], sm.add_constant(a[:-1])).fit()
    pred = fit.get_prediction(np.array([[1.0, a[-1]]]))
    residual = float(b[-1] - pred.predicted_mean[0])
    return residual, residual / float(pred.se_obs[0])


@pytest.mark.parametrize("batches", [[60], [59, 1], [20, 20, 20]])
def test_spread_and_its_z_equal_statsmodels_ols_on_the_same_window(batches):
    rng = np.random.default_rng(8)
    n = sum(batches)
    a = rng.normal(50.0, 2.0, n)
    b = 1.5 * a + 3.0 + rng.normal(0.0, 0.4, n)
    b[-1] += 2.0                                   # a wide last spread
    e = _engine(PAIR)
    start = 0
    for size in batches:
        e.ingest(b"pair", encode({"alpha": a[start:start + size],
                                  "beta": b[start:start + size]}), now=1.0)
        e.flush(1.0)
        start += size
    residual, z = _statsmodels_spread(a, b)
    rg = e.snapshot.series[("pair", ())].regression
    assert rg.residual == pytest.approx(residual, rel=1e-9)
    assert rg.residual_z == pytest.approx(z, rel=1e-9)
    assert rg.latest == (a[-1], b[-1])
    text = SeriesRenderer().render(e.snapshot, 1.0).decode()
    assert f'sigmad_regression_residual_z{{stream="pair"}} {rg.residual_z!r}' in text
    assert "sigmad_regression_residual{" in text
    # the whole window is still one least-squares fit (the split changes nothing)
    sm = need_module("statsmodels.api")
    whole = sm.OLS(b, sm.add_constant(a)).fit()
    assert rg.coefficients[0] == pytest.approx(float(whole.params[1]), rel=1e-9)


def test_spread_is_left_out_until_the_fit_is_defined():
    e = _engine(PAIR)
    e.ingest(b"pair", encode({"alpha": [1.0, 2.0], "beta": [2.0, 4.5]}), now=1.0)
    e.flush(1.0)
    text = SeriesRenderer().render(e.snapshot, 1.0).decode()
    assert "sigmad_regression_residual{" not in text


def test_the_regression_plot_marks_the_latest_point():
    from sigmad.daemon.web.plots import pair_figure
    e = _engine(PAIR)
    rng = np.random.default_rng(2)
    a = rng.normal(10.0, 1.0, 50)
    e.ingest(b"pair", encode({"alpha": a, "beta": 2.0 * a + rng.normal(0, 0.1, 50)}), now=1.0)
    e.flush(1.0)
    svg = pair_figure(e.snapshot.series[("pair", ())])
    assert 'class="latest"' in svg and "z = " in svg


# ------------------------------------------------------------------ legs

LEGS = SOURCE + """
[[stream]]
name = "pair"
legs = { alpha = "px.{venue}.alpha", beta = "px.{venue}.beta" }
max_leg_age = "2s"
regression = { y = "beta", x = ["alpha"] }
"""


def _two_feeds(seed: int, n: int = 600):
    rng = np.random.default_rng(seed)
    ta = 1.7e9 + np.cumsum(rng.exponential(1.0, n))
    tb = 1.7e9 + np.cumsum(rng.exponential(1.5, n * 2 // 3))
    a = 100.0 * np.exp(np.cumsum(rng.normal(0, 0.002, ta.size)))
    b = 50.0 * np.exp(np.cumsum(rng.normal(0, 0.002, tb.size)))
    return ta, a, tb, b


def _asof_rows(ta, a, tb, b, tolerance):
    """pandas merge_asof of each feed against the other (backward, the staleness bound as
    tolerance), rows missing a leg dropped, the two sides unioned in time order."""
    pd = need_module("pandas")
    fa, fb = pd.DataFrame({"t": ta, "alpha": a}), pd.DataFrame({"t": tb, "beta": b})
    kw = {"on": "t", "direction": "backward", "tolerance": tolerance}
    left = pd.merge_asof(fa, fb, **kw)
    right = pd.merge_asof(fb, fa, **kw)
    both = pd.concat([left, right]).dropna().sort_values("t", kind="stable")
    return both[["alpha", "beta"]].to_numpy()


def _send_feeds(e: Engine, ta, a, tb, b, venue="x", flushes=20):
    ticks = sorted([(t, b"alpha", v) for t, v in zip(ta, a, strict=True)]
                   + [(t, b"beta", v) for t, v in zip(tb, b, strict=True)])
    rng = np.random.default_rng(0)
    for part in np.array_split(np.arange(len(ticks)), flushes):
        for i in rng.permutation(part):         # shuffled within each flush
            t, leg, v = ticks[i]
            e.ingest(b"px." + venue.encode() + b"." + leg, encode(float(v), time=float(t)),
                     now=float(t))
        e.flush(ticks[part[-1]][0])


def test_joined_legs_equal_pandas_merge_asof_with_the_staleness_bound():
    ta, a, tb, b = _two_feeds(1)
    e = _engine(LEGS)
    _send_feeds(e, ta, a, tb, b)
    rows = _asof_rows(ta, a, tb, b, 2.0)
    v = e.snapshot.series[("pair", (("venue", "x"),))]
    assert v.observations == rows.shape[0]
    np.testing.assert_allclose(v.mean, rows.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(v.variance, rows.var(axis=0, ddof=1), rtol=1e-9)
    sm = need_module("statsmodels.api")
    fit = sm.OLS(rows[:, 1], sm.add_constant(rows[:, 0])).fit()       # statsmodels OLS
    assert v.regression.coefficients[0] == pytest.approx(float(fit.params[1]), rel=1e-9)
    stale = ta.size + tb.size - rows.shape[0]
    assert e.rejected["stale_leg"] == stale > 0


def test_transforms_apply_to_joined_rows():
    ta, a, tb, b = _two_feeds(2)
    e = _engine(LEGS.replace('max_leg_age = "2s"', 'max_leg_age = "2s"\n'
                             'transform = { alpha = "log_return", beta = "log_return" }'))
    _send_feeds(e, ta, a, tb, b)
    rows = _asof_rows(ta, a, tb, b, 2.0)
    r = np.diff(np.log(rows), axis=0)                                   # numpy
    v = e.snapshot.series[("pair", (("venue", "x"),))]
    assert v.observations == r.shape[0]
    np.testing.assert_allclose(v.mean, r.mean(axis=0), rtol=1e-9, atol=1e-15)


def test_legs_state_survives_a_checkpoint():
    e = _engine(LEGS)
    e.ingest(b"px.x.alpha", encode(10.0, time=100.0), now=100.0)
    e.flush(100.0)
    assert e.snapshot.series == {}                      # one leg only: no row yet
    blob = cpmod.encode_checkpoint(cpmod.collect_columns(e), cpmod.stream_definitions(e),
                                   100.0, {})
    fresh = _engine(LEGS)
    cpmod.restore_checkpoint(fresh, cpmod.decode_checkpoint(blob), now=100.5)
    fresh.ingest(b"px.x.beta", encode(20.0, time=101.0), now=101.0)
    fresh.flush(101.0)
    assert fresh.snapshot.series[("pair", (("venue", "x"),))].mean == (10.0, 20.0)


@pytest.mark.parametrize("extra, words", [
    ('legs = { alpha = "px.a", beta = "px.b" }\ntopic = "px"', ["topic", "and legs"]),
    ('legs = { alpha = "px.a" }', ["legs", "at least two"]),
    ('legs = { alpha = "px.{v}.a", beta = "px.b" }', ["legs.beta", "same labels"]),
    ('legs = { alpha = "px.a", beta = "px.a" }', ["legs.beta", "leg 'alpha'"]),
    ('topic = "px"\nfields = ["a"]\nmax_leg_age = "2s"', ["max_leg_age", "needs legs"]),
    ('legs = { alpha = "px.a", beta = "px.b" }\nfields = ["alpha", "gamma"]',
     ["fields", "each leg"]),
])
def test_bad_leg_keys_are_clear_errors(extra, words):
    with pytest.raises(ConfigError) as err:
        parse_config(SOURCE + f'[[stream]]\nname = "p"\n{extra}\n')
    for w in words:
        assert w in str(err.value)


def test_a_leg_topic_no_source_subscribes_to_is_an_error():
    text = """
[[source]]
socket = "sub"
connect = "tcp://127.0.0.1:7999"
topics = ["px.a"]

[[stream]]
name = "p"
legs = { alpha = "px.a", beta = "fx.b" }
"""
    with pytest.raises(ConfigError, match=r"stream\[0\]\.legs\.beta = 'fx.b' is a topic no source"):
        parse_config(text)


def test_legs_through_the_hot_path_equal_one_by_one():
    ta, a, tb, b = _two_feeds(5, 3000)
    ticks = sorted([(t, b"px.x.alpha", v) for t, v in zip(ta, a, strict=True)]
                   + [(t, b"px.x.beta", v) for t, v in zip(tb, b, strict=True)])
    one, many = _engine(LEGS), _engine(LEGS)
    for part in np.array_split(np.arange(len(ticks)), 10):
        topics = [ticks[i][1] for i in part]
        bodies = [encode({"alpha" if ticks[i][1].endswith(b"alpha") else "beta":
                          float(ticks[i][2])}, time=float(ticks[i][0])) for i in part]
        now = ticks[part[-1]][0]
        for tp, body in zip(topics, bodies, strict=True):
            one.ingest(tp, body, now)
        many.ingest_many(topics, bodies, now)
        one.flush(now)
        many.flush(now)
    key = ("pair", (("venue", "x"),))
    assert many.snapshot.series[key] == one.snapshot.series[key]
    assert many.rejected == one.rejected


# ------------------------------------------------------------------ sessions

SESSIONS = SOURCE + """
[[stream]]
name = "vwap"
topic = "trade.{sym}"
fields = ["price"]
session_reset = "17:00 America/New_York"
"""


def _utc(*args) -> float:
    from datetime import datetime
    return datetime(*args, tzinfo=UTC).timestamp()


@pytest.mark.parametrize("before, boundary", [
    # US rule (common practice): daylight saving starts the second Sunday of March and ends
    # the first Sunday of November; 17:00 is 21:00 UTC under EDT, 22:00 UTC under EST
    (_utc(2026, 3, 7, 23, 0), _utc(2026, 3, 8, 21, 0)),     # the 23-hour session
    (_utc(2026, 10, 31, 22, 0), _utc(2026, 11, 1, 22, 0)),  # the 25-hour session
    (_utc(2026, 3, 8, 21, 0), _utc(2026, 3, 9, 21, 0)),     # exactly at one: the next
])
def test_session_boundary_follows_daylight_saving(before, boundary):
    from sigmad.daemon.config.session import SessionReset
    assert SessionReset.parse("17:00 America/New_York").next_after(before) == boundary


def test_session_reset_exports_closing_values_once_and_starts_afresh_at_a_dst_change():
    from prometheus_client import CollectorRegistry, generate_latest
    from sigmad.daemon.export.model import HealthCollector
    e = _engine(SESSIONS)
    registry = CollectorRegistry()
    registry.register(HealthCollector(lambda: e.snapshot))
    boundary = _utc(2026, 3, 8, 21, 0)       # 17:00 EDT on the first day of EDT
    rng = np.random.default_rng(6)
    p1, s1 = rng.normal(100, 1, 40), rng.integers(1, 500, 40).astype(float)
    p2, s2 = rng.normal(101, 1, 30), rng.integers(1, 500, 30).astype(float)
    start = boundary - 7200.0
    e.flush(start)
    for i in range(40):   # size-weighted: the trade size is the weight
        e.ingest(b"trade.abc", encode({"price": p1[i]}, weight=s1[i]), now=start + i)
    e.flush(boundary - 1.0)                  # 16:59:59 EDT (21:59:59 would be EST's)
    assert e.snapshot.closed == ()
    e.flush(boundary + 0.5)                  # past 17:00 EDT: the session closes
    for i in range(30):
        e.ingest(b"trade.abc", encode({"price": p2[i]}, weight=s2[i]), now=boundary + 1 + i)
    e.flush(boundary + 60.0)
    (name, at, views), = e.snapshot.closed
    assert (name, at) == ("vwap", boundary)
    assert views[0].mean[0] == pytest.approx(float(np.average(p1, weights=s1)), rel=1e-12)
    now = e.snapshot.series[("vwap", (("sym", "abc"),))]
    assert now.mean[0] == pytest.approx(float(np.average(p2, weights=s2)), rel=1e-12)
    assert now.observations == 30
    text = generate_latest(registry).decode()
    assert 'sigmad_session_close_timestamp_seconds{stream="vwap"} 1.7730036e+09' in text
    assert text.count("sigmad_session_close_mean{") == 1
    assert 'sigmad_session_close_observations{stream="vwap",sym="abc"} 40.0' in text
    doc = snapshot_json(e.snapshot, boundary + 60.0)
    assert doc["sessions"]["vwap"]["closed_at"] == boundary
    # the next boundary is a day later on the local clock (EDT now: 21:00 UTC again)
    e.flush(_utc(2026, 3, 9, 20, 59))
    assert e.snapshot.closed[0][1] == boundary
    e.flush(_utc(2026, 3, 9, 21, 0, 1))
    assert e.snapshot.closed[0][1] == _utc(2026, 3, 9, 21, 0)
    assert e.snapshot.closed[0][2][0].observations == 30


def test_rows_waiting_at_the_boundary_and_the_previous_price_carry_over():
    text = SESSIONS.replace('fields = ["price"]', 'fields = ["price"]\n'
                            'transform = { price = "difference" }')
    e = _engine(text)
    boundary = _utc(2026, 3, 8, 21, 0)
    e.flush(boundary - 10)
    e.ingest(b"trade.abc", encode({"price": [10.0, 11.0]}, time=[boundary - 5, boundary - 4]),
             now=boundary - 4)
    e.flush(boundary - 3)
    e.ingest(b"trade.abc", encode({"price": 14.0}, time=boundary + 0.1), now=boundary + 0.1)
    e.flush(boundary + 0.2)
    v = e.snapshot.series[("vwap", (("sym", "abc"),))]
    assert (v.observations, v.mean[0]) == (1, 3.0)      # 14 - 11: across the boundary
    assert e.snapshot.closed[0][2][0].mean[0] == 1.0


@pytest.mark.parametrize("value, words", [
    ('"17:00 Mars/Olympus_Mons"', ["session_reset", "Mars/Olympus_Mons", "does not exist",
                                   "'vwap'"]),
    ('"25:00 UTC"', ["session_reset", "time of day"]),
    ('"5pm New York"', ["session_reset", "HH:MM"]),
    ("1700", ["session_reset", "string"]),
])
def test_bad_session_reset_is_a_clear_error(value, words):
    with pytest.raises(ConfigError) as err:
        parse_config(SESSIONS.replace('"17:00 America/New_York"', value))
    for w in words:
        assert w in str(err.value)


# ------------------------------------------------------------------ hostile input

HOSTILE = SOURCE + """
[[stream]]
name = "pair"
legs = { x = "lg.a", y = "lg.b" }
max_leg_age = "5s"
transform = { x = "log_return", y = "difference" }
volatility_unit = "1d"
regression = { y = "y", x = ["x"] }
session_reset = "17:00 America/New_York"

[[stream]]
name = "mids"
topic = "mid.{k}"
fields = ["v"]
transform = { v = "log_return" }
volatility_unit = "1h"
"""


def test_a_leg_whose_price_falls_from_1e15_to_1e_308_keeps_the_pair_finite():
    # the fuzz below found it: the log return's price ratio underflowed to 0 and the
    # pair's moments and regression took -inf and NaN; reference: math.log of each price
    from test_hostile import NOW, finite_everywhere

    e = _engine(HOSTILE)
    e.ingest(b"lg.a", encode({"x": [10.0, 11.0]}, time=[NOW - 2, NOW - 1]), NOW)
    e.ingest(b"lg.b", encode({"y": [5.0, 6.0]}, time=[NOW - 1.5, NOW - 0.5]), NOW)
    e.flush(NOW)
    e.ingest(b"lg.a", msgpack.packb({"values": {"x": [4503599627370496.0,
                                                      1.1125369292536007e-308]}}), NOW)
    e.flush(NOW)
    state = e.export_state()
    assert finite_everywhere(state)
    pair = next(d for d in state if d["stream"] == "pair")
    assert pair["observations"] == 4      # the row was taken; its x is the log return
    assert pair["spread"][0] == pytest.approx(math.log(1.1125369292536007e-308)
                                              - math.log(4503599627370496.0), rel=1e-14)


@pytest.mark.slow
def test_fuzzed_messages_to_legs_and_transforms_never_escape_and_state_stays_finite():
    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as hst
    from test_hostile import NOW, bodies, finite_everywhere

    topics = hst.sampled_from([b"lg.a", b"lg.b", b"mid.q", b"mid.r"])

    @settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(hst.lists(hst.tuples(topics, bodies), min_size=1, max_size=12))
    def run(batch):
        e = _engine(HOSTILE)
        e.ingest(b"lg.a", encode({"x": [10.0, 11.0]}, time=[NOW - 2, NOW - 1]), NOW)
        e.ingest(b"lg.b", encode({"y": [5.0, 6.0]}, time=[NOW - 1.5, NOW - 0.5]), NOW)
        e.ingest(b"mid.q", encode({"v": [3.0, 3.1, 3.2]}, time=[NOW - 3, NOW - 2, NOW - 1]),
                 NOW)
        e.flush(NOW)
        for topic, body in batch:
            before = sorted(e.export_state(), key=lambda d: (d["stream"], d["labels"]))
            queued = e.ingest(topic, body, NOW)
            e.flush(NOW)
            after = sorted(e.export_state(), key=lambda d: (d["stream"], d["labels"]))
            if queued == 0:
                assert after == before
            assert finite_everywhere(after)
            for v in e.snapshot.series.values():   # NaN: not defined yet, left out
                assert not any(math.isinf(x) for _, x in v.volatility)
    run()


def test_the_merge_tier_pools_volatility_as_one_daemon_would():
    from sigmad.daemon.cluster.merge import pool
    rng = np.random.default_rng(12)
    mids = 100.0 * np.exp(np.cumsum(rng.normal(0, 0.001, 200)))
    times = np.cumsum(rng.exponential(1.0, 200))
    shards = []
    for part in (slice(0, 120), slice(119, 200)):   # each shard saw its own span of ticks
        e = _engine(RETURNS)
        e.ingest(b"px.aaa", encode({"mid": mids[part], "size": np.ones(200)[part]},
                                   time=times[part]), now=times[part][-1])
        e.flush(1.0)
        shards.append(e.stream("px").series[("aaa",)])
    pooled = pool(shards)
    r, dt = np.diff(np.log(mids)), np.diff(times)
    # no forgetting: the mean of r**2 / dt over every return (numpy)
    assert pooled.volatility.rate[0] == pytest.approx(float(np.mean(r * r / dt)), rel=1e-12)


def test_a_non_positive_price_is_logged_with_its_stream_and_field(caplog):
    e = _engine(RETURNS)
    e.ingest(b"px.aaa", encode({"mid": [100.0, -2.0], "size": [1.0, 1.0]}, time=[1.0, 2.0]),
             now=2.0)
    with caplog.at_level("WARNING", logger="sigmad.engine"):
        e.flush(2.0)
    assert "px{sym=aaa}" in caplog.text   # the series (one format in every log line), then
    # the reason and its bound
    assert "not_positive (log_return of mid needs a price > 0)" in caplog.text


def test_a_series_holding_only_its_first_price_is_not_idle():
    e = _engine(RETURNS + 'idle_expiry = "1m"\n')
    e.ingest(b"px.aaa", encode({"mid": 100.0, "size": 1.0}, time=1000.0), now=1000.0)
    e.flush(1000.0)
    assert e.expire_idle(1030.0) == 0            # 30 s: kept with its first price
    e.ingest(b"px.aaa", encode({"mid": 101.0, "size": 1.0}, time=1031.0), now=1031.0)
    e.flush(1031.0)
    assert _view(e, "aaa").observations == 1
    assert e.expire_idle(1100.0) == 1            # idle for over a minute: gone


def test_a_leg_topic_another_stream_takes_is_an_error():
    text = LEGS + '\n[[stream]]\nname = "other"\ntopic = "px.{v}.beta"\nfields = ["q"]\n'
    with pytest.raises(ConfigError, match=r"stream\[1\]\.topic = 'px.\{v\}.beta' could take "
                                          r"the same topics as stream\[0\]"):
        parse_config(text)


def test_a_checkpoint_from_an_earlier_session_closes_at_once():
    e = _engine(SESSIONS)
    boundary = _utc(2026, 3, 8, 21, 0)
    e.flush(boundary - 100)
    e.ingest(b"trade.abc", encode({"price": [10.0, 12.0]}), now=boundary - 50)
    e.flush(boundary - 50)
    blob = cpmod.encode_checkpoint(cpmod.collect_columns(e), cpmod.stream_definitions(e),
                                   boundary - 50, {})
    fresh = _engine(SESSIONS)
    cpmod.restore_checkpoint(fresh, cpmod.decode_checkpoint(blob), now=boundary + 3600)
    fresh.flush(boundary + 3600)                  # restarted an hour after the close
    (_, at, views), = fresh.snapshot.closed
    assert at == boundary and views[0].mean[0] == 11.0
    assert fresh.snapshot.series == {}
