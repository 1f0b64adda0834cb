"""Sample index to UTC: anchored at start, corrected for clock drift.

``utc(n) = anchor_utc + (n - anchor_sample) / rate`` where the rate is the
sample clock's true rate as seen against the system clock. Sources that get
hardware timestamps (PortAudio's input ADC time) feed them in with
:meth:`SampleClock.observe`; the anchor and rate then follow a slowly
smoothed least-squares fit, so a sound card that runs 50 ppm fast does not
walk away from UTC, while single late callbacks do not jerk the mapping.
"""

from __future__ import annotations

import threading
import time


class SampleClock:
    """Map stream sample indices to UTC seconds (POSIX time).

    Parameters
    ----------
    samplerate_hz : float
        Nominal rate.
    anchor_utc : float, optional
        UTC of sample 0 (default: now).
    smoothing_s : float
        Time constant of the drift correction, seconds.
    """

    def __init__(self, samplerate_hz: float, anchor_utc: float | None = None, smoothing_s: float = 30.0):
        self.nominal_hz = float(samplerate_hz)
        self.rate_hz = float(samplerate_hz)
        self.anchor_sample = 0
        self.anchor_utc = time.time() if anchor_utc is None else float(anchor_utc)
        self.smoothing_s = smoothing_s
        self._lock = threading.Lock()
        self._observed = 0

    def utc(self, sample: int) -> float:
        """UTC seconds of stream sample ``sample``."""
        return self.anchor_utc + (sample - self.anchor_sample) / self.rate_hz

    def observe(self, sample: int, utc: float) -> None:
        """A measured (sample index, UTC) pair, e.g. from an ADC timestamp."""
        with self._lock:
            self._observed += 1
            if self._observed == 1:
                self.anchor_sample, self.anchor_utc = int(sample), float(utc)
                return
            predicted = self.utc(sample)
            error = utc - predicted
            if abs(error) > 1.0:  # a jump (clock step, long stall): re-anchor, never glide
                self.anchor_sample, self.anchor_utc = int(sample), float(utc)
                return
            span = (sample - self.anchor_sample) / self.rate_hz
            if span <= 0:
                return
            gain = min(1.0, span / self.smoothing_s) * 0.1
            # Move the anchor to this sample, nudging time and rate toward the observation.
            self.anchor_utc = predicted + gain * error
            self.anchor_sample = int(sample)
            rate = self.rate_hz * (1.0 - gain * error / span)
            lo, hi = self.nominal_hz * 0.999, self.nominal_hz * 1.001
            self.rate_hz = min(max(rate, lo), hi)

    def as_dict(self) -> dict:
        return {"anchor_sample": self.anchor_sample, "anchor_utc": self.anchor_utc,
                "rate_hz": self.rate_hz, "nominal_hz": self.nominal_hz}
