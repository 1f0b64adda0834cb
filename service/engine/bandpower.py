"""Band power of beams: definition, band filter design, exact fast evaluation.

Definition (what ``power`` means everywhere in beamtap): for each band, the
beam output ``y`` is filtered by a causal linear-phase FIR band-pass ``g``
(scipy.signal.firwin with a Kaiser window designed for 80 dB stop-band
attenuation, its -6 dB points at the band edges, each transition centred
on its edge), and the band power of a power block is the mean of
``(g * y)[n]**2`` over the block's samples, reported as
``10*log10(mean)`` dB re full scale (a full-scale sine, amplitude 1, in the
band reads -3.01 dB). The filter's effective noise bandwidth
``fs/2 * sum(g**2)`` Hz is reported with it, so that a white input of
variance s**2 reads ``s**2 * sum(g**2)``.

Evaluation: the engine has the overlap-save spectrum of each beam on the
band's bins only. The block's mean square of the filtered beam is a fixed
quadratic form in those bins' real and imaginary parts; it is factored once
(:class:`BandPowerEvaluator`), so band power costs one real matrix product
per batch instead of a full-length inverse FFT per beam. Exact up to the
stop-band leakage of the bins left out (below -80 dB).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.signal import firwin, kaiser_beta

try:  # the compiled quadratic form (service/engine/_kernels.c); numpy's matrix product without it
    from . import _kernels
except ImportError:  # pragma: no cover - exercised by installs without a C compiler
    _kernels = None

#: Factor columns per pass of the compiled quadratic form (two vectors of eight).
_FACTOR_COLUMNS = 16

#: Stop-band attenuation the band filters are designed for, dB.
STOPBAND_DB = 80.0
#: Bins whose |G| is below this (relative) are left out of the evaluation.
BIN_FLOOR = 10.0 ** (-STOPBAND_DB / 20.0)


@dataclass(frozen=True)
class BandFilter:
    """A designed band filter.

    Attributes
    ----------
    band_hz : (float, float)
        Pass band edges requested, Hz.
    taps : ndarray, shape (n_taps,)
        FIR coefficients (causal, delay ``(n_taps - 1) / 2`` samples).
    transition_hz : float
        Width of each transition band, Hz.
    samplerate_hz : float
    """

    band_hz: tuple
    taps: np.ndarray
    transition_hz: float
    samplerate_hz: float

    @property
    def effective_bandwidth_hz(self) -> float:
        """Equivalent noise bandwidth of the filter, Hz (one-sided)."""
        return float(self.samplerate_hz / 2.0 * np.sum(self.taps**2))

    @property
    def group_delay_samples(self) -> float:
        return (len(self.taps) - 1) / 2.0


def default_transition_hz(band_hz, samplerate_hz: float) -> float:
    """Transition width used when the config gives none.

    Half the band width, but never more than the room below the lower edge
    or above the upper edge (each transition is centred on its edge), and
    at least fs/1000 where the room allows (common practice: narrower
    transitions cost filter length, frame length and latency).
    """
    low, high = band_hz
    room = 1.9 * min(low, samplerate_hz / 2.0 - high)
    return float(min(max(0.5 * (high - low), samplerate_hz / 1000.0), room))


def band_filter_taps(transition_hz: float, samplerate_hz: float) -> int:
    """Length of a band filter with transitions ``transition_hz`` wide (odd: linear phase type I,
    whole-sample delay), from Kaiser's (1974) length formula for :data:`STOPBAND_DB`."""
    numtaps = int(np.ceil((STOPBAND_DB - 7.95) / (14.36 * transition_hz / samplerate_hz))) + 1
    return numtaps + (numtaps + 1) % 2


def design_band_filter(band_hz, samplerate_hz: float, transition_hz: float | None = None) -> BandFilter:
    """Design the band-pass FIR of one band.

    Parameters
    ----------
    band_hz : (float, float)
        ``0 < low < high < fs/2``, Hz.
    samplerate_hz : float
    transition_hz : float, optional
        Transition width; see :func:`default_transition_hz`.

    References
    ----------
    J. F. Kaiser, "Nonrecursive digital filter design using the I0-sinh
    window function" (1974): length and beta from the attenuation.
    """
    low, high = float(band_hz[0]), float(band_hz[1])
    nyq = samplerate_hz / 2.0
    if not 0.0 < low < high < nyq:
        raise ValueError(f"band_hz={band_hz!r}: expected 0 < low < high < {nyq:g} Hz")
    tw = default_transition_hz((low, high), samplerate_hz) if transition_hz is None else float(transition_hz)
    numtaps = band_filter_taps(tw, samplerate_hz)
    if low - tw / 2.0 <= 0.0 or high + tw / 2.0 >= nyq:
        raise ValueError(f"band_hz={band_hz!r} with transition_hz={tw:g}: the transitions must fit between "
                         f"0 and {nyq:g} Hz")
    cutoffs = [low, high]  # the -6 dB points are the band edges: effective bandwidth ≈ high - low
    taps = firwin(numtaps, cutoffs, pass_zero=False, window=("kaiser", kaiser_beta(STOPBAND_DB)),
                  fs=samplerate_hz, scale=False)
    return BandFilter((low, high), taps, tw, float(samplerate_hz))


class BandPowerEvaluator:
    """Exact mean square over the last ``valid`` samples of an N-point frame
    from the band bins of its (unfiltered) spectrum.

    Parameters
    ----------
    band_filter : BandFilter
    n_fft : int
        Frame length N.
    valid : int
        Number of frame samples at the end that form the power block.
    hold_samples : int
        The block ends this many samples before the frame's end (default 0).

    Notes
    -----
    On the band bins K (DC and Nyquist excluded) the filtered frame is
    ``z[i] = (2/N) sum_k Re(G_k Y_k exp(2j pi k i / N))``, a real linear map
    ``z = W A v`` of the interleaved real and imaginary parts ``v`` of ``Y``
    (``A`` applies ``G`` bin by bin). The block's mean square is the quadratic
    form ``v^T (A^T W^T W A / valid) v``; its eigenvectors with eigenvalues
    above 1e-12 of the largest give ``L`` with ``power = ||v L||^2`` — one
    real matrix product per batch of beams and blocks, exact to that cut-off.
    """

    def __init__(self, band_filter: BandFilter, n_fft: int, valid: int, hold_samples: int = 0):
        self.filter = band_filter
        self.n_fft = int(n_fft)
        self.hold_samples = int(hold_samples)
        g = np.fft.rfft(band_filter.taps, n_fft)
        keep = np.nonzero(np.abs(g) >= BIN_FLOOR * np.abs(g).max())[0]
        k1, k2 = max(int(keep[0]), 1), min(int(keep[-1]), n_fft // 2 - 1)
        self.bins = np.arange(k1, k2 + 1)
        gk = g[self.bins]
        # The block: the `valid` samples ending `hold_samples` before the frame's end (bands with
        # shorter filters are held back so that every band's row describes the same input span).
        end = n_fft - self.hold_samples
        theta = 2.0 * np.pi * np.outer(np.arange(end - valid, end), self.bins) / n_fft
        # Columns for the real and the imaginary part of each filtered bin, interleaved like complex64 memory.
        w = np.empty((valid, 2 * len(self.bins)))
        w[:, 0::2] = (2.0 / n_fft) * (np.cos(theta) * gk.real - np.sin(theta) * gk.imag)
        w[:, 1::2] = (2.0 / n_fft) * (-np.cos(theta) * gk.imag - np.sin(theta) * gk.real)
        if w.shape[1] <= valid:
            lam, vec = np.linalg.eigh(w.T @ w / valid)
            big = lam > lam.max() * 1e-12
            factor = vec[:, big] * np.sqrt(lam[big])
        else:
            # Wide bands: the same factor from the smaller Gram matrix of the rows. With W = U S V^T,
            # W^T W / valid = V (S^2 / valid) V^T, and V S = W^T U, so the factor is W^T U / sqrt(valid):
            # (valid)^2 x columns work instead of columns^3 (Golub & Van Loan 2013, §8.6, from memory).
            lam, vec = np.linalg.eigh(w @ w.T)
            big = lam > lam.max() * 1e-12
            factor = w.T @ vec[:, big] / np.sqrt(valid)
        self.factor = np.ascontiguousarray(factor, dtype=np.float32)

    @property
    def factor(self) -> np.ndarray:
        """The factor ``L`` (2 bins, rank) float32: ``power = ||v L||^2``."""
        return self._factor

    @factor.setter
    def factor(self, value: np.ndarray) -> None:
        self._factor = value
        # the compiled loop's copy, its columns padded with zeros to whole passes
        pad = -value.shape[1] % _FACTOR_COLUMNS
        self._factor_padded = np.ascontiguousarray(np.pad(value, ((0, 0), (0, pad))))

    def delayed(self, lag_samples: int) -> "BandPowerEvaluator":
        """The evaluator for spectra that lack a delay of ``lag_samples``.

        Multiplying a spectrum by ``exp(-2j pi k lag / N)`` turns each bin's
        (re, im) pair by a fixed angle, a linear map that folds into the
        factor: no pass over the spectra is needed to apply the delay.
        """
        if lag_samples == 0:
            return self
        c = np.exp(-2j * np.pi * self.bins * lag_samples / self.n_fft)[:, None]
        f_re, f_im = self.factor[0::2].astype(np.float64), self.factor[1::2].astype(np.float64)
        factor = np.empty_like(self.factor, dtype=np.float64)
        # (vr + j vi)(cr + j ci): real part vr cr - vi ci, imaginary part vr ci + vi cr
        factor[0::2] = c.real * f_re + c.imag * f_im
        factor[1::2] = -c.imag * f_re + c.real * f_im
        out = object.__new__(BandPowerEvaluator)
        out.__dict__.update(self.__dict__)
        out.factor = np.ascontiguousarray(factor, dtype=np.float32)
        return out

    def mean_square(self, band_spectrum: np.ndarray) -> np.ndarray:
        """Mean square of the filtered signal over the block.

        Parameters
        ----------
        band_spectrum : ndarray, complex64, shape (..., n_bins)
            Unfiltered spectrum ``Y`` on ``self.bins`` (the band filter
            response is applied by the precomputed factor).

        Returns
        -------
        ndarray of float32, shape (...)
        """
        y = np.ascontiguousarray(band_spectrum, dtype=np.complex64)
        t = y.view(np.float32) @ self.factor
        return np.einsum("...r,...r->...", t, t)

    def mean_square_in(self, spectra: np.ndarray, first_bin: int, compiled: bool, team=None) -> np.ndarray:
        """:meth:`mean_square` of the band inside wider spectra, without copying the band out.

        Parameters
        ----------
        spectra : ndarray, complex64, C order, shape (..., n)
            Spectra whose element ``first_bin`` is bin ``self.bins[0]``.
        first_bin : int
        compiled : bool
            Use the compiled quadratic form (when the kernels are installed);
            it gives :meth:`mean_square`'s values to float32 rounding.
        team : _kernels.Team or None
            Threads that share the rows (compiled form only).

        Returns
        -------
        ndarray of float32, shape (...)
        """
        n_bins = len(self.bins)
        if not (compiled and _kernels is not None):
            return self.mean_square(spectra[..., first_bin:first_bin + n_bins])
        out = np.empty(spectra.shape[:-1], np.float32)
        if spectra.dtype != np.complex64 or not spectra.flags.c_contiguous:
            raise ValueError("spectra: expected a C-contiguous complex64 array")
        _kernels.quadform(spectra, out.size, 2 * spectra.shape[-1], 2 * first_bin, 2 * n_bins,
                          self._factor_padded, self._factor_padded.shape[1], out, team)
        return out
