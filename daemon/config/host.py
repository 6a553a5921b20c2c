"""A validated configuration checked against this host: files, directories, addresses.

:func:`~sigmad.daemon.config.load.parse_config` judges the text alone and stops at
the first mistake. :func:`host_problems` then looks at the machine the daemon is
about to run on and reports *every* problem it finds, each a
:class:`~sigmad.daemon.config.errors.ConfigError` naming the key, the value and what
to do: a key or certificate file that cannot be read, a ``curve_allow`` or ``ipc``
directory that does not exist, an address this host does not have, a host name
that does not resolve. ``sigmad validate`` prints them all; ``sigmad run`` refuses
to start on the first. A port already in use is found only when the daemon binds
it (a running daemon of the same configuration would otherwise be a "problem").
"""

from __future__ import annotations

import os
import socket
from pathlib import Path

from sigmad.daemon.config.errors import ConfigError
from sigmad.daemon.config.schema import Config
from sigmad.daemon.config.units import split_host_port


def _readable_file(path: str, key: str) -> ConfigError | None:
    p = Path(path)
    if not p.exists():
        return ConfigError(key, path, "does not exist; create it or correct the path "
                           f"(relative paths start at {os.getcwd()})")
    if not p.is_file():
        return ConfigError(key, path, "is not a file")
    if not os.access(p, os.R_OK):
        return ConfigError(key, path, "cannot be read by this user; check its permissions")
    return None


def _curve_secret(path: str, key: str) -> ConfigError | None:
    from sigmad.daemon.ingest.curve_keys import load_server_keys

    problem = _readable_file(path, key)
    if problem is not None:
        return problem
    try:
        load_server_keys(path, key)
    except ConfigError as exc:
        return exc
    return None


def _directory(path: str, key: str, what: str) -> ConfigError | None:
    p = Path(path)
    if not p.is_dir():
        return ConfigError(key, path, f"is not an existing directory; create it ({what})")
    return None


def address_problem(host: str, key: str, value: str) -> ConfigError | None:
    """Whether this host can listen on ``host`` (resolving it; port 0, nothing kept open)."""
    if host in ("*", "0.0.0.0", "::"):
        return None
    try:
        infos = socket.getaddrinfo(host, 0, type=socket.SOCK_STREAM)
    except (socket.gaierror, UnicodeError):
        if any(host == name for _, name in socket.if_nameindex()):
            return None   # ZeroMQ binds an interface by name
        return ConfigError(key, value, f"names the host {host!r}, which does not resolve "
                           "here; use an IP address or a name this host resolves")
    last: OSError | None = None
    for family, kind, proto, _, addr in infos:
        with socket.socket(family, kind, proto) as s:
            try:
                s.bind((addr[0], 0) + tuple(addr[2:]))
                return None
            except OSError as exc:
                last = exc
    return ConfigError(key, value, f"is not an address of this host ({last.strerror}); "
                       "use one it has, e.g. 127.0.0.1, or 0.0.0.0 for every interface")


def endpoint_problem(endpoint: str, key: str, binding: bool) -> ConfigError | None:
    """Host checks of one ZeroMQ endpoint whose syntax is already valid."""
    scheme, _, rest = endpoint.partition("://")
    if scheme == "ipc" and binding:
        folder = Path(rest).parent
        if not folder.is_dir():
            return ConfigError(key, endpoint, f"needs the directory {str(folder)!r}, which "
                               "does not exist; create it or choose another path")
        if not os.access(folder, os.W_OK | os.X_OK):
            return ConfigError(key, endpoint, f"needs to create a file in {str(folder)!r}, "
                               "which this user cannot write")
    if scheme == "tcp" and binding:
        host, _ = split_host_port(rest, key, bind_any=True)
        return address_problem(host, key, endpoint)
    return None


def host_problems(config: Config) -> list[ConfigError]:
    """Every problem of ``config`` on this host, in file order (empty when none). O(keys)."""
    found: list[ConfigError | None] = []
    d = config.daemon
    host, _ = split_host_port(d.http, "daemon.http")
    found.append(address_problem(host, "daemon.http", d.http))
    for name in ("tls_cert", "tls_key", "tls_client_ca"):
        path = getattr(d, name)
        if path is not None:
            found.append(_readable_file(path, f"daemon.{name}"))
    if d.state_file is not None:
        folder = Path(d.state_file).parent
        if not folder.is_dir() and not folder.parent.is_dir():
            found.append(ConfigError("daemon.state_file", d.state_file,
                                     f"is in {str(folder)!r}, whose parent does not exist "
                                     "either; create the directory or correct the path"))
    for i, s in enumerate(config.sources):
        for ep in s.bind:
            found.append(endpoint_problem(ep, f"source[{i}].bind", True))
        if s.curve_secret is not None:
            found.append(_curve_secret(s.curve_secret, f"source[{i}].curve_secret"))
        if s.curve_allow is not None:
            found.append(_directory(s.curve_allow, f"source[{i}].curve_allow",
                                    "it holds the public keys of the producers let in"))
    if config.publish is not None:
        for ep in config.publish.bind:
            found.append(endpoint_problem(ep, "publish.bind", True))
    return [p.with_origin(config.origin) for p in found if p is not None]
