"""``beamtap listen``: one audio beam to headphones, safely.

Gain starts low (-20 dB by default) and fades in over half a second; a hard
limiter keeps every output sample within ``--limit-db`` of full scale, so a
burst in the water (a hammer on the pier, a pinger close by) cannot blast
the listener. A small jitter buffer absorbs network and scheduling jitter.
"""

from __future__ import annotations

import sys
import threading
import time
from collections import deque

import numpy as np

from beamtap.errors import UsageError, load_sounddevice

from .subscriber import Controller, ServiceError, Subscriber, control_for

CAUTION = ("CAUTION: beam audio can be loud. Put headphones on only after starting with the volume low; "
           "beamtap limits its own output to {limit:g} dBFS, but your device and amplifier can still be loud.")


class JitterBuffer:
    """Mono samples handed from the network thread to the audio callback.

    The callback takes what it needs and counts an underrun when the buffer
    runs dry; playback (re)starts only once ``target`` frames are queued.
    """

    def __init__(self, target_frames: int, max_frames: int):
        self.target, self.max = int(target_frames), int(max_frames)
        self._blocks: deque = deque()
        self._queued = 0
        self._lock = threading.Lock()
        self._playing = False
        self.underruns = 0
        self.overruns = 0

    def put(self, samples: np.ndarray) -> None:
        with self._lock:
            self._blocks.append(np.asarray(samples, np.float32))
            self._queued += len(samples)
            while self._queued > self.max:  # too far behind: drop the oldest, keep latency bounded
                old = self._blocks.popleft()
                self._queued -= len(old)
                self.overruns += 1

    def take(self, out: np.ndarray) -> int:
        """Fill ``out`` (1-D); returns frames of real audio written (rest is silence)."""
        n = len(out)
        with self._lock:
            if not self._playing:
                if self._queued < self.target:
                    out[:] = 0.0
                    return 0
                self._playing = True
            got = 0
            while got < n and self._blocks:
                blk = self._blocks[0]
                k = min(n - got, len(blk))
                out[got:got + k] = blk[:k]
                if k == len(blk):
                    self._blocks.popleft()
                else:
                    self._blocks[0] = blk[k:]
                got += k
                self._queued -= k
            if got < n:
                out[got:] = 0.0
                self.underruns += 1
                self._playing = False  # refill to the target before going on
            return got


class Limiter:
    """Gain with a fade-in, then a hard clip at the limit.

    Parameters
    ----------
    gain_db : float
    limit_db : float
        Largest output magnitude, dB re full scale (negative).
    fade_frames : int
    """

    def __init__(self, gain_db: float, limit_db: float, fade_frames: int):
        self.gain = 10.0 ** (gain_db / 20.0)
        self.limit = 10.0 ** (limit_db / 20.0)
        self.fade = max(1, int(fade_frames))
        self.done = 0
        self.limited = 0

    def __call__(self, x: np.ndarray) -> np.ndarray:
        ramp = np.minimum((self.done + np.arange(len(x)) + 1) / self.fade, 1.0)
        self.done += len(x)
        y = x * (self.gain * ramp)
        over = np.abs(y) > self.limit
        if over.any():
            self.limited += int(over.sum())
            np.clip(y, -self.limit, self.limit, out=y)
        return y.astype(np.float32)


def point_audio_beam(ctl: Controller, beam: int, look) -> list:
    """Point audio beam ``beam`` toward ``look`` = (azimuth_deg, elevation_deg), adding beams up to it
    if the service has fewer; returns the audio directions before (to restore them).

    Raises ``ServiceError`` when the service refuses (for example a reader key, or the cost limit).
    """
    previous = ctl.beams()["beams"]["audio_deg"]
    audio = list(previous) + [[0.0, 0.0]] * max(0, beam + 1 - len(previous))
    audio[beam] = [float(look[0]), float(look[1])]
    ctl.beams(set={"audio_deg": audio})
    return previous


def run(endpoint: str, control: str | None, beam: int, look, device, gain_db: float, limit_db: float,
        buffer_ms: float, seconds: float | None, keep: bool = False) -> int:
    if limit_db > 0:
        raise UsageError(f"--limit-db: got {limit_db:g}, expected 0 dBFS or below")
    if gain_db > 20:
        raise UsageError(f"--gain-db: got {gain_db:g}, expected at most +20 dB")
    sys.stderr.write(CAUTION.format(limit=limit_db) + "\n")
    control = control or control_for(endpoint)
    previous = None
    if look is not None:
        with Controller(control) as ctl:
            try:
                previous = point_audio_beam(ctl, beam, look)
            except ServiceError as exc:
                raise UsageError(f"--look: {exc}") from None
        sys.stderr.write(f"listen: audio beam {beam} now looks toward {look[0]:g}°/{look[1]:g}° "
                         f"({'kept after listen ends' if keep else 'restored when listen ends'})\n")
    try:
        return _play(endpoint, beam, device, gain_db, limit_db, buffer_ms, seconds)
    finally:
        if previous is not None and not keep:
            try:
                with Controller(control) as ctl:
                    ctl.beams(set={"audio_deg": previous})
                sys.stderr.write("listen: the audio beams are as they were before\n")
            except ServiceError as exc:
                sys.stderr.write(f"listen: could not restore the audio beams: {exc}\n")


def _play(endpoint, beam, device, gain_db, limit_db, buffer_ms, seconds) -> int:
    sd = load_sounddevice()
    with Subscriber(endpoint, topics=["audio"], timeout_s=10.0) as sub:
        try:
            first = sub.recv()
        except TimeoutError as exc:
            raise UsageError(str(exc)) from None
        if first.data.shape[1] <= beam:
            raise UsageError(f"--beam {beam}: the service has {first.data.shape[1]} audio beams (0-based index)")
        fs = float(first.samplerate_hz)
        jitter = JitterBuffer(int(buffer_ms / 1e3 * fs), int(4 * buffer_ms / 1e3 * fs) + 8192)
        limiter = Limiter(gain_db, limit_db, int(0.5 * fs))
        played = {"frames": 0}

        def callback(out, frames, t, status):
            buf = out[:, 0]
            played["frames"] += jitter.take(buf)
            out[:, 0] = limiter(buf)
            if out.shape[1] > 1:
                out[:, 1:] = out[:, :1]

        jitter.put(first.data[:, beam])
        gaps = 0
        try:
            stream = sd.OutputStream(device=device, channels=1, samplerate=fs, dtype="float32", callback=callback)
        except Exception as exc:
            raise UsageError(f"--device {device!r}: cannot open for playback at {fs:g} Hz: {exc}") from None
        end = None if seconds is None else time.monotonic() + seconds
        with stream:
            try:
                while end is None or time.monotonic() < end:
                    try:
                        f = sub.recv()
                    except TimeoutError:
                        sys.stderr.write("listen: no audio for 10 s; still waiting\n")
                        continue
                    if f.gap:
                        gaps += 1
                    if f.data is not None and f.data.shape[1] > beam:
                        jitter.put(f.data[:, beam])
            except KeyboardInterrupt:
                pass
    print(f"played {played['frames'] / fs:.1f} s of beam {beam}; underruns {jitter.underruns}, "
          f"dropped blocks {jitter.overruns}, stream gaps {gaps}, limited samples {limiter.limited}")
    return 0
