"""Minimum-variance distortionless (MVDR, Capon) weights per frequency bin, made robust by
diagonal loading; the cross-spectral matrices they come from.

For a look direction with steering vector ``v`` (per bin) and the sensors'
cross-spectral matrix ``R``, the loaded MVDR weights are

    w = (R + eps I)^-1 v / (v^H (R + eps I)^-1 v)

(Capon 1969; Van Trees 2002 §6.2): the output power ``w^H R w`` is the
least of all weights with ``w^H v = 1``, the look direction's gain exactly
one. ``eps`` is set as a level above the sensor noise power in the bin
(the loading-to-noise ratio, Carlson 1988), the noise power estimated as
the mean of the smaller half of the eigenvalues of ``R`` (with fewer
sources than half the sensors those eigenvalues are noise alone). The
systems are solved with Cholesky factors, never an explicit inverse; a bin
whose ``R`` is not finite or not positive definite even loaded gets the
delay-and-sum weights ``v / (v^H v)`` instead, and is counted.

Nothing here is wired into the streaming engine yet: these are the pure
pieces (weights, white-noise gain, the averaged cross-spectral matrix)
with their tests against the published results (tests/test_adaptive.py).

References
----------
J. Capon, "High-resolution frequency-wavenumber spectrum analysis",
Proc. IEEE 57(8), 1969.
H. L. Van Trees, Optimum Array Processing (Wiley, 2002), §6.2 (MVDR and
its SINR), §6.6 (diagonal loading).
B. D. Carlson, "Covariance matrix estimation errors and diagonal loading in
adaptive arrays", IEEE Trans. AES 24(4), 1988.
H. Cox, R. M. Zeskind and M. M. Owen, "Robust adaptive beamforming", IEEE
Trans. ASSP 35(10), 1987 (white-noise gain and loading).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.linalg import LinAlgError, cho_factor, cho_solve


def noise_power(r: np.ndarray) -> np.ndarray:
    """Sensor noise power per bin: the mean of the smaller half of the eigenvalues of ``r``.

    Parameters
    ----------
    r : ndarray (bins, M, M), Hermitian

    Returns
    -------
    ndarray (bins,), float
    """
    lam = np.linalg.eigvalsh(r)  # ascending, per bin
    return np.maximum(lam[:, : max(1, lam.shape[1] // 2)].mean(axis=1), 0.0)


def mvdr_weights(r: np.ndarray, v: np.ndarray, loading_db: float) -> tuple:
    """Loaded MVDR weights per bin and beam.

    Parameters
    ----------
    r : ndarray (bins, M, M), complex
        Cross-spectral matrices (Hermitian, positive semi-definite).
    v : ndarray (bins, beams, M), complex
        Steering vectors: a plane wave from beam ``b``'s direction gives the
        sensor spectra ``a * v[k, b]`` for a source spectrum ``a``.
    loading_db : float
        Diagonal loading above the estimated sensor noise power per bin
        (:func:`noise_power`), dB; ``-inf`` for none.

    Returns
    -------
    w : ndarray (bins, beams, M), complex
        Weights with ``sum(conj(w) * v) == 1`` (the beam output is ``w^H x``).
    fallback : ndarray (bins,), bool
        Bins given delay-and-sum weights (``r`` not finite, or not positive
        definite even loaded).
    """
    r = np.asarray(r, np.complex128)
    v = np.asarray(v, np.complex128)
    n_bins, n_beams, m = v.shape
    if r.shape != (n_bins, m, m):
        raise ValueError(f"r has shape {r.shape}, expected ({n_bins}, {m}, {m}) for steering of shape {v.shape}")
    das = v / np.sum(np.abs(v) ** 2, axis=2, keepdims=True)
    w = das.copy()
    fallback = np.zeros(n_bins, bool)
    finite = np.isfinite(r).all(axis=(1, 2))
    fallback |= ~finite
    scale = 10.0 ** (loading_db / 10.0) if math.isfinite(loading_db) else 0.0
    eps = np.zeros(n_bins)
    if finite.any():
        eps[finite] = scale * noise_power(r[finite])
    eye = np.eye(m)
    for k in np.nonzero(finite)[0]:
        try:
            factor = cho_factor(r[k] + eps[k] * eye, lower=True, check_finite=False)
        except LinAlgError:
            fallback[k] = True
            continue
        x = cho_solve(factor, v[k].T, check_finite=False)  # (M, beams): (R + eps I)^-1 v
        den = np.einsum("mb,bm->b", x, v[k].conj())  # v^H x, real and positive in exact arithmetic
        if not (np.all(np.isfinite(den)) and np.all(den.real > 0)):
            fallback[k] = True
            continue
        w[k] = (x / den.real).T
    return w, fallback


def white_noise_gain(w: np.ndarray, v: np.ndarray) -> np.ndarray:
    """``|w^H v|^2 / (w^H w)`` per bin and beam: the array gain against spatially white noise
    (Cox, Zeskind and Owen 1987); ``M`` for delay-and-sum on ``M`` sensors with unit-modulus steering."""
    gain = np.abs(np.sum(np.conj(w) * v, axis=-1)) ** 2
    return gain / np.sum(np.abs(w) ** 2, axis=-1)


def output_power(w: np.ndarray, r: np.ndarray) -> np.ndarray:
    """``w^H R w`` per bin and beam (real)."""
    return np.einsum("kbm,kmn,kbn->kb", np.conj(w), r, w).real


class CrossSpectra:
    """Cross-spectral matrices per bin averaged over time with exponential forgetting.

    Parameters
    ----------
    n_bins, n_sensors : int
    average_s : float
        Time constant of the average (seconds).
    block_s : float
        Time between updates (one block).

    Notes
    -----
    ``update`` adds ``x x^H`` of one block's spectra; until a time constant
    has passed the average is the plain mean of the blocks so far (so it
    does not start biased towards zero).
    """

    def __init__(self, n_bins: int, n_sensors: int, average_s: float, block_s: float):
        if not (average_s > 0 and block_s > 0):
            raise ValueError(f"average_s={average_s!r}, block_s={block_s!r}: expected positive seconds")
        self.r = np.zeros((n_bins, n_sensors, n_sensors), np.complex128)
        self.forget = math.exp(-block_s / average_s)
        self.blocks = 0

    def update(self, spectra: np.ndarray) -> None:
        """One block's spectra ``(bins, n_sensors)``."""
        x = np.asarray(spectra, np.complex128)
        self.blocks += 1
        weight = max(1.0 - self.forget, 1.0 / self.blocks)
        self.r *= 1.0 - weight
        self.r += weight * (x[:, :, None] * np.conj(x[:, None, :]))
