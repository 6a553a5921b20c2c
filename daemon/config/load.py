"""The daemon's configuration: TOML validated into frozen dataclasses before anything starts.

Every problem is a :class:`ConfigError` whose message is one sentence naming
the file, the key path (``stream[2].half_life``; tables of an array count from
0) and the value. Unknown keys are errors, with a "did you mean" when a known
key is close.

Durations are strings with a unit: ``"250ms"``, ``"30s"``, ``"1.5s"``,
``"5m"``, ``"2h"``, ``"1d"``. A half-life may also count observations:
``"5000 obs"``.

Two streams may not take the same topic: templates with the same number of
segments and no position where both hold different literals are refused, so
routing never depends on the order of the streams. Paths (``state_file``,
TLS and CurveZMQ key files) are kept as written, relative to the daemon's
working directory, and are not opened here.
"""

from __future__ import annotations

import dataclasses
import difflib
import ipaddress
import math
import re
import reprlib
import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any, Literal

from sigmad.daemon.config.session import SessionError, SessionReset
from sigmad.daemon.ingest.topics import LABEL_NAME, SEPARATORS, TopicError, TopicTemplate
from sigmad.estimators import CORRECTIONS, TRANSFORMS, HalfLife

#: Labels our metrics set themselves, so a topic template may not capture them
#: (plus every name starting with ``__``, which Prometheus reserves).
RESERVED_LABELS: frozenset[str] = frozenset((
    "stream", "field", "field_b", "q", "quantile", "component", "term", "threshold", "reason",
    "source", "le", "instance", "job", "correction", "shard", "state",
))
_UNITS = {"ms": 1e-3, "s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0}
_DURATION = re.compile(r"\s*(\d+(?:\.\d*)?|\.\d+)\s*(ms|s|m|h|d)\s*")
_COUNT = re.compile(r"\s*(\d+(?:\.\d*)?|\.\d+)\s*(obs|observations)\s*")
_ENDPOINT = re.compile(r"(tcp|ipc|inproc)://(.+)")
_DOTTED = re.compile(r"[0-9.]+")
_MISSING = object()
_SCHEMA = object()   # "the default the schema's dataclass declares"
_SHOW = reprlib.Repr()
_SHOW.maxstring = 60
_SHOW.maxother = 60
_SHOW.maxlist = 6
_SHOW.maxdict = 4


class ConfigError(ValueError):
    """A configuration problem: one sentence naming the file, the key path and the value.

    Attributes
    ----------
    key : str
        Key path, e.g. ``stream[2].half_life``.
    value : object
        The value found (the sentinel for a missing key is shown as "missing").
    origin : str or None
        The file (or ``"<string>"``); None until the error reaches the loader.
    """

    def __init__(self, key: str, value: object, message: str,
                 origin: str | None = None) -> None:
        self.key = key
        self.value = value
        self.message = message
        self.origin = origin
        where = f"{origin}: " if origin else ""
        if not key:
            text = f"{where}{message}"
        elif value is _MISSING:
            text = f"{where}{key} is missing; {message}"
        else:
            text = f"{where}{key} = {_SHOW.repr(value)} {message}"
        super().__init__(text if text.endswith((".", "?")) else text + ".")

    def with_origin(self, origin: str) -> ConfigError:
        return ConfigError(self.key, self.value, self.message, origin)


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
            out[f.name] = _MISSING
    return out


def show_default(schema: type, key: str) -> str:
    """A key's declared default as the README's table of keys writes it.

    >>> show_default(DaemonConfig, "checkpoint_every"), show_default(StreamConfig, "quantiles")
    ('"30s"', '[0.5, 0.9, 0.99]')
    """
    value = schema_defaults(schema)[key]
    duration = {f.name: f.metadata.get("duration", False) for f in dataclasses.fields(schema)}

    def show(v: object) -> str:
        if v is _MISSING:
            return "required"
        if v is None:
            return "none"
        if duration[key]:
            return f'"{_show_duration(v)}"'
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


# --------------------------------------------------------------------------- scalar parsers

def parse_duration(text: str, key: str) -> float:
    """Seconds in a duration string such as ``"250ms"``, ``"1.5s"``, ``"5m"``, ``"1d"``.

    Parameters
    ----------
    text : str
        A number and one of the units ms, s, m, h, d.
    key : str
        Key path for the error message.

    Returns
    -------
    float
        Seconds, > 0.

    Raises
    ------
    ConfigError
        If text is not a string, has no or an unknown unit, or is zero.

    Examples
    --------
    >>> parse_duration("250ms", "x"), parse_duration("1.5s", "x"), parse_duration("2h", "x")
    (0.25, 1.5, 7200.0)
    """
    if isinstance(text, bool) or not isinstance(text, str):
        hint = f'; write it with a unit, e.g. "{text}s"' if isinstance(text, (int, float)) \
            and not isinstance(text, bool) else ""
        raise ConfigError(key, text, f"is not a duration string{hint}")
    m = _DURATION.fullmatch(text)
    if m is None:
        raise ConfigError(key, text, "is not a duration (a number and a unit: "
                          'ms, s, m, h or d, e.g. "250ms", "30s", "5m")')
    seconds = float(m.group(1)) * _UNITS[m.group(2)]
    if not (math.isfinite(seconds) and seconds > 0):
        raise ConfigError(key, text, "must be longer than zero")
    return seconds


def parse_half_life(text: str, key: str) -> HalfLife:
    """A half-life in event-time seconds (``"10m"``) or in observations (``"5000 obs"``).

    Returns
    -------
    estimators.HalfLife

    Raises
    ------
    ConfigError

    Examples
    --------
    >>> parse_half_life("10m", "h"), parse_half_life("5000 obs", "h")
    (HalfLife(length=600.0, unit='seconds'), HalfLife(length=5000.0, unit='observations'))
    """
    if isinstance(text, str):
        m = _COUNT.fullmatch(text)
        if m is not None:
            count = float(m.group(1))
            if count <= 0:
                raise ConfigError(key, text, "must count more than zero observations")
            return HalfLife(count, "observations")
        if _DURATION.fullmatch(text) is None:
            raise ConfigError(key, text, 'is not a half-life (a duration such as "10m" '
                              'or a count such as "5000 obs")')
    return HalfLife(parse_duration(text, key), "seconds")


def split_host_port(text: object, key: str = "daemon.http",
                    bind_any: bool = False) -> tuple[str, int]:
    """``"host:port"`` or ``"[v6]:port"`` to (host, port); the one parser of both forms.

    An empty host is refused; ``bind_any`` lets a ZeroMQ bind write ``*`` for the
    port (returned as -1). A dotted-number host must be an IPv4 address (each octet
    0-255).

    Raises
    ------
    ConfigError
        Naming ``key`` and the text.

    Examples
    --------
    >>> split_host_port("[::1]:9410", "k"), split_host_port("localhost:0", "k")
    (('::1', 9410), ('localhost', 0))
    """
    if not isinstance(text, str):
        raise ConfigError(key, text, 'must be a "host:port" string')
    if "://" in text:
        raise ConfigError(key, text, 'must be "host:port" without a scheme, e.g. '
                          '"127.0.0.1:9410" (HTTPS is turned on by tls_cert and tls_key)')
    host, sep, port = text.rpartition(":")
    star = bind_any and port == "*"
    if not sep or not host or not (star or port.isdigit() and 0 <= int(port) <= 65535):
        raise ConfigError(key, text, 'must be "host:port" with a port from 0 to 65535, '
                          'e.g. "127.0.0.1:9410"')
    if host.startswith("["):
        if not host.endswith("]"):
            raise ConfigError(key, text, "has an unclosed [ in its IPv6 address")
        host = host[1:-1]
        try:
            ipaddress.IPv6Address(host)
        except ValueError:
            raise ConfigError(key, text, "has an invalid IPv6 address") from None
    elif ":" in host:
        raise ConfigError(key, text, 'must write an IPv6 address in brackets, e.g. "[::1]:9410"')
    elif any(c.isspace() for c in host):
        raise ConfigError(key, text, "has white space in its host")
    elif _DOTTED.fullmatch(host):
        try:
            ipaddress.IPv4Address(host)
        except ValueError:
            raise ConfigError(key, text, "is not an IPv4 address (four numbers from 0 to "
                              "255, e.g. 127.0.0.1)") from None
    return host, -1 if star else int(port)


def check_endpoint(text: object, key: str, binding: bool) -> str:
    """A ZeroMQ endpoint's syntax: ``tcp://host:port``, ``ipc://path`` or ``inproc://name``.

    Raises ConfigError naming ``key``; returns the text. Files and addresses are
    checked against the host by :mod:`sigmad.daemon.config.host`.
    """
    if not isinstance(text, str):
        raise ConfigError(key, text, "must be an endpoint string such as "
                          '"tcp://127.0.0.1:7410"')
    m = _ENDPOINT.fullmatch(text)
    if m is None:
        raise ConfigError(key, text, "must start with tcp://, ipc:// or inproc://, "
                          'e.g. "tcp://127.0.0.1:7410"')
    scheme, rest = m.groups()
    if scheme == "tcp":
        if ";" in rest:   # ZeroMQ's source-address form
            raise ConfigError(key, text, 'must be "tcp://host:port" (no source address)')
        try:
            host, port = split_host_port(rest, key, bind_any=binding)
        except ConfigError as exc:
            raise ConfigError(key, text, exc.message) from None
        if port == 0 or (host == "*" and not binding):
            raise ConfigError(key, text, 'must be "tcp://host:port" with a port from 1 to '
                              "65535" + (' (or "*")' if binding else "")
                              + ("" if binding else " and a host to connect to"))
    return text


# --------------------------------------------------------------------------- table reader

class _Table:
    """Typed reads from one TOML table, each error naming the key path."""

    def __init__(self, data: object, path: str, schema: type | tuple[str, ...],
                 extra: tuple[str, ...] = ()) -> None:
        if not isinstance(data, dict):
            raise ConfigError(path, data, "must be a table")
        self.data = data
        self.path = path
        self.defaults = schema_defaults(schema) if isinstance(schema, type) else {}
        allowed = (tuple(self.defaults) or schema) + extra
        for key, value in data.items():
            if key not in allowed:
                close = difflib.get_close_matches(key, allowed, n=1)
                hint = f"; did you mean {close[0]!r}?" if close else \
                    f" (known keys: {', '.join(allowed)})"
                raise ConfigError(self.key(key), value, f"is not a known key{hint}")

    def key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def raw(self, name: str, default: object = _SCHEMA, why: str = "it is required") -> Any:
        if default is _SCHEMA:
            default = self.defaults.get(name, _MISSING)
        value = self.data.get(name, default)
        if value is _MISSING:
            raise ConfigError(self.key(name), _MISSING, why)
        return value

    def string(self, name: str, default: object = _SCHEMA,
               choices: tuple[str, ...] | None = None) -> Any:
        if name not in self.data:
            return self.raw(name, default)
        value = self.data[name]
        if not isinstance(value, str):
            raise ConfigError(self.key(name), value, "must be a string")
        if choices is not None and value not in choices:
            quoted = " | ".join(f'"{c}"' for c in choices)
            raise ConfigError(self.key(name), value, f"must be one of {quoted}")
        return value

    def path_string(self, name: str) -> str | None:
        value = self.string(name, None)
        if value is not None and not value.strip():
            raise ConfigError(self.key(name), value, "must not be empty (leave the key out)")
        return value

    def integer(self, name: str, default: object = _SCHEMA, minimum: int = 0,
                maximum: int | None = None) -> Any:
        if name not in self.data:
            return self.raw(name, default)
        value = self.data[name]
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(self.key(name), value, "must be an integer")
        if value < minimum or (maximum is not None and value > maximum):
            bound = f"from {minimum} to {maximum}" if maximum is not None else f">= {minimum}"
            raise ConfigError(self.key(name), value, f"must be an integer {bound}")
        return value

    def boolean(self, name: str, default: object = _SCHEMA) -> Any:
        if name not in self.data:
            return self.raw(name, default)
        value = self.data[name]
        if not isinstance(value, bool):
            raise ConfigError(self.key(name), value, "must be true or false")
        return value

    def duration(self, name: str, default: object = _SCHEMA) -> Any:
        if name not in self.data:
            return self.raw(name, default)
        return parse_duration(self.data[name], self.key(name))

    def strings(self, name: str, default: object = _SCHEMA) -> Any:
        """A string or a list of strings, as a tuple."""
        if name not in self.data:
            return self.raw(name, default)
        value = self.data[name]
        items = [value] if isinstance(value, str) else value
        if not isinstance(items, list) or not all(isinstance(v, str) for v in items):
            raise ConfigError(self.key(name), value, "must be a string or a list of strings")
        return tuple(items)

    def numbers(self, name: str, default: object = _SCHEMA) -> Any:
        if name not in self.data:
            return self.raw(name, default)
        value = self.data[name]
        if not isinstance(value, list) or not all(
                isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
            raise ConfigError(self.key(name), value, "must be a list of numbers")
        if len(set(value)) != len(value):
            raise ConfigError(self.key(name), value, "must not repeat a number")
        return tuple(float(v) for v in value)


def _names(table: _Table, name: str, what: str) -> tuple[str, ...]:
    """A non-empty list of unique identifier-like names."""
    values = table.strings(name)
    key = table.key(name)
    if not values:
        raise ConfigError(key, list(values), f"must name at least one {what}")
    for v in values:
        if not LABEL_NAME.fullmatch(v):
            raise ConfigError(key, v, f"is not a valid {what} name (letters, digits and _, "
                              "not starting with a digit)")
    dupes = sorted({v for v in values if values.count(v) > 1})
    if dupes:
        raise ConfigError(key, list(values), f"names {dupes[0]!r} twice")
    return values


# --------------------------------------------------------------------------- sections

MAX_THRESHOLDS = 32   # per field: each is a histogram bucket and two gauges per series
_TOP_KEYS = ("daemon", "source", "stream", "publish", "merge", "feed")


def _daemon(data: object) -> DaemonConfig:
    t = _Table(data, "daemon", DaemonConfig)
    http = t.string("http")
    split_host_port(http, t.key("http"))
    cfg = DaemonConfig(
        http=http,
        state_file=t.path_string("state_file"),
        checkpoint_every=t.duration("checkpoint_every"),
        tls_cert=t.path_string("tls_cert"),
        tls_key=t.path_string("tls_key"),
        tls_client_ca=t.path_string("tls_client_ca"),
        max_message_bytes=t.integer("max_message_bytes", minimum=16, maximum=2**31 - 1),
        max_batch_rows=t.integer("max_batch_rows", minimum=1, maximum=2**31 - 1),
        max_topic_bytes=t.integer("max_topic_bytes", minimum=1, maximum=65536),
        flush_every=t.duration("flush_every"),
        max_clock_skew=t.duration("max_clock_skew"),
        max_time_ahead=t.duration("max_time_ahead"),
        strict_restore=t.boolean("strict_restore"),
        log_rejected=t.integer("log_rejected", minimum=0),
        max_abs_value=_max_abs_value(t),
    )
    if (cfg.tls_cert is None) != (cfg.tls_key is None):
        present = "tls_cert" if cfg.tls_cert is not None else "tls_key"
        missing = "tls_key" if present == "tls_cert" else "tls_cert"
        raise ConfigError(t.key(missing), _MISSING, f"{present} needs it too (HTTPS takes both)")
    if cfg.tls_client_ca is not None and cfg.tls_cert is None:
        raise ConfigError(t.key("tls_client_ca"), cfg.tls_client_ca,
                          "needs tls_cert and tls_key (client certificates need HTTPS)")
    return cfg


def _max_abs_value(t: _Table) -> float:
    """Largest accepted |value|; above 1e100 squares times weights could overflow float64."""
    value = t.raw("max_abs_value")
    if isinstance(value, bool) or not isinstance(value, (int, float)) \
            or not 0 < value <= 1e100:
        raise ConfigError(t.key("max_abs_value"), value,
                          "must be a number > 0 and <= 1e100 (larger squares overflow)")
    return float(value)


def _endpoints(t: _Table, name: str, binding: bool) -> tuple[str, ...]:
    values = t.strings(name, ())
    if name in t.data and not values:
        raise ConfigError(t.key(name), [], "must hold at least one endpoint")
    for v in values:
        check_endpoint(v, t.key(name), binding)
    return values


def _source(data: object, path: str) -> SourceConfig:
    if isinstance(data, dict) and data.get("socket") == "mqtt":
        return _mqtt_source(_Table(data, path, MqttConfig,
                                   extra=("socket", "connect", "topics", "high_water_mark")))
    t = _Table(data, path, SourceConfig)
    socket = t.string("socket", choices=("pull", "sub", "mqtt"))
    bind = _endpoints(t, "bind", True)
    connect = _endpoints(t, "connect", False)
    if bool(bind) == bool(connect):
        raise ConfigError(t.key("bind"), list(bind) if bind else _MISSING,
                          "a source needs bind or connect (one of the two)" if not bind else
                          "and connect cannot both be given: a source either binds or connects")
    if "topics" in t.data and socket == "pull":
        raise ConfigError(t.key("topics"), t.data["topics"],
                          'applies only to socket = "sub" (a PULL socket takes everything)')
    topics = t.strings("topics")
    if not topics:
        raise ConfigError(t.key("topics"), [], 'must hold at least one prefix ("" = everything)')
    curve_secret = t.path_string("curve_secret")
    curve_allow = t.path_string("curve_allow")
    if curve_allow is not None and curve_secret is None:
        raise ConfigError(t.key("curve_allow"), curve_allow,
                          "needs curve_secret (the server key that authenticates producers)")
    return SourceConfig(socket=socket, bind=bind, connect=connect, topics=topics,
                        curve_secret=curve_secret, curve_allow=curve_allow,
                        high_water_mark=t.integer("high_water_mark", minimum=1))


# ------------------------------------------------------------------ MQTT sources
_MQTT_URL = re.compile(r"(mqtts?)://([^/?#@]+)")
_MQTT_PORTS = {"mqtt": 1883, "mqtts": 8883}


def _mqtt_url(t: _Table) -> tuple[str, str, int]:
    """``connect`` of an MQTT source: (url, host, port); mqtt:// or mqtts://, no path,
    no credentials (those go in username and password_file)."""
    values = t.strings("connect")
    key = t.key("connect")
    if len(values) != 1:
        raise ConfigError(key, list(values), "must be one broker URL such as "
                          '"mqtt://127.0.0.1:1883" (a source talks to one broker)')
    url = values[0]
    if "@" in url.partition("://")[2].split("/")[0]:
        raise ConfigError(key, url, "must not carry credentials: use username and "
                          "password_file")
    m = _MQTT_URL.fullmatch(url.rstrip("/"))
    if m is None:
        raise ConfigError(key, url, 'must be "mqtt://host[:port]" or "mqtts://host[:port]" '
                          "(no path or query)")
    scheme, netloc = m.groups()
    port_text: str | None = None
    if netloc.startswith("["):
        host, closed, rest = netloc[1:].partition("]")
        if not closed:
            raise ConfigError(key, url, "has an unclosed [ in its IPv6 address")
        try:
            ipaddress.IPv6Address(host)
        except ValueError:
            raise ConfigError(key, url, "has an invalid IPv6 address") from None
        if rest and not rest.startswith(":"):
            raise ConfigError(key, url, "must put the port after the ], e.g. mqtt://[::1]:1883")
        port_text = rest[1:] if rest else None
    elif netloc.count(":") > 1:
        raise ConfigError(key, url, "must write an IPv6 address in brackets, "
                          "e.g. mqtt://[::1]:1883")
    else:
        host, colon, rest = netloc.partition(":")
        port_text = rest if colon else None
    port = _MQTT_PORTS[scheme] if port_text is None else \
        int(port_text) if port_text.isdigit() else 0
    if not host or any(c.isspace() for c in host) or not 0 < port <= 65535:
        raise ConfigError(key, url, "must name a host and a port from 1 to 65535")
    return url, host, port


def check_topic_filter(text: object, key: str) -> str:
    """An MQTT topic filter (MQTT 5.0 section 4.7): ``+`` and ``#`` only as whole levels,
    ``#`` last; at most 65535 bytes of UTF-8, no NUL.

    >>> check_topic_filter("greenhouse/+/climate", "topics")
    'greenhouse/+/climate'
    """
    if not isinstance(text, str) or not text:
        raise ConfigError(key, text, "must be a non-empty MQTT topic filter")
    if "\x00" in text or len(text.encode("utf-8", "surrogatepass")) > 65535:
        raise ConfigError(key, text, "must be at most 65535 bytes of UTF-8 without NUL")
    if text.startswith("$share/"):
        raise ConfigError(key, text, "is a shared subscription: write the bare filter and "
                          "set shared_group instead")
    levels = text.split("/")
    for i, level in enumerate(levels):
        if "#" in level and (level != "#" or i != len(levels) - 1):
            raise ConfigError(key, text, "may use # only as the whole last level "
                              '(e.g. "greenhouse/#")')
        if "+" in level and level != "+":
            raise ConfigError(key, text, f"has the level {level!r}: + must be a whole level "
                              '(e.g. "greenhouse/+/climate")')
    return text


def _readable_file(t: _Table, name: str) -> str | None:
    path = t.path_string(name)
    if path is not None:
        p = Path(path)
        try:
            with p.open("rb"):
                pass
        except OSError as exc:
            raise ConfigError(t.key(name), path, f"cannot be read ({exc.strerror})") from None
        if not p.is_file():
            raise ConfigError(t.key(name), path, "is not a regular file")
    return path


def _mqtt_qos(t: _Table) -> int:
    qos = t.integer("qos", maximum=2)
    if qos == 2:
        raise ConfigError(t.key("qos"), qos, "is not supported: paho keeps QoS 2 exchanges in "
                          "memory only, so a restart could lose or stall them; use 1 (at least "
                          "once, kept by the broker's session) or 0")
    return qos


def _mqtt_source(t: _Table) -> SourceConfig:
    """A ``socket = "mqtt"`` source: one broker URL, topic filters, the session's keys."""
    url, host, port = _mqtt_url(t)
    topics = t.strings("topics")
    if not topics:
        raise ConfigError(t.key("topics"), [], 'must hold at least one topic filter ("#" = all)')
    for f in topics:
        check_topic_filter(f, t.key("topics"))
    client_id = t.string("client_id", None)
    if client_id is not None and not (0 < len(client_id) <= 128 and client_id.isprintable()
                                      and "/" not in client_id):
        raise ConfigError(t.key("client_id"), client_id, "must be 1 to 128 printable "
                          "characters without /")
    group = t.string("shared_group", None)
    if group is not None and (not group or not group.isprintable()
                              or any(c in group for c in "/+#")):
        raise ConfigError(t.key("shared_group"), group, "must be a non-empty printable name "
                          "without /, + or #")
    username = t.string("username", None)
    password_file = _readable_file(t, "password_file")
    if password_file is not None and username is None:
        raise ConfigError(t.key("password_file"), password_file, "needs username too")
    tls = url.startswith("mqtts://")
    files = {name: _readable_file(t, name) for name in ("tls_ca", "tls_cert", "tls_key")}
    for name, path in files.items():
        if path is not None and not tls:
            raise ConfigError(t.key(name), path, "applies only to an mqtts:// broker URL")
    if (files["tls_cert"] is None) != (files["tls_key"] is None):
        present = "tls_cert" if files["tls_cert"] is not None else "tls_key"
        missing = "tls_key" if present == "tls_cert" else "tls_cert"
        raise ConfigError(t.key(missing), _MISSING, f"{present} needs it too (a client "
                          "certificate takes both)")
    mqtt = MqttConfig(host=host, port=port, tls=tls, client_id=client_id,
                      qos=_mqtt_qos(t), shared_group=group, username=username,
                      password_file=password_file, session_expiry=t.duration("session_expiry"),
                      **files)
    if mqtt.session_expiry > 2**32 - 1:
        raise ConfigError(t.key("session_expiry"), t.data["session_expiry"],
                          "must be below 136 years (MQTT counts it in 32-bit seconds)")
    return SourceConfig(socket="mqtt", connect=(url,), topics=topics, mqtt=mqtt,
                        high_water_mark=t.integer("high_water_mark", schema_defaults(
                            SourceConfig)["high_water_mark"], 1, 10_000_000))


def _mixture(data: object, path: str) -> MixtureConfig:
    t = _Table(data, path, MixtureConfig)
    return MixtureConfig(
        components=t.integer("components", minimum=1, maximum=64),
        log=t.boolean("log"),
        covariance=t.string("covariance", choices=("full", "diag")),
        warmup=t.integer("warmup", minimum=0),
        seed=t.integer("seed", minimum=0, maximum=2**63 - 1),
    )


def _regression(data: object, path: str, fields: tuple[str, ...]) -> RegressionConfig:
    t = _Table(data, path, RegressionConfig)
    y = t.string("y")
    if y not in fields:
        raise ConfigError(t.key("y"), y, f"is not one of the stream's fields {list(fields)}")
    x = t.strings("x")
    if not x:
        raise ConfigError(t.key("x"), [], "must name at least one field")
    intercept = t.boolean("intercept")
    for v in x:
        if v not in fields:
            raise ConfigError(t.key("x"), v, f"is not one of the stream's fields {list(fields)}")
        if v == y:
            raise ConfigError(t.key("x"), v, "is also y: a field cannot explain itself")
        if v == "intercept" and intercept:
            raise ConfigError(t.key("x"), v, "clashes with the intercept term's name; "
                              "rename the field or set intercept = false")
    if len(set(x)) != len(x):
        raise ConfigError(t.key("x"), list(x), "must not name a field twice")
    return RegressionConfig(y=y, x=x, intercept=intercept)


def _thresholds(value: object, key: str, stream: str,
                fields: tuple[str, ...]) -> tuple[tuple[float, ...], ...]:
    """``thresholds = [...]`` (a one-field stream) or ``{ field = [...] }``, per field."""
    where = f"in stream {stream!r}"
    if isinstance(value, list):
        if len(fields) != 1:
            raise ConfigError(key, value, f"must be written {{ field = [...] }} {where}, "
                              f"which has the fields {list(fields)}")
        value = {fields[0]: value}
    if not isinstance(value, dict):
        raise ConfigError(key, value, f"must be a list of numbers or a table of lists {where}")
    for name in value:
        if name not in fields:
            raise ConfigError(f"{key}.{name}", value[name],
                              f"is not one of the stream's fields {list(fields)} ({where})")
    out = []
    for name in fields:
        bounds = value.get(name, [])
        at = f"{key}.{name}"
        if not isinstance(bounds, list) or not all(
                isinstance(v, (int, float)) and not isinstance(v, bool) for v in bounds):
            raise ConfigError(at, bounds, f"must be a list of numbers ({where})")
        if name in value and not bounds:
            raise ConfigError(at, bounds, f"must hold at least one number ({where})")
        if len(bounds) > MAX_THRESHOLDS:
            raise ConfigError(at, len(bounds), f"thresholds are too many: at most "
                              f"{MAX_THRESHOLDS} per field ({where})")
        for i, v in enumerate(bounds):
            if not math.isfinite(v):
                raise ConfigError(at, float(v), f"must be finite ({where})")
            if i and not v > bounds[i - 1]:
                raise ConfigError(at, float(v), f"must be increasing: it follows "
                                  f"{float(bounds[i - 1])!r} ({where})")
        out.append(tuple(float(v) for v in bounds))
    return tuple(out)


# Most quantiles, or outlier thresholds, one stream may ask for: each costs every
# series a sample per field on every scrape and work on every flush.
MAX_PER_STREAM = 32


def _at_most(t: _Table, name: str, items: tuple) -> None:
    if len(items) > MAX_PER_STREAM:
        raise ConfigError(t.key(name), f"{len(items)} entries",
                          f"is too many: at most {MAX_PER_STREAM} per stream")


def _limits(data: object, path: str,
            fields: tuple[str, ...]) -> tuple[tuple[float, float], ...]:
    """``limits = { field = [low, high], ... }``: each field's plausible range (a sensor's
    rated range, a latency's plausible maximum); fields not named are unbounded."""
    if not isinstance(data, dict):
        raise ConfigError(path, data, "must be a table of field = [low, high]")
    bounds = {f: (-math.inf, math.inf) for f in fields}
    for name, pair in data.items():
        key = f"{path}.{name}"
        if name not in bounds:
            raise ConfigError(key, name, f"is not one of the stream's fields {list(fields)}")
        if not (isinstance(pair, list) and len(pair) == 2 and all(
                isinstance(v, (int, float)) and not isinstance(v, bool) and not math.isnan(v)
                for v in pair)):
            raise ConfigError(key, pair, "must be [low, high]: two numbers")
        low, high = float(pair[0]), float(pair[1])
        if not low < high:
            raise ConfigError(key, pair, "must have low < high")
        bounds[name] = (low, high)
    return tuple(bounds[f] for f in fields)


def _stream(data: object, path: str) -> StreamConfig:
    t = _Table(data, path, StreamConfig, extra=("separator",))   # separator: of the topic
    name = t.string("name")
    if not LABEL_NAME.fullmatch(name):
        raise ConfigError(t.key("name"), name, "is not a valid stream name (letters, digits "
                          "and _, not starting with a digit)")
    separator = t.string("separator", None, SEPARATORS)
    legs = _legs(t, name, separator)
    topic = legs[0][1] if legs else _template(t.string("topic"), t.key("topic"), separator)
    fields = _names(t, "fields", "field") if not legs or "fields" in t.data else \
        tuple(f for f, _ in legs)
    if legs and sorted(fields) != sorted(f for f, _ in legs):
        raise ConfigError(t.key("fields"), list(fields), f"must name each leg of stream "
                          f"{name!r} once ({[f for f, _ in legs]})")
    age = t.duration("max_leg_age")
    if age is not None and not legs:
        raise ConfigError(t.key("max_leg_age"), t.data["max_leg_age"],
                          f"needs legs: stream {name!r} takes one topic")
    half_life = t.raw("half_life")
    if half_life is not None:
        half_life = parse_half_life(half_life, t.key("half_life"))
    quantiles = t.numbers("quantiles")
    _at_most(t, "quantiles", quantiles)
    for q in quantiles:
        if not 0.0 < q < 1.0:
            raise ConfigError(t.key("quantiles"), q, "must lie strictly between 0 and 1")
    sigmas = t.numbers("outlier_sigmas")
    _at_most(t, "outlier_sigmas", sigmas)
    for s in sigmas:
        if not (math.isfinite(s) and s > 0):
            raise ConfigError(t.key("outlier_sigmas"), s, "must be a finite number > 0")
    mixture = t.raw("mixture")
    regression = t.raw("regression")
    idle = t.raw("idle_expiry")
    thresholds = t.raw("thresholds", None)   # None: absent (the schema's () is the result)
    limits = t.raw("limits")
    transform, unit = _transform(t, name, fields)
    if transform and isinstance(mixture, dict) and mixture.get("log") is True:
        raise ConfigError(t.key("mixture.log"), True, f"cannot fit the log of returns "
                          f"(stream {name!r} transforms {dict(transform)}; returns change sign)")
    return StreamConfig(
        name=name, topic=topic, fields=fields, half_life=half_life,
        correction=t.string("correction", choices=CORRECTIONS),
        quantiles=quantiles, outlier_sigmas=sigmas,
        outlier_warmup=t.integer("outlier_warmup", minimum=0),
        mixture=None if mixture is None else _mixture(mixture, t.key("mixture")),
        regression=None if regression is None else
        _regression(regression, t.key("regression"), fields),
        max_series=t.integer("max_series", minimum=1),
        idle_expiry=None if idle is None else parse_duration(idle, t.key("idle_expiry")),
        thresholds=() if thresholds is None else
        _thresholds(thresholds, t.key("thresholds"), name, fields),
        transform=transform, volatility_unit=unit, legs=legs, max_leg_age=age,
        session_reset=_session(t, name),
        limits=None if limits is None else _limits(limits, t.key("limits"), fields),
    )


def _session(t: _Table, name: str) -> SessionReset | None:
    text = t.raw("session_reset")
    if text is None:
        return None
    try:
        return SessionReset.parse(text)
    except SessionError as exc:
        raise ConfigError(t.key("session_reset"), text, f"{exc} (stream {name!r})") from None


def _template(text: str, key: str, separator: str | None = None) -> TopicTemplate:
    try:
        topic = TopicTemplate.parse(text, key, separator)
    except TopicError as exc:
        raise ConfigError(exc.key, exc.value, exc.message) from None
    for label in topic.labels:
        if label in RESERVED_LABELS or label.startswith("__"):
            raise ConfigError(key, topic.text, f"captures the label {{{label}}}, "
                              "which sigmad's metrics (or Prometheus) reserve; rename it")
    return topic


def _legs(t: _Table, name: str,
          separator: str | None = None) -> tuple[tuple[str, TopicTemplate], ...] | None:
    """``legs = { field = "topic", ... }``: each field from its own topic."""
    table = t.raw("legs")
    if table is None:
        return None
    if "topic" in t.data:
        raise ConfigError(t.key("topic"), t.data["topic"], f"and legs cannot both be given: "
                          f"stream {name!r} takes its topics from its legs")
    if not isinstance(table, dict) or len(table) < 2:
        raise ConfigError(t.key("legs"), table, 'must be a table of at least two fields and '
                          'their topics, e.g. { alpha = "px.alpha", beta = "px.beta" }')
    legs = []
    for f, text in table.items():
        key = t.key(f"legs.{f}")
        if not LABEL_NAME.fullmatch(f):
            raise ConfigError(key, text, "names an invalid field (letters, digits and _)")
        if not isinstance(text, str):
            raise ConfigError(key, text, "must be a topic string")
        tpl = _template(text, key, separator)
        if legs and tpl.labels != legs[0][1].labels:
            raise ConfigError(key, text, f"must capture the same labels as the first leg "
                              f"{list(legs[0][1].labels)} (stream {name!r})")
        for g, other in legs:
            if other.overlaps(tpl):
                raise ConfigError(key, text, f"could take the same topics as leg {g!r}")
        legs.append((f, tpl))
    return tuple(legs)


def _deliverable(tpl: TopicTemplate, sources: tuple[SourceConfig, ...]) -> bool:
    """Whether some source could receive topics of ``tpl`` (a PULL takes everything, a
    SUB the topics starting with one of its prefixes)."""
    for s in sources:
        if s.socket != "sub":
            return True
        if any(tpl.prefix.startswith(p) or (p.startswith(tpl.prefix) and "{" in tpl.text)
               or tpl.text.startswith(p) for p in s.topics):
            return True
    return False


def _transform(t: _Table, name: str, fields: tuple[str, ...]
               ) -> tuple[tuple[tuple[str, str], ...] | None, float | None]:
    """``transform = { field = "log_return" | "difference" }`` and ``volatility_unit``."""
    table = t.raw("transform")
    unit = t.duration("volatility_unit")
    if table is None:
        if unit is not None:
            raise ConfigError(t.key("volatility_unit"), t.data["volatility_unit"],
                              f"needs a transform: stream {name!r} has no return field")
        return None, None
    if not isinstance(table, dict) or not table:
        raise ConfigError(t.key("transform"), table, 'must be a table such as '
                          '{ mid = "log_return" } naming at least one field')
    for f, kind in table.items():
        if f not in fields:
            raise ConfigError(t.key(f"transform.{f}"), kind, f"names no field of stream "
                              f"{name!r} (its fields are {list(fields)})")
        if kind not in TRANSFORMS:
            quoted = " | ".join(f'"{k}"' for k in TRANSFORMS)
            raise ConfigError(t.key(f"transform.{f}"), kind,
                              f"is not a transform of stream {name!r}: use {quoted}")
    return tuple((f, table[f]) for f in fields if f in table), unit


def _array_of_tables(data: dict, name: str) -> list:
    value = data.get(name, [])
    if isinstance(value, dict):
        raise ConfigError(name, value, f"must be written [[{name}]] (an array of tables), "
                          f"not [{name}]")
    if not isinstance(value, list):
        raise ConfigError(name, value, f"must be an array of tables, written [[{name}]]")
    return value


def _build(data: dict) -> Config:
    _Table(data, "", _TOP_KEYS)  # unknown top-level tables
    daemon = _daemon(data.get("daemon", {}))
    sources = tuple(_source(s, f"source[{i}]")
                    for i, s in enumerate(_array_of_tables(data, "source")))
    streams = tuple(_stream(s, f"stream[{i}]")
                    for i, s in enumerate(_array_of_tables(data, "stream")))
    publish = merge = None
    if "publish" in data:
        t = _Table(data["publish"], "publish", PublishConfig)
        bind = _endpoints(t, "bind", True)
        if not bind:
            raise ConfigError("publish.bind", _MISSING, "a [publish] table needs an endpoint")
        publish = PublishConfig(bind=bind, every=t.duration("every"))
    if "merge" in data:
        t = _Table(data["merge"], "merge", MergeConfig)
        connect = _endpoints(t, "connect", False)
        if not connect:
            raise ConfigError("merge.connect", _MISSING, "a [merge] table needs endpoints")
        merge = MergeConfig(connect=connect, shard_expiry=t.duration("shard_expiry"))

    feed = None
    if "feed" in data:
        t = _Table(data["feed"], "feed", FeedConfig)
        bind = _endpoints(t, "bind", True)
        if not bind:
            raise ConfigError("feed.bind", _MISSING, "a [feed] table needs an endpoint")
        feed = FeedConfig(bind=bind)
    if not sources and merge is None:
        raise ConfigError("source", _MISSING, "add a [[source]] (or a [merge] table) so the "
                          "daemon has something to read")
    if sources and not streams:
        raise ConfigError("stream", _MISSING, "add a [[stream]] so messages have somewhere to go")
    if merge is not None and not streams:
        raise ConfigError("stream", _MISSING, "a merger reads shard states through its "
                          "[[stream]] tables: copy the shards' [[stream]] tables here")
    seen: dict[str, int] = {}
    for i, s in enumerate(streams):
        if s.name in seen:
            raise ConfigError(f"stream[{i}].name", s.name,
                              f"is already the name of stream[{seen[s.name]}]")
        seen[s.name] = i
        for j in range(i):
            for mine in s.templates:
                for theirs in streams[j].templates:
                    if theirs.overlaps(mine):
                        raise ConfigError(f"stream[{i}].{'legs' if s.legs else 'topic'}",
                                          mine.text, f"could take the same topics as stream"
                                          f"[{j}] ({theirs.text!r}); make a literal segment "
                                          "differ")
        for f, tpl in s.legs or ():
            if sources and not _deliverable(tpl, sources):
                raise ConfigError(f"stream[{i}].legs.{f}", tpl.text, "is a topic no source "
                                  f"subscribes to (stream {s.name!r}); add its prefix to a "
                                  "sub source's topics")
    bound: dict[str, str] = {}
    binds = [(f"source[{i}].bind", ep) for i, s in enumerate(sources) for ep in s.bind]
    binds += [("publish.bind", ep) for ep in (publish.bind if publish else ())]
    binds += [("feed.bind", ep) for ep in (feed.bind if feed else ())]
    for key, ep in binds:
        if ep in bound:
            raise ConfigError(key, ep, f"is already bound by {bound[ep]}")
        bound[ep] = key
    return Config(daemon=daemon, sources=sources, streams=streams, publish=publish, merge=merge,
                  feed=feed)


# --------------------------------------------------------------------------- entry points

def parse_config(text: str, origin: str = "<string>") -> Config:
    """Validate TOML text into a :class:`Config`.

    Parameters
    ----------
    text : str
        The TOML document.
    origin : str
        Named in every error message (the file path, usually).

    Returns
    -------
    Config

    Raises
    ------
    ConfigError
        On a TOML syntax error, an unknown key, a bad value or a cross-check
        (duplicate stream names, overlapping topics, an endpoint bound twice).

    Notes
    -----
    O(size of the file + streams**2) for the topic overlap check.

    Examples
    --------
    >>> cfg = parse_config('''
    ... [[source]]
    ... socket = "pull"
    ... bind = "tcp://127.0.0.1:7410"
    ... [[stream]]
    ... name = "lat"
    ... topic = "lat.{service}"
    ... fields = ["ms"]
    ... half_life = "10m"
    ... ''')
    >>> cfg.streams[0].topic.labels, cfg.streams[0].half_life.length
    (('service',), 600.0)
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError("", None, f"not valid TOML ({exc})", origin) from None
    try:
        cfg = _build(data)
    except ConfigError as exc:
        raise exc.with_origin(origin) from None
    return dataclasses.replace(cfg, origin=origin)


def config_problems(text: str, origin: str = "<string>") -> list[ConfigError]:
    """Every problem :func:`parse_config` would raise one at a time, as far as they can
    be told apart: the ``[daemon]`` table and each ``[[source]]`` and ``[[stream]]``
    are checked on their own (each reports its first problem), then, if they are
    all sound, the whole (cross-checks). ``sigmad validate`` prints them all.

    Examples
    --------
    >>> bad = '[daemon]\\nflush_every = 5\\n[[stream]]\\nname = "x y"'
    >>> [p.key for p in config_problems(bad)]
    ['daemon.flush_every', 'stream[0].name']
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        return [ConfigError("", None, f"not valid TOML ({exc})", origin)]
    problems: list[ConfigError] = []

    def attempt(check, *args) -> None:
        try:
            check(*args)
        except ConfigError as exc:
            problems.append(exc.with_origin(origin))

    attempt(_Table, data, "", _TOP_KEYS)
    attempt(_daemon, data.get("daemon", {}))
    for name, check in (("source", _source), ("stream", _stream)):
        try:
            tables = _array_of_tables(data, name)
        except ConfigError as exc:
            problems.append(exc.with_origin(origin))
            continue
        for i, table in enumerate(tables):
            attempt(check, table, f"{name}[{i}]")
    if not problems:
        attempt(parse_config, text, origin)
    return problems


def load_config(path: str | Path) -> Config:
    """Read and validate a TOML file; see :func:`parse_config`.

    Raises
    ------
    ConfigError
        Also when the file cannot be read or is not UTF-8.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError("", None, f"cannot be read as a UTF-8 text file ({exc})",
                          str(p)) from None
    return parse_config(text, str(p))


def default_config() -> Config:
    """The embedded default configuration (``daemon/config/default.toml``)."""
    text = resources.files(__package__).joinpath("default.toml").read_text(encoding="utf-8")
    return parse_config(text, "<embedded default.toml>")


def _show_duration(seconds: float) -> str:
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("m", 60.0), ("s", 1.0)):
        if seconds >= size and (seconds / size).is_integer():
            return f"{int(seconds / size)}{unit}"
    return f"{seconds * 1000:g}ms" if seconds < 1 else f"{seconds:g}s"


def _show_half_life(h: HalfLife | None) -> str:
    if h is None:
        return "none (no forgetting)"
    if h.by_count:
        return f"{h.length:g} observations"
    return f"{_show_duration(h.length)} of event time"


def describe(config: Config) -> str:
    """A human summary of what the daemon would run (``sigmad validate`` prints it).

    Examples
    --------
    >>> print(describe(default_config()).splitlines()[0])
    configuration <embedded default.toml>
    """
    d = config.daemon
    lines = [f"configuration {config.origin}",
             f"  http        {'https' if d.tls_cert else 'http'}://{d.http}/metrics"
             + (" (client certificates required)" if d.tls_client_ca else ""),
             "  state file  " + (f"{d.state_file}, checkpoint every "
                                 f"{_show_duration(d.checkpoint_every)}"
                                 if d.state_file else "none (estimates are not persisted)"),
             f"  limits      messages <= {d.max_message_bytes} bytes, <= {d.max_batch_rows} "
             f"rows; flush every {_show_duration(d.flush_every)}; event times within "
             f"{_show_duration(d.max_clock_skew)} of arrival"]
    lines.append(f"sources ({len(config.sources)})")
    for s in config.sources:
        if s.mqtt is not None:
            m = s.mqtt
            session = (f"session {m.client_id!r} kept {_show_duration(m.session_expiry)}"
                       if m.client_id else "no persistent session (no client_id)")
            group = f" shared group {m.shared_group!r}" if m.shared_group else ""
            lines.append(f"  mqtt connect {s.connect[0]} topics {', '.join(s.topics)} "
                         f"qos {m.qos}{group}; {session}")
            continue
        how = "bind" if s.bind else "connect"
        extra = ""
        if s.socket == "sub":
            extra = " topics " + ("(everything)" if s.topics == ("",) else
                                  ", ".join(repr(p) for p in s.topics))
        if s.curve_secret:
            extra += " curve " + (f"allow {s.curve_allow}" if s.curve_allow else "any client")
        lines.append(f"  {s.socket:4} {how} {', '.join(s.endpoints)}{extra}")
    lines.append(f"streams ({len(config.streams)})")
    for st in config.streams:
        labels = ", ".join(st.topic.labels) or "none"
        topics = ", ".join(repr(tpl.text) for tpl in st.templates)
        lines.append(f"  {st.name}: {'topics' if st.legs else 'topic'} {topics} "
                     f"(labels: {labels})")
        lines.append(f"    fields      {', '.join(st.fields)} (d = {st.dim})")
        lines.append(f"    half-life   {_show_half_life(st.half_life)}; "
                     f"correction {st.correction}")
        estimates = ["moments"]
        if st.dim > 1:
            estimates.append("covariance/correlation")
        if st.mixture:
            m = st.mixture
            estimates.append(f"mixture K={m.components} {m.covariance}"
                             + (" on log values" if m.log else ""))
        if st.regression:
            r = st.regression
            estimates.append(f"regression {r.y} ~ " + " + ".join(
                (["intercept"] if r.intercept else []) + list(r.x)))
        lines.append(f"    estimates   {'; '.join(estimates)}")
        source = "mixture" if st.mixture else "normal model"
        lines.append("    quantiles   " + (f"{', '.join(f'{q:g}' for q in st.quantiles)} "
                                         f"(from the {source})" if st.quantiles else "none"))
        for name, bounds in zip(st.fields, st.thresholds, strict=False):
            if bounds:
                lines.append(f"    thresholds  {name} > {', '.join(f'{b:g}' for b in bounds)}"
                             " (histogram bounds, exceedance shares)")
        if st.outlier_sigmas:
            lines.append(f"    outliers    beyond {', '.join(f'{s:g}' for s in st.outlier_sigmas)}"
                         f" sigma, after {st.outlier_warmup} observations")
        if st.legs:
            lines.append("    legs        " + ", ".join(f"{f} <- {tpl.text!r}"
                                                        for f, tpl in st.legs)
                         + (f"; a leg older than {_show_duration(st.max_leg_age)} forms no row"
                            if st.max_leg_age else ""))
        if st.transform:
            lines.append("    transform   " + ", ".join(f"{f} -> {k}" for f, k in st.transform)
                         + (f"; volatility per {_show_duration(st.volatility_unit)}"
                            if st.volatility_unit else ""))
        if st.session_reset:
            lines.append(f"    sessions    reset daily at {st.session_reset.text}, closing "
                         "values exported")
        if st.limits:
            lines.append("    limits      " + ", ".join(
                f"{f} in [{lo:g}, {hi:g}]" for f, (lo, hi) in zip(st.fields, st.limits,
                                                                 strict=True)
                if (lo, hi) != (-math.inf, math.inf)))
        expiry = _show_duration(st.idle_expiry) if st.idle_expiry else "never"
        lines.append(f"    series      at most {st.max_series}; idle expiry {expiry}")
    if config.publish:
        lines.append(f"publish snapshots on {', '.join(config.publish.bind)} every "
                     f"{_show_duration(config.publish.every)}")
    if config.feed:
        lines.append(f"push estimates on {', '.join(config.feed.bind)} after every flush")
    if config.merge:
        lines.append(f"merge snapshots from {', '.join(config.merge.connect)}; shards expire "
                     f"after {_show_duration(config.merge.shard_expiry)}")
    return "\n".join(lines)
