"""The push feed of estimates: each changed series' read-out on a ZeroMQ PUB socket.

After every flush the engine thread sends, for each series whose estimates
changed, one message of two frames ``[topic, body]``:

- ``topic`` is ``sigmad.estimates.<stream>.`` (UTF-8; the trailing dot lets a
  SUB socket take one stream by prefix without also taking ``<stream>2``);
- ``body`` is a msgpack map ``{"format": 1, "sent_at": unix seconds,
  "series": {...}}`` where ``series`` is the series' map in ``/api/state``
  (schema 1: stream, labels, fields, observations, mean, stddev, covariance,
  correlation, quantiles, volatility, regression with the spread and its z, ...;
  NaN written as nil), without its history.

Like the merge tier's state snapshots (``cluster/publish.py``), sending never
blocks the engine: the PUB socket queues at most ``SEND_QUEUE`` messages per
subscriber and drops beyond that, so a slow subscriber misses updates, never
slows the daemon. ``sigmad.daemon.client.Subscriber`` reads this feed.
"""

from __future__ import annotations

import msgpack
import numpy as np
import zmq
from sigmad.daemon.engine.snapshot import Snapshot
from sigmad.daemon.export.api_state import series_json

FEED_FORMAT = 1
FEED_PREFIX = b"sigmad.estimates."
SEND_QUEUE = 10_000


def feed_topic(stream: str) -> bytes:
    """The topic frame of a stream's estimates."""
    return FEED_PREFIX + stream.encode() + b"."


class EstimateFeed:
    """The PUB socket of the push feed; see the module notes."""

    def __init__(self, ctx: zmq.Context, bind: tuple[str, ...]) -> None:
        self.socket = ctx.socket(zmq.PUB)
        self.socket.setsockopt(zmq.SNDHWM, SEND_QUEUE)
        self.socket.setsockopt(zmq.LINGER, 0)
        self.sent = self.dropped = 0
        self._last: dict = {}       # the last snapshot's object views
        self._blocks: dict = {}     # the last snapshot's column blocks, by stream
        try:
            for ep in bind:
                self.socket.bind(ep)
        except zmq.ZMQError:
            self.socket.close(0)
            raise

    def send_changes(self, snap: Snapshot, now: float) -> int:
        """Send every series of ``snap`` whose read-out changed since the last call
        (a view kept as an object: a new view; a series in columns: its version or last
        update moved, found with numpy, and only those views are built). Returns the
        messages sent. O(series), plus O(changed series) Python."""
        sent = 0
        send = self.socket.send_multipart
        for view in self._changed(snap):
            body = msgpack.packb({"format": FEED_FORMAT, "sent_at": now,
                                  "series": series_json(view, now)}, use_bin_type=True)
            try:
                send([feed_topic(view.stream), body], zmq.NOBLOCK)
                sent += 1
            except zmq.Again:
                self.dropped += 1
        self.sent += sent
        return sent

    def _changed(self, snap: Snapshot):
        objects = getattr(snap.series, "objects", snap.series)   # a SeriesTable or a dict
        last = self._last
        for key, view in objects.items():
            if last.get(key) is not view:
                yield view
        self._last = objects
        seen = {}
        for b in getattr(snap.series, "blocks", ()):
            prev = self._blocks.get(b.stream)
            seen[b.stream] = b
            if prev is None or prev.labels is not b.labels:   # new, or series left
                rows = np.arange(b.n)
            else:
                k = prev.n
                moved = (b.version[:k] != prev.version) | (b.last_update[:k]
                                                          != prev.last_update)
                rows = np.r_[np.flatnonzero(moved), np.arange(k, b.n)]
            for i in range(0, rows.shape[0], 4096):
                yield from b.views(rows[i:i + 4096])
        self._blocks = seen

    def close(self) -> None:
        self.socket.close(0)
