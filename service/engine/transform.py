"""Real FFTs of the overlap-save frames: forward down the columns of a frame, inverse down columns.

The engine's history holds one column per history row (frames down), so a
frame is ``(n, rows)`` and its spectrum ``(n // 2 + 1, rows)``: for every bin
the rows sit side by side, the order in which the steered sums read them.
The forward transform is the compiled one of ``_kernels.c`` when it is
installed (each vector lane carries one column through a self-sorting
mixed-radix FFT; faster here than pocketfft on the same frame, see
bench/results.md); otherwise scipy's pocketfft.

References
----------
C. Van Loan, Computational Frameworks for the Fast Fourier Transform (SIAM,
1992): the Stockham autosort frameworks (§1.7) and real data by a
half-length complex transform (ch. 4); section numbers from memory.
"""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft

try:
    from . import _kernels
except ImportError:  # pragma: no cover - exercised by installs without a C compiler
    _kernels = None

#: Columns per vector of the compiled transform (FL in _kernels.c): its scratch holds this many.
_KERNEL_COLUMNS = 8
_RADICES = (8, 4, 2, 3, 5)


def _pocketfft():
    """scipy's pocketfft binding, called directly: the public ``scipy.fft`` wrappers cost about
    10 µs per call in dispatch here, a tenth of the 16-sensor block. Private API, so it is
    used only after a check that it gives the public functions' results; else None."""
    try:
        from scipy.fft._pocketfft import pypocketfft as pfft

        probe = np.random.default_rng(0).standard_normal((10, 2)).astype(np.float32)
        spec = pfft.r2c(probe, (0,), True, 0, None, 1)  # forward down columns, no scaling, one worker
        back = pfft.c2r(spec, (0,), 10, False, 2, None, 1)  # inverse down columns, scaled by 1/n
        if (spec.dtype == np.complex64 and np.allclose(spec, sfft.rfft(probe, axis=0), atol=1e-5)
                and np.allclose(back, probe, atol=1e-5)):
            return pfft
    except Exception:  # noqa: BLE001 - any change of the private binding means: use the public one
        pass
    return None


_PFFT = _pocketfft()


def fast_length(need: int) -> int:
    """Smallest even length ``>= need`` whose half has no prime factor above 5 (both transforms
    are fast there, and the compiled one needs it)."""
    return 2 * int(sfft.next_fast_len(max(1, -(-int(need) // 2)), real=True))


def _radices(m: int):
    """Radices 8, 4, 2, 3, 5 whose product is ``m``, or None."""
    out = []
    for p in _RADICES:
        while m % p == 0:
            out.append(p)
            m //= p
    return out if m == 1 else None


class ColumnFFT:
    """Forward real FFT down the columns of ``(n, columns)`` float32 frames, one length.

    Parameters
    ----------
    n : int
        Frame length (samples).
    compiled : bool
        Use the compiled transform (needs the kernels, an even ``n`` and
        ``n // 2`` with no prime factor above 5; else pocketfft).
    team : _kernels.Team or None
        Threads that share each call's column groups (compiled transform only).

    Notes
    -----
    Real-time constraint: the twiddles and scratch are made here, once;
    a call allocates only its output.
    """

    def __init__(self, n: int, compiled: bool, team=None):
        self.n = int(n)
        self.team = team
        radices = _radices(self.n // 2) if self.n % 2 == 0 else None
        self.compiled = bool(compiled) and _kernels is not None and radices is not None
        if not self.compiled:
            return
        m, twiddles, length = self.n // 2, [], self.n // 2
        for p in radices:  # each stage's table W_L^(q k), q < L / p, k = 1 .. p - 1
            q, k = np.arange(length // p)[:, None], np.arange(1, p)[None, :]
            twiddles.append(np.exp(-2j * np.pi * q * k / length).ravel())
            length //= p
        twiddles.append(np.exp(-2j * np.pi * np.arange(m + 1) / self.n))  # the real split's W_n^k
        self._radices = np.array(radices, np.int32)
        self._twiddles = np.concatenate(twiddles).astype(np.complex64)
        parts = 1 if team is None else team.threads
        self._scratch = np.empty(4 * m * _KERNEL_COLUMNS * parts, np.float32)  # one per thread

    def __call__(self, frame: np.ndarray) -> np.ndarray:
        """Spectrum ``(n // 2 + 1, columns)`` complex64 of ``frame`` ``(n, columns)`` float32, C order."""
        # The compiled loop reads raw float32 memory: anything else would be misread, not converted.
        if not (isinstance(frame, np.ndarray) and frame.dtype == np.float32 and frame.ndim == 2
                and frame.flags.c_contiguous and frame.shape[0] == self.n):
            raise ValueError(f"frame: expected a C-contiguous float32 array of shape ({self.n}, columns), got "
                             f"{getattr(frame, 'dtype', type(frame).__name__)} "
                             f"{getattr(frame, 'shape', '')}{'' if getattr(frame, 'flags', None) is None or frame.flags.c_contiguous else ' (not C-contiguous)'}")
        if self.compiled:
            out = cache_aligned((self.n // 2 + 1, frame.shape[1]), np.complex64)
            _kernels.rfft(frame, frame.shape[1], frame.shape[1], self.n, self._radices, self._twiddles,
                          self._scratch, out, self.team)
            return out
        if _PFFT is None:
            return sfft.rfft(frame, axis=0)
        return _PFFT.r2c(frame, (0,), True, 0, None, 1)


def cache_aligned(shape: tuple, dtype, zero: bool = False) -> np.ndarray:
    """An array (empty, or zeros) starting on a 64-byte cache line.

    The threads of a team write neighbouring column groups of each row of
    the history and of the spectra; on a line shared by two of them every
    write bounces the line between cores (measured here, 2026-12-05: the
    two-thread FFT three times slower than one thread on a misaligned output).
    """
    dtype = np.dtype(dtype)
    n = 1
    for s in shape:
        n *= int(s)
    raw = (np.zeros if zero else np.empty)(n + 64 // dtype.itemsize, dtype)
    skip = (-raw.__array_interface__["data"][0] % 64) // dtype.itemsize
    return raw[skip:skip + n].reshape(shape)


def irfft_columns(spec: np.ndarray, n: int) -> np.ndarray:
    """Inverse real FFT of every column of ``spec`` (n // 2 + 1, columns) to (n, columns): frames
    down the first axis, the layout of the audio output (no transposed copy afterwards)."""
    if _PFFT is None:
        return sfft.irfft(spec, n=n, axis=0)
    return _PFFT.c2r(spec, (0,), n, False, 2, None, 1)
