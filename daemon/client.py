"""A producer library: send observations to sigmad from a Python service.

A message is two ZeroMQ frames, ``[topic, body]`` (wire format v1): the topic
is UTF-8 text of dot-separated segments that a stream's template matches
(``lat.checkout.eu``), the body a msgpack map with ``values`` (a number per
field, or arrays for a batch), optional ``weight`` and ``time`` (unix seconds),
and the producer's ``source`` and ``seq`` so the daemon can count lost
messages. See :mod:`daemon.wire` for the full table.

Example (the daemon's default PULL source listens on tcp://127.0.0.1:7410)::

    from sigmad.daemon.client import Producer

    with Producer("tcp://127.0.0.1:7410") as p:
        p.send("lat.checkout.eu", {"ms": 12.7})                  # one observation
        p.send("lat.checkout.eu", {"ms": np.array([9.1, 30.2])},  # a batch, sent as bin
               weight=[1.0, 2.0])

``send`` is non-blocking until the socket's send queue (``high_water_mark``
messages) is full; then a PUSH socket waits for the daemon (up to
``send_timeout`` if given, raising ``zmq.Again``) and a PUB socket drops.

``close()`` (and leaving the ``with`` block) waits up to ``linger`` seconds
(default 10) until every message sent has left, and raises
:class:`DeliveryError` if some had not: a script that sends and exits loses
nothing without being told. ``wait_ready(timeout)`` says whether a daemon is
there (a PUSH peer finished the ZeroMQ handshake; a PUB has a subscriber),
before anything is sent.
"""

from __future__ import annotations

import contextlib
import os
import socket as _socket
import threading
import time as _time
from collections.abc import Iterator, Sequence
from pathlib import Path
from types import TracebackType
from typing import NamedTuple

import msgpack
import zmq
import zmq.auth
from sigmad.daemon.ingest.wire import encode
from zmq.utils.monitor import parse_monitor_message

_SOCKETS = {"push": zmq.PUSH, "pub": zmq.PUB}
#: Seconds ``wait_ready`` gives a SUB's subscription to follow the handshake when a
#: PUB connects: libzmq (4.3.5) does not pass subscriptions up to a *connecting*
#: XPUB, so they cannot be seen; on loopback they follow within 2 ms (measured).
SUBSCRIPTION_GRACE = 0.25



#: the monitor events a producer reads: a peer let it in, or refused its handshake
_HANDSHAKE_EVENTS = (zmq.EVENT_HANDSHAKE_SUCCEEDED | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL
                     | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL | zmq.EVENT_HANDSHAKE_FAILED_AUTH)

class DeliveryError(RuntimeError):
    """``close()`` ran out of time before every message sent had left."""


def default_source() -> str:
    """``hostname:pid``, the default producer id."""
    return f"{_socket.gethostname()[:100]}:{os.getpid()}"


def _public_key(key: bytes | str | Path) -> bytes:
    """A Z85 public key, or the public key in a zmq.auth certificate file."""
    if isinstance(key, Path) or (isinstance(key, str) and os.path.isfile(key)):
        public, _ = zmq.auth.load_certificate(str(key))
        return public
    return key.encode("ascii") if isinstance(key, str) else key


class Producer:
    """Sends ``[topic, body]`` messages to a sigmad source.

    Parameters
    ----------
    endpoint : str
        ``tcp://host:port``, ``ipc://path`` or ``inproc://name``.
    socket : {"push", "pub"}
        PUSH for a ``socket = "pull"`` source, PUB for ``"sub"``.
    bind : bool
        Bind the endpoint instead of connecting to it (e.g. a PUB that several
        daemons connect to).
    source : str, optional
        Producer id stamped on every message; default ``hostname:pid``.
    context : zmq.Context, optional
        Default: a context of this producer's own, which ``close()`` ends; that is
        what lets it know every message left. With a context of yours, messages
        leave when you ``term()`` it, and ``close()`` cannot tell.
    curve_server_key : bytes, str or path, optional
        The daemon's CurveZMQ public key (Z85) or its public certificate file;
        turns on encryption and authentication.
    curve_keypair : (public, secret) or path, optional
        This producer's CurveZMQ key pair, or its secret certificate file;
        default a fresh pair (accepted only by a daemon without ``curve_allow``).
    high_water_mark : int
        Messages queued before ``send`` waits (PUSH) or drops (PUB).
    linger : float
        Seconds ``close`` waits for queued messages to leave (then
        :class:`DeliveryError`); 0 drops them without a word.
    send_timeout : float, optional
        Seconds a PUSH ``send`` waits on a full queue before ``zmq.Again``;
        default wait for ever.

    Attributes
    ----------
    seq : int
        Sequence number the next message will carry (starts at 0).

    Examples
    --------
    >>> import zmq
    >>> ctx = zmq.Context()
    >>> pull = ctx.socket(zmq.PULL)
    >>> _ = pull.bind("inproc://doc")
    >>> with Producer("inproc://doc", context=ctx, source="doc") as p:
    ...     p.send("lat.checkout.eu", {"ms": 12.5})
    >>> pull.recv(), len(pull.recv()) > 0
    (b'lat.checkout.eu', True)
    >>> pull.close(); ctx.term()
    """

    def __init__(self, endpoint: str, *, socket: str = "push", bind: bool = False,
                 source: str | None = None, context: zmq.Context | None = None,
                 curve_server_key: bytes | str | Path | None = None,
                 curve_keypair: tuple[bytes, bytes] | str | Path | None = None,
                 high_water_mark: int = 10000, linger: float = 10.0,
                 send_timeout: float | None = None) -> None:
        if socket not in _SOCKETS:
            raise ValueError(f'socket must be "push" or "pub", got {socket!r}')
        self.endpoint = endpoint
        self.source = default_source() if source is None else source
        self.seq = 0
        self.linger = linger
        self._kind = socket
        self._own_context = context is None
        self._context = zmq.Context() if context is None else context
        # a binding PUB is an XPUB: it sends the same and sees subscriptions come in
        kind = zmq.XPUB if socket == "pub" and bind else _SOCKETS[socket]
        self._socket = self._context.socket(kind)
        self._socket.setsockopt(zmq.SNDHWM, high_water_mark)
        self._socket.setsockopt(zmq.LINGER, int(linger * 1000))   # if dropped unclosed
        self._ready = False
        self._refused = False     # a daemon refused our handshake (CurveZMQ) and none let us in
        self._monitor = None
        self._grace = SUBSCRIPTION_GRACE if socket == "pub" else 0.0
        if kind != zmq.XPUB:   # told when a peer finishes, or refuses, the handshake
            self._monitor = self._socket.get_monitor_socket(_HANDSHAKE_EVENTS)
        if send_timeout is not None:
            self._socket.setsockopt(zmq.SNDTIMEO, int(send_timeout * 1000))
        try:
            self._curve(curve_server_key, curve_keypair)
        except BaseException:
            self._abandon()
            raise
        try:
            (self._socket.bind if bind else self._socket.connect)(endpoint)
        except zmq.ZMQError:
            self._abandon()
            raise

    def _curve(self, server_key, keypair) -> None:
        if server_key is None:
            return
        if keypair is None:
            public, secret = zmq.curve_keypair()
        elif isinstance(keypair, (str, Path)):
            public, secret = zmq.auth.load_certificate(str(keypair))
            if secret is None:
                raise ValueError(f"{keypair} holds no secret key")
        else:
            public, secret = keypair
        self._socket.curve_publickey = public
        self._socket.curve_secretkey = secret
        self._socket.curve_serverkey = _public_key(server_key)

    def wait_ready(self, timeout: float) -> bool:
        """Whether a daemon is there, waiting up to ``timeout`` seconds.

        PUSH: a peer has finished the ZeroMQ handshake (with CURVE, been let in).
        PUB: a subscriber has subscribed, so what is sent next reaches it (the
        messages a PUB sends before that are dropped). A binding PUB sees the
        subscription itself; a connecting one sees the handshake and then gives
        the subscription ``SUBSCRIPTION_GRACE`` seconds to follow.
        """
        deadline = _time.monotonic() + timeout
        while not self._ready:
            left = deadline - _time.monotonic()
            if left <= 0:
                return False
            if self._monitor is not None:
                if self._read_handshakes(left) and self._ready and self._grace:
                    _time.sleep(self._grace)
            elif self._socket.poll(int(left * 1000) + 1):
                # a subscription (first byte 1) on the XPUB
                self._ready = self._socket.recv_multipart()[0][:1] == b"\x01"
        return True

    def _read_handshakes(self, wait: float) -> bool:
        """Read the monitor's handshake events, waiting up to ``wait`` s for the first:
        a success makes the producer ready, a failure marks it refused. Whether any
        event came."""
        came = False
        while self._monitor.poll(int(wait * 1000) + 1 if not came else 0):
            came = True
            event = parse_monitor_message(self._monitor.recv_multipart())["event"]
            if event == zmq.EVENT_HANDSHAKE_SUCCEEDED:
                self._ready = True
            else:
                self._refused = True
        return came

    def send(self, topic: str, values: object, *, weight: object = None,
             time: object = None) -> None:
        """Send one observation or a batch on ``topic``. O(n d).

        Parameters
        ----------
        topic : str
        values : number, array-like or mapping field -> number or array-like
            Arrays (numpy or lists) are sent as bin of little-endian float64.
        weight, time : number or array-like, optional

        Raises
        ------
        TypeError, ValueError
            If values cannot be encoded (nothing is sent).
        zmq.Again
            PUSH with ``send_timeout``: the queue stayed full.
        """
        body = encode(values, weight=weight, time=time, source=self.source, seq=self.seq)
        # Two send() calls: cheaper than send_multipart for two frames.
        self._socket.send(topic.encode("utf-8"), zmq.SNDMORE)
        self._socket.send(body)
        self.seq += 1

    def close(self) -> None:
        """Close the socket once every message sent has left, waiting up to ``linger`` s.

        Raises
        ------
        DeliveryError
            If messages were still queued after ``linger`` seconds (the daemon
            not reachable, or not reading); they are dropped when the process
            exits. With a context of your own, messages leave when you ``term()``
            it, and this returns at once.
        """
        if self._socket.closed:
            return
        if self._monitor is not None and self._own_context:
            self._read_handshakes(0.0)
            if self._refused and not self._ready:    # nothing can have left: say so now
                self._abandon()
                raise DeliveryError(
                    f"{self.endpoint} refused this producer's handshake (a CurveZMQ key "
                    f"it does not allow, or none); seq 0..{self.seq - 1} were not sent")
        self._close_monitor()
        if not self._own_context:
            self._socket.close()
            return
        if self.linger <= 0:   # asked not to wait: what is queued is dropped, unsaid
            self._abandon()
            return
        self._socket.setsockopt(zmq.LINGER, -1)   # term() below returns when all have left
        self._socket.close()
        done = threading.Thread(target=self._context.term, name="sigmad-producer-close",
                                daemon=True)
        done.start()
        done.join(self.linger)
        if done.is_alive():
            raise DeliveryError(
                f"messages sent to {self.endpoint} had not all left after {self.linger:g} s "
                f"(of seq 0..{self.seq - 1}); is the daemon running and reading?")

    def _close_monitor(self) -> None:
        if self._monitor is not None:
            with contextlib.suppress(zmq.ZMQError):
                self._socket.disable_monitor()
            self._monitor.close(0)
            self._monitor = None

    def _abandon(self) -> None:
        self._close_monitor()
        self._socket.close(0)
        if self._own_context:
            self._context.term()

    @property
    def closed(self) -> bool:
        return self._socket.closed

    def __enter__(self) -> Producer:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()


class Estimates(NamedTuple):
    """One series' estimates from the push feed (``[feed]`` in the daemon's configuration).

    ``series`` is the series' map as ``/api/state`` gives it (schema 1): ``stream``,
    ``labels``, ``fields``, ``observations``, ``mean``, ``stddev``, ``variance``,
    ``covariance``, ``correlation``, ``quantiles``, ``volatility``, ``regression``
    (with ``residual`` and ``residual_z``, the spread and its z-score), ... ; values not
    defined yet are None.
    """

    stream: str
    labels: dict
    sent_at: float
    series: dict


class Subscriber:
    """Receives the latest estimates of a daemon's series as they change.

    The daemon sends a series' estimates after every flush that changed them
    (``daemon.flush_every``, 50 ms by default), so a strategy process sees new
    data within one flush interval instead of waiting for a scrape. Messages
    are ``[b"sigmad.estimates.<stream>.", body]`` with body a msgpack map
    ``{"format": 1, "sent_at": unix seconds, "series": {...}}``; see
    :mod:`sigmad.daemon.export.feed`.

    Parameters
    ----------
    endpoint : str
        The daemon's ``[feed] bind`` endpoint, e.g. ``tcp://127.0.0.1:7412``.
    streams : sequence of str
        Streams to receive; empty: all of them.
    max_message_bytes : int
        Larger messages are dropped by ZeroMQ before they reach Python.

    Estimates are not trading advice: they are statistics of the data sent.

    Examples
    --------
    >>> import zmq
    >>> ctx = zmq.Context()
    >>> with Subscriber("inproc://feed-doc", ["pair"], context=ctx) as sub:
    ...     sub.receive(timeout=0.01) is None    # nothing published yet
    True
    >>> ctx.term()
    """

    def __init__(self, endpoint: str, streams: Sequence[str] = (), *,
                 context: zmq.Context | None = None,
                 max_message_bytes: int = 16 * 2**20) -> None:
        self.endpoint = endpoint
        self._context = context if context is not None else zmq.Context.instance()
        self._socket = self._context.socket(zmq.SUB)
        self._socket.setsockopt(zmq.LINGER, 0)
        self._socket.setsockopt(zmq.MAXMSGSIZE, max_message_bytes)
        for prefix in ([b"sigmad.estimates." + s.encode() + b"." for s in streams]
                       or [b"sigmad.estimates."]):
            self._socket.setsockopt(zmq.SUBSCRIBE, prefix)
        try:
            self._socket.connect(endpoint)
        except zmq.ZMQError:
            self._socket.close(0)
            raise

    def receive(self, timeout: float | None = None) -> Estimates | None:
        """The next series' estimates; None when ``timeout`` seconds pass first.

        Raises ValueError on a message of another format (naming the format seen).
        """
        if not self._socket.poll(None if timeout is None else int(timeout * 1000)):
            return None
        frames = self._socket.recv_multipart()
        if len(frames) != 2:
            raise ValueError(f"feed message has {len(frames)} frames, expected 2")
        body = msgpack.unpackb(frames[1], raw=False)
        if not isinstance(body, dict) or body.get("format") != 1:
            seen = body.get("format") if isinstance(body, dict) else type(body).__name__
            raise ValueError(f"feed message format {seen!r} is not 1: upgrade the client")
        s = body["series"]
        return Estimates(s["stream"], s["labels"], float(body["sent_at"]), s)

    def __iter__(self) -> Iterator[Estimates]:
        while True:
            yield self.receive()

    def close(self) -> None:
        self._socket.close(0)

    def __enter__(self) -> Subscriber:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()
