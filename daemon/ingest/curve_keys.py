"""CurveZMQ keys: ``sigmad keygen`` and loading the daemon's key pair."""

from __future__ import annotations

import os
from pathlib import Path

import zmq.auth
from sigmad.daemon.config.errors import ConfigError


def keygen(directory: str | os.PathLike, name: str = "sigmad") -> tuple[Path, Path]:
    """Write a CurveZMQ key pair ``NAME.key`` (public) and ``NAME.key_secret`` into DIR.

    The secret file is created with mode 0600 (the umask is tightened while it is
    written, so it is never readable by others even for a moment); existing keys
    are never overwritten. Returns (public path, secret path).

    Raises
    ------
    FileExistsError
        If either file already exists.
    """
    d = Path(directory)
    public, secret = d / f"{name}.key", d / f"{name}.key_secret"
    for p in (public, secret):
        if p.exists():
            raise FileExistsError(f"{p} already exists; refusing to overwrite a key")
    d.mkdir(parents=True, exist_ok=True)
    old = os.umask(0o077)
    try:
        made_public, made_secret = zmq.auth.create_certificates(str(d), name)
    finally:
        os.umask(old)
    os.chmod(made_secret, 0o600)
    os.chmod(made_public, 0o644)   # public keys are meant to be handed out
    return Path(made_public), Path(made_secret)

def load_server_keys(path: str, key: str = "source.curve_secret") -> tuple[bytes, bytes]:
    """(public, secret) from a zmq.auth secret certificate file.

    Raises ConfigError (naming ``key`` and the file) when it cannot be read or
    holds no secret key (a public ``.key`` file given by mistake).
    """
    try:
        public, secret = zmq.auth.load_certificate(path)
    except (OSError, ValueError) as exc:
        why = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        raise ConfigError(key, path, f"cannot be read as a key pair ({why}); "
                          "write one with `sigmad keygen DIR`") from None
    if not secret:
        raise ConfigError(key, path, "holds no secret key; give the .key_secret file "
                          "that `sigmad keygen` wrote beside it")
    return public, secret
