"""ZeroMQ sources: open the configured sockets and drain them without blocking."""

from __future__ import annotations

import errno

import zmq
from sigmad.daemon.config.errors import ConfigError
from sigmad.daemon.config.schema import SourceConfig

# A socket is drained until empty, this many messages or this many frame bytes, so
# that one busy source cannot starve the others or grow a flush without bound.
DRAIN_LIMIT = 5_000
DRAIN_BYTES = 1 << 20


def _looks_like_body(frame: bytes) -> bool:
    """Starts like a msgpack map: fixmap (0x80-0x8f), map16 (0xde) or map32 (0xdf)."""
    return bool(frame) and (frame[0] & 0xF0 == 0x80 or frame[0] in (0xDE, 0xDF))


class BindError(RuntimeError):
    """A bind that failed for a reason other than the configuration (exit code 2)."""


#: ZeroMQ bind errors that the configuration (or the host's set-up) causes, with
#: what to say and what to do; anything else is a runtime failure.
_BIND_ERRORS = {
    errno.EADDRINUSE: "is already in use by another process; stop that process or "
                      "choose another port",
    errno.EADDRNOTAVAIL: "is not an address of this host; bind one it has, e.g. 127.0.0.1, "
                         "or * for every interface",
    errno.ENODEV: "names neither an address nor a network interface of this host; "
                  "use an IP address it has, e.g. 127.0.0.1",
    errno.ENOENT: "is in a directory that does not exist; create the directory or "
                  "choose another path",
    errno.EACCES: "cannot be bound by this user (ports below 1024 need privileges, an ipc "
                  "path a writable directory)",
    errno.EINVAL: 'is not an endpoint ZeroMQ accepts, e.g. "tcp://127.0.0.1:7410"',
}


def bind_socket(socket: zmq.Socket, endpoint: str, key: str) -> None:
    """``socket.bind(endpoint)``, its failure told as one sentence naming ``key``.

    Raises
    ------
    ConfigError
        For a mistake the user can fix (address in use or not on this host, a
        missing directory, no permission).
    BindError
        For any other failure.
    """
    try:
        socket.bind(endpoint)
    except zmq.ZMQError as exc:
        told = _BIND_ERRORS.get(exc.errno)
        if told is None:
            raise BindError(f"{key} = {endpoint!r} could not be bound: "
                            f"{zmq.strerror(exc.errno)}") from None
        raise ConfigError(key, endpoint, told) from None


class Source:
    """One configured socket and the label its messages are counted under.

    ``key`` names the source in errors (``source[0]``); a failed bind raises
    what :func:`bind_socket` raises, with the socket closed.
    """

    drain_before_flush = False   # drained when the poller says so (see MqttSource)

    def __init__(self, ctx: zmq.Context, cfg: SourceConfig, key: str = "source") -> None:
        kind = zmq.PULL if cfg.socket == "pull" else zmq.SUB
        self.cfg = cfg
        self.socket = ctx.socket(kind)
        self.socket.setsockopt(zmq.RCVHWM, cfg.high_water_mark)
        self.socket.setsockopt(zmq.LINGER, 0)
        self.label = f"{cfg.socket} " + " ".join(cfg.bind or cfg.connect)
        self.guard = None
        if cfg.curve_secret:
            from sigmad.daemon.ingest.curve_auth import Guard

            try:
                self.guard = Guard(ctx, self.socket, cfg, domain=self.label, key=key)
            except BaseException:
                self.socket.close(0)
                raise
        if kind == zmq.SUB:
            for prefix in cfg.topics:
                self.socket.setsockopt(zmq.SUBSCRIBE, prefix.encode())
        try:
            for ep in cfg.bind:
                bind_socket(self.socket, ep, f"{key}.bind")
            for ep in cfg.connect:
                self.socket.connect(ep)
        except BaseException:
            self.close()
            raise

    @property
    def endpoints(self) -> list[str]:
        """Bound endpoints as resolved by ZeroMQ (a tcp port 0 or '*' becomes real)."""
        last = self.socket.getsockopt_string(zmq.LAST_ENDPOINT)
        return [last] if last else list(self.cfg.bind or self.cfg.connect)

    def drain(self, engine, now: float, limit: int = DRAIN_LIMIT) -> int:
        """Receive up to ``limit`` messages without blocking and hand them to the engine.

        A message is two frames, read with two plain ``recv`` calls. Asking ZeroMQ
        whether more frames follow (RCVMORE) costs more than a receive in pyzmq, so
        it is asked only when a pair does not look like [topic, body]: the first
        frame is not a topic that a stream takes, or the second does not start like
        a msgpack map. If RCVMORE then says the pair did not end a message, and the
        pair still does not look like one, its first frame is counted as
        ``bad_frames`` and the pair slides on by one frame. A topic is UTF-8 text
        and never starts like a map, so a good message that follows a malformed one
        is always read as itself. What this costs (README, "Wire format v1"): a
        one-frame message followed by another is read as one [topic, body] pair;
        of a longer message the first two frames are read as a message, and the
        frames after them as the next pair (one that does not look like a message
        costs one ``bad_frames`` a frame; one that does is read as a message).
        Returns the messages read. O(messages).
        """
        recv = self.socket.recv
        routes = engine.routes_seen
        route = engine.route
        noblock = zmq.NOBLOCK
        topics: list[bytes] = []
        bodies: list[bytes] = []
        add_topic, add_body = topics.append, bodies.append
        n = size = 0
        for n in range(1, limit + 1):   # noqa: B007  (n is the count read)
            try:
                topic = recv(noblock)
            except zmq.Again:
                n -= 1
                break
            try:
                body = recv(noblock)
            except zmq.Again:   # messages arrive whole: this was a one-frame message
                self._stray(engine, topic, now)
                break
            # a routed topic and a body that starts like a map: a [topic, body] pair
            # (a topic not seen yet is routed here, so RCVMORE is not asked for it)
            if body and body[0] & 0xF0 == 0x80 and (routes.get(topic) is not None
                                                     or route(topic) is not None):
                add_topic(topic)
                add_body(body)
            else:
                pair = self._realign(engine, topic, body, now)
                if pair is not None:
                    add_topic(pair[0])
                    add_body(pair[1])
            size += len(topic) + len(body)
            if size >= DRAIN_BYTES:
                break
        if topics:
            engine.ingest_many(topics, bodies, now, self.label)
        return n

    def _realign(self, engine, first: bytes, second: bytes,
                 now: float) -> tuple[bytes, bytes] | None:
        """Slide past stray frames until a pair ends a message or looks like one."""
        more = self.socket.getsockopt
        while more(zmq.RCVMORE):
            if engine.route(first) is not None and _looks_like_body(second):
                return first, second
            self._stray(engine, first, now)
            first = second
            try:
                second = self.socket.recv(zmq.NOBLOCK)
            except zmq.Again:   # not expected mid-message: ZeroMQ delivers messages whole
                self._stray(engine, first, now)
                return None
        return first, second

    def _stray(self, engine, frame: bytes, now: float) -> None:
        engine.messages[self.label] += 1
        engine.reject("bad_frames", topic=frame, detail="a frame outside a [topic, body] pair",
                      now=now)

    def stop_receiving(self) -> None:
        """Nothing to leave: a ZeroMQ peer keeps no session for us (see MqttSource)."""

    def close(self) -> None:
        if self.guard is not None:
            self.guard.close()
        self.socket.close(0)
