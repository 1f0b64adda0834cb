"""Shared helpers: independent reference signals for engine tests.

Plane waves here are generated without the engine or the scene simulator:
tones in closed form at the exact arrival times, broadband signals by an
exact whole-signal FFT phase shift of a periodic signal.
"""

from __future__ import annotations

import numpy as np
import pytest

from beamtap.service.engine.directions import unit_vectors


def arrival_leads_s(positions_m, c, az_deg, el_deg=0.0):
    """How much earlier than the origin each sensor hears a plane wave (p·u/c)."""
    return positions_m @ unit_vectors(az_deg, el_deg) / c


def tone_plane_wave(positions_m, c, fs, az_deg, freq_hz, frames, amplitude=0.5, el_deg=0.0):
    t = np.arange(frames)[:, None] / fs + arrival_leads_s(positions_m, c, az_deg, el_deg)[None, :]
    return (amplitude * np.sin(2 * np.pi * freq_hz * t)).astype(np.float32)


def broadband_plane_wave(positions_m, c, fs, az_deg, source, el_deg=0.0, top=0.4):
    """Sensor signals of a periodic source (band-limited to ``top``·fs) by exact FFT shifts.

    Returns (sensors float32 (n, m), band-limited source float64 (n,)).
    """
    n = len(source)
    spec = np.fft.rfft(source)
    f = np.fft.rfftfreq(n)
    spec[f > top] = 0.0
    src = np.fft.irfft(spec, n)
    leads = arrival_leads_s(positions_m, c, az_deg, el_deg) * fs
    x = np.stack([np.fft.irfft(spec * np.exp(2j * np.pi * f * a), n) for a in leads], axis=1)
    return x.astype(np.float32), src


@pytest.fixture
def rng():
    return np.random.default_rng(20261202)
