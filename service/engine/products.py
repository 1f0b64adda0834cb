"""The steered sums ``Y[j, b, k] = sum_m H[k, b, m] X[j, m, k]``: the compiled loop, or numpy in two ways."""

from __future__ import annotations

import numpy as np

from .basis import _Basis, _paired

try:  # the compiled inner loops (service/engine/_kernels.c); numpy forms the same sums without them
    from . import _kernels
    KERNELS_MISSING = None
except ImportError as _exc:  # pragma: no cover - exercised by installs without a C compiler
    _kernels = None
    #: Why the compiled kernels are not there (one line), or None when they are.
    KERNELS_MISSING = (f"the compiled kernels are not installed ({_exc}); numpy forms the same sums more slowly "
                       "(measured 2026-12-03: RTF 72 instead of 140 for 16 sensors, 20 instead of 33 for 64); "
                       "reinstall beamtap with a C compiler (gcc or clang) and Python's headers, see DEVELOPERS.md")


#: True when the compiled inner loops are installed (see DEVELOPERS.md, "The compiled kernels").
COMPILED_AVAILABLE = _kernels is not None

#: Largest audio beams × sensors product formed element-wise rather than by matrix products.
_ELEMENTWISE_MAX = 128
#: Beams per vector of the compiled loop for the power fans (LANES in _kernels.c; half for a
#: few audio beams).
_KERNEL_LANES = 8


def need(arr, dtype, name: str) -> None:
    """The compiled loops read raw memory: refuse (not misread) an array of another dtype or layout."""
    if not (isinstance(arr, np.ndarray) and arr.dtype == dtype and arr.flags.c_contiguous):
        raise ValueError(f"{name}: expected a C-contiguous {np.dtype(dtype).name} array, got "
                         f"{getattr(arr, 'dtype', type(arr).__name__)}"
                         f"{'' if not isinstance(arr, np.ndarray) or arr.flags.c_contiguous else ' (not C-contiguous)'}")


class _BeamProduct:
    """Steered spectra ``Y[j, b, k] = sum_m H[k, b, m] X[j, m, k]`` of a set of beams on given bins,
    for blocks ``j``, from the spectra of the history rows (:class:`_Basis`).

    For beams symmetric about the phase centre of a symmetric array the
    steering is real and half the size (:func:`_paired`); otherwise it is
    complex. The sum is formed by the compiled loop when it is installed
    (``compiled``), which reads the steering once for up to four blocks and
    works in the spectra's own layout; without it by numpy, in one of two
    ways chosen from the shapes (measured in bench/): an element-wise product
    for few beams × sensors, or one small matrix product per bin.

    ``__call__`` returns ``(Y, lag)``: in the real form the common factor
    ``exp(-j w D)`` is left out, so the true output is ``Y`` delayed by
    ``lag`` whole samples (a circular shift of the frame for audio; for power
    the band-power factor absorbs it, see
    :meth:`bandpower.BandPowerEvaluator.delayed`).
    """

    def __init__(self, h: np.ndarray, basis: _Basis, symmetric: bool, bulk_delay: int, n_fft: int,
                 bins: np.ndarray, compiled: bool, team=None):
        n_bins, n_beams, n_sensors = h.shape
        self.n_beams, self.first_bin, self.n_bins = n_beams, int(bins[0]), n_bins
        self.real_form, self.lag = bool(symmetric), bulk_delay if symmetric else 0
        self.n_plain = basis.n_sums if symmetric else basis.n_rows
        self.compiled, self.elementwise = bool(compiled), False
        self.team = team  # threads that share the compiled loop's bins (None: the caller's alone)
        q = _paired(h, basis.pairs, bulk_delay, n_fft, bins) if symmetric else basis.transform(h)
        if self.compiled:
            # Beams formed in the loop; a mirror image comes out of its partner's pass.
            self.main_out, self.mirror_out = _mirror_beams(q, basis.n_sums) if symmetric else (
                np.arange(n_beams, dtype=np.int32), np.full(n_beams, -1, np.int32))
            q, formed = q[:, self.main_out], len(self.main_out)
            # (beam groups, bins, rows, beams of the group), real and imaginary planes
            # Few formed beams (the audio beams) go in 4-wide groups: half the padding, and half the
            # steering streamed every block (measured in bench/: the loop waits on the cache there).
            self.lanes = _KERNEL_LANES if formed > _KERNEL_LANES // 2 else _KERNEL_LANES // 2
            groups = -(-formed // self.lanes)
            planes = [np.pad(part, ((0, 0), (0, groups * self.lanes - formed), (0, 0)))
                      .reshape(n_bins, groups, self.lanes, -1).transpose(1, 0, 3, 2)
                      for part in ((q,) if symmetric else (q.real, q.imag))]
            self.h = [np.ascontiguousarray(part, dtype=np.float32) for part in planes]
        elif n_beams * n_sensors <= _ELEMENTWISE_MAX and not symmetric:
            self.h, self.elementwise = [np.ascontiguousarray(q)], True
        else:
            self.h = [np.ascontiguousarray(q, dtype=np.float32 if symmetric else np.complex64)]

    def own_copy(self) -> "_BeamProduct":
        """A copy holding steering arrays of its own, for :meth:`set_bins` to change."""
        out = object.__new__(_BeamProduct)
        out.__dict__.update(self.__dict__)
        out.h = [part.copy() for part in self.h]
        return out

    def set_bins(self, rel_bins: np.ndarray, h: np.ndarray) -> None:
        """Replace, in place, the steering on ``rel_bins`` (indices into this product's bins) by
        ``h`` (len(rel_bins), beams, sensors), sensor rows only; a fraction of the cost of packing
        every bin again. Only for a product no engine is using (see :meth:`own_copy`)."""
        if self.real_form:
            raise ValueError("set_bins: a mirror-pair (real) product cannot take complex steering")
        if self.compiled:
            formed = len(self.main_out)
            groups = self.h[0].shape[0]
            q = np.pad(h[:, self.main_out], ((0, 0), (0, groups * self.lanes - formed), (0, 0)))
            q = q.reshape(len(rel_bins), groups, self.lanes, -1).transpose(1, 0, 3, 2)
            self.h[0][:, rel_bins] = q.real
            self.h[1][:, rel_bins] = q.imag
        else:
            self.h[0][rel_bins] = h

    @property
    def nbytes(self) -> int:
        return sum(part.nbytes for part in self.h)

    def __call__(self, spec: np.ndarray, offset: int = 0) -> tuple:
        """Steered spectra (blocks, beams, bins) and their lag from row spectra
        ``spec`` (blocks, n, rows), complex64, C order, whose ``spec[:, i]``
        is bin ``offset + i``."""
        if self.compiled:
            y = self._compiled_sums(_kernels.steer, spec, offset)[0]
            return y, self.lag
        return self._numpy_sums(spec, offset)

    def start(self, spec: np.ndarray, offset: int = 0) -> tuple:
        """As ``__call__``, but handed to the team's helpers, returning at once:
        ``(Y, lag, call)``, where ``Y`` is ready after ``call.join()``.

        The calling thread is free meanwhile for work outside the team (the
        audio's inverse FFT): a team call it makes first ends this one. Without
        helpers the sums are formed here and ``call`` is already done.
        """
        if self.compiled and self.team is not None:
            y, call = self._compiled_sums(_kernels.steer_start, spec, offset)
            return y, self.lag, call
        y, lag = self(spec, offset)
        return y, lag, _DONE

    def _compiled_sums(self, kernel, spec: np.ndarray, offset: int) -> tuple:
        need(spec, np.complex64, "spec")
        n_blocks, width, n_rows = spec.shape
        y = np.empty((n_blocks, self.n_beams, self.n_bins), np.complex64)
        call = kernel(self.h[0], self.h[1] if len(self.h) > 1 else None, spec, n_blocks, width,
                      self.first_bin - offset, self.n_bins, n_rows, self.n_plain, len(self.main_out),
                      self.main_out, self.mirror_out, self.n_beams, y, self.lanes, self.team)
        return y, call

    def _numpy_sums(self, spec: np.ndarray, offset: int) -> tuple:
        k0 = self.first_bin - offset
        n_blocks, width, n_rows = spec.shape
        band = spec[:, k0:k0 + self.n_bins]
        if self.elementwise:  # h: (bins, beams, rows)
            return (self.h[0][None] * band[:, :, None, :]).sum(axis=3).transpose(0, 2, 1), 0
        v = band.transpose(1, 2, 0).copy()  # (bins, rows, blocks), a copy: turned in place below
        if not self.real_form:
            return np.matmul(self.h[0], v).transpose(2, 1, 0), 0
        v[:, self.n_plain:] *= np.complex64(1j)
        n_bins, _, k = v.shape
        y = np.matmul(self.h[0], v.view(np.float32).reshape(n_bins, n_rows, 2 * k))
        return y.view(np.complex64).transpose(2, 1, 0), self.lag


class _Done:
    """A finished call (no helpers): joining it does nothing."""

    @staticmethod
    def join() -> None:
        return None


_DONE = _Done()


def _mirror_beams(q: np.ndarray, n_sums: int) -> tuple:
    """Beams to form, and the mirror image each one also gives, from real pair-row steering.

    On mirror-pair rows, the beam steered to the mirror image of a direction
    (each sensor's delay that of its mirror sensor, e.g. azimuth θ and 180° − θ
    on a line) has the same sum-row steering and the difference-row steering
    negated. Returns int32 arrays ``(main, mirror)``: beam ``main[i]`` is
    formed, and ``mirror[i]`` (or -1) is its image.
    """
    n_beams = q.shape[1]
    s, d = q[:, :, :n_sums], q[:, :, n_sums:]
    tol = 1e-6 * (float(np.max(np.abs(q))) or 1.0)
    partner = np.full(n_beams, -1)
    if d.shape[2]:
        # Candidates: beams whose sum rows at one bin project to nearly the same number
        # (sorted, so the search stays O(n log n) for large beam sets); then the full check.
        key = s[len(s) // 2].reshape(n_beams, -1) @ np.random.default_rng(0).standard_normal(s.shape[2])
        order = np.argsort(key)
        spread = tol * np.sqrt(s.shape[2]) * 4.0
        for b in range(n_beams):
            if partner[b] >= 0 or np.max(np.abs(d[:, b])) <= tol:  # no difference part: its own image
                continue
            lo, hi = np.searchsorted(key[order], [key[b] - spread, key[b] + spread])
            for c in order[lo:hi]:
                if (c != b and partner[c] < 0 and np.max(np.abs(s[:, c] - s[:, b])) <= tol
                        and np.max(np.abs(d[:, c] + d[:, b])) <= tol):
                    partner[b], partner[c] = c, b
                    break
    main = [b for b in range(n_beams) if partner[b] < 0 or b < partner[b]]
    return np.array(main, np.int32), np.array([partner[b] for b in main], np.int32)
