"""The publisher: one ZeroMQ PUB socket, never blocking the processing thread.

Each topic has its own sequence counter. ZeroMQ keeps a bounded queue per
subscriber (the send high-water mark, ``[publish] send_queue`` messages);
a subscriber that falls behind loses messages there, which it sees as a
jump in ``seq``. A send the socket itself refuses is dropped and counted.
"""

from __future__ import annotations

import logging
import time

import zmq

from beamtap.client.protocol import encode
from beamtap.errors import UsageError

log = logging.getLogger("beamtap.publish")


def bind(sock, endpoint: str, section: str) -> str:
    """Bind ``sock`` (LINGER 0); returns the bound endpoint, or a config error naming ``[section] endpoint``."""
    sock.setsockopt(zmq.LINGER, 0)
    try:
        sock.bind(endpoint)
    except zmq.ZMQError as exc:
        sock.close()
        raise UsageError(f"[{section}] endpoint = {endpoint!r}: cannot bind: {exc}") from None
    return sock.getsockopt_string(zmq.LAST_ENDPOINT)


class Publisher:
    """PUB socket with per-topic sequence numbers.

    Parameters
    ----------
    endpoint : str
        ZeroMQ endpoint to bind, e.g. ``"tcp://127.0.0.1:5560"``.
    stream_id : str
        Identifies this run of the service in every header.
    send_queue : int
        Messages queued per subscriber before it loses messages.
    context : zmq.Context, optional
    """

    def __init__(self, endpoint: str, stream_id: str, send_queue: int = 200, context=None):
        self.stream_id = stream_id
        self._ctx = context or zmq.Context.instance()
        self._sock = self._ctx.socket(zmq.PUB)
        self._sock.setsockopt(zmq.SNDHWM, int(send_queue))
        self.endpoint = bind(self._sock, endpoint, "publish")
        self.seq = {}
        self.sent = 0
        self.dropped = 0

    def publish(self, topic: str, header: dict, payload=None) -> bool:
        """Send one message without blocking; returns False if it was dropped."""
        seq = self.seq.get(topic, 0)
        self.seq[topic] = seq + 1
        header = dict(header, stream=self.stream_id, seq=seq, published_utc=time.time())
        try:
            self._sock.send_multipart(encode(topic, header, payload), flags=zmq.NOBLOCK, copy=False)
        except zmq.Again:
            self.dropped += 1
            return False
        self.sent += 1
        return True

    def close(self) -> None:
        self._sock.close(linger=0)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
