"""The producer library over real ZeroMQ sockets (loopback TCP and ipc in tmp_path).

Expected messages are the wire format v1 of DESIGN.md: two frames [topic, body], the
body a msgpack map with values / weight / time / source / seq; expected arrays are the
numpy arrays that were sent.
"""

import os
import socket
import threading
import time

import msgpack
import numpy as np
import pytest
import zmq
from sigmad.daemon.client import Producer, default_source
from sigmad.daemon.ingest.wire import decode

LIMITS = {"max_bytes": 1 << 20, "max_rows": 100_000}
WAIT_MS = 5000


@pytest.fixture
def ctx():
    context = zmq.Context()
    yield context
    context.term()


def receive(sock: zmq.Socket) -> tuple[bytes, bytes]:
    assert sock.poll(WAIT_MS), "no message arrived"
    topic = sock.recv()
    assert sock.getsockopt(zmq.RCVMORE)
    body = sock.recv()
    assert not sock.getsockopt(zmq.RCVMORE)  # exactly two frames
    return topic, body


@pytest.fixture
def pull_tcp(ctx):
    sock = ctx.socket(zmq.PULL)
    port = sock.bind_to_random_port("tcp://127.0.0.1")
    yield sock, f"tcp://127.0.0.1:{port}"
    sock.close(0)


@pytest.fixture
def pull_ipc(ctx, tmp_path):
    sock = ctx.socket(zmq.PULL)
    endpoint = f"ipc://{tmp_path}/in.ipc"
    sock.bind(endpoint)
    yield sock, endpoint
    sock.close(0)


@pytest.mark.parametrize("pull", ["pull_tcp", "pull_ipc"])
def test_push_messages_decode_to_what_was_sent(request, ctx, pull):
    sock, endpoint = request.getfixturevalue(pull)
    with Producer(endpoint, context=ctx, source="svc-a:1") as p:
        p.send("lat.checkout.eu", {"ms": 12.5})
        p.send("lat.checkout.eu", {"ms": 30.0}, weight=2.0, time=1.7e9)
        p.send("lat.search.us", {"ms": np.array([1.0, 2.0, 3.0])}, weight=[1, 2, 3],
               time=np.array([10.0, 11.0, 12.0]))
    got = [receive(sock) for _ in range(3)]
    assert [t for t, _ in got] == [b"lat.checkout.eu", b"lat.checkout.eu", b"lat.search.us"]
    first, second, third = (decode(b, ("ms",), **LIMITS) for _, b in got)
    np.testing.assert_array_equal(first.values, [[12.5]])
    assert first.weights is None and first.times is None
    np.testing.assert_array_equal(second.weights, [2.0])
    np.testing.assert_array_equal(second.times, [1.7e9])
    np.testing.assert_array_equal(third.values[:, 0], [1.0, 2.0, 3.0])
    np.testing.assert_array_equal(third.weights, [1.0, 2.0, 3.0])
    np.testing.assert_array_equal(third.times, [10.0, 11.0, 12.0])
    assert [d.seq for d in (first, second, third)] == [0, 1, 2]
    assert {d.source for d in (first, second, third)} == {"svc-a:1"}


def test_numpy_batches_travel_as_bin(ctx, pull_tcp):
    sock, endpoint = pull_tcp
    with Producer(endpoint, context=ctx) as p:
        p.send("env.site.probe", {"temperature": np.array([20.5, 21.0]),
                                  "humidity": np.array([40.0, 41.0])})
    _, body = receive(sock)
    raw = msgpack.unpackb(body)
    assert isinstance(raw["values"]["temperature"], bytes)
    d = decode(body, ("temperature", "humidity"), **LIMITS)
    np.testing.assert_array_equal(d.values, [[20.5, 40.0], [21.0, 41.0]])


def test_default_source_is_host_and_pid(ctx, pull_tcp):
    sock, endpoint = pull_tcp
    with Producer(endpoint, context=ctx) as p:
        p.send("x", 1.0)
    _, body = receive(sock)
    assert decode(body, ("v",), **LIMITS).source == f"{socket.gethostname()}:{os.getpid()}"
    assert default_source() == f"{socket.gethostname()}:{os.getpid()}"


def test_seq_increments_per_producer_and_only_on_sent_messages(ctx, pull_tcp):
    sock, endpoint = pull_tcp
    a = Producer(endpoint, context=ctx, source="a")
    b = Producer(endpoint, context=ctx, source="b")
    try:
        a.send("x", 1.0)
        with pytest.raises(TypeError):
            a.send("x", "not a number")      # refused before sending: no seq used
        a.send("x", 2.0)
        b.send("x", 3.0)
        assert (a.seq, b.seq) == (2, 1)
    finally:
        a.close()
        b.close()
    seqs = {}
    for _ in range(3):
        d = decode(receive(sock)[1], ("v",), **LIMITS)
        seqs.setdefault(d.source, []).append(d.seq)
    assert seqs == {"a": [0, 1], "b": [0]}


def test_pub_to_a_sub_socket(ctx, tmp_path):
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.SUBSCRIBE, b"lat.")
    port = sub.bind_to_random_port("tcp://127.0.0.1")
    try:
        with Producer(f"tcp://127.0.0.1:{port}", socket="pub", context=ctx, source="pub") as p:
            # PUB drops messages until the subscription has crossed: probe until one lands
            for _ in range(200):
                p.send("lat.probe", 0.0)
                if sub.poll(25):
                    break
            else:
                pytest.fail("subscription never arrived")
            while sub.poll(50):
                sub.recv_multipart()
            p.send("other.topic", 1.0)          # filtered out by the SUB prefix
            p.send("lat.checkout.eu", {"ms": 7.0})
            last_seq = p.seq - 1
        topic, body = receive(sub)
    finally:
        sub.close(0)
    assert topic == b"lat.checkout.eu"
    d = decode(body, ("ms",), **LIMITS)
    assert d.values[0, 0] == 7.0 and d.seq == last_seq and d.source == "pub"


def test_producer_can_bind_for_a_connecting_daemon(ctx, tmp_path):
    endpoint = f"ipc://{tmp_path}/out.ipc"
    with Producer(endpoint, bind=True, context=ctx) as p:
        pull = ctx.socket(zmq.PULL)
        pull.connect(endpoint)
        try:
            p.send("x", 4.0)
            topic, body = receive(pull)
        finally:
            pull.close(0)
    assert topic == b"x" and decode(body, ("v",), **LIMITS).values[0, 0] == 4.0


@pytest.mark.skipif(not zmq.has("curve"), reason="libzmq built without CURVE")
def test_curve_encrypted_push(ctx):
    server_public, server_secret = zmq.curve_keypair()
    pull = ctx.socket(zmq.PULL)
    pull.curve_server = True
    pull.curve_secretkey = server_secret
    port = pull.bind_to_random_port("tcp://127.0.0.1")
    try:
        with Producer(f"tcp://127.0.0.1:{port}", context=ctx,
                      curve_server_key=server_public) as p:
            p.send("sec.x", 5.0)
        _, body = receive(pull)
    finally:
        pull.close(0)
    assert decode(body, ("v",), **LIMITS).values[0, 0] == 5.0


@pytest.mark.skipif(not zmq.has("curve"), reason="libzmq built without CURVE")
def test_curve_keys_from_certificate_files(ctx, tmp_path):
    import zmq.auth
    server_pub_file, server_secret_file = zmq.auth.create_certificates(tmp_path, "server")
    _, client_secret_file = zmq.auth.create_certificates(tmp_path, "client")
    _, server_secret = zmq.auth.load_certificate(server_secret_file)
    pull = ctx.socket(zmq.PULL)
    pull.curve_server = True
    pull.curve_secretkey = server_secret
    port = pull.bind_to_random_port("tcp://127.0.0.1")
    try:
        with Producer(f"tcp://127.0.0.1:{port}", context=ctx,
                      curve_server_key=server_pub_file,
                      curve_keypair=client_secret_file) as p:
            p.send("sec.x", 6.0)
        _, body = receive(pull)
    finally:
        pull.close(0)
    assert decode(body, ("v",), **LIMITS).values[0, 0] == 6.0


def test_a_full_push_queue_times_out_when_asked(ctx, tmp_path):
    # nobody listens: the queue fills to its high-water mark, then send waits and gives up
    with Producer(f"ipc://{tmp_path}/nobody.ipc", context=ctx, send_timeout=0.05,
                  high_water_mark=2, linger=0) as p:
        with pytest.raises(zmq.Again):
            for _ in range(100):
                p.send("x", 1.0)
        assert p.seq < 100


def test_close_and_context_manager(ctx, pull_tcp):
    _, endpoint = pull_tcp
    p = Producer(endpoint, context=ctx)
    with p:
        assert not p.closed
    assert p.closed


def test_unknown_socket_kind_is_refused(ctx):
    with pytest.raises(ValueError, match='"push" or "pub"'):
        Producer("tcp://127.0.0.1:1", socket="req", context=ctx)


def test_a_bad_endpoint_raises_and_closes_its_socket(ctx):
    # a leaked socket would make the fixture's ctx.term() block
    with pytest.raises(zmq.ZMQError):
        Producer("bogus://x", context=ctx)


def test_close_raises_when_messages_could_not_leave(tmp_path):
    from sigmad.daemon.client import DeliveryError

    # nothing listens on this ipc path: the messages stay queued
    p = Producer(f"ipc://{tmp_path}/nobody.ipc", linger=0.3)
    assert not p.wait_ready(0.2)
    p.send("t", 1.0)
    with pytest.raises(DeliveryError, match="nobody.ipc"):
        p.close()


def _subscriber(ctx, endpoint: str, got: list, ready: threading.Event) -> None:
    """A bound SUB polled the whole time, as the daemon's engine loop polls its sources."""
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    sub.bind(endpoint)
    ready.set()
    deadline = time.monotonic() + 5.0
    while time.monotonic() < deadline and not got:
        if sub.poll(20):
            got.append(sub.recv_multipart())
    sub.close(0)


@pytest.mark.parametrize("bind", [False, True])
def test_wait_ready_sees_a_push_peer_and_a_pub_subscriber(ctx, pull_tcp, tmp_path, bind):
    _, endpoint = pull_tcp
    with Producer(endpoint) as p:
        assert p.wait_ready(5.0)
    endpoint = f"ipc://{tmp_path}/sub.ipc"
    got: list = []
    if bind:   # the producer binds, the subscriber connects
        with Producer(endpoint, socket="pub", bind=True) as p:
            sub = ctx.socket(zmq.SUB)
            sub.setsockopt(zmq.SUBSCRIBE, b"")
            sub.connect(endpoint)
            try:
                assert p.wait_ready(5.0)
                p.send("t", 2.0)             # the first message sent: not dropped
                assert sub.poll(WAIT_MS)
            finally:
                sub.close(0)
        return
    ready = threading.Event()
    t = threading.Thread(target=_subscriber, args=(ctx, endpoint, got, ready))
    t.start()
    ready.wait(5)
    with Producer(endpoint, socket="pub") as p:
        assert p.wait_ready(5.0)
        p.send("t", 2.0)                     # the first message sent: not dropped
    t.join()
    assert got and got[0][0] == b"t"
