"""``soundcard``: a PortAudio input stream; the callback copies into the ring and counts, nothing more."""

from __future__ import annotations

import threading
import time

from beamtap.errors import UsageError, load_sounddevice

from ..clock import SampleClock
from .base import Source

class SoundcardSource(Source):
    """A sound card through PortAudio.

    The callback copies into the ring buffer and notes status flags; an
    input overflow reported by PortAudio becomes a gap whose length is
    measured from the ADC timestamps, or, when the driver gives none, from
    the frames the callbacks delivered against the monotonic time since the
    first callback (:meth:`_overflow_frames`). A stream that PortAudio ends
    on its own (device gone) sets :attr:`error`, which ends the service.
    """

    kind = "soundcard"

    def __init__(self, device, channels, samplerate_hz, block_frames, ring_frames):
        super().__init__(channels, samplerate_hz, ring_frames)
        self.sd = load_sounddevice()
        self.block_frames = int(block_frames)
        self.device = _find_device(self.sd, device)
        try:
            self.sd.check_input_settings(device=self.device, channels=self.channels, dtype="float32",
                                         samplerate=self.samplerate_hz)
        except Exception as exc:
            info = _device_info(self.sd, self.device)
            raise UsageError(
                f"[input] device = {device!r} ({info['name']}): cannot capture {self.channels} channels at "
                f"{self.samplerate_hz:g} Hz ({exc}); it offers {info['max_input_channels']} input channels, "
                f"default rate {info['default_samplerate']:g} Hz") from None
        self.device_name = _device_info(self.sd, self.device)["name"]
        self._t0 = self._last_adc = None
        self._expected_adc = None
        self._stream = None

    def describe(self) -> str:
        return f"sound card {self.device_name!r}"

    def _callback(self, indata, frames, t, status):
        # Real-time thread: copy, count and note flags only.
        adc = t.inputBufferAdcTime
        if status.input_overflow:
            self.input_overflows += 1
            self.ring.lost(self._overflow_frames(adc, frames))
        self.ring.write(indata)
        if adc > 0:
            self._expected_adc = adc + frames / self.samplerate_hz
            self._last_adc = (self.ring.next_stream_index - frames, adc)

    def _overflow_frames(self, adc: float, frames: int) -> int:
        """Frames lost before this callback's buffer (an input overflow is always at least one frame).

        With ADC timestamps: the time between the expected and the actual
        first frame. Without them (some drivers give none): the frames the
        callbacks delivered against the monotonic time since the first
        callback, to the nearest whole buffer, since hosts lose whole buffers
        and the callback's own arrival time jitters by up to one.
        """
        if self._expected_adc is not None and adc > 0:
            return max(1, int(round((adc - self._expected_adc) * self.samplerate_hz)))
        if self._t0 is None:
            return frames
        due = (time.monotonic() - self._t0) * self.samplerate_hz - frames  # this buffer's first frame
        missing = due - self.ring.next_stream_index  # frames delivered and frames already counted lost
        return max(frames, int(round(missing / frames)) * frames)

    def start(self):
        self._last_adc = None
        self._t0 = None
        self._stream = self.sd.InputStream(device=self.device, channels=self.channels, dtype="float32",
                                           samplerate=self.samplerate_hz, blocksize=self.block_frames,
                                           callback=self._timed_callback, finished_callback=self._finished)
        self._offset = time.time() - self._stream.time  # PortAudio stream time to UTC
        self.clock = SampleClock(self.samplerate_hz, time.time())
        self._stream.start()
        self._thread = threading.Thread(target=self._watch_clock, name="beamtap-adc-clock", daemon=True)
        self._thread.start()

    def _timed_callback(self, indata, frames, t, status):
        if self._t0 is None:  # the arrival of the first buffer's last frame
            self._t0 = time.monotonic() - frames / self.samplerate_hz
        self._callback(indata, frames, t, status)

    def _finished(self):
        # PortAudio ended the stream (device unplugged, driver failure) without our asking.
        if not self._stop.is_set():
            self.error = f"sound card {self.device_name!r}: the input stream stopped"
            self.finished.set()
            self.ring.wake()

    def _watch_clock(self):
        # Feed ADC timestamps to the sample clock outside the callback; notice a stream that died.
        while not self._stop.wait(0.5):
            last = self._last_adc
            if last is not None:
                self.clock.observe(last[0], last[1] + self._offset)
            if not self._stream.active and not self._stop.is_set() and self.error is None:
                self.error = f"sound card {self.device_name!r}: the input stream is no longer active"
                self.finished.set()

    def stop(self):
        self._stop.set()
        if self._stream is not None:
            self._stream.stop()
            self._stream.close()
        super().stop()


def _device_info(sd, device) -> dict:
    """The device's info; ``None`` is PortAudio's default input device (``query_devices(None)`` would
    list every device instead)."""
    if device is None:
        try:
            return sd.query_devices(kind="input")
        except Exception as exc:
            raise UsageError(f"[input] device: there is no default input device ({exc}); name one, see "
                             "'beamtap devices'") from None
    return sd.query_devices(device)


def _find_device(sd, device):
    if device is None or device == "":
        return None
    if isinstance(device, int):
        try:
            sd.query_devices(device)
        except Exception:
            raise UsageError(f"[input] device = {device}: no such device (see 'beamtap devices')") from None
        return device
    matches = [i for i, d in enumerate(sd.query_devices())
               if device.lower() in d["name"].lower() and d["max_input_channels"] > 0]
    exact = [i for i in matches if sd.query_devices(i)["name"].lower() == device.lower()]
    if exact:
        return exact[0]
    if not matches:
        raise UsageError(f"[input] device = {device!r}: no input device has that name (see 'beamtap devices')")
    return matches[0]
