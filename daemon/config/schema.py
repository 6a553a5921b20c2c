"""The configuration schema: frozen dataclasses, one per TOML table, each key's default
declared once on its field (the reader, ``describe`` and README's table of keys take it
from here)."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any, Literal

from sigmad.daemon.config.errors import MISSING
from sigmad.daemon.config.session import SessionReset
from sigmad.daemon.config.units import show_duration, split_host_port
from sigmad.daemon.ingest.topics import TopicTemplate
from sigmad.estimators import HalfLife

#: Labels our metrics set themselves, so a topic template may not capture them
#: (plus every name starting with ``__``, which Prometheus reserves).
RESERVED_LABELS: frozenset[str] = frozenset((
    "stream", "field", "field_b", "q", "quantile", "component", "term", "threshold", "reason",
    "source", "le", "instance", "job", "correction", "shard", "state",
))


# --------------------------------------------------------------------------- dataclasses
# Each key's default is declared once, here; the table reader and the README's table
# of keys (checked by tests/test_config.py) take it from these fields.

def _duration(seconds: float | None) -> Any:
    """A field written in the TOML as a duration string (``"30s"``)."""
    return field(default=seconds, metadata={"duration": True})


@dataclass(frozen=True, slots=True)
class DaemonConfig:
    """The ``[daemon]`` table. Durations are in seconds; an ``http`` port of 0 lets the
    system pick a free one."""

    http: str = "127.0.0.1:9410"
    state_file: str | None = None
    checkpoint_every: float = _duration(30.0)
    tls_cert: str | None = None
    tls_key: str | None = None
    tls_client_ca: str | None = None
    max_message_bytes: int = 1_048_576
    max_batch_rows: int = 100_000
    max_topic_bytes: int = 256
    flush_every: float = _duration(0.05)
    max_clock_skew: float = _duration(86400.0)
    max_time_ahead: float = _duration(10.0)
    max_abs_value: float = 1e100
    strict_restore: bool = False
    log_rejected: int = 10

    @property
    def http_host(self) -> str:
        return split_host_port(self.http, "daemon.http")[0]

    @property
    def http_port(self) -> int:
        return split_host_port(self.http, "daemon.http")[1]


@dataclass(frozen=True, slots=True)
class MqttConfig:
    """What a ``socket = "mqtt"`` source adds: the broker session (see daemon/ingest/mqtt.py)."""

    host: str = field(metadata={"toml": False})      # from connect
    port: int = field(metadata={"toml": False})
    tls: bool = field(metadata={"toml": False})      # mqtts://
    client_id: str | None = None
    qos: int = 1
    shared_group: str | None = None
    username: str | None = None
    password_file: str | None = None
    tls_ca: str | None = None
    tls_cert: str | None = None
    tls_key: str | None = None
    session_expiry: float = _duration(86400.0)

    def subscriptions(self, topics: tuple[str, ...]) -> tuple[str, ...]:
        """The filters as subscribed: ``$share/<group>/<filter>`` in a shared group."""
        if self.shared_group is None:
            return topics
        return tuple(f"$share/{self.shared_group}/{t}" for t in topics)


@dataclass(frozen=True, slots=True)
class SourceConfig:
    """One ``[[source]]``: a ZeroMQ socket or an MQTT broker the daemon reads messages from."""

    socket: Literal["pull", "sub", "mqtt"]
    bind: tuple[str, ...] = ()
    connect: tuple[str, ...] = ()
    topics: tuple[str, ...] = ("",)
    curve_secret: str | None = None
    curve_allow: str | None = None
    high_water_mark: int = 10000
    mqtt: MqttConfig | None = field(default=None, metadata={"toml": False})  # socket = "mqtt"

    @property
    def endpoints(self) -> tuple[str, ...]:
        return self.bind or self.connect


@dataclass(frozen=True, slots=True)
class MixtureConfig:
    """A stream's ``mixture = {...}``: an online-EM Gaussian mixture."""

    components: int
    log: bool = False
    covariance: Literal["full", "diag"] = "full"
    warmup: int = 200
    seed: int = 0


@dataclass(frozen=True, slots=True)
class RegressionConfig:
    """A stream's ``regression = {...}``: recursive least squares of y on x."""

    y: str
    x: tuple[str, ...]
    intercept: bool = True


@dataclass(frozen=True, slots=True)
class StreamConfig:
    """One ``[[stream]]``: which topics it takes and what it estimates."""

    name: str
    topic: TopicTemplate
    fields: tuple[str, ...]
    half_life: HalfLife | None = None
    correction: Literal["none", "frequency", "reliability"] = "reliability"
    quantiles: tuple[float, ...] = (0.5, 0.9, 0.99)
    outlier_sigmas: tuple[float, ...] = ()
    outlier_warmup: int = 30
    mixture: MixtureConfig | None = None
    regression: RegressionConfig | None = None
    max_series: int = 1000
    idle_expiry: float | None = _duration(None)
    # per field, in field order: histogram bounds and exceedance thresholds (() = none)
    thresholds: tuple[tuple[float, ...], ...] = ()
    transform: tuple[tuple[str, str], ...] | None = None   # (field, "log_return" | ...)
    volatility_unit: float | None = _duration(None)
    legs: tuple[tuple[str, TopicTemplate], ...] | None = None   # (field, its topic)
    max_leg_age: float | None = _duration(None)
    session_reset: SessionReset | None = None
    # per field (low, high): rows with a value outside are rejected as out_of_range
    limits: tuple[tuple[float, float], ...] | None = None

    @property
    def templates(self) -> tuple[TopicTemplate, ...]:
        """Every topic template the stream takes: its legs', or its one topic."""
        return tuple(tpl for _, tpl in self.legs) if self.legs else (self.topic,)

    @property
    def dim(self) -> int:
        return len(self.fields)

    @property
    def transforms(self) -> tuple[str | None, ...]:
        """Each field's transform, in field order (None: the field passes through)."""
        kinds = dict(self.transform or ())
        return tuple(kinds.get(f) for f in self.fields)


@dataclass(frozen=True, slots=True)
class PublishConfig:
    """``[publish]``: this daemon publishes its state snapshots (a shard)."""

    bind: tuple[str, ...]
    every: float = _duration(2.0)


@dataclass(frozen=True, slots=True)
class FeedConfig:
    """``[feed]``: this daemon pushes each changed series' estimates on a PUB socket."""

    bind: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class MergeConfig:
    """``[merge]``: this daemon pools other daemons' snapshots (a merger)."""

    connect: tuple[str, ...]
    shard_expiry: float = _duration(30.0)


@dataclass(frozen=True, slots=True)
class Config:
    """A whole, validated configuration."""

    daemon: DaemonConfig = field(default_factory=DaemonConfig)
    sources: tuple[SourceConfig, ...] = ()
    streams: tuple[StreamConfig, ...] = ()
    publish: PublishConfig | None = None
    merge: MergeConfig | None = None
    feed: FeedConfig | None = None
    origin: str = "<string>"


def schema_defaults(schema: type) -> dict[str, object]:
    """Each key of a table's dataclass and its declared default (a sentinel: required)."""
    out: dict[str, object] = {}
    for f in dataclasses.fields(schema):
        if not f.metadata.get("toml", True):
            continue    # derived from other keys, not written in the TOML
        if f.default is not dataclasses.MISSING:
            out[f.name] = f.default
        elif f.default_factory is not dataclasses.MISSING:
            out[f.name] = f.default_factory()
        else:
            out[f.name] = MISSING
    return out


def show_default(schema: type, key: str) -> str:
    """A key's declared default as the README's table of keys writes it.

    >>> show_default(DaemonConfig, "checkpoint_every"), show_default(StreamConfig, "quantiles")
    ('"30s"', '[0.5, 0.9, 0.99]')
    """
    value = schema_defaults(schema)[key]
    duration = {f.name: f.metadata.get("duration", False) for f in dataclasses.fields(schema)}

    def show(v: object) -> str:
        if v is MISSING:
            return "required"
        if v is None:
            return "none"
        if duration[key]:
            return f'"{show_duration(v)}"'
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return f'"{v}"'
        if isinstance(v, tuple):
            return "[" + ", ".join(show(x) for x in v) + "]"
        if isinstance(v, float):
            return f"{v:g}".replace("e+", "e")
        return str(v)

    return show(value)
