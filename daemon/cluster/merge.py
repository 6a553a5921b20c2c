"""The merge tier: pool several shards' state snapshots into one exported snapshot.

A merger SUB-connects to every ``[merge] connect`` endpoint, keeps the latest
snapshot of each shard (see :mod:`daemon.publish`), forgets a shard that has
been silent for ``shard_expiry``, and builds one ``SeriesView`` per series key
by merging the shards' estimators:

- ``Moments.merge`` (Chan, Golub & LeVeque) and ``Regression.merge`` (stacked R
  factors) are exact: the result is what one daemon that saw every shard's
  observations would hold (with event-time or no forgetting; with count-based
  forgetting each shard's state is as of its own latest observation).
- Mixtures are pooled exactly (K components per shard, weighted by their W) and
  then reduced back to the stream's K by Runnalls' method, which keeps the
  pooled mean and covariance; quantiles come from that reduced mixture.
- Counters (observations, outliers) are sums of the shards' own counts; so are the
  threshold histograms, whose decayed shares pool exactly (``Thresholds.merge``).

A merger may have ``[[source]]``s of its own: its engine's series are pooled
as one more shard. With ``[publish]`` it publishes the pooled states, so a
merger can feed a merger above it.

The merger interprets shard states through its own ``[[stream]]`` tables, which
must match the shards' (fields, estimators, half-life); a series state that does
not is counted in ``sigmad_rejected_total{reason="state_incompatible"}``.
"""

from __future__ import annotations

import logging
from collections import Counter
from collections.abc import Iterable, Iterator
from dataclasses import dataclass

import zmq
from prometheus_client.metrics_core import Metric
from sigmad.daemon.cluster.publish import MAX_STATE_BYTES, STATE_FORMAT, STATE_TOPIC
from sigmad.daemon.config.schema import Config
from sigmad.daemon.engine.engine import Series, StreamState, restore_series, series_state, view_of
from sigmad.daemon.engine.snapshot import Health, SeriesView, Snapshot
from sigmad.daemon.export.model import METRICS
from sigmad.daemon.ingest.topics import series_text
from sigmad.daemon.ingest.wire import MsgpackError, unpack_bounded
from sigmad.estimators import IncompatibleError, Volatility

log = logging.getLogger("sigmad.merge")

MAX_SHARDS = 1024          # live shards kept; more are refused (a misdirected publisher)
MAX_EXPIRED_SHOWN = 1024   # expired shard ids remembered for the metric
MAX_SHARD_ID = 200
MAX_SERIES_PER_SHARD = 1_000_000

Key = tuple[str, tuple[tuple[str, str], ...]]


class StateError(ValueError):
    """A state message that is not a well-formed snapshot; ``reason`` is its counter label."""

    def __init__(self, reason: str, detail: str) -> None:
        super().__init__(f"{reason}: {detail}")
        self.reason = reason


def decode_state(body: bytes) -> dict:
    """Unpack and check a state message's envelope (not the series in it). Bounded: the
    unpacker's limits derive from the body length. Raises StateError. O(len(body))."""
    n = len(body)
    if n > MAX_STATE_BYTES:
        raise StateError("state_too_large", f"{n} bytes exceeds {MAX_STATE_BYTES}")
    try:
        msg = unpack_bounded(body, max_depth=32)   # a state message nests about 8 levels
    except MsgpackError as exc:
        raise StateError("state_malformed", f"not msgpack ({exc.kind})") from None
    if not isinstance(msg, dict):
        raise StateError("state_malformed", "not a map")
    if msg.get("format") != STATE_FORMAT:
        raise StateError("state_malformed", f"format {msg.get('format')!r} is not "
                         f"{STATE_FORMAT}")
    shard = msg.get("shard")
    if not (isinstance(shard, str) and 0 < len(shard) <= MAX_SHARD_ID and shard.isprintable()):
        raise StateError("state_malformed", f"shard id {shard!r} is not a printable string "
                         f"of 1..{MAX_SHARD_ID} characters")
    if not isinstance(msg.get("seq"), int) or not isinstance(msg.get("sent_at"), (int, float)):
        raise StateError("state_malformed", "seq must be an integer and sent_at a number")
    series = msg.get("series")
    if not isinstance(series, list) or len(series) > MAX_SERIES_PER_SHARD:
        raise StateError("state_malformed", "series must be an array")
    return msg


@dataclass(frozen=True, slots=True)
class ShardStatus:
    """What the shard metrics show, swapped by reference like a Snapshot."""

    live: tuple[tuple[str, float], ...] = ()    # (shard id, wall time of its last snapshot)
    expired: tuple[str, ...] = ()


@dataclass(slots=True)
class _Shard:
    received_at: float
    seq: int
    series: dict[Key, Series]


def _key(st: StreamState, labels: tuple[str, ...]) -> Key:
    return st.name, tuple(zip(st.cfg.topic.labels, labels, strict=True))


def pool(parts: list[Series]) -> Series:
    """One series from several shards' copies of it; the inputs are not changed.

    Moments and regression merge exactly; the mixtures are pooled, then reduced to
    the stream's component count. O(shards d**2 + shards k**3 + (shards K)**3 d**3).
    """
    first = parts[0]
    st = first.stream
    out = st.new_series(first.labels)
    out.moments = first.moments.copy()
    if first.regression is not None:
        out.regression = first.regression.copy()
    mix = None if first.mixture is None else first.mixture.copy()
    for p in parts[1:]:
        out.moments.merge(p.moments)
        if out.regression is not None:
            out.regression.merge(p.regression)
        if mix is not None:
            mix.merge(p.mixture)
    if mix is not None and mix.components > st.cfg.mixture.components:
        mix = mix.reduce(st.cfg.mixture.components)
    out.mixture = mix
    if first.volatility is not None:   # pools exactly, like the moments
        out.volatility = Volatility.from_dict(first.volatility.to_dict())
        for p in parts[1:]:
            out.volatility.merge(p.volatility)
    out.observations = sum(p.observations for p in parts)
    out.outliers = [sum(c) for c in zip(*(p.outliers for p in parts), strict=True)]
    out.thresholds = [t.copy() for t in first.thresholds] or ()
    for p in parts[1:]:
        for mine, theirs in zip(out.thresholds, p.thresholds, strict=True):
            mine.merge(theirs)
    out.version = sum(p.version for p in parts)
    out.last_update = max(p.last_update for p in parts)
    return out


class Merger:
    """Receives shard snapshots and builds the pooled ``snapshot`` (engine thread only).

    Parameters
    ----------
    ctx : zmq.Context
    config : Config
        Needs ``merge``; its ``[[stream]]`` tables say how to read the shards' states.
    """

    def __init__(self, ctx: zmq.Context, config: Config) -> None:
        if config.merge is None:
            raise ValueError("a Merger needs a configuration with a [merge] table")
        self.cfg = config.merge
        self.streams = {s.name: StreamState(s) for s in config.streams}
        self.socket = ctx.socket(zmq.SUB)
        # ZeroMQ drops a peer that sends a larger frame before anything is allocated for it
        self.socket.setsockopt(zmq.MAXMSGSIZE, MAX_STATE_BYTES + 64)
        self.socket.setsockopt(zmq.RCVHWM, 64)
        self.socket.setsockopt(zmq.LINGER, 0)
        self.socket.setsockopt(zmq.SUBSCRIBE, STATE_TOPIC)
        try:
            for ep in self.cfg.connect:
                self.socket.connect(ep)
        except zmq.ZMQError:
            self.socket.close(0)
            raise
        self.shards: dict[str, _Shard] = {}
        self._expired: dict[str, None] = {}        # insertion-ordered set
        self.rejected: Counter[str] = Counter()
        self.received = 0
        self.rebuilds = 0
        self._cache: dict[Key, tuple[tuple, Series, SeriesView]] = {}
        self._dirty = True
        self.snapshot = Snapshot(taken_at=0.0)
        self.status = ShardStatus()

    # ------------------------------------------------------------- receiving
    def drain(self, now: float, limit: int = 256) -> int:
        """Receive waiting snapshots without blocking; returns how many. O(their size)."""
        n = 0
        while n < limit:
            try:
                frames = self.socket.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                break
            n += 1
            self.received += 1
            if len(frames) != 2 or frames[0] != STATE_TOPIC:
                self.rejected["state_malformed"] += 1
                continue
            self.accept(frames[1], now)
        return n

    def accept(self, body: bytes, now: float) -> None:
        """Take one shard snapshot as that shard's current state; count what is refused.

        A series whose version is unchanged since the shard's previous snapshot
        keeps its already-restored estimators. O(changed state).
        """
        try:
            msg = decode_state(body)
        except StateError as exc:
            self.rejected[exc.reason] += 1
            log.warning("refused a state message: %s", exc)
            return
        sid = msg["shard"]
        old = self.shards.get(sid)
        if old is None and len(self.shards) >= MAX_SHARDS:
            self.rejected["state_too_many_shards"] += 1
            return
        prev = old.series if old is not None else {}
        series: dict[Key, Series] = {}
        for d in msg["series"]:
            s = self._restore(d, prev)
            if s is not None:
                series[_key(s.stream, s.labels)] = s
        self.shards[sid] = _Shard(received_at=now, seq=msg["seq"], series=series)
        self._expired.pop(sid, None)
        self._dirty = True

    def _restore(self, d: object, prev: dict[Key, Series]) -> Series | None:
        if not isinstance(d, dict) or not isinstance(d.get("stream"), str):
            self.rejected["state_malformed"] += 1
            return None
        st = self.streams.get(d["stream"])
        if st is None:
            self.rejected["state_unknown_stream"] += 1
            return None
        labels = d.get("labels")
        if isinstance(labels, list) and len(labels) == len(st.cfg.topic.labels) \
                and all(isinstance(v, str) for v in labels):
            known = prev.get(_key(st, tuple(labels)))
            if known is not None and known.version == d.get("version"):
                return known
        try:
            return restore_series(st, d, exact_thresholds=True)
        except IncompatibleError as exc:
            self.rejected["state_incompatible"] += 1
            log.warning("refused a %s series state: %s", st.name, exc)
            return None

    def expire(self, now: float) -> int:
        """Forget shards silent for longer than ``shard_expiry``; returns how many."""
        gone = [sid for sid, sh in self.shards.items()
                if now - sh.received_at > self.cfg.shard_expiry]
        for sid in gone:
            del self.shards[sid]
            self._expired[sid] = None
            log.warning("shard %s silent for over %gs: left out of the pool", sid,
                        self.cfg.shard_expiry)
        while len(self._expired) > MAX_EXPIRED_SHOWN:
            del self._expired[next(iter(self._expired))]
        if gone:
            self._dirty = True
        return len(gone)

    # ------------------------------------------------------------- pooling
    def rebuild(self, now: float, local: Iterable[Series] = (),
                local_health: Health | None = None) -> Snapshot:
        """The pooled snapshot of the shards and of ``local`` series (a merger's own
        engine, when it has sources too, whose counters ``local_health`` are shown
        alongside the merger's). A series whose parts' versions are unchanged keeps
        its pooled state and view. O(series + changed state)."""
        self.status = ShardStatus(
            live=tuple(sorted((sid, sh.received_at) for sid, sh in self.shards.items())),
            expired=tuple(self._expired))
        local = list(local)
        if not self._dirty and not local:
            return self.snapshot
        parts: dict[Key, list[tuple[str, Series]]] = {}
        for s in local:
            parts.setdefault(_key(s.stream, s.labels), []).append(("", s))
        for sid, sh in sorted(self.shards.items()):
            for key, s in sh.series.items():
                parts.setdefault(key, []).append((sid, s))
        cache = {}
        for key, group in parts.items():
            signature = tuple((sid, s.version) for sid, s in group)
            hit = self._cache.get(key)
            if hit is not None and hit[0] == signature:
                cache[key] = hit
            else:
                try:
                    pooled = pool([s for _, s in group])
                    cache[key] = (signature, pooled, view_of(pooled))
                except IncompatibleError as exc:   # e.g. shards disagree on a mixture's K
                    self.rejected["state_incompatible"] += 1
                    log.warning("cannot pool %s: %s", series_text(
                        key[0], tuple(n for n, _ in key[1]), tuple(v for _, v in key[1])), exc)
        self._cache = cache
        self._dirty = False
        self.rebuilds += 1
        counts = Counter(key[0] for key in cache)
        own = local_health or Health()
        rejected = Counter(dict(own.rejected))
        rejected.update(self.rejected)   # (not +, which drops the counts at 0)
        self.snapshot = Snapshot(
            taken_at=now, series={k: v for k, (_, _, v) in cache.items()},
            series_per_stream=tuple((name, counts[name]) for name in self.streams),
            health=Health(messages=(*own.messages,
                                    ("merge " + " ".join(self.cfg.connect), self.received)),
                          rejected=tuple(sorted(rejected.items())),
                          sequence_gaps=own.sequence_gaps, flushes=self.rebuilds))
        return self.snapshot

    def pooled_states(self) -> list[dict]:
        """The pooled series as ``series_state`` dicts, so a merger with ``[publish]`` can
        feed a merger above it. As of the last ``rebuild``. O(pooled state)."""
        return [series_state(s) for _, s, _ in self._cache.values()]

    def close(self) -> None:
        self.socket.close(0)


class ShardCollector:
    """prometheus-client collector of the merger's shard metrics, read from ``status``."""

    def __init__(self, merger: Merger, clock) -> None:
        self._merger = merger
        self._clock = clock

    def collect(self) -> Iterator[Metric]:
        status, now = self._merger.status, self._clock()
        shards = Metric("sigmad_merge_shards", METRICS["sigmad_merge_shards"][1], "gauge")
        shards.add_sample("sigmad_merge_shards", {"state": "live"}, float(len(status.live)))
        shards.add_sample("sigmad_merge_shards", {"state": "expired"},
                          float(len(status.expired)))
        yield shards
        if status.live:
            age = Metric("sigmad_shard_age_seconds", METRICS["sigmad_shard_age_seconds"][1],
                         "gauge")
            for sid, at in status.live:
                age.add_sample("sigmad_shard_age_seconds", {"shard": sid}, max(0.0, now - at))
            yield age

    def describe(self) -> list:
        return []
