"""The publisher: one ZeroMQ PUB socket, never blocking the processing thread.

Each topic has its own sequence counter. Messages are handed to a sender
thread that owns the socket: encoding and the socket's hand-over to
ZeroMQ's I/O thread (which on a virtual machine costs tens to hundreds of
microseconds per block, more with many subscribers; measured in
bench/service_bench.py) then overlap the wait for the next block instead of
lengthening the processing of this one. ZeroMQ keeps a bounded queue per
subscriber (the send high-water mark, ``[publish] send_queue`` messages);
a subscriber that falls behind loses messages there, which it sees as a
jump in ``seq``. A send the socket itself refuses, or a message that finds
the hand-over queue full, is dropped and counted.
"""

from __future__ import annotations

import logging
import queue
import threading
import time

import zmq

from beamtap.client.protocol import encode
from beamtap.errors import UsageError

from .config import DEFAULT_SEND_QUEUE

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
    secure : callable, optional
        Applied to the socket before it binds (``Guard.apply``: CURVE).
    """

    #: Messages waiting for the sender thread before new ones are dropped (a few seconds of blocks).
    HANDOVER_MESSAGES = 1000

    def __init__(self, endpoint: str, stream_id: str, send_queue: int = DEFAULT_SEND_QUEUE, context=None,
                 secure=None):
        self.stream_id = stream_id
        self._ctx = context or zmq.Context.instance()
        self._sock = self._ctx.socket(zmq.PUB)
        self._sock.setsockopt(zmq.SNDHWM, int(send_queue))
        if secure is not None:
            secure(self._sock)  # CURVE server options, before the bind
        self.endpoint = bind(self._sock, endpoint, "publish")
        self.seq = {}
        self.sent = 0
        self.dropped = 0
        self._next_drop_log = 0.0
        self._drop_lock = threading.Lock()  # drops are counted from both threads
        self._handover: queue.SimpleQueue = queue.SimpleQueue()
        self._thread = threading.Thread(target=self._send_loop, name="beamtap-publish", daemon=True)
        self._thread.start()

    def publish(self, topic: str, header: dict, payload=None) -> bool:
        """Queue one message for sending without blocking; returns False if it was dropped.

        ``payload`` is sent as it is when the sender thread gets to it: pass
        an array nobody modifies afterwards (the engine's outputs are fresh
        arrays every block).
        """
        seq = self.seq.get(topic, 0)
        self.seq[topic] = seq + 1
        if self._handover.qsize() >= self.HANDOVER_MESSAGES:
            self._note_drop(topic, "the sender thread is behind")
            return False
        self._handover.put((topic, dict(header, stream=self.stream_id, seq=seq), payload))
        return True

    def _send_loop(self) -> None:
        while True:
            item = self._handover.get()
            if item is None:
                return
            topic, header, payload = item
            header["published_utc"] = time.time()
            try:
                self._sock.send_multipart(encode(topic, header, payload), flags=zmq.NOBLOCK, copy=False)
            except zmq.Again:
                self._note_drop(topic, "the socket refused it")
                continue
            except zmq.ZMQError as exc:
                self._note_drop(topic, str(exc))
                continue
            self.sent += 1

    def _note_drop(self, topic: str, why: str) -> None:
        # Every drop is counted (status: messages_dropped); the log gets at most one line a second.
        with self._drop_lock:
            self.dropped += 1
            now = time.monotonic()
            if now < self._next_drop_log:
                return
            self._next_drop_log = now + 1.0
            dropped = self.dropped
        log.warning("publish: %d message(s) dropped so far, latest %s (%s)", dropped, topic, why)

    def close(self) -> None:
        """Send what is queued, stop the sender thread and close the socket."""
        if self._thread.is_alive():
            self._handover.put(None)
            self._thread.join(timeout=2.0)
        self._sock.close(linger=0)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
