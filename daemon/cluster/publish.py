"""A shard's side of the merge tier: state snapshots on a ZeroMQ PUB socket.

Every ``[publish] every`` the engine thread sends one message of two frames,
``[b"sigmad.state", body]``, where body is a msgpack map

=============  ===========================================================
``format``     1
``shard``      this daemon's id (``hostname/first publish endpoint``)
``sent_at``    wall-clock unix seconds
``seq``        message number since this daemon started
``series``     array of ``engine.series_state`` maps, one per live series
=============  ===========================================================

Each message is the shard's whole state, so a merger needs only the latest
one and a lost message costs nothing but freshness. Sending never blocks the
engine thread: the socket keeps at most ``SEND_QUEUE`` messages and drops
when full (a slow merger sees fewer, never older, snapshots).
"""

from __future__ import annotations

import logging
import socket as _socket

import msgpack
import zmq
from sigmad.daemon.config.schema import PublishConfig
from sigmad.daemon.ingest.source import bind_socket

log = logging.getLogger("sigmad.publish")

STATE_TOPIC = b"sigmad.state"
STATE_FORMAT = 1
#: Largest state message sent (and accepted by a merger), in bytes.
MAX_STATE_BYTES = 64 * 2**20
SEND_QUEUE = 2


def shard_id(cfg: PublishConfig) -> str:
    """The default shard id: host name and first publish endpoint (stable across restarts)."""
    return f"{_socket.gethostname()[:64]}/{cfg.bind[0]}"


class Publisher:
    """The PUB socket a shard sends its state snapshots on.

    Parameters
    ----------
    ctx : zmq.Context
    cfg : PublishConfig
    shard : str, optional
        Shard id; default ``shard_id(cfg)``.
    """

    def __init__(self, ctx: zmq.Context, cfg: PublishConfig, shard: str | None = None) -> None:
        self.cfg = cfg
        self.shard = shard or shard_id(cfg)
        self.seq = 0
        self.oversized = 0
        self.socket = ctx.socket(zmq.PUB)
        self.socket.setsockopt(zmq.SNDHWM, SEND_QUEUE)
        self.socket.setsockopt(zmq.LINGER, 0)
        try:
            for ep in cfg.bind:
                bind_socket(self.socket, ep, "publish.bind")
        except BaseException:
            self.socket.close(0)
            raise

    def publish(self, states: list[dict], now: float) -> bool:
        """Send one snapshot; True unless it was too large. O(state size).

        A PUB socket never blocks: at its high-water mark ZeroMQ drops the message.
        """
        body = msgpack.packb({"format": STATE_FORMAT, "shard": self.shard, "sent_at": now,
                              "seq": self.seq, "series": states}, use_bin_type=True)
        self.seq += 1
        if len(body) > MAX_STATE_BYTES:
            self.oversized += 1
            log.warning("state snapshot of %d bytes exceeds %d: not published (fewer series "
                        "per shard, or more shards)", len(body), MAX_STATE_BYTES)
            return False
        self.socket.send_multipart([STATE_TOPIC, body], zmq.NOBLOCK)
        return True

    def close(self) -> None:
        self.socket.close(0)
