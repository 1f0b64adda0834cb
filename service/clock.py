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

    Notes
    -----
    Thread safety: the anchor and rate are one immutable tuple, replaced
    whole under the lock by :meth:`observe` (one writer) and read whole by
    :meth:`utc` (any thread), so a reader never mixes an old anchor with a
    new rate.
    """

    def __init__(self, samplerate_hz: float, anchor_utc: float | None = None, smoothing_s: float = 30.0):
        self.nominal_hz = float(samplerate_hz)
        self.smoothing_s = smoothing_s
        self._lock = threading.Lock()
        self._observed = 0
        # (anchor_sample, anchor_utc, rate_hz)
        self._state = (0, time.time() if anchor_utc is None else float(anchor_utc), float(samplerate_hz))

    @property
    def anchor_sample(self) -> int:
        return self._state[0]

    @property
    def anchor_utc(self) -> float:
        return self._state[1]

    @property
    def rate_hz(self) -> float:
        return self._state[2]

    def utc(self, sample: int) -> float:
        """UTC seconds of stream sample ``sample``."""
        anchor_sample, anchor_utc, rate = self._state
        return anchor_utc + (sample - anchor_sample) / rate

    def observe(self, sample: int, utc: float) -> None:
        """A measured (sample index, UTC) pair, e.g. from an ADC timestamp."""
        with self._lock:
            self._observed += 1
            anchor_sample, anchor_utc, rate = self._state
            if self._observed == 1:
                self._state = (int(sample), float(utc), rate)
                return
            predicted = anchor_utc + (sample - anchor_sample) / rate
            error = utc - predicted
            if abs(error) > 1.0:  # a jump (clock step, long stall): re-anchor, never glide
                self._state = (int(sample), float(utc), rate)
                return
            span = (sample - anchor_sample) / rate
            if span <= 0:
                return
            gain = min(1.0, span / self.smoothing_s) * 0.1
            # Move the anchor to this sample, nudging time and rate toward the observation.
            new_rate = rate * (1.0 - gain * error / span)
            lo, hi = self.nominal_hz * 0.999, self.nominal_hz * 1.001
            self._state = (int(sample), predicted + gain * error, min(max(new_rate, lo), hi))

    def as_dict(self) -> dict:
        anchor_sample, anchor_utc, rate = self._state
        return {"anchor_sample": anchor_sample, "anchor_utc": anchor_utc, "rate_hz": rate,
                "nominal_hz": self.nominal_hz}
