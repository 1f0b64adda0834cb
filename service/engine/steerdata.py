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
        self._context = (geometry, basis, sound_speed_mps, samplerate_hz, bulk_delay, n_fft, compiled, team)
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
            h, w, _ = self.das_steering(directions_deg, bins)
            pairs = basis.pairs
            symmetric = pairs is not None and np.allclose(w[:, pairs[0]], w[:, pairs[1]], rtol=1e-9, atol=0.0)
            return _BeamProduct(h, basis, symmetric, bulk_delay, n_fft, bins, compiled, team)

        self.power_bins = power_bins
        self.power = product(beams.power_deg, power_bins)
        # the real form leaves out a delay of `lag` samples; each band's factor puts it back
        self.bands = [ev.delayed(self.power.lag) for ev in self.bands]
        self.audio = product(beams.audio_deg, np.arange(n_fft // 2 + 1)) if len(beams.audio_deg) else None

    def das_steering(self, directions_deg, bins) -> tuple:
        """Delay-and-sum steering ``h`` (bins, beams, sensors) of ``directions_deg`` on ``bins``, with
        the weights (shading x gain, (beams, sensors)) and relative delays (samples) it is made of."""
        geometry, _, _, _, bulk_delay, n_fft, _, _ = self._context
        beams = self.beams
        units, tau = self._delays(directions_deg)
        w = shading.shading_weights(geometry.kind, geometry.positions_m, geometry.active, units,
                                    beams.shading, beams.sidelobe_db, beams.nbar) * geometry.active_gain[None, :]
        return steering.steering_spectra(bulk_delay + tau, w, n_fft, bins), w, tau

    def _delays(self, directions_deg) -> tuple:
        """Unit vectors and relative delays (samples, trims included) of the directions' plane waves."""
        geometry, _, c, fs, _, _, _, _ = self._context
        units = unit_vectors(directions_deg[:, 0], directions_deg[:, 1])
        return units, steering.relative_delays_samples(geometry.centred_positions_m, geometry.active_trim_s,
                                                       units, c, fs)

    def manifold(self, directions_deg, bins) -> np.ndarray:
        """What the sensors hear, per unit of source spectrum, of a plane wave from each direction:
        ``a[k, b, m] = exp(+2 pi j k tau_m / N) / gain_m`` (bins, beams, sensors), the convention in
        which the delay-and-sum steering gives ``sum_m h[k, b, m] a[k, b, m]`` close to the bulk delay's
        phase ``exp(-2 pi j k D / N)``."""
        geometry, _, _, _, _, n_fft, _, _ = self._context
        _, tau = self._delays(directions_deg)
        phase = 2.0 * np.pi * np.asarray(bins)[:, None, None] * tau[None, :, :] / n_fft
        return np.exp(1j * phase) / geometry.active_gain[None, None, :]

    def own_copy(self) -> "_Steering":
        """This steering with power and audio products of its own, whose bins can be changed in
        place (``power.set_bins``, ``audio.set_bins``), e.g. to adaptive weights."""
        out = object.__new__(_Steering)
        out.__dict__.update(self.__dict__)
        out.power = self.power.own_copy()
        out.audio = None if self.audio is None else self.audio.own_copy()
        return out

    @property
    def nbytes(self) -> int:
        return self.power.nbytes + (0 if self.audio is None else self.audio.nbytes)
