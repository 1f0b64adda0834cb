"""Simulated scenes: plane waves with exact fractional arrival times.

A scene is a few far-field sources (broadband noise, tones, chirps; fixed or
sweeping in azimuth) plus independent noise on every sensor. It renders
block by block, so the live service's simulated source and the offline
``simulate`` command produce the very same samples for the same seed.

Arrival times: a plane wave from u reaches the sensor at p earlier than the
origin by p·u/c, so sensor m hears ``s(t + p_m·u(t)/c)``. Tones and chirps
are evaluated in closed form at that time; noise is band-limited (FIR
band-pass, within 0.45·fs) and interpolated with a 48-tap Kaiser-windowed
sinc from a 1024-phase table with linear interpolation between phases
(error below -80 dB for content up to 0.4·fs).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.signal import firwin, lfilter

from . import fracdelay
from .directions import unit_vectors
from .geometry import ArrayGeometry

_TAPS = 48
_BETA = 9.0
_HOLD = 1024  # samples over which a moving noise source's delays are held
_NOISE_TAPS = 255


#: Sample offsets (from floor of the wanted time) of the interpolation taps.
_OFFSETS = np.arange(-_TAPS // 2 + 1, _TAPS // 2 + 1)


@dataclass
class _NoiseStream:
    """Band-limited Gaussian noise kept as a growing-then-trimmed sample buffer."""

    rng: np.random.Generator
    taps: np.ndarray
    scale: float
    start: int = 0  # index of buf[0]
    buf: np.ndarray = None
    zi: np.ndarray = None

    def __post_init__(self):
        self.buf = np.zeros(0)
        self.zi = np.zeros(len(self.taps) - 1)
        # Run the filter in so the first samples are already stationary.
        _, self.zi = lfilter(self.taps, 1.0, self.rng.standard_normal(len(self.taps) * 2), zi=self.zi)

    def ensure(self, upto: int):
        need = upto - (self.start + len(self.buf))
        if need > 0:
            y, self.zi = lfilter(self.taps, 1.0, self.rng.standard_normal(need), zi=self.zi)
            self.buf = np.concatenate([self.buf, y * self.scale])

    def trim(self, before: int):
        drop = before - self.start
        if drop > 0:
            self.buf = self.buf[drop:]
            self.start = before


class Scene:
    """Streaming renderer of a simulated scene.

    Parameters
    ----------
    geometry : ArrayGeometry
    sound_speed_mps, samplerate_hz : float
    sources : sequence of SceneSource-like objects
        Each with ``azimuth_deg, elevation_deg, signal, band_hz,
        frequency_hz, level_db`` (RMS, dB re full scale),
        ``sweep_deg_per_s`` and ``period_s`` (chirp repetition).
    noise_db : float
        RMS of independent white noise on every sensor, dB re full scale.
    seed : int

    Examples
    --------
    >>> from beamtap.service.config import SceneSource
    >>> scene = Scene(ArrayGeometry.line(4, 0.5), 1500.0, 8000.0,
    ...               [SceneSource(60.0, signal="tone", frequency_hz=500.0)], -80.0)
    >>> scene.render(256).shape
    (256, 4)
    """

    def __init__(self, geometry: ArrayGeometry, sound_speed_mps: float, samplerate_hz: float,
                 sources, noise_db: float = -60.0, seed: int = 1):
        self.geometry = geometry
        self.c = float(sound_speed_mps)
        self.fs = float(samplerate_hz)
        self.sources = list(sources)
        self.noise_rms = 10.0 ** (noise_db / 20.0)
        self.next_sample = 0
        seeds = np.random.SeedSequence(seed).spawn(len(self.sources) + 1)
        self._sensor_rng = np.random.default_rng(seeds[-1])
        self._pos = geometry.positions_m  # physical positions, origin of the array frame
        self._noise = {}
        for i, src in enumerate(self.sources):
            if src.signal == "noise":
                low, high = src.band_hz
                high = min(high, 0.45 * self.fs)
                taps = firwin(_NOISE_TAPS, [low, high], pass_zero=False, fs=self.fs)
                scale = 10.0 ** (src.level_db / 20.0) / np.sqrt(np.sum(taps**2))
                self._noise[i] = _NoiseStream(np.random.default_rng(seeds[i]), taps, scale)
        self._lead = int(np.ceil(np.max(np.linalg.norm(self._pos, axis=1)) / self.c * self.fs)) + _TAPS
        for stream in self._noise.values():
            stream.start = -self._lead  # sensors nearer the source hear it before the origin does

    def direction_at(self, source_index: int, time_s: np.ndarray) -> np.ndarray:
        """Unit vectors toward a source at the given times, shape (n, 3)."""
        src = self.sources[source_index]
        travel = abs(src.sweep_deg_per_s) * np.asarray(time_s, dtype=np.float64)
        to = getattr(src, "sweep_to_deg", None)
        if to is None:
            az = src.azimuth_deg + np.sign(src.sweep_deg_per_s) * travel
        else:  # back and forth between the two azimuths (triangle wave)
            span = abs(to - src.azimuth_deg)
            phase = np.mod(travel, 2.0 * span)
            az = src.azimuth_deg + np.sign(to - src.azimuth_deg) * np.minimum(phase, 2.0 * span - phase)
        return unit_vectors(az, np.full_like(az, src.elevation_deg))

    def render(self, frames: int) -> np.ndarray:
        """The next ``frames`` samples, shape (frames, n_input_channels), float32."""
        n0 = self.next_sample
        n = n0 + np.arange(frames)
        t = n / self.fs
        sensors = np.zeros((frames, self.geometry.n_sensors))
        for i, src in enumerate(self.sources):
            if src.signal == "noise":
                sensors += self._interpolate(self._noise[i], i, n0, frames)
            else:
                when = t[:, None] + (self.direction_at(i, t if src.sweep_deg_per_s else t[:1]) @ self._pos.T) / self.c
                sensors += _closed_form(src, when)
        sensors += self.noise_rms * self._sensor_rng.standard_normal(sensors.shape, dtype=np.float32)
        self.next_sample += frames
        out = np.zeros((frames, self.geometry.n_input_channels), np.float32)
        out[:, self.geometry.channels - 1] = sensors
        return out

    def _interpolate(self, stream: _NoiseStream, source_index: int, n0: int, frames: int) -> np.ndarray:
        stream.ensure(n0 + frames + self._lead)
        out = np.empty((frames, self.geometry.n_sensors))
        # Stretches on a fixed grid of the stream index keep rendering independent of call sizes.
        edges = np.unique(np.concatenate([[n0, n0 + frames],
                                          np.arange((n0 // _HOLD + 1) * _HOLD, n0 + frames, _HOLD)]))
        for a, b in zip(edges[:-1], edges[1:]):
            centre = (a // _HOLD + 0.5) * _HOLD / self.fs
            lead = (self.direction_at(source_index, np.array([centre])) @ self._pos.T)[0] / self.c * self.fs
            at = a + lead  # fractional stream position each sensor hears at sample a
            i0 = np.floor(at).astype(np.int64)
            weights = fracdelay.windowed_sinc((at - i0)[:, None] - _OFFSETS[None, :], _TAPS, _BETA)
            rows = i0 + _OFFSETS[0] - stream.start
            for m, row in enumerate(rows):
                out[a - n0:b - n0, m] = np.correlate(stream.buf[row:row + (b - a) + _TAPS - 1], weights[m], "valid")
        stream.trim(n0 + frames - self._lead)
        return out


def _closed_form(src, when_s: np.ndarray) -> np.ndarray:
    amp = np.sqrt(2.0) * 10.0 ** (src.level_db / 20.0)
    if src.signal == "tone":
        return amp * np.sin(2.0 * np.pi * src.frequency_hz * when_s)
    f0, f1 = src.band_hz
    period = src.period_s
    tp = np.mod(when_s, period)
    return amp * np.sin(2.0 * np.pi * (f0 * tp + 0.5 * (f1 - f0) / period * tp**2))
