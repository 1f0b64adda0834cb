"""The streaming engine with minimum-variance (MVDR) beams: delay-and-sum steering remade from
loaded MVDR weights (:mod:`.adaptive`) every ``update_s``.

Each frame's channel spectra (the engine's own FFT) update the averaged
cross-spectral matrices on the adaptive bins. Every ``update_s`` of stream
the power and audio steering on those bins is rebuilt from the MVDR weights
and handed to the engine at the block boundary, like a retarget: power
blocks pending are formed with the weights they were recorded under, audio
crossfades over 10 ms. Outside the adaptive band the steering stays
delay-and-sum.

The weights are scaled so that a plane wave from the look direction comes
out exactly as through the delay-and-sum steering (same bulk delay D, gain
one): with ``a`` the look direction's manifold and ``g = sum(h_das a)`` the
delay-and-sum response (``exp(-j w D)`` up to the fractional-delay
filter's ripple), the steering is ``h = g conj(w)``, ``w^H a = 1``.

The service, ``process`` and ``pattern`` build it through :func:`engine_for`
(``[beams] method = "mvdr"``); tests in tests/test_mvdr.py.
"""

from __future__ import annotations

import numpy as np

from .adaptive import AdaptiveSettings, CrossSpectra, loaded_factors, noise_power, weights_from_factors
from .beamformer import Beamformer, BlockResult, _concat_results
from .cost import mvdr_slices

__all__ = ["AdaptiveBeamformer", "AdaptiveSettings", "engine_for"]

#: Weight updates between two estimates of a bin's noise floor under the loading.
_NOISE_EVERY = 4


class AdaptiveBeamformer:
    """MVDR power and audio beams over a delay-and-sum :class:`Beamformer` built with ``pair_rows=False``.

    Parameters
    ----------
    engine : Beamformer
    settings : AdaptiveSettings

    Attributes
    ----------
    fallback_bins : int
        Bins given delay-and-sum weights so far (a covariance not finite or
        not positive definite).
    updates : int
        Weight updates applied so far.
    """

    def __init__(self, engine: Beamformer, settings: AdaptiveSettings = AdaptiveSettings()):
        if engine.mirror_pair_rows:
            raise ValueError("method mvdr needs one history row per sensor; this engine holds mirror-pair rows "
                             "(start the service with [beams] method = \"mvdr\" for this array)")
        need = settings.min_frame_samples(engine.samplerate_hz)
        if engine.fft_size < need:
            raise ValueError(f"resolution_hz={settings.resolution_hz!r} needs frames of {need} samples, this engine's "
                             f"are {engine.fft_size}: build it with BeamSet(method=\"mvdr\", adaptive=settings)")
        self.engine, self.settings = engine, settings
        self.fallback_bins = 0
        self.updates = 0
        self.cross, self._cross_bins = None, None
        self.rebuild()

    def __getattr__(self, name):
        # everything else is the engine's (bulk delay, beams, flush, reset, prepare, apply, ...)
        if name == "engine":  # not set yet (copying, unpickling): no recursion
            raise AttributeError(name)
        return getattr(self.engine, name)

    @property
    def method(self) -> str:
        return "mvdr"

    def __enter__(self) -> "AdaptiveBeamformer":
        return self

    def __exit__(self, *exc) -> None:
        self.engine.close()

    def status(self) -> dict:
        """What the service reports of the adaptive stage."""
        return {"method": "mvdr", **self.settings.as_dict(), "weight_updates": self.updates,
                "fallback_bins": self.fallback_bins, "adaptive_bins": int(len(self.bins)),
                "bin_hz": self.engine.samplerate_hz / self._n_fft}

    def rebuild(self) -> None:
        """Set up for the engine's current (delay-and-sum) steering: after a retarget, the new beams'
        steering, manifolds and responses; the averaged cross-spectra are kept when the adaptive
        bins are the same (the scene has not changed), else started afresh."""
        engine, settings = self.engine, self.settings
        base, n_fft = engine._steer
        self._base, self._n_fft = base, n_fft
        fs = engine.samplerate_hz
        bins_hz = np.arange(n_fft // 2 + 1) * fs / n_fft
        # The issue's default: the span of the power bands. Their filters' transition skirts then
        # keep delay-and-sum weights, and a loud source leaks through them at its delay-and-sum
        # sidelobe level: give band_hz over the skirts too where that matters (README; measured
        # 2026-12-05: MVDR power beside a source 10 dB above its neighbour then depends on the block
        # size by 1.15 dB instead of 4.5 dB; the updates cost about 1.5 times as much).
        lo, hi = settings.band_hz or (min(b[0] for b in base.beams.bands_hz), max(b[1] for b in base.beams.bands_hz))
        if not 0.0 < lo < hi <= fs / 2:
            raise ValueError(f"band_hz={settings.band_hz!r}: expected 0 < low < high <= {fs / 2:g} Hz")
        self.bins = np.nonzero((bins_hz >= lo) & (bins_hz <= hi))[0]  # the adaptive bins
        if not len(self.bins):
            raise ValueError(f"band_hz=({lo:g}, {hi:g}): no FFT bin in it at {fs:g} Hz and {n_fft} points")
        n_sensors = engine._basis.n_rows
        if self.cross is None or self.cross.n_bins != len(self.bins) or self._cross_bins is None or \
                not np.array_equal(self._cross_bins, self.bins):
            self.cross = CrossSpectra(len(self.bins), n_sensors, settings.average_s, engine.block_frames / fs)
            self._cross_bins = self.bins
            self._noise = np.full(len(self.bins), np.nan)  # per adaptive bin, estimated as updates go
        beams = base.beams
        # Power: the power bins that adapt, their delay-and-sum steering, manifold and response.
        p_bins = base.power_bins
        self._p_sel = np.nonzero(np.isin(p_bins, self.bins))[0]
        self._p_in_a = np.searchsorted(self.bins, p_bins[self._p_sel])
        self._a_to_p = np.full(len(self.bins), -1)  # adaptive bin -> its row among the power bins that adapt
        self._a_to_p[self._p_in_a] = np.arange(len(self._p_sel))
        h_das, _, _ = base.das_steering(beams.power_deg, p_bins[self._p_sel])
        self._p_a = base.manifold(beams.power_deg, p_bins[self._p_sel])
        self._p_g = np.einsum("kbm,kbm->kb", h_das, self._p_a).astype(np.complex64)  # steering is float32
        self._audio = len(beams.audio_deg) > 0
        if self._audio:
            h_das, _, _ = base.das_steering(beams.audio_deg, self.bins)
            self._a_a = base.manifold(beams.audio_deg, self.bins)
            self._a_g = np.einsum("kbm,kbm->kb", h_das, self._a_a).astype(np.complex64)
        self._update_frames = max(1, int(round(settings.update_s * fs)))
        self._since = 0
        self._cycle = None  # an update in progress (see process)
        # Two steerings of our own, applied in turn: an update writes its bins into the one the
        # engine is not using, slice by slice, so no block copies or repacks the whole steering
        # (5 MB per plane for 64 sensors and 181 beams).
        self._spares = [base.own_copy(), base.own_copy()]
        engine.on_spectra = self._observe

    def _observe(self, spec: np.ndarray) -> None:
        """One frame's channel spectra (the engine calls this): into the averaged cross-spectra."""
        self.cross.update(spec[self.bins])

    def process(self, block: np.ndarray) -> BlockResult:
        """Beamform one block (as :meth:`Beamformer.process`).

        Every ``update_s`` a weight update starts; its work is spread over
        about three quarters of the update period's blocks, a slice of the
        adaptive bins per block, each solved from its bins' averaged
        cross-spectra of that block (so no block carries the whole of it),
        and the new steering takes effect at the end of the block that
        finishes it.
        """
        out = self.engine.process(block)
        self._since += len(block)
        if self._cycle is None and self._since >= self._update_frames:
            self._since = 0
            self._start_cycle()
        if self._cycle is None or not self._work_slice():
            return out
        released = self.engine.apply((self._cycle.pop("steering"), self._n_fft))
        self._cycle = None
        self.updates += 1
        if not len(released.power_first_sample):
            return out
        rows = _concat_results([(out.power_db, out.power_first_sample),
                                (released.power_db, released.power_first_sample)],
                               out.power_db.shape[1], out.power_db.shape[2])
        return BlockResult(out.first_sample, out.audio, rows[0], rows[1], out.nan_count, out.clip_count)

    def _start_cycle(self) -> None:
        n_bins = len(self.bins)
        blocks = mvdr_slices(n_bins, self.cross.n_sensors, len(self._p_sel), self.engine.beams.power_deg.shape[0],
                             len(self.engine.beams.audio_deg), self._update_frames, self.engine.block_frames)
        target = self._spares[0]
        engine = self.engine
        if target is engine._steer[0] or (engine._fade_from is not None and engine._fade_from[0] is target):
            # still in use (a crossfade longer than an update period): a fresh copy this time
            target = self._spares[0] = self._base.own_copy()
        self._cycle = {
            "slices": np.array_split(np.arange(n_bins), blocks), "next": 0,
            "steering": target,
        }

    def _work_slice(self) -> bool:
        """The next slice of the adaptive bins of the update in progress (their loaded factors,
        and the power and audio weights written into the steering being made); True when the
        steering is ready to apply."""
        c = self._cycle
        self._solve_slice(c["slices"][c["next"]])
        c["next"] += 1
        if c["next"] < len(c["slices"]):
            return False
        self._spares.reverse()  # the other one is written next time
        return True

    def _solve_slice(self, idx: np.ndarray) -> None:
        """Loaded factors and weights on adaptive bins ``idx``; the noise floor under the loading
        (eigenvalues, the costliest part for many sensors; it moves slowly) every fourth update."""
        c = self._cycle
        # Each slice is solved from its bins' averages as they are now (a copy of these bins only:
        # a snapshot of every bin at the update's start cost a 4 MB copy in one block, 64 sensors).
        r = self.cross.of(idx)
        # A quarter of the bins refresh their noise floor each update (each bin every fourth), so
        # every slice carries the same share of eigenvalue work; bins with none yet get one now.
        due = (idx % _NOISE_EVERY == self.updates % _NOISE_EVERY) | np.isnan(self._noise[idx])
        if due.any():
            finite = np.isfinite(r[due]).all(axis=(1, 2))
            noise = np.zeros(int(due.sum()))
            noise[finite] = noise_power(r[due][finite])
            self._noise[idx[due]] = noise
        linv, fallback = loaded_factors(r, self.settings.loading_db, self._noise[idx])
        in_power = self._a_to_p[idx]
        sel = np.nonzero(in_power >= 0)[0]
        steering = c["steering"]
        if len(sel):
            rows = in_power[sel]
            w, fb = weights_from_factors(linv[sel], fallback[sel], self._p_a[rows], np.complex64)
            steering.power.set_bins(self._p_sel[rows], self._p_g[rows][..., None] * np.conj(w))
            self.fallback_bins += int(fb.sum())
        if self._audio:
            w, fb = weights_from_factors(linv, fallback, self._a_a[idx], np.complex64)
            steering.audio.set_bins(self.bins[idx], self._a_g[idx][..., None] * np.conj(w))
            self.fallback_bins += int(fb.sum())


def wants_pair_rows(beams) -> bool:
    """Whether ``beams`` may run on mirror-pair rows: delay-and-sum may (where the array allows),
    MVDR beams need one history row per sensor."""
    return beams.method != "mvdr"


def base_engine(engine) -> Beamformer:
    """The delay-and-sum :class:`Beamformer` under ``engine`` (itself, or what MVDR beams are formed over)."""
    return engine.engine if isinstance(engine, AdaptiveBeamformer) else engine


def engine_for(make, beams, current=None):
    """The engine for ``beams``: a :class:`Beamformer`, wrapped for ``method="mvdr"``.

    ``make(pair_rows)`` builds a new :class:`Beamformer` for ``beams``. With
    ``current`` (an engine already running another beam set) nothing is
    built: the caller retargets ``current`` and this returns it, wrapped or
    unwrapped as ``beams.method`` asks (the history, and so the stream, goes
    on). A running engine whose history holds mirror-pair rows cannot take
    MVDR beams: :class:`ValueError` says so.
    """
    if current is None:
        engine = make(wants_pair_rows(beams))
        return AdaptiveBeamformer(engine, beams.adaptive) if beams.method == "mvdr" else engine
    base = base_engine(current)
    if beams.method != "mvdr":
        base.on_spectra = None
        return base
    if isinstance(current, AdaptiveBeamformer) and current.settings == beams.adaptive:
        current.rebuild()
        return current
    return AdaptiveBeamformer(base, beams.adaptive)
