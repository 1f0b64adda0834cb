"""What a beam set costs, and the one admission check every part calls.

Before anything is built, a beam set is priced from its counts and ranges:
how many directions (:func:`check_counts`, from the fan or grid ranges
alone), how much memory its steering and band evaluators take, and how long
one block takes to beamform (:class:`CostModel`). The live service refuses a
beam set whose estimate exceeds ``[control] max_block_share`` of the block
duration, with the estimate in the reply, so no client can push it into
losing input; ``beamtap check`` prints the same estimate; the engine refuses
beam sets over the memory ceiling through :func:`check_memory`. Later stages
(threads, adaptive beams, detection) add their terms here.

The time estimate is one deterministic formula over sensors (history rows),
beams, frequency bins and bands. Its per-unit constants below were timed
piece by piece on the 2-core machine of 2026-12-03 for the 64-sensor, 181 +
8 beam case (see DEVELOPERS.md); one scale factor, measured once at start-up
by :func:`calibrate` on this machine and this array, adapts them to the host
and the code path (compiled or numpy). After that the same request always
gets the same answer, whatever the momentary load.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

from . import bandpower, steering
from .transform import fast_length

#: Most sensors an array may have (the mirror-pair search alone is sensors^2 x 3 doubles: 25 MB here).
MAX_SENSORS = 1024
#: Most power beams one beam set may have, whatever the array.
MAX_POWER_BEAMS = 20000
#: Most audio beams one beam set may have.
MAX_AUDIO_BEAMS = 64
#: Most memory one beam set's steering and band evaluators may take, bytes.
MAX_WORK_BYTES = 512 * 2**20
#: Longest FFT frame (samples): set by the band filters' transition widths (a band edge close to 0 Hz
#: or to Nyquist forces a narrow transition and a long filter).
MAX_FRAME_SAMPLES = 2**21
#: Default share of the block duration a beam set's estimated processing may take.
DEFAULT_MAX_BLOCK_SHARE = 0.7

# Nanoseconds per unit of work, from the 2026-12-03 profile of one 64-sensor block (compiled path):
# channel FFTs 0.22 ms / (64 rows x 2560 x log2 2560), history write 0.06 ms / (64 x 1024),
# steered sums 0.08 ms / (8 x 64 x 1281) complex multiply-adds, quadratic form 0.07 ms /
# (181 x 186 x 86), Python overhead about 0.03 ms a block.
_NS_FFT = 0.12
_NS_WRITE = 0.9
_NS_STEER = 0.12
_NS_QUAD = 0.025
_NS_BLOCK = 30000.0
# Steering data past what the caches hold streams from memory every block: about 16 GB/s here
# (measured: 19,781 power beams over 16 sensors, 157 MB, took 15.6 ms a block against 11.5 ms
# from the terms above). Cache size from memory, a typical last-level share of a server core pair.
_NS_STREAM_BYTE = 0.06
_CACHE_BYTES = 8 * 2**20
# MVDR weight updates (2026-12-05, per-step timings of a 64-sensor, 181 + 8 beam update, slices of
# 3-4 bins; see DEVELOPERS.md): Cholesky factors, their inverses and a quarter of the noise floor's
# eigenvalues 1.2 ms a slice, per bin and M^3; the weights 0.8 ms, per bin, beam and M^2 (complex64
# products); writing them into the steering 0.3 ms, per bin, beam and sensor; folding the blocks'
# cross-spectra 0.3 ms, per bin, block and M^2; a slice's fixed numpy cost (a dozen calls and
# their temporaries) from the 16-sensor update, 2.3 ms in one slice of which the terms above are 1.
# Against bench/mvdr_bench.py the same day: 64 sensors 66 ms an update by this formula, 54 ms
# measured; 16 sensors 2.3 ms and 2.3 ms.
_NS_MVDR_CUBE = 1.3
_NS_MVDR_WEIGHT = 0.3
_NS_MVDR_SET = 7.0
_NS_MVDR_FOLD = 0.9
_NS_MVDR_SLICE = 1.3e6
#: Work per slice of an MVDR update, in multiply-adds of M^3 per bin plus M^2 per beam and bin (M
#: sensors): about 2 ms of one core here (measured 2026-12-05: 64 sensors, 181 + 8 beams, 3.5
#: bins a slice took 4 ms with the engine's own block).
MVDR_SLICE_WORK = 2_000_000


class AdmissionError(ValueError):
    """A beam set refused by the admission check; the message carries the estimate."""


@dataclass(frozen=True)
class BlockCost:
    """The price of one beam set on one array.

    Attributes
    ----------
    work_ns : float
        Formula cost of one block before calibration, ns.
    estimate_s : float
        Calibrated estimate of one block's processing time, seconds.
    block_s : float
        Block duration, seconds.
    work_bytes : int
        Memory of the steering data and band evaluators, bytes.
    n_fft : int
        Frame length the beam set needs.
    """

    work_ns: float
    estimate_s: float
    block_s: float
    work_bytes: int
    n_fft: int

    @property
    def share(self) -> float:
        """Estimated share of the block duration."""
        return self.estimate_s / self.block_s

    def describe(self) -> str:
        return (f"estimated {1e3 * self.estimate_s:.2f} ms per block of {1e3 * self.block_s:.2f} ms "
                f"({100 * self.share:.0f} % of real time), {self.work_bytes / 2**20:.1f} MB of steering data")


def check_counts(n_power: int, n_audio: int) -> None:
    """Refuse beam counts over the hard ceilings (call before building any directions)."""
    if n_power > MAX_POWER_BEAMS:
        raise AdmissionError(f"at most {MAX_POWER_BEAMS} power beams")
    if n_audio > MAX_AUDIO_BEAMS:
        raise AdmissionError(f"at most {MAX_AUDIO_BEAMS} audio beams")


def band_transition_hz(band_hz, transition_hz, samplerate_hz) -> float:
    return bandpower.default_transition_hz(band_hz, samplerate_hz) if transition_hz is None else float(transition_hz)


def frame_length(block_frames: int, bulk_delay: int, bands_hz, transition_hz, samplerate_hz: float,
                 min_frame: int = 0) -> int:
    """FFT frame length N >= block + 2D + 1 + band filter - 2 (see :mod:`.beamformer`), and
    >= ``min_frame`` (an adaptive beam set's resolution, :func:`min_frame_of`)."""
    taps = max(bandpower.band_filter_taps(band_transition_hz(b, transition_hz, samplerate_hz), samplerate_hz)
               for b in bands_hz)
    return fast_length(max(block_frames + steering.filter_span_samples(bulk_delay) + taps - 2, int(min_frame)))


def min_frame_of(beams, samplerate_hz: float) -> int:
    """The shortest frame a :class:`~.beamformer.BeamSet` asks for: MVDR beams with
    ``resolution_hz`` set hold their bins that narrow whatever the block (0: none)."""
    return beams.adaptive.min_frame_samples(samplerate_hz) if beams.method == "mvdr" else 0


def _band_bins(band_hz, tw: float, n_fft: int, samplerate_hz: float) -> int:
    # The evaluator keeps the bins where the filter is above -80 dB: the pass band and one
    # transition's width around it (each transition is centred on its edge), plus rounding.
    return int(math.ceil((band_hz[1] - band_hz[0] + tw) * n_fft / samplerate_hz)) + 4


def block_work(rows: int, n_power: int, n_audio: int, bands_hz, transition_hz, samplerate_hz: float,
               block_frames: int, bulk_delay: int, min_frame: int = 0) -> tuple:
    """(formula ns per block, work bytes, n_fft) of a beam set, from counts and ranges only."""
    n_fft = frame_length(block_frames, bulk_delay, bands_hz, transition_hz, samplerate_hz, min_frame)
    half = n_fft // 2 + 1
    log_n = math.log2(n_fft)
    tws = [band_transition_hz(b, transition_hz, samplerate_hz) for b in bands_hz]
    bins = [min(_band_bins(b, tw, n_fft, samplerate_hz), half) for b, tw in zip(bands_hz, tws)]
    lo = min(b[0] - tw / 2 for b, tw in zip(bands_hz, tws))
    hi = max(b[1] + tw / 2 for b, tw in zip(bands_hz, tws))
    span = min(int(math.ceil((hi - lo) * n_fft / samplerate_hz)) + 4, half)
    cols = [min(block_frames, 2 * k) for k in bins]
    ns = (_NS_FFT * rows * n_fft * log_n + _NS_WRITE * rows * block_frames
          + _NS_STEER * n_audio * rows * half + _NS_FFT * n_audio * n_fft * log_n
          + _NS_STEER * n_power * rows * span + _NS_QUAD * n_power * sum(2 * k * c for k, c in zip(bins, cols))
          + _NS_BLOCK)
    steering_bytes = 8 * rows * (n_power * span + n_audio * half)
    ns += _NS_STREAM_BYTE * max(0, steering_bytes - _CACHE_BYTES)
    # The history (frame + room for four frames or blocks, float32 rows) and the spectra of a frame.
    history_bytes = 4 * rows * (n_fft + max(4 * block_frames, 4 * n_fft)) + 8 * rows * half
    # Each band evaluator's set-up: a (block, 2 bins) matrix and its (2 bins)^2 Gram matrix, float64.
    evaluator_bytes = sum(8 * (block_frames * 2 * k + 4 * k * k) for k in bins)
    return ns, steering_bytes + evaluator_bytes + history_bytes, n_fft


def mvdr_slices(n_bins: int, sensors: int, n_power_bins: int, n_power: int, n_audio: int, update_frames: int,
                block_frames: int) -> int:
    """How many blocks (slices of the adaptive bins) one MVDR weight update is spread over: as many
    as its work needs (:data:`MVDR_SLICE_WORK` each), within three quarters of the update period's
    blocks so the new weights apply inside it; one where a slice's fixed cost would dominate.
    ``n_power_bins`` of the ``n_bins`` adaptive bins carry the ``n_power`` power beams' weights."""
    m = sensors
    work = n_bins * (m ** 3 + m * m * (n_power_bins / max(n_bins, 1) * n_power + n_audio))
    return max(1, min(n_bins, 3 * update_frames // (4 * block_frames), -(-int(work) // MVDR_SLICE_WORK)))


def mvdr_update_ns(n_bins: int, sensors: int, n_power_bins: int, n_power: int, n_audio: int, update_frames: int,
                   block_frames: int) -> float:
    """Formula time (ns) of one MVDR weight update (the ``_NS_MVDR_*`` terms of this module)."""
    m = sensors
    beam_bins = n_power_bins * n_power + n_bins * n_audio
    slices = mvdr_slices(n_bins, sensors, n_power_bins, n_power, n_audio, update_frames, block_frames)
    return (_NS_MVDR_CUBE * n_bins * m ** 3 + _NS_MVDR_WEIGHT * beam_bins * m * m + _NS_MVDR_SET * beam_bins * m
            + _NS_MVDR_FOLD * n_bins * m * m * max(1.0, update_frames / block_frames) + _NS_MVDR_SLICE * slices)


def _mvdr_block_ns(rows: int, beams, n_fft: int, samplerate_hz: float, block_frames: int) -> float:
    """An MVDR beam set's weight updates, spread over the blocks of an update period (ns a block)."""
    settings = beams.adaptive
    bands = (min(b[0] for b in beams.bands_hz), max(b[1] for b in beams.bands_hz))  # the power bands' span
    lo, hi = bands if settings.band_hz is None else settings.band_hz

    def bins_in(width_hz):
        return int(math.ceil(width_hz * n_fft / samplerate_hz)) + 1

    n_bins = bins_in(hi - lo)
    n_power_bins = min(n_bins, bins_in(bands[1] - bands[0]))
    update_frames = max(1, int(round(settings.update_s * samplerate_hz)))
    per_update = mvdr_update_ns(n_bins, rows, n_power_bins, len(beams.power_deg), len(beams.audio_deg),
                                update_frames, block_frames)
    return per_update * block_frames / max(update_frames, block_frames)


def check_memory(work_bytes: int, n_power: int, n_audio: int, rows: int, n_fft: int = 0) -> None:
    """Refuse a beam set whose steering data and band evaluators exceed :data:`MAX_WORK_BYTES`."""
    frame = f" with frames of {n_fft} samples" if n_fft else ""
    if n_fft > MAX_FRAME_SAMPLES:
        raise AdmissionError(f"the band filters need frames of {n_fft} samples, more than {MAX_FRAME_SAMPLES}: a band "
                             "edge close to 0 Hz or to half the sample rate forces a narrow transition and a long "
                             "filter; move the band edge or give a wider transition_hz")
    if work_bytes > MAX_WORK_BYTES:
        raise AdmissionError(f"{n_power} power beams and {n_audio} audio beams over {rows} sensors{frame} need "
                             f"{work_bytes / 2**20:.0f} MB of steering data, more than "
                             f"{MAX_WORK_BYTES / 2**20:.0f} MB: use fewer beams, a narrower band, a wider "
                             "transition or a smaller aperture")


@dataclass(frozen=True)
class CostModel:
    """The calibrated time formula for one array at one sample rate and block length.

    Parameters
    ----------
    rows : int
        History rows (active sensors).
    samplerate_hz : float
    block_frames : int
    bulk_delay : int
        Bulk delay D, samples.
    scale : float
        Measured time / formula time on this host (1.0: the reference machine).
    max_block_share : float
        Share of the block duration above which :meth:`admit` refuses.
    """

    rows: int
    samplerate_hz: float
    block_frames: int
    bulk_delay: int
    scale: float = 1.0
    max_block_share: float = DEFAULT_MAX_BLOCK_SHARE

    def price(self, beams, adaptive: bool = True) -> BlockCost:
        """The :class:`BlockCost` of a :class:`~.beamformer.BeamSet` (nothing is built); MVDR beams'
        weight updates included, averaged over the blocks of an update period, unless ``adaptive``
        is false (the delay-and-sum work they are formed over)."""
        ns, nbytes, n_fft = block_work(self.rows, len(beams.power_deg), len(beams.audio_deg), beams.bands_hz,
                                       beams.transition_hz, self.samplerate_hz, self.block_frames,
                                       self.bulk_delay, min_frame_of(beams, self.samplerate_hz))
        if adaptive and beams.method == "mvdr":
            ns += _mvdr_block_ns(self.rows, beams, n_fft, self.samplerate_hz, self.block_frames)
        return BlockCost(ns, self.scale * ns * 1e-9, self.block_frames / self.samplerate_hz, nbytes, n_fft)

    def admit(self, beams, realtime: bool = True) -> BlockCost:
        """Price ``beams`` and refuse it (:class:`AdmissionError`) over the memory ceiling or, when
        ``realtime``, over ``max_block_share`` of the block duration."""
        check_counts(len(beams.power_deg), len(beams.audio_deg))
        cost = self.price(beams)
        check_memory(cost.work_bytes, len(beams.power_deg), len(beams.audio_deg), self.rows, cost.n_fft)
        if realtime and cost.share > self.max_block_share:
            mvdr = ", or for MVDR beams a longer update_s" if beams.method == "mvdr" else ""
            raise AdmissionError(f"{cost.describe()}: above max_block_share = {self.max_block_share:g}; "
                                 f"use fewer beams, fewer audio beams or narrower bands{mvdr}")
        return cost


def model_for(geometry, sound_speed_mps: float, samplerate_hz: float, block_frames: int,
              max_block_share: float = DEFAULT_MAX_BLOCK_SHARE) -> CostModel:
    """An uncalibrated model (scale 1) for an array."""
    bulk = steering.bulk_delay_samples(geometry.max_steering_delay_s(sound_speed_mps), samplerate_hz)
    return CostModel(int(np.count_nonzero(geometry.active)), float(samplerate_hz), int(block_frames), bulk,
                     1.0, max_block_share)


def calibrate(model: CostModel, engine, beams, blocks: int = 24) -> CostModel:
    """The model with its scale measured once: ``engine`` (a :class:`~.beamformer.Beamformer` of
    this array forming ``beams``; reset to sample 0 afterwards) beamforms ``blocks`` blocks of noise;
    the median block time over the formula's time for ``beams`` gives the scale, kept within
    0.25–20 so one disturbed start-up cannot make the model absurd."""
    rng = np.random.default_rng(0)
    x = (0.01 * rng.standard_normal((model.block_frames, engine.geometry.n_input_channels))).astype(np.float32)
    for _ in range(4):  # warm caches and the allocator
        engine.process(x)
    times = []
    for _ in range(blocks):
        t0 = time.perf_counter()
        engine.process(x)
        times.append(time.perf_counter() - t0)
    engine.reset(0)  # the engine starts its stream afresh, as if the measurement never happened
    # The median block is a delay-and-sum block, also under MVDR beams (their updates are a few blocks
    # of each period): the scale is measured against the delay-and-sum terms.
    formula_s = model.price(beams, adaptive=False).work_ns * 1e-9
    scale = float(np.median(times)) / formula_s
    return CostModel(model.rows, model.samplerate_hz, model.block_frames, model.bulk_delay,
                     min(max(scale, 0.25), 20.0), model.max_block_share)
