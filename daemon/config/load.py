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

from sigmad.daemon.ingest.topics import LABEL_NAME, TopicError, TopicTemplate
from sigmad.estimators import CORRECTIONS, HalfLife

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

@dataclass(frozen=True, slots=True)
class DaemonConfig:
    """The ``[daemon]`` table. Durations are in seconds; an ``http`` port of 0 lets the
    system pick a free one."""

    http: str = "127.0.0.1:9410"
    state_file: str | None = None
    checkpoint_every: float = 30.0
    tls_cert: str | None = None
    tls_key: str | None = None
    tls_client_ca: str | None = None
    max_message_bytes: int = 1_048_576
    max_batch_rows: int = 100_000
    flush_every: float = 0.05
    max_clock_skew: float = 86400.0
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
class SourceConfig:
    """One ``[[source]]``: a ZeroMQ socket the daemon reads messages from."""

    socket: Literal["pull", "sub"]
    bind: tuple[str, ...] = ()
    connect: tuple[str, ...] = ()
    topics: tuple[str, ...] = ("",)
    curve_secret: str | None = None
    curve_allow: str | None = None
    high_water_mark: int = 10000

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
    idle_expiry: float | None = None

    @property
    def dim(self) -> int:
        return len(self.fields)


@dataclass(frozen=True, slots=True)
class PublishConfig:
    """``[publish]``: this daemon publishes its state snapshots (a shard)."""

    bind: tuple[str, ...]
    every: float = 2.0


@dataclass(frozen=True, slots=True)
class MergeConfig:
    """``[merge]``: this daemon pools other daemons' snapshots (a merger)."""

    connect: tuple[str, ...]
    shard_expiry: float = 30.0


@dataclass(frozen=True, slots=True)
class Config:
    """A whole, validated configuration."""

    daemon: DaemonConfig = field(default_factory=DaemonConfig)
    sources: tuple[SourceConfig, ...] = ()
    streams: tuple[StreamConfig, ...] = ()
    publish: PublishConfig | None = None
    merge: MergeConfig | None = None
    origin: str = "<string>"


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


def split_host_port(text: object, key: str, bind_any: bool = False) -> tuple[str, int]:
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

    def __init__(self, data: object, path: str, allowed: tuple[str, ...]) -> None:
        if not isinstance(data, dict):
            raise ConfigError(path, data, "must be a table")
        self.data = data
        self.path = path
        for key, value in data.items():
            if key not in allowed:
                close = difflib.get_close_matches(key, allowed, n=1)
                hint = f"; did you mean {close[0]!r}?" if close else \
                    f" (known keys: {', '.join(allowed)})"
                raise ConfigError(self.key(key), value, f"is not a known key{hint}")

    def key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def raw(self, name: str, default: object = _MISSING, why: str = "it is required") -> Any:
        value = self.data.get(name, default)
        if value is _MISSING:
            raise ConfigError(self.key(name), _MISSING, why)
        return value

    def string(self, name: str, default: object = _MISSING,
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

    def integer(self, name: str, default: object, minimum: int,
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

    def boolean(self, name: str, default: bool) -> bool:
        if name not in self.data:
            return default
        value = self.data[name]
        if not isinstance(value, bool):
            raise ConfigError(self.key(name), value, "must be true or false")
        return value

    def duration(self, name: str, default: object) -> Any:
        if name not in self.data:
            return self.raw(name, default)
        return parse_duration(self.data[name], self.key(name))

    def strings(self, name: str, default: object = _MISSING) -> Any:
        """A string or a list of strings, as a tuple."""
        if name not in self.data:
            return self.raw(name, default)
        value = self.data[name]
        items = [value] if isinstance(value, str) else value
        if not isinstance(items, list) or not all(isinstance(v, str) for v in items):
            raise ConfigError(self.key(name), value, "must be a string or a list of strings")
        return tuple(items)

    def numbers(self, name: str, default: tuple[float, ...]) -> tuple[float, ...]:
        if name not in self.data:
            return default
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

_DAEMON_KEYS = ("http", "state_file", "checkpoint_every", "tls_cert", "tls_key", "tls_client_ca",
                "max_message_bytes", "max_batch_rows", "flush_every", "max_clock_skew",
                "strict_restore", "log_rejected", "max_abs_value")
_SOURCE_KEYS = ("socket", "bind", "connect", "topics", "curve_secret", "curve_allow",
                "high_water_mark")
_STREAM_KEYS = ("name", "topic", "fields", "half_life", "correction", "quantiles",
                "outlier_sigmas", "outlier_warmup", "mixture", "regression", "max_series",
                "idle_expiry")
_MIXTURE_KEYS = ("components", "log", "covariance", "warmup", "seed")
_REGRESSION_KEYS = ("y", "x", "intercept")
_TOP_KEYS = ("daemon", "source", "stream", "publish", "merge")


def _daemon(data: object) -> DaemonConfig:
    t = _Table(data, "daemon", _DAEMON_KEYS)
    d = DaemonConfig()
    http = t.string("http", d.http)
    split_host_port(http, t.key("http"))
    cfg = DaemonConfig(
        http=http,
        state_file=t.path_string("state_file"),
        checkpoint_every=t.duration("checkpoint_every", d.checkpoint_every),
        tls_cert=t.path_string("tls_cert"),
        tls_key=t.path_string("tls_key"),
        tls_client_ca=t.path_string("tls_client_ca"),
        max_message_bytes=t.integer("max_message_bytes", d.max_message_bytes, 16, 2**31 - 1),
        max_batch_rows=t.integer("max_batch_rows", d.max_batch_rows, 1, 2**31 - 1),
        flush_every=t.duration("flush_every", d.flush_every),
        max_clock_skew=t.duration("max_clock_skew", d.max_clock_skew),
        strict_restore=t.boolean("strict_restore", d.strict_restore),
        log_rejected=t.integer("log_rejected", d.log_rejected, 0),
        max_abs_value=_max_abs_value(t, d.max_abs_value),
    )
    if (cfg.tls_cert is None) != (cfg.tls_key is None):
        present = "tls_cert" if cfg.tls_cert is not None else "tls_key"
        missing = "tls_key" if present == "tls_cert" else "tls_cert"
        raise ConfigError(t.key(missing), _MISSING, f"{present} needs it too (HTTPS takes both)")
    if cfg.tls_client_ca is not None and cfg.tls_cert is None:
        raise ConfigError(t.key("tls_client_ca"), cfg.tls_client_ca,
                          "needs tls_cert and tls_key (client certificates need HTTPS)")
    return cfg


def _max_abs_value(t: _Table, default: float) -> float:
    """Largest accepted |value|; above 1e100 squares times weights could overflow float64."""
    value = t.raw("max_abs_value", default)
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
    t = _Table(data, path, _SOURCE_KEYS)
    socket = t.string("socket", _MISSING, ("pull", "sub"))
    bind = _endpoints(t, "bind", True)
    connect = _endpoints(t, "connect", False)
    if bool(bind) == bool(connect):
        raise ConfigError(t.key("bind"), list(bind) if bind else _MISSING,
                          "a source needs bind or connect (one of the two)" if not bind else
                          "and connect cannot both be given: a source either binds or connects")
    if "topics" in t.data and socket == "pull":
        raise ConfigError(t.key("topics"), t.data["topics"],
                          'applies only to socket = "sub" (a PULL socket takes everything)')
    topics = t.strings("topics", ("",))
    if not topics:
        raise ConfigError(t.key("topics"), [], 'must hold at least one prefix ("" = everything)')
    curve_secret = t.path_string("curve_secret")
    curve_allow = t.path_string("curve_allow")
    if curve_allow is not None and curve_secret is None:
        raise ConfigError(t.key("curve_allow"), curve_allow,
                          "needs curve_secret (the server key that authenticates producers)")
    return SourceConfig(socket=socket, bind=bind, connect=connect, topics=topics,
                        curve_secret=curve_secret, curve_allow=curve_allow,
                        high_water_mark=t.integer("high_water_mark", 10000, 1))


def _mixture(data: object, path: str) -> MixtureConfig:
    t = _Table(data, path, _MIXTURE_KEYS)
    return MixtureConfig(
        components=t.integer("components", _MISSING, 1, 64),
        log=t.boolean("log", False),
        covariance=t.string("covariance", "full", ("full", "diag")),
        warmup=t.integer("warmup", 200, 0),
        seed=t.integer("seed", 0, 0, 2**63 - 1),
    )


def _regression(data: object, path: str, fields: tuple[str, ...]) -> RegressionConfig:
    t = _Table(data, path, _REGRESSION_KEYS)
    y = t.string("y")
    if y not in fields:
        raise ConfigError(t.key("y"), y, f"is not one of the stream's fields {list(fields)}")
    x = t.strings("x")
    if not x:
        raise ConfigError(t.key("x"), [], "must name at least one field")
    intercept = t.boolean("intercept", True)
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


def _stream(data: object, path: str) -> StreamConfig:
    t = _Table(data, path, _STREAM_KEYS)
    name = t.string("name")
    if not LABEL_NAME.fullmatch(name):
        raise ConfigError(t.key("name"), name, "is not a valid stream name (letters, digits "
                          "and _, not starting with a digit)")
    try:
        topic = TopicTemplate.parse(t.string("topic"), t.key("topic"))
    except TopicError as exc:
        raise ConfigError(exc.key, exc.value, exc.message) from None
    for label in topic.labels:
        if label in RESERVED_LABELS or label.startswith("__"):
            raise ConfigError(t.key("topic"), topic.text, f"captures the label {{{label}}}, "
                              "which sigmad's metrics (or Prometheus) reserve; rename it")
    fields = _names(t, "fields", "field")
    half_life = t.raw("half_life", None)
    if half_life is not None:
        half_life = parse_half_life(half_life, t.key("half_life"))
    quantiles = t.numbers("quantiles", (0.5, 0.9, 0.99))
    for q in quantiles:
        if not 0.0 < q < 1.0:
            raise ConfigError(t.key("quantiles"), q, "must lie strictly between 0 and 1")
    sigmas = t.numbers("outlier_sigmas", ())
    for s in sigmas:
        if not (math.isfinite(s) and s > 0):
            raise ConfigError(t.key("outlier_sigmas"), s, "must be a finite number > 0")
    mixture = t.raw("mixture", None)
    regression = t.raw("regression", None)
    idle = t.raw("idle_expiry", None)
    return StreamConfig(
        name=name, topic=topic, fields=fields, half_life=half_life,
        correction=t.string("correction", "reliability", CORRECTIONS),
        quantiles=quantiles, outlier_sigmas=sigmas,
        outlier_warmup=t.integer("outlier_warmup", 30, 0),
        mixture=None if mixture is None else _mixture(mixture, t.key("mixture")),
        regression=None if regression is None else
        _regression(regression, t.key("regression"), fields),
        max_series=t.integer("max_series", 1000, 1),
        idle_expiry=None if idle is None else parse_duration(idle, t.key("idle_expiry")),
    )


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
        t = _Table(data["publish"], "publish", ("bind", "every"))
        bind = _endpoints(t, "bind", True)
        if not bind:
            raise ConfigError("publish.bind", _MISSING, "a [publish] table needs an endpoint")
        publish = PublishConfig(bind=bind, every=t.duration("every", 2.0))
    if "merge" in data:
        t = _Table(data["merge"], "merge", ("connect", "shard_expiry"))
        connect = _endpoints(t, "connect", False)
        if not connect:
            raise ConfigError("merge.connect", _MISSING, "a [merge] table needs endpoints")
        merge = MergeConfig(connect=connect, shard_expiry=t.duration("shard_expiry", 30.0))

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
            if streams[j].topic.overlaps(s.topic):
                raise ConfigError(f"stream[{i}].topic", s.topic.text,
                                  f"could take the same topics as stream[{j}] "
                                  f"({streams[j].topic.text!r}); make a literal segment differ")
    bound: dict[str, str] = {}
    binds = [(f"source[{i}].bind", ep) for i, s in enumerate(sources) for ep in s.bind]
    binds += [("publish.bind", ep) for ep in (publish.bind if publish else ())]
    for key, ep in binds:
        if ep in bound:
            raise ConfigError(key, ep, f"is already bound by {bound[ep]}")
        bound[ep] = key
    return Config(daemon=daemon, sources=sources, streams=streams, publish=publish, merge=merge)


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
        lines.append(f"  {st.name}: topic {st.topic.text!r} (labels: {labels})")
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
        if st.outlier_sigmas:
            lines.append(f"    outliers    beyond {', '.join(f'{s:g}' for s in st.outlier_sigmas)}"
                         f" sigma, after {st.outlier_warmup} observations")
        expiry = _show_duration(st.idle_expiry) if st.idle_expiry else "never"
        lines.append(f"    series      at most {st.max_series}; idle expiry {expiry}")
    if config.publish:
        lines.append(f"publish snapshots on {', '.join(config.publish.bind)} every "
                     f"{_show_duration(config.publish.every)}")
    if config.merge:
        lines.append(f"merge snapshots from {', '.join(config.merge.connect)}; shards expire "
                     f"after {_show_duration(config.merge.shard_expiry)}")
    return "\n".join(lines)
