"""``stream``: the ``raw`` topic of another beamtap service, every message checked before use."""

from __future__ import annotations

import logging
import math
import time

from ..clock import SampleClock
from .base import Source

log = logging.getLogger("beamtap.source")

#: Most frames one upstream ``raw`` message may carry (the config's largest block).
MAX_STREAM_FRAMES = 65536
#: Largest first_sample accepted from upstream (far beyond any real stream: 3e6 years at 48 kHz).
MAX_FIRST_SAMPLE = 2**62
#: How far an upstream stream may run ahead of real time since its first message, seconds.
STREAM_AHEAD_S = 10.0


class StreamSource(Source):
    """The ``raw`` topic of another beamtap service.

    Every message is checked before use: an integer ``first_sample`` in
    0..2**62, strictly after the previous message's frames and not further
    ahead of real time than the time that passed (plus
    :data:`STREAM_AHEAD_S`); a finite ``time_utc``; float32 little-endian
    samples shaped (frames, channels) with at least the array's channels
    and at most :data:`MAX_STREAM_FRAMES` frames. A bad message is dropped
    and counted by reason (``rejected`` in the status) and never moves the
    sample counter. A forward jump in ``first_sample`` (messages lost
    upstream or on the way) or a new upstream ``stream`` id (a restart) is a
    flagged gap here too.
    """

    kind = "stream"

    def __init__(self, endpoint, channels, samplerate_hz, ring_frames):
        super().__init__(channels, samplerate_hz, ring_frames)
        self.endpoint = endpoint
        self.upstream_gaps = 0
        self.rejected: dict[str, int] = {}
        self._expect = None  # upstream first_sample of the next message
        self._stream_id = None
        self._origin = None  # (upstream first_sample, monotonic time) of the stream's first message
        self._next_warning = 0.0

    def describe(self) -> str:
        return f"raw stream from {self.endpoint}"

    def stats(self) -> dict:
        return dict(super().stats(), rejected=dict(self.rejected), upstream_gaps=self.upstream_gaps)

    def _run(self):
        import zmq  # noqa: PLC0415

        ctx = zmq.Context.instance()
        with ctx.socket(zmq.SUB) as sock:
            sock.setsockopt(zmq.RCVHWM, 1000)
            sock.setsockopt(zmq.LINGER, 0)
            # A message larger than twice the largest block this source accepts is never read.
            sock.setsockopt(zmq.MAXMSGSIZE, 2 * max(self.channels, 64) * MAX_STREAM_FRAMES * 4 + 65536)
            sock.connect(self.endpoint)
            sock.setsockopt(zmq.SUBSCRIBE, b"raw")
            while not self._stop.is_set():
                if not sock.poll(200):
                    continue
                try:
                    frames = sock.recv_multipart(copy=False)
                except zmq.ZMQError:
                    continue
                try:
                    self.accept(frames)
                except Exception as exc:  # noqa: BLE001 - no message may stop the source
                    self._reject(f"internal error ({type(exc).__name__})", str(exc))

    def accept(self, frames) -> bool:
        """Check one upstream message and, if good, put its frames in the ring; False if rejected."""
        from beamtap.client.protocol import ProtocolError, decode  # noqa: PLC0415

        try:
            topic, header, data = decode(frames)
        except ProtocolError as exc:
            return self._reject("malformed", str(exc))
        if topic != "raw":
            return self._reject("wrong topic", repr(topic))
        first, utc = header.get("first_sample"), header.get("time_utc")
        if isinstance(first, bool) or not isinstance(first, int) or not 0 <= first <= MAX_FIRST_SAMPLE:
            return self._reject("bad first_sample", f"first_sample = {first!r}, expected a whole number "
                                "from 0 to 2**62")
        if isinstance(utc, bool) or not isinstance(utc, (int, float)) or not math.isfinite(utc) or utc <= 0:
            return self._reject("bad time_utc", f"time_utc = {utc!r}, expected a finite positive number")
        if data is None or header.get("dtype") != "<f4":
            return self._reject("bad dtype", f"dtype = {header.get('dtype')!r}, expected '<f4' (float32)")
        if data.ndim != 2 or not 1 <= data.shape[0] <= MAX_STREAM_FRAMES or data.shape[1] < self.channels:
            return self._reject("bad shape", f"shape {list(data.shape)}, expected (1..{MAX_STREAM_FRAMES} frames, "
                                f">= {self.channels} channels)")
        stream_id = header.get("stream")
        now = time.monotonic()
        if self._expect is None or stream_id != self._stream_id:
            if self._expect is not None:  # upstream restarted: a loss of unknown length
                self.upstream_gaps += 1
                self.ring.lost(1)
                log.warning("stream source: upstream %s restarted (stream %r); gap flagged", self.endpoint, stream_id)
            else:
                self.clock = SampleClock(self.samplerate_hz, float(utc))
            self._stream_id, self._expect, self._origin = stream_id, first, (first, now)
        if first < self._expect:
            return self._reject("repeated or backward", f"first_sample {first} before {self._expect}")
        ahead = (first - self._origin[0]) / self.samplerate_hz - (now - self._origin[1])
        if ahead > STREAM_AHEAD_S:
            return self._reject("ahead of real time", f"first_sample {first} is {ahead:.1f} s ahead of the "
                                "time since the stream began")
        if first > self._expect:
            self.upstream_gaps += 1
            self.ring.lost(first - self._expect)
        self._expect = first + len(data)
        self.ring.write(data[:, : self.channels])
        return True

    def _reject(self, reason: str, detail: str) -> bool:
        # Counted every time; logged at most once a second with the latest detail.
        self.rejected[reason] = self.rejected.get(reason, 0) + 1
        now = time.monotonic()
        if now >= self._next_warning:
            log.warning("stream source: message from %s dropped (%s): %s; %d dropped so far", self.endpoint,
                        reason, detail, sum(self.rejected.values()))
            self._next_warning = now + 1.0
        return False
