"""Steering: per-beam, per-sensor delays, the bulk delay, and filter spectra.

Delay convention (DEVELOPERS.md, "Delays and causality"): a plane wave from
unit direction u reaches a sensor at p earlier than the origin by p·u/c, so
steering holds that channel back by p·u/c relative to the origin, and
advances it by its trim (a trim is extra delay in the sensor's own signal
path). The relative delay ``tau_bm = (p_m·u_b/c - trim_m)·fs`` may have
either sign; one bulk delay D, sized from the aperture, makes every channel's
total delay ``D + tau_bm`` causal.
"""

from __future__ import annotations

import math

import numpy as np

from . import fracdelay


def relative_delays_samples(positions_m: np.ndarray, trims_s: np.ndarray, look_units: np.ndarray,
                            sound_speed_mps: float, samplerate_hz: float) -> np.ndarray:
    """Steering delay of every beam and sensor relative to the origin, samples.

    Returns
    -------
    ndarray, shape (n_beams, n_sensors)
        ``(p·u/c - trim) * fs``; the engine applies ``D + tau``.
    """
    return (look_units @ positions_m.T / sound_speed_mps - trims_s[None, :]) * samplerate_hz


def bulk_delay_samples(max_delay_s: float, samplerate_hz: float,
                       kernel_taps: int = fracdelay.TAPS) -> int:
    """Common delay D that makes every possible steering causal, whole samples.

    ``D = ceil(max|tau| * fs) + kernel_taps / 2``, ``max|tau|`` the worst
    case over all directions (set by the aperture and trims, not by the
    current beams), so retargeting never changes latency.
    """
    return int(math.ceil(max_delay_s * samplerate_hz - 1e-9) + kernel_taps // 2)


def filter_span_samples(bulk_delay: int) -> int:
    """Length of the longest steering filter (taps from 0 to 2D inclusive)."""
    return 2 * bulk_delay + 1


def steering_spectra(delays_samples: np.ndarray, weights: np.ndarray, n_fft: int,
                     bins: np.ndarray) -> np.ndarray:
    """Frequency responses of the weighted fractional-delay filters.

    Parameters
    ----------
    delays_samples : ndarray, shape (n_beams, n_sensors)
        Total delay of each channel in each beam (``D + tau``), >= taps/2.
    weights : ndarray, shape (n_beams, n_sensors)
        Linear weight (shading × calibration gain) of each channel.
    n_fft : int
        DFT length of the overlap-save frames.
    bins : ndarray of int
        DFT bins (``0 <= k <= n_fft // 2``) wanted.

    Returns
    -------
    ndarray of complex64, shape (n_bins, n_beams, n_sensors)
        ``H[k, b, m] = w_bm * sum_j h_j exp(-2j*pi*k*(first_tap + j)/n_fft)``,
        bin-major so that the product with channel spectra is one batched
        matrix product per bin.
    """
    first_tap, taps = fracdelay.kernel(delays_samples)
    bins = np.asarray(bins, dtype=np.int64)
    n_bins = len(bins)
    j = np.arange(taps.shape[-1])
    # Exact twiddles for whole-sample offsets by table lookup (no large exp).
    table = np.exp(-2j * np.pi * np.arange(n_fft) / n_fft)
    twiddles = table[np.outer(j, bins) % n_fft]
    # Real taps times complex twiddles as one real product (a quarter of the complex one's work).
    twiddles_ri = np.concatenate([twiddles.real, twiddles.imag], axis=1)
    taps = taps.reshape(-1, taps.shape[-1])
    first = first_tap.reshape(-1)
    w = weights.reshape(-1)
    out = np.empty((n_bins, len(taps)), np.complex64)
    # Filters a few hundred at a time: the temporaries stay small and are reused, where whole-array
    # temporaries (tens of MB for a large fan) cost more in fresh memory than in arithmetic.
    step = 512
    for lo in range(0, len(taps), step):
        part = slice(lo, lo + step)
        ri = taps[part] @ twiddles_ri
        local = ri[:, :n_bins] + 1j * ri[:, n_bins:]
        local *= table[(first[part, None] * bins[None, :]) % n_fft]
        local *= w[part, None]
        out[:, part] = local.T
    return out.reshape((n_bins,) + delays_samples.shape)
