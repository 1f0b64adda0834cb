"""The streaming delay-and-sum beamformer.

Method: frequency-domain overlap-save with exact linear convolution. Every
block, each active channel's last ``N`` samples (``N >= block + 2D + band
filter - 1``) are transformed once; the same spectra serve the audio beams
(full band, every frame) and the power fan (band bins only, one product per
bin for a batch of power blocks). The steering filters are the
Kaiser-windowed-sinc fractional delays of :mod:`.fracdelay`, weighted by
shading and calibration gain; their DFTs are computed once per beam set, so
the output is exactly the time-domain delay-and-sum of those FIR filters
(to float32 rounding), whatever the block size. For large arrays symmetric
through their phase centre the history holds sums and differences of mirror
pairs instead of the sensor signals, so that symmetric beams are steered by
real products of half the size (:class:`_Basis`, :func:`_paired`).

References
----------
A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal Processing, 3rd ed.
(2010), §8.7.3, overlap-save block convolution.
H. L. Van Trees, Optimum Array Processing (2002), §2.2, delay-and-sum
beamformer.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from . import cost, shading, steering
from .adaptive import AdaptiveSettings
from .basis import _Basis
from .geometry import ArrayGeometry
from .products import COMPILED_AVAILABLE, KERNELS_MISSING, _kernels, need
from .steerdata import _Steering
from .transform import cache_aligned, irfft_columns

__all__ = ["COMPILED_AVAILABLE", "KERNELS_MISSING", "BeamSet", "Beamformer", "BlockResult", "EngineState", "sanitize"]

#: Input samples beyond this (a million times full scale) are held at it: their power would
#: overflow float32 on its way through the band power.
INPUT_LIMIT = 1e6
#: Beamforming methods: delay-and-sum, minimum variance distortionless response.
METHODS = ("das", "mvdr")
#: Most threads one engine uses (the compiled team's limit).
MAX_THREADS = 64
#: Default audio crossfade after a retarget, seconds.
CROSSFADE_S = 0.010


@dataclass(frozen=True)
class BeamSet:
    """What the engine forms: power beams, audio beams, shading, bands.

    Parameters
    ----------
    power_deg : ndarray, shape (n_beams, 2)
        (azimuth_deg, elevation_deg) of every power beam.
    audio_deg : ndarray, shape (n_audio, 2)
        Directions whose full-band audio is produced (may be empty).
    shading : str
        One of :data:`beamtap.service.engine.shading.SHADINGS`.
    sidelobe_db : float
        Sidelobe level for Chebyshev and Taylor, positive dB.
    nbar : int
        Taylor n-bar.
    bands_hz : tuple of (low, high)
        Power bands, Hz; at least one.
    transition_hz : float or None
        Band filter transition width (None: automatic).
    method : {"das", "mvdr"}
        Delay-and-sum (this engine), or minimum-variance beams formed by
        :class:`~beamtap.service.engine.mvdr.AdaptiveBeamformer` over it
        (:func:`~beamtap.service.engine.mvdr.engine_for` builds either).
    adaptive : AdaptiveSettings
        The MVDR settings (used with ``method="mvdr"``).
    """

    power_deg: np.ndarray
    audio_deg: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    shading: str = "uniform"
    sidelobe_db: float = 30.0
    nbar: int = 4
    bands_hz: tuple = ((500.0, 1500.0),)
    transition_hz: float | None = None
    method: str = "das"
    adaptive: AdaptiveSettings = field(default_factory=AdaptiveSettings)

    def __post_init__(self):
        for name in ("power_deg", "audio_deg"):
            value = np.asarray(getattr(self, name), dtype=np.float64).reshape(-1, 2)
            object.__setattr__(self, name, value)
        object.__setattr__(self, "bands_hz", tuple((float(a), float(b)) for a, b in self.bands_hz))
        if len(self.power_deg) == 0:
            raise ValueError("power_deg: at least one power beam is needed")
        if len(self.bands_hz) == 0:
            raise ValueError("bands_hz: at least one band is needed")
        if self.shading not in shading.SHADINGS:
            raise ValueError(f"shading={self.shading!r}: expected one of {', '.join(shading.SHADINGS)}")
        if self.method not in METHODS:
            raise ValueError(f"method={self.method!r}: expected one of {', '.join(METHODS)}")


@dataclass(frozen=True)
class EngineState:
    """What a :class:`Beamformer` needs to continue a stream exactly (see :meth:`Beamformer.state`).

    Attributes
    ----------
    next_sample : int
        Stream index of the next input frame.
    power_origin : int
        Stream index the power blocks are aligned to (the start or the last reset).
    n_fft : int
        Frame length.
    history : ndarray of float32, shape (n_fft, rows)
        The last ``n_fft`` frames of the history rows.
    pending_start, pending_spec : tuple
        Power blocks waiting for a full batch: their starts and band spectra.
    """

    next_sample: int
    power_origin: int
    n_fft: int
    history: np.ndarray
    pending_start: tuple = ()
    pending_spec: tuple = ()


@dataclass
class BlockResult:
    """What one call of :meth:`Beamformer.process` returns.

    Attributes
    ----------
    first_sample : int
        Stream index of the block's first frame (input and audio output).
    audio : ndarray of float32, shape (frames, n_audio)
        Audio beams; sample n holds the wavefront that passed the phase
        centre at input sample ``n - bulk_delay_samples``.
    power_db : ndarray of float32, shape (rows, n_bands, n_beams)
        Band power of every power block completed (and released) in this
        call, dB re full scale. Usually one row per block.
    power_first_sample : ndarray of int64, shape (rows,)
        Stream index of the first input sample of the span each power row
        describes: the power block's start less the bulk delay D and the
        longest band filter's delay (:attr:`Beamformer.power_delay_samples`);
        every band of a row describes that same span. Blocks whose span
        would start before the input began (since the start or the last
        :meth:`reset`) give no row.
    nan_count, clip_count : int
        Non-finite samples replaced by zero, and samples with |x| >= 1, in
        this block (all channels).
    """

    first_sample: int
    audio: np.ndarray
    power_db: np.ndarray
    power_first_sample: np.ndarray
    nan_count: int = 0
    clip_count: int = 0


class Beamformer:
    """Causal multi-beam delay-and-sum over blocks of float32 samples.

    Parameters
    ----------
    geometry : ArrayGeometry
    sound_speed_mps : float
    samplerate_hz : float
    block_frames : int
        Power block length (power is reported per block of this many
        frames, aligned to the stream start); also the largest chunk the
        engine transforms at once.
    beams : BeamSet
    power_batch_blocks : int
        Power blocks formed together in one product (>= 1). Each adds one
        block of latency to the power stream only; audio is never delayed
        beyond D.
    crossfade_s : float
        Length of the linear crossfade of audio beams after a retarget.
    compiled : bool or None
        Form the per-bin sums and the history rows with the compiled loops
        (True), with numpy (False), or with the compiled loops when they are
        installed (None, the default). Both give the same output to float32
        rounding.
    threads : int
        Threads that work on each block, the calling thread included
        (default 1; at most 64). The compiled loops split their work (the
        bins of the steered sums, the column groups of the channel FFT, the
        frames of the history write) across them; each thread writes its own
        outputs, so the output is the same bit for bit. Without the compiled
        kernels the engine uses one thread (:attr:`threads` says 1). Helper
        threads spin for 0.3 ms after each call before they sleep, so that
        the several calls of one block hand over quickly; they stop when the
        engine is closed (:meth:`close`, or the engine as a context manager)
        or dropped.
    pair_rows : bool
        Let the history hold sums and differences of mirror pairs where the
        array allows (default). False keeps one row per sensor, as adaptive
        steering needs (see :mod:`.mvdr`).
    spin_s : float
        How long an idle helper spins before it sleeps (default 0.3 ms: the
        calls of one block). A live service whose blocks arrive every few
        milliseconds sets it above the block period, so that helpers are
        awake when a block comes (as OpenMP runtimes do with their block
        time): waking a sleeping thread on a virtual machine costs tens of
        microseconds and its cold cache more. A spinning helper keeps its
        core busy.

    Notes
    -----
    Real-time constraint: :meth:`process` allocates only its outputs and
    per-call temporaries of fixed size; steering data is built by
    :meth:`retarget` (call it off the processing thread via
    :meth:`prepare` and hand over with :meth:`apply` to keep the block
    time flat). More threads shorten the block time while the cores are
    free (bench/engine_bench.py measures it); on a loaded machine they can
    lengthen it, which is why the live service defaults to one.

    Examples
    --------
    >>> import numpy as np
    >>> from beamtap.service.engine import ArrayGeometry, Beamformer
    >>> from beamtap.service.engine.beamformer import BeamSet
    >>> from beamtap.service.engine.directions import fan
    >>> geo = ArrayGeometry.line(16, 0.5)
    >>> bf = Beamformer(geo, 1500.0, 48000.0, 1024,
    ...                 BeamSet(fan(0, 180, 2), [[90, 0]], bands_hz=[(500, 1400)]))
    >>> out = bf.process(np.zeros((1024, 16), np.float32))
    >>> out.audio.shape, out.power_db.shape
    ((1024, 1), (1, 1, 91))
    """

    def __init__(self, geometry: ArrayGeometry, sound_speed_mps: float, samplerate_hz: float,
                 block_frames: int, beams: BeamSet, power_batch_blocks: int = 1,
                 crossfade_s: float = CROSSFADE_S, compiled: bool | None = None, threads: int = 1,
                 spin_s: float = 0.0003, pair_rows: bool = True):
        if block_frames < 1:
            raise ValueError(f"block_frames={block_frames!r}: expected a positive whole number")
        if power_batch_blocks < 1:
            raise ValueError(f"power_batch_blocks={power_batch_blocks!r}: expected >= 1")
        self.geometry = geometry
        self.sound_speed_mps = float(sound_speed_mps)
        self.samplerate_hz = float(samplerate_hz)
        self.block_frames = int(block_frames)
        self.power_batch_blocks = int(power_batch_blocks)
        if compiled and not COMPILED_AVAILABLE:
            raise ValueError("compiled=True: the compiled kernels are not installed (reinstall beamtap with a C compiler)")
        self.compiled = COMPILED_AVAILABLE if compiled is None else bool(compiled)
        if isinstance(threads, bool) or not isinstance(threads, (int, np.integer)) or not 1 <= threads <= MAX_THREADS:
            raise ValueError(f"threads={threads!r}: expected a whole number from 1 to {MAX_THREADS}")
        if not (isinstance(spin_s, (int, float)) and 0.0 <= spin_s <= 10.0):
            raise ValueError(f"spin_s={spin_s!r}: expected 0 to 10 seconds")
        self._team = _kernels.Team(int(threads), float(spin_s)) if self.compiled and threads > 1 else None
        self.crossfade_frames = max(1, int(round(crossfade_s * self.samplerate_hz)))
        self.bulk_delay_samples = steering.bulk_delay_samples(
            geometry.max_steering_delay_s(self.sound_speed_mps), self.samplerate_hz)
        self._basis = _Basis(geometry, allow_pairs=pair_rows)
        #: Called with each frame's channel spectra (n_fft // 2 + 1, rows) as they are formed (an
        #: adaptive stage's cross-spectra are estimated from them); None for nothing.
        self.on_spectra = None
        self._steer = self._build(beams)
        self.reset(0)

    # ---- set-up -------------------------------------------------------
    def prepare(self, beams: BeamSet) -> _Steering:
        """Build steering data for a new beam set (may run on another thread)."""
        return self._build(beams)

    def _build(self, beams: BeamSet) -> _Steering:
        # Priced from counts and ranges before anything is built; over the memory ceiling it is refused.
        _, work_bytes, n_fft = cost.block_work(
            self._basis.n_rows, len(beams.power_deg), len(beams.audio_deg), beams.bands_hz, beams.transition_hz,
            self.samplerate_hz, self.block_frames, self.bulk_delay_samples,
            cost.min_frame_of(beams, self.samplerate_hz))
        cost.check_memory(work_bytes, len(beams.power_deg), len(beams.audio_deg), self._basis.n_rows, n_fft)
        return _Steering(self.geometry, self._basis, self.sound_speed_mps, self.samplerate_hz,
                         self.bulk_delay_samples, n_fft, self.block_frames, beams, self.compiled,
                         self._team), n_fft

    def apply(self, prepared) -> BlockResult:
        """Switch to prepared steering at the current block boundary.

        Any change is allowed (bands, transition width, shading, beam
        counts, FFT length). Pending power blocks are first formed with the
        beams they were recorded under and returned (as from :meth:`flush`).
        Audio beam ``i`` of the new set crossfades from audio beam ``i`` of
        the old set over ``crossfade_frames``; new beams past the old count
        fade in from silence, and old beams past the new count end here.
        """
        released = self.flush()
        old, old_n = self._steer
        new, new_n = prepared
        self._steer = prepared
        # The old frame length stays in the history while the old beams are still faded out.
        fading = new.audio is not None
        self._fade_from = (old, old_n, self._sample) if fading else None
        self._ensure_history(max(old_n, new_n) if fading else new_n)
        return released
    def retarget(self, beams: BeamSet) -> BlockResult:
        """Build and apply a new beam set in one call (see :meth:`apply`)."""
        return self.apply(self.prepare(beams))

    def state(self) -> "EngineState":
        """The streaming state, to resume exactly in another engine (another process, another day).

        Like the ``zi``/``zf`` state of :func:`scipy.signal.lfilter`: an
        engine built with the same array, beams and block length and given
        this state with :meth:`resume` produces exactly what this one would
        have produced next. Not available during a retarget's crossfade.
        """
        if self._fade_from is not None:
            raise ValueError("state(): a retarget's crossfade is in progress; take the state a block later")
        n_fft = self._steer[1]
        return EngineState(next_sample=self._sample, power_origin=self._power_origin, n_fft=n_fft,
                           history=self._buf[self._pos - n_fft:self._pos].copy(),
                           pending_start=tuple(self._pending_start),
                           pending_spec=tuple(np.array(p) for p in self._pending_spec))

    def resume(self, state: "EngineState") -> None:
        """Continue from ``state`` (see :meth:`state`); its frame must fit this engine's beams."""
        n_fft = self._steer[1]
        if state.n_fft != n_fft or state.history.shape != (n_fft, self._basis.n_rows):
            raise ValueError(f"state: frames of {state.n_fft} samples over {state.history.shape[1]} rows, this engine "
                             f"uses {n_fft} over {self._basis.n_rows}: resume needs the same array, beams and block")
        self.reset(state.next_sample)
        self._buf[:n_fft] = state.history
        self._power_origin = int(state.power_origin)
        self._pending_start = list(state.pending_start)
        self._pending_spec = [np.array(p) for p in state.pending_spec]

    def take_over(self, other: "Beamformer") -> None:
        """Continue the stream ``other`` was on, with this engine's beams and row layout.

        The two engines have the same array and block; ``other`` has had its
        pending power flushed. Its history is carried over, turned into sensor
        rows when it held mirror-pair rows and this engine does not (the
        pairs' sums and differences give the sensors back), or into
        mirror-pair rows the other way, so the output goes on without a
        restart (the way the service switches a mirror-pair engine to
        adaptive beams, and back). Where this engine's frame is longer, the
        samples before the other's frame read as zeros (as after a reset).
        """
        state = other.state()
        history = state.history
        if other.mirror_pair_rows and not self.mirror_pair_rows:
            history = other._basis.to_sensors(history)
        elif self.mirror_pair_rows and not other.mirror_pair_rows:
            history = self._basis.from_sensors(history)
        n_fft = self._steer[1]
        frame = np.zeros((n_fft, history.shape[1]), np.float32)
        take = min(n_fft, len(history))
        frame[n_fft - take:] = history[len(history) - take:]
        self.resume(EngineState(next_sample=state.next_sample, power_origin=state.power_origin, n_fft=n_fft,
                                history=frame, pending_start=(), pending_spec=()))

    def reset(self, first_sample: int = 0, power_origin: int | None = None) -> None:
        """Forget all history (after a gap) and restart at ``first_sample``.

        Power blocks realign so that a block starts at ``power_origin``
        (default ``first_sample``). Pending power blocks are dropped; call
        :meth:`flush` first to keep them. Starting later than the origin with
        an empty history is how a stream is picked up in the middle: once
        the frame has filled with real input (a warm-up of
        :meth:`warmup_frames`), the output is the uninterrupted stream's.
        """
        n_fft = self._steer[1]
        # One history row per column: a frame is a contiguous (n_fft, rows) slice.
        self._buf = cache_aligned((self._history_frames(n_fft), self._basis.n_rows), np.float32, zero=True)
        self._pos = n_fft
        self._sample = int(first_sample)
        self._power_origin = int(first_sample if power_origin is None else power_origin)
        self._pending_start: list[int] = []
        self._pending_spec: list[np.ndarray] = []
        self._fade_from = None

    def warmup_frames(self) -> int:
        """Input frames after which an engine started mid-stream (:meth:`reset` with a
        ``power_origin``) gives the uninterrupted stream's output: every frame it reads, every band
        filter and every pending power batch then holds real input only."""
        n_fft = self._steer[1]
        return int(2 * n_fft + 2 * self.power_delay_samples + (self.power_batch_blocks + 2) * self.block_frames)

    def _history_frames(self, n_fft: int) -> int:
        # The last n_fft frames are moved to the front when the buffer is full: room for four
        # frames' worth of new blocks keeps that copy to a few percent of the block's work.
        return n_fft + max(4 * self.block_frames, 4 * n_fft)

    def _ensure_history(self, n_keep: int) -> None:
        """Make the last ``n_keep`` frames addressable before the write position.

        After a retarget to a longer frame the write position may sit below
        the new frame length (it moves through the buffer and back), so the
        history is laid out again whenever either the position or the buffer
        is short; samples never written (before a reset) stay zero, as in a
        fresh engine.
        """
        if self._pos >= n_keep and self._buf.shape[0] >= self._history_frames(n_keep):
            return
        keep = self._buf[: self._pos]
        buf = cache_aligned((max(self._history_frames(n_keep), self._buf.shape[0]), self._basis.n_rows), np.float32,
                            zero=True)
        take = min(len(keep), n_keep)
        buf[n_keep - take: n_keep] = keep[len(keep) - take:]
        self._buf, self._pos = buf, n_keep

    def close(self) -> None:
        """Stop the helper threads; the engine goes on working on the calling thread alone."""
        if self._team is not None:
            self._team.close()

    def __enter__(self) -> "Beamformer":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ---- properties ---------------------------------------------------
    @property
    def method(self) -> str:
        """``"das"``: delay-and-sum (:class:`~beamtap.service.engine.mvdr.AdaptiveBeamformer` says ``"mvdr"``)."""
        return "das"

    @property
    def threads(self) -> int:
        """Threads working on each block (1 after :meth:`close` or without the compiled kernels)."""
        return 1 if self._team is None else self._team.threads

    @property
    def beams(self) -> BeamSet:
        return self._steer[0].beams

    @property
    def fft_size(self) -> int:
        return self._steer[1]

    @property
    def mirror_pair_rows(self) -> bool:
        """True when the history holds sums and differences of mirror pairs (see :class:`_Basis`)."""
        return self._basis.pairs is not None

    @property
    def power_delay_samples(self) -> int:
        """D plus the longest band filter delay: a power row stamped ``n`` covers input samples from
        ``n`` on, and is complete once the block ending ``power_delay_samples`` later is in."""
        return self.bulk_delay_samples + self._steer[0].band_delay

    @property
    def steering_bytes(self) -> int:
        return self._steer[0].nbytes

    @property
    def band_filters(self):
        return [ev for ev in self._steer[0].bands]

    @property
    def next_sample(self) -> int:
        """Stream index of the next frame :meth:`process` expects."""
        return self._sample

    # ---- processing ---------------------------------------------------
    def process(self, block: np.ndarray) -> BlockResult:
        """Beamform one block.

        Parameters
        ----------
        block : ndarray, shape (frames, n_input_channels)
            Float samples, full scale ±1. Any number of frames (>= 0).
            Non-finite samples are replaced by zero and counted.

        Returns
        -------
        BlockResult
        """
        block = np.asarray(block)
        if block.ndim != 2 or block.shape[1] < self.geometry.n_input_channels:
            raise ValueError(f"block has shape {block.shape}, expected (frames, "
                             f">= {self.geometry.n_input_channels}) channels")
        # float32 without a copy when it already is; the scan for non-finite and clipped samples
        # happens where the block is written to the history (_push).
        if self._team is not None:
            self._team.wake()  # helpers asleep since the last block spin up while this one is written
        x = np.asarray(block, dtype=np.float32)
        nan_count = clip_count = 0
        steer, n_fft = self._steer
        delay = self.bulk_delay_samples + steer.band_delay
        frames = len(x)
        first = self._sample
        n_audio = len(steer.beams.audio_deg)
        audio = np.empty((frames, n_audio), np.float32)
        released = []
        pos = 0
        while pos < frames:
            to_boundary = self.block_frames - (self._sample - self._power_origin) % self.block_frames
            b = min(frames - pos, to_boundary)
            frame, bad, clipped = self._push(x[pos:pos + b], n_fft)
            nan_count += bad
            clip_count += clipped
            spec = steer.fft(frame)  # (n_fft//2+1, rows), one FFT serves both paths
            if self.on_spectra is not None:
                self.on_spectra(spec)
            y_audio = steer.audio(spec[None]) if n_audio else None
            self._sample += b
            # A row never describes time before the input began (since the start or the last reset).
            power = None
            if b == to_boundary and self._sample - self.block_frames - delay >= self._power_origin:
                self._pending_start.append(self._sample - self.block_frames)
                self._pending_spec.append(spec[steer.k1:steer.k2 + 1])  # a view: spec is new every frame
                if len(self._pending_start) >= self.power_batch_blocks:
                    # The helpers form the power beams while this thread does the audio's
                    # inverse FFT, which is not split across the team.
                    power = self._start_power()
            if n_audio:
                audio[pos:pos + b] = self._audio(y_audio, spec, b, n_fft, self._sample - b)
            if power is not None:
                released.append(self._finish_power(*power))
            pos += b
        rows = _concat_results(released, len(steer.bands), len(steer.beams.power_deg))
        return BlockResult(first, audio, rows[0], rows[1], nan_count, clip_count)

    def flush(self) -> BlockResult:
        """Form and return power blocks still waiting for a full batch (no audio)."""
        rows = self._release_power()
        n_audio = len(self.beams.audio_deg)
        return BlockResult(self._sample, np.zeros((0, n_audio), np.float32), rows[0], rows[1])

    def _push(self, chunk: np.ndarray, n_fft: int) -> tuple:
        """Write ``chunk`` (frames, channels) float32 to the history, non-finite samples as zero.

        Returns the frame ending with it and the counts of non-finite and clipped samples.
        """
        b = len(chunk)
        if self._pos + b > self._buf.shape[0]:
            keep = n_fft if self._fade_from is None else max(n_fft, self._fade_from[1])
            self._buf[:keep] = self._buf[self._pos - keep:self._pos]
            self._pos = keep
        bad = clipped = 0
        if self.compiled:
            chunk = np.ascontiguousarray(chunk)
            lo, hi, finite = self._write_rows(chunk)
            if not finite or hi > INPUT_LIMIT or lo < -INPUT_LIMIT:  # rare: again from a cleaned copy
                chunk, bad, clipped = sanitize(chunk)
                self._write_rows(chunk)
            elif hi >= 1.0 or lo <= -1.0:
                clipped = _count_clipped(chunk)
        else:
            chunk, bad, clipped = sanitize(chunk)
            self._basis.write(self._buf[self._pos:self._pos + b], chunk)
        self._pos += b
        return self._buf[self._pos - n_fft:self._pos], bad, clipped

    def _write_rows(self, chunk: np.ndarray) -> tuple:
        """The compiled history write at the current position; returns (min, max, all finite) of ``chunk``."""
        need(chunk, np.float32, "chunk")
        ia, ib, ca, cb = self._basis.kernel_rows
        return _kernels.rows(chunk, len(chunk), chunk.shape[1], ia, ib, ca, cb, len(ia), self._buf, len(self._buf),
                             self._pos, self._team)

    def _audio(self, steered: tuple, spec: np.ndarray, b: int, n_fft: int, first: int) -> np.ndarray:
        """The audio beams' last ``b`` samples (frames from stream index ``first``) from their steered
        spectra ``steered`` (``steer.audio`` of this frame's ``spec``), crossfaded after a retarget."""
        y = _audio_frames(steered, b, n_fft)
        if self._fade_from is not None:
            old, old_n, start = self._fade_from
            n = first + np.arange(b)
            ramp = np.clip((n - start + 0.5) / self.crossfade_frames, 0.0, 1.0)[:, None].astype(np.float32)
            kept = 0 if old.audio is None else min(old.audio.n_beams, y.shape[1])
            if kept:
                # The old beams need the old frame length's spectra when the retarget changed it.
                old_spec = spec if old_n == n_fft else old.fft(self._buf[self._pos - old_n:self._pos])
                y_old = _audio_frames(old.audio(old_spec[None]), b, old_n)[:, :kept]
                y[:, :kept] = ramp * y[:, :kept] + (1.0 - ramp) * y_old
            y[:, kept:] *= ramp  # beams new in this set rise from silence
            if first + b >= start + self.crossfade_frames:
                self._fade_from = None
        return y

    def _release_power(self) -> tuple:
        if not self._pending_start:
            steer = self._steer[0]
            return _empty_rows(len(steer.bands), len(steer.beams.power_deg))
        return self._finish_power(*self._start_power())

    def _start_power(self) -> tuple:
        """Hand the waiting blocks' power beams to the team; :meth:`_finish_power` takes them back."""
        steer = self._steer[0]
        pending = self._pending_spec
        # (K, bins from k1, rows); one block (unbatched power) needs no copy: a view of its spectra
        spec = pending[0][None] if len(pending) == 1 and pending[0].flags.c_contiguous else np.stack(pending)
        # Rows are stamped with the input span they describe: block start less D and the band delay.
        starts = np.array(self._pending_start, np.int64) - (self.bulk_delay_samples + steer.band_delay)
        self._pending_start, self._pending_spec = [], []
        y, _, call = steer.power.start(spec, offset=steer.k1)  # (K, beams, bins); the band factors hold the lag
        return steer, y, call, starts

    def _finish_power(self, steer, y: np.ndarray, call, starts: np.ndarray) -> tuple:
        call.join()
        out = np.empty((len(starts), len(steer.bands), y.shape[1]), np.float32)
        for i, ev in enumerate(steer.bands):
            lo = int(ev.bins[0]) - steer.k1
            ms = ev.mean_square_in(y, lo, self.compiled, self._team)  # finite: input held at INPUT_LIMIT
            np.maximum(ms, 1e-30, out=ms)
            np.log10(ms, out=ms)
            ms *= 10.0
            out[:, i, :] = ms
        return out, starts


def _audio_frames(steered: tuple, b: int, n_fft: int) -> np.ndarray:
    """The last ``b`` samples of audio beams from one frame's steered spectra ``(Y, lag)``."""
    y, lag = steered
    frame = irfft_columns(y[0].T, n_fft)  # (n_fft, beams)
    return frame[n_fft - b - lag:n_fft - lag]


def _empty_rows(n_bands: int, n_beams: int) -> tuple:
    return np.zeros((0, n_bands, n_beams), np.float32), np.zeros(0, np.int64)


def _concat_results(parts: list, n_bands: int, n_beams: int) -> tuple:
    if not parts:
        return _empty_rows(n_bands, n_beams)
    if len(parts) == 1:
        return parts[0]
    return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])


def sanitize(block: np.ndarray) -> tuple:
    """``block`` as float32 with non-finite samples zeroed, never modifying the caller's array.

    Returns
    -------
    clean : ndarray of float32, same shape
        ``block`` itself when it is clean float32 (no copy on the hot path),
        otherwise a cleaned copy.
    nan_count : int
        Non-finite samples replaced.
    clip_count : int
        Finite samples with |x| >= 1 (at or beyond full scale).
    """
    x = np.asarray(block, dtype=np.float32)
    if x.size == 0:
        return x, 0, 0
    top, bottom = float(x.max()), float(x.min())  # fast path: no temporaries for clean data
    nan_count = 0
    if not (math.isfinite(top) and math.isfinite(bottom)):
        x = np.array(x)
        bad = ~np.isfinite(x)
        nan_count = int(bad.sum())
        x[bad] = 0.0
        top, bottom = float(x.max()), float(x.min())
    clip_count = _count_clipped(x) if (top >= 1.0 or bottom <= -1.0) else 0
    if top > INPUT_LIMIT or bottom < -INPUT_LIMIT:
        # Samples this far beyond full scale are junk, and their power would overflow float32:
        # held at the limit (and counted as clipped, above).
        x = np.clip(x, -INPUT_LIMIT, INPUT_LIMIT)
    return x, nan_count, clip_count


def _count_clipped(x: np.ndarray) -> int:
    """Samples at or beyond full scale, |x| >= 1 (non-finite ones already zeroed)."""
    return int(np.count_nonzero(np.abs(x) >= 1.0))
