"""A one-line progress bar on a terminal's standard error for the long offline commands."""

from __future__ import annotations

import sys
import time


class Progress:
    """``[####....]  12.3 / 60.0 s  31x real time`` on stderr, redrawn at most five times a second.

    Silent when stderr is not a terminal (logs and pipes stay clean) or the
    job is shorter than ``min_s`` seconds of stream. Cheap to call every
    block: the terminal check is made once and the clock read is the only
    per-call cost.
    """

    def __init__(self, total_frames: int, samplerate_hz: float, min_s: float = 5.0, stream=None):
        self.stream = sys.stderr if stream is None else stream
        self.total, self.fs = int(total_frames), float(samplerate_hz)
        try:
            tty = self.stream.isatty()
        except (AttributeError, ValueError):  # closed or replaced streams
            tty = False
        self.shown = tty and self.total / self.fs > min_s
        self._start = self._last = time.monotonic()

    def update(self, done: int, note: str = "") -> None:
        """``done`` frames of the total; ``note`` is shown after the speed (e.g. chunks done)."""
        if not self.shown:
            return
        now = time.monotonic()
        if now - self._last < 0.2 and done < self.total:
            return
        self._last = now
        width = 40
        filled = int(width * min(done, self.total) / max(self.total, 1))
        speed = done / self.fs / max(now - self._start, 1e-9)
        self.stream.write(f"\r[{'#' * filled}{'.' * (width - filled)}] {done / self.fs:7.1f} / "
                          f"{self.total / self.fs:.1f} s  {speed:5.1f}x real time{'  ' + note if note else ''}")
        if done >= self.total:
            self.stream.write("\n")
        self.stream.flush()
