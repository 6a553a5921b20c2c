"""The tests' and the bench's port source: a port handed out is free, new, and out of
the way of outgoing connections.

A CI run failed when one test's daemon found the port of its second source taken. Its
ports came from asking the kernel for port 0, which can give one port twice (121
repeats in 2,000 calls on this machine) or a port that an outgoing connection takes
next (both come from the ephemeral range).
"""

from __future__ import annotations

import socket

from harness import free_port
from sigmad.daemon.bench import process, suite


def test_the_bench_takes_its_ports_from_the_same_place():
    assert process.free_port is free_port and suite.free_port is free_port


def test_no_port_is_handed_out_twice():
    ports = [free_port() for _ in range(2000)]
    assert len(set(ports)) == len(ports)


def test_ports_sit_below_the_ephemeral_range():
    from sigmad.daemon.bench.ports import FLOOR, ephemeral_range
    low, high = ephemeral_range()
    assert 1024 <= low <= high
    ports = [free_port() for _ in range(200)]
    if low - FLOOR >= 1000:
        assert all(FLOOR <= p < low for p in ports), (low, sorted(ports)[:3], sorted(ports)[-3:])


def test_a_held_port_is_passed_over():
    held = []
    try:
        for _ in range(50):
            s = socket.socket()
            s.bind(("127.0.0.1", free_port()))
            s.listen()
            held.append(s)
        taken = {s.getsockname()[1] for s in held}
        for _ in range(500):
            p = free_port()
            assert p not in taken
            with socket.socket() as s:
                s.bind(("127.0.0.1", p))   # would raise if it were held
    finally:
        for s in held:
            s.close()
