"""The rows the engine's history holds: sensor signals, or sums and differences of mirror pairs.

For an array symmetric through its phase centre, sums and differences of
mirror pairs let every symmetric beam be steered by real products of half
the size (Van Trees 2002, §2.2: a symmetric array's response is real about
its phase centre).
"""

from __future__ import annotations

import numpy as np

from .geometry import ArrayGeometry

#: Fewest sensors for which the mirror-pair rows pay for their extra pass over each block.
_PAIR_BASIS_MIN_SENSORS = 48


def mirror_pair_rows_for(geometry: ArrayGeometry) -> bool:
    """Whether a delay-and-sum engine for ``geometry`` holds mirror-pair rows (see :class:`_Basis`)."""
    return _Basis(geometry).pairs is not None


class _Basis:
    """The rows the history buffer holds: sensor signals, or sums and
    differences of mirror pairs.

    For an array symmetric through its phase centre (every sensor has a
    mirror image with the same gain and opposite trim) the rows are
    ``x_a + x_b`` for every pair (a centre sensor alone: ``x_c``) followed by
    ``x_a - x_b`` for every pair of two sensors. Forming them in the time
    domain costs one pass over the block and lets every symmetric beam be
    steered by real products of half the size (:func:`_paired`); any other
    beam is steered in the same rows by :meth:`transform`.
    """

    def __init__(self, geometry: ArrayGeometry, allow_pairs: bool = True):
        channels = geometry.active_channel_index
        pairs = _mirror_pairs(geometry.centred_positions_m, geometry.active_gain, geometry.active_trim_s)
        if len(channels) < _PAIR_BASIS_MIN_SENSORS or not allow_pairs:
            pairs = None
        self.pairs = pairs
        # Every input channel feeds an active sensor, in order: a view, no gather. Channels past the
        # configured inputs (a wider sound card) are not read.
        n_inputs = geometry.n_input_channels
        self._cols = slice(0, n_inputs) if np.array_equal(channels, np.arange(n_inputs)) else channels
        if pairs is None:
            self.n_rows = self.n_sums = len(channels)
            self.kernel_rows = _typed_rows(channels, channels, np.ones(len(channels)), np.zeros(len(channels)))
            return
        pa, pb = pairs
        two = pa != pb
        self.n_sums, self.n_rows = len(pa), len(pa) + int(two.sum())
        # Row indices into the active sensors; slices where they run in steps of one (a line array).
        self._sa, self._sb = _as_index(pa), _as_index(pb)
        self._da, self._db = _as_index(pa[two]), _as_index(pb[two])
        self._centre = np.nonzero(~two)[0]
        half = np.where(two, 1.0, 0.5)  # a centre sensor's row is x_c = (x_c + x_c) / 2
        self.kernel_rows = _typed_rows(channels[np.concatenate([pa, pa[two]])],
                                       channels[np.concatenate([pb, pb[two]])],
                                       np.concatenate([half, np.ones(int(two.sum()))]),
                                       np.concatenate([half, -np.ones(int(two.sum()))]))

    def write(self, out: np.ndarray, chunk: np.ndarray) -> None:
        """History ``out`` (frames, n_rows), one row per column, from input frames ``chunk`` (frames, channels)."""
        self.from_sensors(chunk[:, self._cols], out)

    def from_sensors(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """The active sensors' signals ``x`` (frames, sensors) as history rows (frames, n_rows), into
        ``out`` when given: the inverse of :meth:`to_sensors`."""
        out = np.empty((len(x), self.n_rows), x.dtype) if out is None else out
        if self.pairs is None:
            out[:] = x
            return out
        sums = out[:, :self.n_sums]
        np.add(x[:, self._sa], x[:, self._sb], out=sums)
        if len(self._centre):
            sums[:, self._centre] *= 0.5
        np.subtract(x[:, self._da], x[:, self._db], out=out[:, self.n_sums:])
        return out

    def to_sensors(self, rows: np.ndarray) -> np.ndarray:
        """History rows (frames, n_rows) back to the active sensors' signals (frames, sensors): the
        inverse of :meth:`write` (``x_a = (s + d) / 2``, ``x_b = (s - d) / 2``; a centre sensor's row
        is its signal)."""
        if self.pairs is None:
            return np.array(rows)
        pa, pb = self.pairs
        two = pa != pb
        s, d = rows[:, :self.n_sums], rows[:, self.n_sums:]
        out = np.empty((len(rows), len(pa) + int(two.sum())), rows.dtype)
        out[:, pa[two]] = 0.5 * (s[:, two] + d)
        out[:, pb[two]] = 0.5 * (s[:, two] - d)
        out[:, pa[~two]] = s[:, ~two]
        return out

    def transform(self, h: np.ndarray) -> np.ndarray:
        """Steering (..., sensors) on sensor signals -> the same sum on the rows."""
        if self.pairs is None:
            return h
        pa, pb = self.pairs
        # x_a = (s + d) / 2 and x_b = (s - d) / 2 for a pair; x_c = s for a centre sensor (a = b).
        return np.concatenate([0.5 * (h[..., pa] + h[..., pb]), 0.5 * (h[..., self._da] - h[..., self._db])], axis=-1)


def _typed_rows(ia, ib, ca, cb) -> tuple:
    """(ia, ib, ca, cb): row r = ca[r] x[:, ia[r]] + cb[r] x[:, ib[r]] in input channels, typed for the
    compiled write (``_kernels.rows``)."""
    return (np.ascontiguousarray(ia, np.int32), np.ascontiguousarray(ib, np.int32),
            np.ascontiguousarray(ca, np.float32), np.ascontiguousarray(cb, np.float32))


def _mirror_pairs(pos: np.ndarray, gain: np.ndarray, trims: np.ndarray):
    """Index arrays (a, b) pairing each sensor with its mirror image through the
    phase centre (same gain, opposite trim), or None when the array has no such
    symmetry. A sensor at the centre pairs with itself."""
    scale = max(float(np.max(np.abs(pos))), 1e-9)
    dist = np.linalg.norm(pos[:, None, :] + pos[None, :, :], axis=-1)
    partner = np.argmin(dist, axis=1)
    m = np.arange(len(pos))
    if (len(pos) < 2 or np.any(dist[m, partner] > 1e-9 * scale) or np.any(partner[partner] != m)
            or not np.allclose(gain, gain[partner], rtol=1e-12, atol=0.0)
            or np.any(np.abs(trims + trims[partner]) > 1e-15)):
        return None
    keep = m <= partner
    return m[keep], partner[keep]


def _as_index(idx: np.ndarray):
    """A slice equal to the index array ``idx`` when it runs in steps of +1 or -1, else ``idx``."""
    if len(idx) > 1 and np.all(np.diff(idx) == idx[1] - idx[0]) and abs(int(idx[1] - idx[0])) == 1:
        step = int(idx[1] - idx[0])
        stop = int(idx[-1]) + step
        return slice(int(idx[0]), None if stop < 0 else stop, step)
    return idx


def _paired(h: np.ndarray, pairs, bulk_delay: int, n_fft: int, bins: np.ndarray) -> np.ndarray:
    """Real matrices for mirror pairs (Van Trees 2002, §2.2: a symmetric array's
    beam pattern is real about its phase centre).

    With ``H_b = exp(-j w 2D) conj(H_a)`` for mirror sensors, the pair's term is
    ``exp(-j w D) [R (x_a + x_b) + j I (x_a - x_b)]`` (spectra) where ``R + jI
    = exp(j w D) H_a``: two real products of half the size instead of one
    complex one. Returns ``[R | I]`` for the rows of :class:`_Basis`, float32,
    shape (bins, beams, rows); the factor ``exp(-j w D)`` is left to the caller.
    """
    pa, pb = pairs
    omega = 2.0 * np.pi * np.asarray(bins) / n_fft
    q = h[:, :, pa] * np.exp(1j * omega * bulk_delay)[:, None, None]
    return np.ascontiguousarray(np.concatenate([q.real, q.imag[:, :, pa != pb]], axis=2), dtype=np.float32)
