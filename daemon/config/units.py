"""Units of the configuration: durations (``"250ms"``, ``"5m"``), half-lives (``"10m"``,
``"5000 obs"``), ``host:port`` addresses and ZeroMQ endpoints; each read once, here."""

from __future__ import annotations

import ipaddress
import math
import re

from sigmad.daemon.config.errors import ConfigError
from sigmad.estimators import HalfLife

_UNITS = {"ms": 1e-3, "s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0}
_DURATION = re.compile(r"\s*(\d+(?:\.\d*)?|\.\d+)\s*(ms|s|m|h|d)\s*")
_COUNT = re.compile(r"\s*(\d+(?:\.\d*)?|\.\d+)\s*(obs|observations)\s*")
_ENDPOINT = re.compile(r"(tcp|ipc|inproc)://(.+)")
_DOTTED = re.compile(r"[0-9.]+")


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


def show_duration(seconds: float) -> str:
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("m", 60.0), ("s", 1.0)):
        if seconds >= size and (seconds / size).is_integer():
            return f"{int(seconds / size)}{unit}"
    return f"{seconds * 1000:g}ms" if seconds < 1 else f"{seconds:g}s"


def show_half_life(h: HalfLife | None) -> str:
    if h is None:
        return "none (no forgetting)"
    if h.by_count:
        return f"{h.length:g} observations"
    return f"{show_duration(h.length)} of event time"
