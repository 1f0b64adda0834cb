"""The source interface: a producer thread (or callback) feeding a ring buffer, and real-time pacing."""

from __future__ import annotations

import logging
import threading
import time

import numpy as np

from ..clock import SampleClock
from ..ringbuffer import RingBuffer

log = logging.getLogger("beamtap.source")

class Source:
    """Base class: a producer thread (or callback) feeding a ring buffer.

    Attributes
    ----------
    ring : RingBuffer
    clock : SampleClock
    channels : int
    samplerate_hz : float
    finished : threading.Event
        Set when a finite source (a file without looping) has delivered
        everything.
    """

    kind = "source"

    def __init__(self, channels: int, samplerate_hz: float, ring_frames: int):
        self.channels = int(channels)
        self.samplerate_hz = float(samplerate_hz)
        self.ring = RingBuffer(ring_frames, self.channels)
        self.clock = SampleClock(self.samplerate_hz)
        self.finished = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.input_overflows = 0
        self.error: str | None = None

    def describe(self) -> str:
        return self.kind

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run_guarded, name=f"beamtap-{self.kind}", daemon=True)
        self._thread.start()

    def _run_guarded(self):
        try:
            self._run()
        except Exception as exc:  # a source failure is reported, never a silent stop
            self.error = f"{self.kind} source stopped: {exc}"
            log.error(self.error)
        finally:
            self.finished.set()
            self.ring.wake()

    def _run(self):
        raise NotImplementedError

    def stop(self) -> None:
        self._stop.set()
        self.ring.wake()
        if self._thread is not None:
            self._thread.join(timeout=2.0)

    def stats(self) -> dict:
        r = self.ring
        return {"frames_captured": int(r.frames_offered), "ring_overflows": int(r.overflow_events),
                "input_overflows": int(self.input_overflows), "frames_lost": int(r.frames_dropped)}

    # Pacing shared by the generated and file sources.
    def _paced_write(self, block: np.ndarray, start_time: float, realtime: bool) -> None:
        if realtime:
            due = start_time + (self.ring.next_stream_index + len(block)) / self.samplerate_hz
            _sleep_until(due, self._stop)
            self.ring.write(block)
        else:
            # As fast as the engine takes it: wait for room instead of dropping.
            while self.ring.capacity - self.ring.available < len(block) and not self._stop.is_set():
                self._stop.wait(0.002)
            self.ring.write(block)


def _sleep_until(deadline: float, stop) -> bool:
    """Sleep until ``time.monotonic()`` reaches ``deadline``; True if ``stop`` was set meanwhile.

    ``time.sleep`` (a high-resolution timer) wakes closer to the deadline than
    a timed wait on an event; ``stop`` (a threading or multiprocessing event)
    is checked at least every 50 ms.
    """
    while not stop.is_set():
        left = deadline - time.monotonic()
        if left <= 0:
            return False
        time.sleep(min(left, 0.05))
    return True
