"""Reading a configuration: TOML validated into the schema's frozen dataclasses
(``schema.py``) before anything starts.

Every problem is a :class:`ConfigError` whose message is one sentence naming
the file, the key path (``stream[2].half_life``; tables of an array count from
0) and the value. Unknown keys are errors, with a "did you mean" when a known
key is close.

Durations, half-lives and addresses are read by ``units.py``; ``host.py``
checks what only this host can tell (files, directories, addresses).

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
import tomllib
from importlib import resources
from pathlib import Path
from typing import Any

from sigmad.daemon.config.errors import MISSING, ConfigError
from sigmad.daemon.config.schema import (
    RESERVED_LABELS,
    Config,
    DaemonConfig,
    FeedConfig,
    MergeConfig,
    MixtureConfig,
    MqttConfig,
    PublishConfig,
    RegressionConfig,
    SourceConfig,
    StreamConfig,
    schema_defaults,
)
from sigmad.daemon.config.session import SessionError, SessionReset
from sigmad.daemon.config.units import (
    check_endpoint,
    parse_duration,
    parse_half_life,
    split_host_port,
)
from sigmad.daemon.ingest.topics import LABEL_NAME, SEPARATORS, TopicError, TopicTemplate
from sigmad.estimators import CORRECTIONS, TRANSFORMS

_SCHEMA = object()   # "the default the schema's dataclass declares"


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
            default = self.defaults.get(name, MISSING)
        value = self.data.get(name, default)
        if value is MISSING:
            raise ConfigError(self.key(name), MISSING, why)
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
        raise ConfigError(t.key(missing), MISSING, f"{present} needs it too (HTTPS takes both)")
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
        raise ConfigError(t.key("bind"), list(bind) if bind else MISSING,
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
        raise ConfigError(t.key(missing), MISSING, f"{present} needs it too (a client "
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
            raise ConfigError("publish.bind", MISSING, "a [publish] table needs an endpoint")
        publish = PublishConfig(bind=bind, every=t.duration("every"))
    if "merge" in data:
        t = _Table(data["merge"], "merge", MergeConfig)
        connect = _endpoints(t, "connect", False)
        if not connect:
            raise ConfigError("merge.connect", MISSING, "a [merge] table needs endpoints")
        merge = MergeConfig(connect=connect, shard_expiry=t.duration("shard_expiry"))

    feed = None
    if "feed" in data:
        t = _Table(data["feed"], "feed", FeedConfig)
        bind = _endpoints(t, "bind", True)
        if not bind:
            raise ConfigError("feed.bind", MISSING, "a [feed] table needs an endpoint")
        feed = FeedConfig(bind=bind)
    if not sources and merge is None:
        raise ConfigError("source", MISSING, "add a [[source]] (or a [merge] table) so the "
                          "daemon has something to read")
    if sources and not streams:
        raise ConfigError("stream", MISSING, "add a [[stream]] so messages have somewhere to go")
    if merge is not None and not streams:
        raise ConfigError("stream", MISSING, "a merger reads shard states through its "
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
    are checked on their own (each again without a key found bad, so every bad key is
    reported), then, if they are all sound, the whole (cross-checks). ``sigmad
    validate`` prints them all.

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

    def attempt_each_key(check, table: object, path: str, schema: type) -> None:
        """Check a table, and after each problem with an optional key check it again
        without that key, so every bad key of the table is reported (a problem with a
        required key, or one naming no key of this table, ends its report)."""
        required = {k for k, v in schema_defaults(schema).items() if v is MISSING}
        table = dict(table) if isinstance(table, dict) else table
        for _ in range(64):
            try:
                check(table) if path == "daemon" else check(table, path)
                return
            except ConfigError as exc:
                problems.append(exc.with_origin(origin))
                name = exc.key[len(path) + 1:].split(".")[0].split("[")[0] \
                    if exc.key.startswith(path + ".") else ""
                if not isinstance(table, dict) or name not in table or name in required \
                        or exc.value is MISSING:
                    return
                del table[name]

    attempt(_Table, data, "", _TOP_KEYS)
    attempt_each_key(_daemon, data.get("daemon", {}), "daemon", DaemonConfig)
    for name, check, schema in (("source", _source, SourceConfig),
                                ("stream", _stream, StreamConfig)):
        try:
            tables = _array_of_tables(data, name)
        except ConfigError as exc:
            problems.append(exc.with_origin(origin))
            continue
        for i, table in enumerate(tables):
            attempt_each_key(check, table, f"{name}[{i}]", schema)
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
