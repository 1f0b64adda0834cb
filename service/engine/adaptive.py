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
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class AdaptiveSettings:
    """``[beams.adaptive]``: MVDR settings."""

    average_s: float = 1.0  # cross-spectra averaging time constant, seconds
    loading_db: float = 10.0  # diagonal loading over the estimated sensor noise per bin
    update_s: float = 0.25  # how often the weights are recomputed, seconds
    band_hz: tuple | None = None  # where R is estimated and weights adapt; None: the power bands' span
    # Bin width of the adaptive estimate and weights, Hz: frames of at least fs / resolution_hz
    # samples, whatever the block. None: the block's own frame (block + 2D + band filter).
    resolution_hz: float | None = None

    def as_dict(self) -> dict:
        out = {"average_s": self.average_s, "loading_db": self.loading_db, "update_s": self.update_s}
        if self.band_hz is not None:
            out["band_hz"] = list(self.band_hz)
        if self.resolution_hz is not None:
            out["resolution_hz"] = self.resolution_hz
        return out

    def min_frame_samples(self, samplerate_hz: float) -> int:
        """The shortest FFT frame these settings allow at ``samplerate_hz`` (0: no floor)."""
        return 0 if self.resolution_hz is None else int(math.ceil(samplerate_hz / self.resolution_hz))


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


def loaded_factors(r: np.ndarray, loading_db: float, noise: np.ndarray | None = None) -> tuple:
    """Cholesky factors of the loaded matrices ``R + eps I`` per bin (see :func:`mvdr_weights`);
    ``noise`` (bins,) the sensor noise power per bin when known (else :func:`noise_power`).

    Returns
    -------
    inverse : ndarray (bins, M, M), complex
        ``L^-1`` of the factor ``L L^H = R + eps I``, by forward substitution
        on the identity (the triangular factor's inverse, never ``R``'s);
        identity where the bin falls back.
    fallback : ndarray (bins,), bool
        Bins whose matrix is not finite or not positive definite even loaded.
    """
    r = np.asarray(r, np.complex128)
    n_bins, m = r.shape[0], r.shape[1]
    finite = np.isfinite(r).all(axis=(1, 2))
    fallback = ~finite
    scale = 10.0 ** (loading_db / 10.0) if math.isfinite(loading_db) else 0.0
    loaded = np.where(finite[:, None, None], r, 0.0)
    if finite.any():
        eps = np.zeros(n_bins)
        eps[finite] = scale * (noise_power(r[finite]) if noise is None else np.asarray(noise)[finite])
        loaded = loaded + eps[:, None, None] * np.eye(m)
    lower = np.broadcast_to(np.eye(m, dtype=np.complex128), r.shape).copy()
    try:  # one call for every bin; a bin that cannot be factored sends us bin by bin
        lower[finite] = np.linalg.cholesky(loaded[finite])
    except np.linalg.LinAlgError:
        for k in np.nonzero(finite)[0]:
            try:
                lower[k] = np.linalg.cholesky(loaded[k])
            except np.linalg.LinAlgError:
                fallback[k] = True
    return np.linalg.solve(lower, np.broadcast_to(np.eye(m, dtype=np.complex128), lower.shape)), fallback


def weights_from_factors(linv: np.ndarray, fallback: np.ndarray, v: np.ndarray, dtype=np.complex128) -> tuple:
    """MVDR weights ``(R + eps I)^-1 v / (v^H (R + eps I)^-1 v)`` from the inverse factors of
    :func:`loaded_factors`: ``z = L^-1 v`` and ``x = L^-H z`` are two batched products for any
    number of beams, and ``v^H (R + eps I)^-1 v = |z|^2``, real and positive by construction;
    delay-and-sum where a bin falls back or the result is not finite. Returns ``(w, fallback)``
    as :func:`mvdr_weights`. ``dtype`` complex64 halves the time of the products (the streaming
    engine applies the weights in single precision anyway)."""
    v = np.asarray(v)
    rhs = np.transpose(v, (0, 2, 1)).astype(dtype)  # (bins, M, beams)
    linv = linv.astype(dtype, copy=False)
    z = linv @ rhs
    x = np.conj(np.transpose(linv, (0, 2, 1))) @ z
    den = np.sum(z.real ** 2 + z.imag ** 2, axis=1)  # (bins, beams)
    good = np.isfinite(den) & (den > 0) & ~fallback[:, None]
    # times the reciprocal, in place: a complex division per element cost five times more (measured
    # 2026-12-05, 41 bins x 16 sensors x 91 beams: 165 -> 30 us)
    x *= (1.0 / np.where(good, den, 1.0))[:, None, :]
    w = np.transpose(x, (0, 2, 1))
    if not good.all():  # delay-and-sum where the bin fell back or the solve went wrong
        das = v / np.sum(np.abs(v) ** 2, axis=2, keepdims=True)
        w = np.where(good[:, :, None], w, das)
    return w, fallback | ~good.all(axis=1)


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
    r = np.asarray(r)
    v = np.asarray(v)
    n_bins, _, m = v.shape
    if r.shape != (n_bins, m, m):
        raise ValueError(f"r has shape {r.shape}, expected ({n_bins}, {m}, {m}) for steering of shape {v.shape}")
    lower, fallback = loaded_factors(r, loading_db)
    return weights_from_factors(lower, fallback, v)


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
    does not start biased towards zero). Blocks are kept as they come (a
    copy) and folded into a bin's matrix when that bin is read (:meth:`of`,
    :attr:`r`): the same weights as one by one, in one batched product per
    bin instead of an outer product per block (about twenty times less time
    for 64 sensors), and a reader that takes the bins a slice at a time
    pays for each slice's bins only (the scaling of every matrix per fold
    was 1 ms a block for 64 sensors on 59 bins).
    """

    #: Blocks kept unfolded before the bins furthest behind are folded on ``update``.
    _KEEP_BLOCKS = 48

    def __init__(self, n_bins: int, n_sensors: int, average_s: float, block_s: float):
        if not (average_s > 0 and block_s > 0):
            raise ValueError(f"average_s={average_s!r}, block_s={block_s!r}: expected positive seconds")
        self._r = np.zeros((n_bins, n_sensors, n_sensors), np.complex128)
        self.n_bins, self.n_sensors = n_bins, n_sensors
        self.forget = math.exp(-block_s / average_s)
        self.blocks = 0
        self._pending: list = []  # spectra of blocks _first .. blocks - 1
        self._first = 0
        self._folded = np.zeros(n_bins, np.int64)  # per bin: the first block not yet in its matrix

    def update(self, spectra: np.ndarray) -> None:
        """One block's spectra ``(bins, n_sensors)``."""
        self._pending.append(np.array(spectra, np.complex128))
        self.blocks += 1
        if len(self._pending) > self._KEEP_BLOCKS:  # bounded memory: the bins furthest behind, a share a block
            behind = np.argsort(self._folded, kind="stable")[:max(1, -(-self.n_bins // 8))]
            self._fold(behind)

    @property
    def r(self) -> np.ndarray:
        """The averaged matrices ``(bins, n_sensors, n_sensors)`` (Hermitian)."""
        self._fold(np.arange(self.n_bins))
        return self._r

    def of(self, bins: np.ndarray) -> np.ndarray:
        """The averaged matrices of ``bins`` (indices), a copy ``(len(bins), n_sensors, n_sensors)``."""
        bins = np.asarray(bins, np.int64)
        self._fold(bins)
        return self._r[bins]

    def _fold(self, bins: np.ndarray) -> None:
        for start in np.unique(self._folded[bins]):
            if start == self.blocks:
                continue
            group = bins[self._folded[bins] == start]
            # One block at a time: R <- (1 - w) R + w x x^H, w = max(1 - forget, 1/count) for block
            # number count (from one). Over blocks j: R <- prod(1 - w_j) R + sum_j c_j x_j x_j^H,
            # c_j = w_j prod_{i > j} (1 - w_i).
            counts = np.arange(start, self.blocks) + 1
            w = np.maximum(1.0 - self.forget, 1.0 / counts)
            keep = np.concatenate([np.cumprod((1.0 - w)[::-1])[::-1][1:], [1.0]])  # prod over i > j
            x = np.stack([p[group] for p in self._pending[start - self._first:]], axis=2)  # (bins, M, K)
            r = self._r[group] * np.prod(1.0 - w) + (x * (w * keep)) @ np.conj(np.transpose(x, (0, 2, 1)))
            self._r[group] = r
            self._folded[group] = self.blocks
        oldest = int(self._folded.min())
        if oldest > self._first:
            del self._pending[:oldest - self._first]
            self._first = oldest
