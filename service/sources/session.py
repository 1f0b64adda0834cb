"""``session``: a recorded session's raw segments played back; its gaps stay gaps."""

from __future__ import annotations

import time
from pathlib import Path

from beamtap.errors import UsageError

from ..clock import SampleClock
from .base import Source

class SessionSource(Source):
    """A recorded session's raw segments, played back contiguously; its gaps stay gaps."""

    kind = "session"

    def __init__(self, path, channels, samplerate_hz, block_frames, ring_frames, realtime=True):
        from beamtap.session import MANIFEST, segments  # noqa: PLC0415

        self.path = str(path)
        if not (Path(path) / MANIFEST).exists():
            raise UsageError(f"[input] path = {self.path}: not a beamtap session folder (no {MANIFEST})")
        self.segments = segments(path, "raw")
        if not self.segments:
            raise UsageError(f"[input] path = {self.path}: the session has no raw segments")
        for seg in self.segments:
            if int(round(seg["samplerate_hz"])) != int(round(samplerate_hz)) or seg["channels"] < channels:
                raise UsageError(f"[input] path = {self.path}: segment {seg['file']} has {seg['channels']} channels "
                                 f"at {seg['samplerate_hz']:g} Hz; the config needs {channels} at {samplerate_hz:g} Hz")
        super().__init__(channels, samplerate_hz, ring_frames)
        self.block_frames, self.realtime = int(block_frames), realtime

    def describe(self) -> str:
        return f"session {self.path}" + ("" if self.realtime else " (fast)")

    def _run(self):
        from beamtap.wavfile import WavReader  # noqa: PLC0415

        t0 = time.monotonic()
        first0 = self.segments[0]["first_sample"]
        self.clock = SampleClock(self.samplerate_hz, self.segments[0]["utc"])
        for seg in self.segments:
            gap = seg["first_sample"] - first0 - self.ring.next_stream_index
            if gap > 0:
                self.ring.lost(gap)
            with WavReader(Path(self.path) / seg["file"]) as r:
                left = seg["frames"]
                while left > 0 and not self._stop.is_set():
                    block, _ = r.read(min(self.block_frames, left))
                    if len(block) == 0:
                        break
                    left -= len(block)
                    self._paced_write(block[:, : self.channels], t0, self.realtime)
            if self._stop.is_set():
                return
