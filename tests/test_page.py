"""The status page and /api/state rendered in-process from a real Engine.

The page must parse strictly (it is written as well-formed XML), show every
series, and its numbers must be the estimates, checked against numpy, scipy and
statsmodels on the same values (named beside each check).
"""

from __future__ import annotations

import json
import math
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

import numpy as np
import pytest
from conftest import need_module
from sigmad.daemon.config.load import parse_config
from sigmad.daemon.engine.engine import Engine
from sigmad.daemon.engine.snapshot import Snapshot
from sigmad.daemon.export.api_state import snapshot_json
from sigmad.daemon.ingest.wire import encode
from sigmad.daemon.web.history import History
from sigmad.daemon.web.page import CAUTION, render_page, series_id
from sigmad.daemon.web.plots import LEFT, RIGHT, W, density_range
from sigmad.daemon.web.server import json_bytes
from sigmad.daemon.web.svg import num

SVG = "{http://www.w3.org/2000/svg}"
XHTML = "{http://www.w3.org/1999/xhtml}"

CONFIG = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:7998"

[[stream]]
name = "lat"
topic = "lat.{region}"
fields = ["ms"]
quantiles = [0.5, 0.99]
outlier_sigmas = [3.0]
mixture = { components = 2, log = true, warmup = 200 }

[[stream]]
name = "temp"
topic = "temp.{room}"
fields = ["c"]
quantiles = [0.1, 0.9]

[[stream]]
name = "pair"
topic = "px.pair"
fields = ["a", "b"]
regression = { y = "b", x = ["a"] }

[[stream]]
name = "env"
topic = "env"
fields = ["t", "h", "p"]
"""

T0 = 1_800_000_000.0


def _data():
    rng = np.random.default_rng(11)
    hit = rng.random(1500) < 0.7
    lat = np.where(hit, rng.lognormal(math.log(8.0), 0.2, 1500),
                   rng.lognormal(math.log(50.0), 0.3, 1500))
    temp = {r: rng.normal(20.0 + i, 0.5 + i, 300) for i, r in enumerate(("a", "b"))}
    a = rng.normal(100.0, 4.0, 500)
    b = 1.5 * a + 2.0 + rng.normal(0.0, 0.4, 500)
    env = rng.multivariate_normal([20, 0.5, 1000], [[1, 0.05, 2], [0.05, 0.01, 0.1],
                                                    [2, 0.1, 25]], 400)
    return lat, temp, a, b, env


@pytest.fixture(scope="module")
def rendered():
    engine = Engine(parse_config(CONFIG))
    lat, temp, a, b, env = _data()
    history = History(every=1.0, length=10)
    for step in range(3):      # three flushes a second apart: three history samples
        now = T0 + step
        sl = slice(step * 500, (step + 1) * 500)
        engine.ingest(b"lat.north", encode({"ms": lat[sl]}), now)
        if step == 0:
            for room, v in temp.items():
                engine.ingest(f"temp.{room}".encode(), encode({"c": v}), now)
            engine.ingest(b"px.pair", encode({"a": a, "b": b}), now)
            engine.ingest(b"env", encode({"t": env[:, 0], "h": env[:, 1], "p": env[:, 2]}),
                          now)
        snap = engine.flush(now)
        history.record(snap, now)
    page = render_page(snap, T0 + 3, history).decode()
    return engine, snap, history, page, (lat, temp, a, b, env)


def _tree(page: str) -> ET.Element:
    assert page.startswith("<!DOCTYPE html>\n")
    return ET.fromstring(page.split("\n", 1)[1])   # strict XML: raises on any unclosed tag


def _cards(root: ET.Element) -> dict[str, ET.Element]:
    return {c.get("data-series"): c for c in root.iter(f"{XHTML}section")}


def _text(el: ET.Element) -> str:
    return "".join(el.itertext())


def test_page_is_well_formed_and_the_html_parser_sees_no_unclosed_tags(rendered):
    page = rendered[3]
    _tree(page)

    class Depth(HTMLParser):
        void = {"meta", "br", "img", "input", "link", "hr"}

        def __init__(self):
            super().__init__()
            self.stack: list[str] = []

        def handle_starttag(self, tag, attrs):
            if tag not in self.void:
                self.stack.append(tag)

        def handle_startendtag(self, tag, attrs):
            pass

        def handle_endtag(self, tag):
            assert self.stack and self.stack[-1] == tag, (tag, self.stack[-3:])
            self.stack.pop()

    p = Depth()
    p.feed(page)
    p.close()
    assert p.stack == []
    # nothing fetched from elsewhere: no script, no external src/href
    assert "<script" not in page and "src=" not in page
    assert 'http-equiv="refresh"' in page and CAUTION in page


def test_every_series_has_a_card_with_a_titled_plot(rendered):
    _, snap, _, page, _ = rendered
    cards = _cards(_tree(page))
    assert set(cards) == {series_id(v) for v in snap.series.values()}
    assert set(cards) == {"lat{region=north}", "temp{room=a}", "temp{room=b}", "pair", "env"}
    for name, card in cards.items():
        svgs = [s for s in card.iter(f"{SVG}svg") if s.get("class") == "plot"]
        assert len(svgs) == 1, name
        assert svgs[0].find(f"{SVG}title").text


def test_means_and_stddevs_on_the_page_are_numpys(rendered):
    _, _, _, page, (lat, temp, a, b, env) = rendered
    cards = _cards(_tree(page))
    columns = {"lat{region=north}": {"ms": lat}, "temp{room=a}": {"c": temp["a"]},
               "temp{room=b}": {"c": temp["b"]}, "pair": {"a": a, "b": b},
               "env": {"t": env[:, 0], "h": env[:, 1], "p": env[:, 2]}}
    for name, fields in columns.items():
        rows = {r.get("data-field"): r for r in cards[name].iter(f"{XHTML}tr")
                if r.get("class") == "field"}
        for f, x in fields.items():
            mean = next(e for e in rows[f].iter() if e.get("class") == "mean")
            sd = next(e for e in rows[f].iter() if e.get("class") == "sd")
            # reference: numpy.mean and numpy.std(ddof=1) (the "reliability" correction of
            # unit weights is the unbiased n - 1 divisor)
            assert float(mean.get("data-value")) == pytest.approx(np.mean(x), rel=1e-12)
            assert float(sd.get("data-value")) == pytest.approx(np.std(x, ddof=1), rel=1e-10)
            assert mean.text == num(float(mean.get("data-value")))
            assert sd.text == num(float(sd.get("data-value")))


def test_normal_quantiles_on_the_page_are_scipys(rendered):
    stats = need_module("scipy.stats")
    _, _, _, page, (_, temp, *_rest) = rendered
    card = _cards(_tree(page))["temp{room=b}"]
    text = _text(card)
    x = temp["b"]
    for q in (0.1, 0.9):
        # reference: scipy.stats.norm.ppf with numpy's mean and std(ddof=1)
        ref = stats.norm.ppf(q, np.mean(x), np.std(x, ddof=1))
        assert f"p{q * 100:g} {num(ref)}" in text


def test_regression_coefficients_on_the_page_are_statsmodels_ols(rendered):
    sm = need_module("statsmodels.api")
    _, _, _, page, (_, _, a, b, _) = rendered
    card = _cards(_tree(page))["pair"]
    coefs = [float(e.get("data-value")) for e in card.iter() if e.get("class") == "coef"]
    fit = sm.OLS(b, sm.add_constant(a)).fit()
    # reference: statsmodels OLS params (slope, then intercept as the page lists terms)
    np.testing.assert_allclose(coefs, [fit.params[1], fit.params[0]], rtol=1e-8)
    text = _text(card)
    assert num(fit.bse[1], 3) in text and f"R² {num(fit.rsquared, 3)}" in text
    fits = [p for p in card.iter(f"{SVG}path") if p.get("class") == "fit"]
    assert len(fits) == 1


def test_mixture_card_draws_each_component_and_the_estimators_quantiles(rendered):
    engine, snap, _, page, _ = rendered
    card = _cards(_tree(page))["lat{region=north}"]
    view = next(v for v in snap.series.values() if v.stream == "lat")
    assert view.mixture.warm and view.mixture.log
    comps = [p for p in card.iter(f"{SVG}path") if p.get("class") == "component"]
    assert len(comps) == 2
    text = _text(card)
    series = next(s for st in engine.streams for s in st.series.values()
                  if st.name == "lat")
    for q in (0.5, 0.99):
        # the page shows the mixture's own quantile (estimators.Mixture.quantile)
        assert f"p{q * 100:g} {num(float(series.mixture.quantile(q)))}" in text
    # component means in the stream's units: log-normal means exp(mu + s^2/2)
    # (the log-normal mean, common practice)
    for mu, s in zip(series.mixture.means[:, 0], series.mixture.stddevs[:, 0], strict=True):
        assert num(math.exp(mu + s * s / 2)) in text


def test_density_curve_points_are_the_mixture_density():
    """The drawn curve's peak sits where the log-space density peaks (scipy.stats.norm)."""
    stats = need_module("scipy.stats")
    engine = Engine(parse_config(CONFIG))
    rng = np.random.default_rng(3)
    engine.ingest(b"lat.x", encode({"ms": rng.lognormal(math.log(20.0), 0.3, 2000)}), T0)
    snap = engine.flush(T0)
    v = next(iter(snap.series.values()))
    root = _tree(render_page(snap, T0).decode())
    path = next(p for p in root.iter(f"{SVG}path") if p.get("class") == "density")
    pts = np.array([[float(c) for c in pair.split(",")]
                    for pair in path.get("d")[1:].split()])
    m = v.mixture
    # reference: on the log axis the drawn height is x p(x) = sum_k w_k norm.pdf(ln x)
    grid = np.linspace(math.log(5.0), math.log(80.0), 4001)
    dens = sum(w * stats.norm.pdf(grid, mu[0], s[0])
               for w, mu, s in zip(m.weights, m.log_means, m.log_stddevs, strict=True))
    peak_x = pts[np.argmin(pts[:, 1]), 0]         # SVG y grows downwards
    # the page's log axis maps [lo, hi] of density_range linearly in log10 onto the frame
    lo, hi = (math.log10(x) for x in density_range(v, 0))
    log10_peak = lo + (peak_x - LEFT) * (hi - lo) / (W - RIGHT - LEFT)
    assert 10 ** log10_peak == pytest.approx(math.exp(grid[np.argmax(dens)]), rel=0.02)


def test_page_caps_cards_to_the_most_recently_updated_and_says_so():
    engine = Engine(parse_config(CONFIG))
    for i in range(12):
        engine.ingest(f"temp.r{i:02d}".encode(), encode({"c": [1.0, 2.0, 3.0]}), T0 + i)
        engine.flush(T0 + i)
    snap = engine.snapshot
    page = render_page(snap, T0 + 20, None, limit=5)
    cards = _cards(_tree(page.decode()))
    assert set(cards) == {f"temp{{room=r{i:02d}}}" for i in range(7, 12)}
    assert b"Showing the 5 most recently updated of 12 series" in page


def test_history_is_bounded_sampled_at_its_interval_and_forgets_expired_series(rendered):
    engine, snap, _, _, _ = rendered
    h = History(every=5.0, length=3)
    assert h.record(snap, 0.0) and not h.record(snap, 4.9) and h.record(snap, 5.0)
    for t in (10.0, 15.0, 20.0):
        h.record(snap, t)
    key = next(iter(snap.series))
    pts = h.of(key)
    assert [t for t, _ in pts] == [10.0, 15.0, 20.0]
    assert pts[-1][1] == snap.series[key].mean
    h.record(Snapshot(taken_at=30.0), 30.0)
    assert h.of(key) == () and len(h) == 0


def test_api_state_carries_history_and_fitted_mixture_parameters(rendered):
    engine, snap, history, _, _ = rendered
    doc = json.loads(json_bytes(snapshot_json(snap, T0 + 3, history)))
    lat = next(s for s in doc["series"] if s["stream"] == "lat")
    assert [p[0] for p in lat["history"]] == [T0, T0 + 1, T0 + 2]
    assert lat["history"][-1][1] == list(snap.series[("lat", (("region", "north"),))].mean)
    series = next(s for st in engine.streams for s in st.series.values()
                  if st.name == "lat")
    np.testing.assert_allclose(np.array(lat["mixture"]["log_means"]), series.mixture.means,
                               rtol=1e-15)
    np.testing.assert_allclose(np.array(lat["mixture"]["means"]),
                               series.mixture.original_means, rtol=1e-15)
    pair = next(s for s in doc["series"] if s["stream"] == "pair")
    assert pair["regression"]["y"] == "b"


def test_history_follows_at_most_max_series_the_most_recently_updated():
    from sigmad.daemon.engine.snapshot import Snapshot
    from sigmad.daemon.web.history import History

    class _View:
        def __init__(self, t):
            self.last_update, self.mean = t, (t,)
    snap = Snapshot(taken_at=1.0, series={("s", (("k", str(i)),)): _View(float(i))
                                          for i in range(50)})
    h = History(every=1.0, length=4, max_series=10)
    assert h.record(snap, 100.0)
    assert len(h) == 10
    assert h.of(("s", (("k", "49"),))) == ((100.0, (49.0,)),)   # newest kept
    assert h.of(("s", (("k", "0"),))) == ()                     # oldest not followed
