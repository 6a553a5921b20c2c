"""Loopback ports for the daemons, brokers and scrapers that the bench and the tests start.

Asking the kernel for port 0 and closing the socket at once is a race twice over:
the kernel may hand the same port to the next such call (about one in 17 calls gave a
port already given, measured over 2,000 calls), and any outgoing connection on the
machine takes its local port from the same ephemeral range. Either way a daemon told
to bind that port later finds it in use (a CI run failed so: a daemon's second source
found its port taken). Here a port comes from below the ephemeral range, where no
outgoing connection lands, is never handed out twice by one process, and is held by
nobody at the moment it is handed out.
"""

from __future__ import annotations

import os
import random
import socket

#: where the search starts when the kernel's ephemeral range begins high enough
FLOOR = 20000

_given: set[int] = set()
_rng = random.Random(os.getpid() ^ int.from_bytes(os.urandom(4), "little"))


def ephemeral_range() -> tuple[int, int]:
    """The kernel's range for outgoing connections' local ports (Linux; else the usual one)."""
    try:
        with open("/proc/sys/net/ipv4/ip_local_port_range") as f:
            low, high = (int(p) for p in f.read().split())
        return low, high
    except (OSError, ValueError):
        return 32768, 60999


def _free_now(port: int) -> bool:
    with socket.socket() as s:
        try:
            s.bind(("127.0.0.1", port))
        except OSError:
            return False
    return True


def free_port() -> int:
    """A loopback TCP port nobody holds now, outside the ephemeral range when it can be,
    and new to this process."""
    low, _ = ephemeral_range()
    if low - FLOOR >= 1000:
        span = low - FLOOR
        start = _rng.randrange(span)   # processes on one machine start far apart
        for i in range(span):
            port = FLOOR + (start + i) % span
            if port not in _given and _free_now(port):
                _given.add(port)
                return port
    for _ in range(1000):   # a machine with a low ephemeral range: the kernel's choice
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            port = s.getsockname()[1]
        if port not in _given:
            _given.add(port)
            return port
    raise OSError("no free loopback port found")
