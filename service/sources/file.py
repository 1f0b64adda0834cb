"""``file``: a multichannel WAV played into the pipeline, paced or as fast as the engine takes it."""

from __future__ import annotations

import time

from beamtap.errors import UsageError

from ..clock import SampleClock
from .base import Source

class FileSource(Source):
    """A multichannel WAV played into the pipeline."""

    kind = "file"

    def __init__(self, path, channels, samplerate_hz, block_frames, ring_frames, realtime=True, loop=False):
        from beamtap.wavfile import WavReader  # noqa: PLC0415

        self.path = str(path)
        with WavReader(self.path) as r:
            if r.samplerate_hz != int(round(samplerate_hz)):
                raise UsageError(f"[input] path = {self.path}: sample rate {r.samplerate_hz} Hz does not "
                                 f"match samplerate_hz = {samplerate_hz:g}")
            if r.channels < channels:
                raise UsageError(f"[input] path = {self.path}: {r.channels} channels, the array needs {channels}")
            self.file_channels = r.channels
        super().__init__(channels, samplerate_hz, ring_frames)
        self.block_frames, self.realtime, self.loop = int(block_frames), realtime, loop
        self.clipped = 0

    def describe(self) -> str:
        return f"file {self.path}" + (" (looped)" if self.loop else "") + ("" if self.realtime else " (fast)")

    def _run(self):
        from beamtap.wavfile import WavReader  # noqa: PLC0415

        t0 = time.monotonic()
        self.clock = SampleClock(self.samplerate_hz, time.time())
        while not self._stop.is_set():
            with WavReader(self.path) as r:
                while not self._stop.is_set():
                    block, clipped = r.read(self.block_frames)
                    if len(block) == 0:
                        break
                    self.clipped += clipped
                    self._paced_write(block[:, : self.channels], t0, self.realtime)
            if not self.loop:
                break
