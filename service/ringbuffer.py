"""Bounded single-producer / single-consumer ring buffer of sample frames.

The producer (an audio callback or a source thread) copies frames in; the
consumer (the processing thread) takes them out in blocks. Nothing is glued
over a loss: when the producer's frames do not fit, they are dropped and
counted, and the frames that follow start a new *segment* whose first
stream index jumps by the number lost. The consumer never receives a block
that straddles a segment boundary, and learns of each gap when it reaches it.

Thread safety: the producer only advances ``_written`` and appends
segments; the consumer only advances ``_read``. Under CPython each of those
integer stores is atomic, and the data are stored before the index that
publishes them, so the data path takes no lock. The one synchronisation
is a ``threading.Event`` that wakes a waiting reader: setting it takes the
event's internal lock for a moment (no allocation, no I/O), which is the
only lock the audio callback ever touches.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np

_MAX_SEGMENTS = 4096


@dataclass
class Chunk:
    """What :meth:`RingBuffer.read` returns.

    Attributes
    ----------
    first_sample : int
        Stream index of the chunk's first frame.
    frames : ndarray of float32, shape (n, channels)
        A copy, owned by the caller.
    gap_frames : int
        Frames lost immediately before this chunk (0 when contiguous).
    """

    first_sample: int
    frames: np.ndarray
    gap_frames: int = 0


class RingBuffer:
    """SPSC ring of float32 frames.

    Parameters
    ----------
    capacity_frames : int
    channels : int
    """

    def __init__(self, capacity_frames: int, channels: int):
        self.capacity = int(capacity_frames)
        self.channels = int(channels)
        self._data = np.zeros((self.capacity, self.channels), np.float32)
        self._written = 0  # total frames ever stored (ring position, not stream index)
        self._read = 0
        # Segment table: ring position where a segment starts, its stream index, frames lost before it.
        self._seg_pos = np.zeros(_MAX_SEGMENTS, np.int64)
        self._seg_first = np.zeros(_MAX_SEGMENTS, np.int64)
        self._seg_gap = np.zeros(_MAX_SEGMENTS, np.int64)
        self._segs_written = 1
        self._segs_read = 0
        self._next_stream = 0  # producer: stream index of the next frame offered
        self._pending_gap = 0  # producer: frames lost since the last stored frame
        self.overflow_events = 0
        self.frames_dropped = 0
        self.frames_offered = 0
        self._wake = threading.Event()

    # ---- producer side ----------------------------------------------------
    def write(self, frames: np.ndarray) -> bool:
        """Store frames (n, channels); returns False (and counts) when they do not fit.

        Called from the audio callback: no allocation beyond numpy's slice
        views, no I/O; only the reader's wake-up event is set (see the module notes).
        """
        n = len(frames)
        self.frames_offered += n
        if self.capacity - (self._written - self._read) < n:
            self.overflow_events += 1
            self.frames_dropped += n
            self._pending_gap += n
            self._next_stream += n
            self._wake.set()
            return False
        if self._pending_gap:
            self._start_segment(self._pending_gap)
        start = self._written % self.capacity
        first = min(n, self.capacity - start)
        self._data[start:start + first] = frames[:first]
        if first < n:
            self._data[: n - first] = frames[first:]
        self._written += n  # publishes the frames
        self._next_stream += n
        self._wake.set()
        return True

    def lost(self, frames: int) -> None:
        """Record frames lost upstream of the buffer (an input overflow, a dropped message)."""
        if frames > 0:
            self.frames_dropped += frames
            self._pending_gap += frames
            self._next_stream += frames

    def _start_segment(self, gap: int) -> None:
        i = self._segs_written % _MAX_SEGMENTS
        self._seg_pos[i] = self._written
        self._seg_first[i] = self._next_stream
        self._seg_gap[i] = gap
        self._pending_gap = 0
        self._segs_written += 1

    @property
    def next_stream_index(self) -> int:
        return self._next_stream

    # ---- consumer side ----------------------------------------------------
    @property
    def available(self) -> int:
        return self._written - self._read

    def read(self, max_frames: int, timeout: float | None = None, exact: bool = True) -> Chunk | None:
        """Take up to ``max_frames`` frames from the current segment.

        Parameters
        ----------
        max_frames : int
        timeout : float or None
            Seconds to wait for data; None waits forever.
        exact : bool
            Wait until ``max_frames`` frames (or a segment end) are there.

        Returns
        -------
        Chunk or None
            None on timeout.
        """
        while True:
            seg_end = self._segment_end()
            have = min(self._written, seg_end) - self._read
            if have >= max_frames or (have > 0 and (not exact or seg_end <= self._written)):
                break
            self._wake.clear()
            # Re-check after clearing so a write between the test and clear() is not missed.
            seg_end = self._segment_end()
            have = min(self._written, seg_end) - self._read
            if have >= max_frames or (have > 0 and (not exact or seg_end <= self._written)):
                break
            if not self._wake.wait(timeout):
                return None
        gap = 0
        if self._segs_read + 1 < self._segs_written:
            j = (self._segs_read + 1) % _MAX_SEGMENTS
            if self._read == self._seg_pos[j]:
                self._segs_read += 1  # entering the next segment
        cur = self._segs_read % _MAX_SEGMENTS
        if self._read == self._seg_pos[cur] and self._segs_read > 0:
            gap = int(self._seg_gap[cur])
        first_sample = int(self._seg_first[cur] + (self._read - self._seg_pos[cur]))
        n = min(max_frames, min(self._written, self._segment_end()) - self._read)
        start = self._read % self.capacity
        out = np.empty((n, self.channels), np.float32)
        first = min(n, self.capacity - start)
        out[:first] = self._data[start:start + first]
        if first < n:
            out[first:] = self._data[: n - first]
        self._read += n
        if gap:
            self._seg_gap[cur] = 0  # report each gap once
        return Chunk(first_sample, out, gap)

    def _segment_end(self) -> int:
        """Ring position where the segment being read ends (or +inf-like)."""
        nxt = self._segs_read + 1
        while nxt < self._segs_written:
            pos = int(self._seg_pos[nxt % _MAX_SEGMENTS])
            if pos > self._read:
                return pos
            nxt += 1
        return 1 << 62

    def wake(self) -> None:
        """Wake a waiting reader (used at shutdown)."""
        self._wake.set()
