"""A beam set's steering data, built once per beam set off the hot path: the channel FFT, the band
power evaluators (every band held to the longest filter's delay) and the steered-sum products for the
power fan and the audio beams."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from . import bandpower, shading, steering
from .basis import _Basis
from .directions import unit_vectors
from .products import _BeamProduct
from .transform import ColumnFFT

if TYPE_CHECKING:  # the beam set type lives with the engine, which imports this module
    from .beamformer import BeamSet


class _Steering:
    """Precomputed steering data for one beam set (built off the hot path)."""

    def __init__(self, geometry, basis: _Basis, sound_speed_mps, samplerate_hz, bulk_delay, n_fft, valid,
                 beams: BeamSet, compiled: bool, team=None):
        self.beams = beams
        self.fft = ColumnFFT(n_fft, compiled, team)
        pos = geometry.centred_positions_m
        gain = geometry.active_gain
        trims = geometry.active_trim_s
        filters = [bandpower.design_band_filter(b, samplerate_hz, beams.transition_hz) for b in beams.bands_hz]
        # Every band's row describes the same input span: bands with shorter filters are held back
        # to the longest filter's delay.
        self.band_delay = max(int(f.group_delay_samples) for f in filters)
        self.bands = [bandpower.BandPowerEvaluator(f, n_fft, valid, self.band_delay - int(f.group_delay_samples))
                      for f in filters]
        self.k1 = min(int(ev.bins[0]) for ev in self.bands)
        self.k2 = max(int(ev.bins[-1]) for ev in self.bands)
        power_bins = np.arange(self.k1, self.k2 + 1)

        def product(directions_deg, bins):
            units = unit_vectors(directions_deg[:, 0], directions_deg[:, 1])
            w = shading.shading_weights(geometry.kind, geometry.positions_m, geometry.active, units,
                                        beams.shading, beams.sidelobe_db, beams.nbar) * gain[None, :]
            tau = steering.relative_delays_samples(pos, trims, units, sound_speed_mps, samplerate_hz)
            h = steering.steering_spectra(bulk_delay + tau, w, n_fft, bins)
            pairs = basis.pairs
            symmetric = pairs is not None and np.allclose(w[:, pairs[0]], w[:, pairs[1]], rtol=1e-9, atol=0.0)
            return _BeamProduct(h, basis, symmetric, bulk_delay, n_fft, bins, compiled, team)

        self.power = product(beams.power_deg, power_bins)
        # the real form leaves out a delay of `lag` samples; each band's factor puts it back
        self.bands = [ev.delayed(self.power.lag) for ev in self.bands]
        self.audio = product(beams.audio_deg, np.arange(n_fft // 2 + 1)) if len(beams.audio_deg) else None

    @property
    def nbytes(self) -> int:
        return self.power.nbytes + (0 if self.audio is None else self.audio.nbytes)
