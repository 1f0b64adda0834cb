"""Fractional-delay accuracy, kernel and engine, against exact FFT phase shifts.

Requirement: error below -60 dB relative to the signal up to 0.4·fs.
Reference: the ideal delay exp(-j*omega*d) (Laakso et al. 1996, eq. 3),
applied as an exact whole-signal FFT phase shift.
"""

import numpy as np
import pytest

from beamtap.service.engine import ArrayGeometry, Beamformer, fracdelay
from beamtap.service.engine.beamformer import BeamSet
from beamtap.service.engine.directions import unit_vectors

from conftest import broadband_plane_wave


@pytest.mark.parametrize("frac", [0.0, 0.137, 0.25, 0.5, 0.731, 0.999])
def test_kernel_response_below_minus_60_db_to_0p4_fs(frac):
    first, h = fracdelay.kernel(np.array(10.0 + frac))
    k = first + np.arange(fracdelay.TAPS)
    w = np.linspace(0, 0.8 * np.pi, 2001)  # up to 0.4·fs
    resp = np.exp(-1j * np.outer(w, k)) @ h
    err = np.abs(resp - np.exp(-1j * w * (10.0 + frac)))
    assert 20 * np.log10(err.max()) < -60.0


def test_engine_audio_matches_exact_fft_shift(rng):
    """A broadband plane wave from a direction with clearly fractional delays
    comes out of the look-direction audio beam as the source delayed by D."""
    fs, c = 48000.0, 1500.0
    geo = ArrayGeometry.line(16, 0.5)
    look = 63.7  # delays (p cos θ / c)·fs are far from whole samples here
    delays = geo.centred_positions_m @ unit_vectors(look, 0.0) / c * fs
    assert np.mean(np.abs(delays - np.round(delays))) > 0.15
    x, src = broadband_plane_wave(geo.centred_positions_m, c, fs, look, rng.standard_normal(1 << 15))
    bf = Beamformer(geo, c, fs, 1024, BeamSet([[look, 0.0]], [[look, 0.0]], bands_hz=[(500, 1400)]))
    y = bf.process(x).audio[:, 0].astype(np.float64)
    d = bf.bulk_delay_samples
    ref = np.roll(src, d)
    settle = 2 * d + 64
    err = y[settle:] - ref[settle:]
    assert 20 * np.log10(np.std(err) / np.std(src)) < -60.0


@pytest.mark.parametrize("freq_frac", [0.05, 0.2, 0.33, 0.4])
def test_engine_tone_error_per_frequency(freq_frac):
    fs, c = 48000.0, 1500.0
    geo = ArrayGeometry.line(8, 0.37)
    look = 41.3
    n = 1 << 14
    f = round(freq_frac * n) / n  # whole cycles in the period, so the FFT shift is exact
    src = np.sin(2 * np.pi * f * np.arange(n))
    x, src = broadband_plane_wave(geo.centred_positions_m, c, fs, look, src, top=0.41)
    bf = Beamformer(geo, c, fs, 512, BeamSet([[look, 0.0]], [[look, 0.0]], bands_hz=[(500, 1400)]))
    y = bf.process(x).audio[:, 0].astype(np.float64)
    d = bf.bulk_delay_samples
    err = y[4 * d:] - np.roll(src, d)[4 * d:]
    assert 20 * np.log10(np.std(err) / np.std(src)) < -60.0
