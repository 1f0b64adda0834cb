"""``beamtap process``: the engine over a WAV file or a recorded session, offline."""

from __future__ import annotations

import json
import queue
import threading
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from beamtap import __version__, powertable, tracktable
from beamtap.errors import UsageError
from beamtap.outputs import remove_files
from beamtap.session import json_default
from beamtap.wavfile import WavReader, WavWriter

from ..assembly import make_beamformer, make_detection, summary
from ..config import Config, available_cores, loads
from ..engine.beamformer import KERNELS_MISSING
from .progress import Progress


#: The files ``process`` writes into its output folder.
PROCESS_OUTPUTS = ("power.csv", "beams.csv", "bands.csv", "audio.wav", "detections.csv", "tracks.csv", "summary.json")


def session_config(folder) -> Config:
    """The config a session was recorded with (its manifest's first record)."""
    from beamtap.session import MANIFEST, read_manifest  # noqa: PLC0415

    folder = Path(folder)
    if not (folder / MANIFEST).exists():
        raise UsageError(f"{folder}: not a beamtap session (no {MANIFEST})")
    first = (read_manifest(folder) or [{}])[0]
    if first.get("type") != "session" or not isinstance(first.get("config"), str):
        raise UsageError(f"{folder / MANIFEST}: the session does not hold its config; give one with --config")
    return loads(first["config"], f"{folder / MANIFEST} (the session's config)")


def config_differences(stored: Config, given: Config) -> list:
    """What differs between a session's config and another, in the parts that decide whether its
    recordings can be beamformed with the other (array, channels, medium, sample rate)."""
    a, b = stored.geometry, given.geometry
    out = []
    if a.n_sensors != b.n_sensors or not np.allclose(a.positions_m, b.positions_m, atol=1e-6):
        out.append(f"array: the session has {a.n_sensors} sensors ({a.kind}, aperture {a.aperture_m:.3f} m), "
                   f"the config {b.n_sensors} ({b.kind}, aperture {b.aperture_m:.3f} m)")
    elif not (np.array_equal(a.channels, b.channels) and np.array_equal(a.dead, b.dead)):
        out.append("channel map or dead sensors differ")
    if a.n_input_channels != b.n_input_channels:
        out.append(f"input channels: {a.n_input_channels} in the session, {b.n_input_channels} in the config")
    if abs(stored.sound_speed_mps - given.sound_speed_mps) > 1e-6 * stored.sound_speed_mps:
        out.append(f"medium: sound speed {stored.sound_speed_mps:.2f} m/s ({stored.medium.source}) in the session, "
                   f"{given.sound_speed_mps:.2f} m/s ({given.medium.source}) in the config")
    if stored.input.samplerate_hz != given.input.samplerate_hz:
        out.append(f"sample rate: {stored.input.samplerate_hz:g} Hz in the session, "
                   f"{given.input.samplerate_hz:g} Hz in the config")
    return out


@dataclass(frozen=True)
class Segment:
    """One WAV file of a run: its path, the stream index of its first frame, and its frames."""

    path: str
    first_sample: int
    frames: int


@dataclass(frozen=True)
class Run:
    """Frames contiguous in stream samples: a WAV file, or a session's segments between two gaps."""

    first: int
    frames: int
    channels: int
    sample_format: str
    segments: tuple

    @property
    def end(self) -> int:
        return self.first + self.frames


@dataclass(frozen=True)
class InputPlan:
    """One input, checked and ready to beamform: its config, runs and UTC anchors."""

    config: Config
    source: str
    input_format: str
    runs: tuple
    anchors: tuple = ()

    @property
    def frames(self) -> int:
        return sum(r.frames for r in self.runs)


def plan_input(config: Config | None, input_path, allow_mismatch: bool = False, warn=None,
               start_utc: float | None = None) -> InputPlan:
    """Check one input (a WAV file or a session folder) against ``config`` and lay out its runs.

    ``config`` None takes a session's own stored config (a WAV needs one);
    a given config that differs from a session's in array, channels, medium
    or sample rate is refused unless ``allow_mismatch``. ``warn`` (a
    callable taking one line) hears about segments shorter than the
    manifest says. ``start_utc`` dates a WAV's first sample.
    """
    warn = warn or (lambda line: None)
    if Path(input_path).is_dir():
        stored = session_config(input_path)
        if config is None:
            config = stored
        else:
            diffs = config_differences(stored, config)
            if diffs and not allow_mismatch:
                raise UsageError(f"{config.where} does not match the session {input_path}: {'; '.join(diffs)} "
                                 "(--allow-mismatch to beamform it anyway)")
            for d in diffs:
                warn(f"{input_path}: {d} (processing anyway, --allow-mismatch)")
        runs, anchors = _session_runs(config, Path(input_path), warn)
        return InputPlan(config, str(input_path), "session", runs, anchors)
    if config is None:
        raise UsageError(f"{input_path}: a WAV file needs --config FILE (only a session holds its own config)")
    with WavReader(input_path) as reader:
        _check_input(config, input_path, reader.samplerate_hz, reader.channels)
        if reader.truncated:
            warn(f"{input_path}: the header promises {reader.frames_promised} frames, the file holds "
                 f"{reader.frames}; processing what is there")
        run = Run(0, reader.frames, reader.channels, reader.sample_format,
                  (Segment(str(reader.path), 0, reader.frames),))
        anchors = () if start_utc is None else ((0, float(start_utc)),)
        return InputPlan(config, str(reader.path), reader.sample_format, (run,), anchors)


def process(config: Config | None, input_path, out_dir, allow_mismatch: bool = False, warn=None,
            start_utc: float | None = None, threads: int | None = None) -> dict:
    """Beamform a WAV file or a recorded session folder (the ``process`` command), on this machine.

    See :func:`plan_input` for ``config``, ``allow_mismatch``, ``warn`` and
    ``start_utc``. Outputs are created only once the inputs are checked.
    ``threads`` (``--threads``) overrides the config's engine threads
    (default offline: every core). Returns the summary it writes to
    ``summary.json``.
    """
    warn = warn or (lambda line: None)
    if KERNELS_MISSING:
        warn(KERNELS_MISSING)
    plan = plan_input(config, input_path, allow_mismatch, warn, start_utc)
    with make_beamformer(plan.config, threads=plan.config.engine_threads(offline=True, override=threads)) as bf:
        return process_plan(plan, out_dir, bf)


def process_plan(plan: InputPlan, out_dir, bf) -> dict:
    """Beamform a checked input with the engine ``bf`` (built for ``plan.config``; it is reset per
    run, so one engine serves input after input); returns the summary."""
    out = Path(out_dir)
    _make_folder(out)
    config = plan.config
    counts = new_counts()
    bar = Progress(plan.frames, config.input.samplerate_hz)
    # About half a second of outputs per hand-over to the writer thread (so the last, written after
    # the engine is done, is short).
    batch_frames = max(2 * config.input.block_frames, int(config.input.samplerate_hz / 2))
    try:
        return _beamform_into(plan, out, bf, counts, bar, batch_frames)
    except OSError as exc:  # a full disk, a removed folder: say where, in one line
        if exc.filename:
            raise
        raise UsageError(f"--out {out}: writing the outputs failed: {exc.strerror or exc}") from None


def _beamform_into(plan: InputPlan, out: Path, bf, counts: dict, bar, batch_frames: int) -> dict:
    config = plan.config
    rows_per_batch = max(1, batch_frames // config.input.block_frames)
    with Outputs(config, bf, out, plan.anchors) as outputs, _Writer() as writer:
        batch_audio, batch_firsts, batch_power = [], [], []
        held_frames = held_rows = 0  # audio frames and power rows waiting

        def hand_over():
            nonlocal held_frames, held_rows
            writer.submit(outputs.write_batch, batch_audio[:], batch_firsts[:], batch_power[:])
            batch_audio.clear(), batch_firsts.clear(), batch_power.clear()
            held_frames = held_rows = 0

        def on_audio(a):
            nonlocal held_frames
            batch_audio.append(a)
            held_frames += len(a)
            if held_frames >= batch_frames:
                hand_over()

        def on_power(firsts, power_db):
            nonlocal held_rows
            batch_firsts.append(firsts)
            batch_power.append(power_db)
            held_rows += len(firsts)
            if held_rows >= rows_per_batch:  # also without audio beams, whose callback never comes
                hand_over()

        end_prev = None
        for run in plan.runs:
            if end_prev is not None:  # a gap: silence in audio.wav keeps it on the session's time axis
                hand_over()
                writer.submit(outputs.gap, run.first - end_prev)
            beamform_span(bf, run, run.first, run.end, counts, on_audio, on_power,
                          read_ahead=bf.threads < available_cores(), progress=bar)
            hand_over()
            end_prev = run.end
    return write_summary(out, plan, counts, outputs, bf)


def new_counts() -> dict:
    return {"nan": 0, "clipped": 0, "frames": 0, "power_rows": 0}


def read_span(run: Run, start: int, stop: int, frames_per_read: int):
    """``(block, clipped)`` reads of stream frames ``start`` to ``stop`` of ``run``, in order.

    Each read is at most ``frames_per_read`` frames and never spans two
    files; float WAVs are memory-mapped (see :class:`WavReader`).
    """
    for seg in run.segments:
        lo, hi = max(start, seg.first_sample), min(stop, seg.first_sample + seg.frames)
        if lo >= hi:
            continue
        with WavReader(seg.path, mapped=True) as r:
            r.seek(lo - seg.first_sample)
            left = hi - lo
            while left > 0:
                x, clipped = r.read(min(frames_per_read, left))
                if len(x) == 0:
                    raise UsageError(f"{seg.path}: ends {left} frames early (the file shrank while being read)")
                left -= len(x)
                yield x, clipped


def beamform_span(bf, run: Run, own_from: int, own_to: int, counts: dict, on_audio, on_power,
                  read_ahead: bool = False, progress=None) -> None:
    """The engine's output for input frames ``own_from`` to ``own_to`` of ``run``, as an
    uninterrupted run would give it.

    Starting inside the run, the engine is started early by
    :meth:`Beamformer.warmup_frames` (outputs discarded) with its power
    blocks aligned to the run's start; it reads on past ``own_to`` as far as
    the owned outputs need, and at the run's end pushes the bulk delay out
    as a whole run does. ``on_audio(frames)`` gets the audio beams for input
    wavefronts ``own_from`` to ``own_to`` (output samples ``own_from + D``
    on; a whole run's audio has the input's length), ``on_power(first_samples,
    power_db)`` the rows whose span starts in ``own_from`` to ``own_to``
    and ends, with the power delay and a block, within the run (rows
    computed from the zero tail are left out). ``counts`` adds the owned
    input frames, their non-finite and clipped samples, and the rows.
    """
    d = bf.bulk_delay_samples
    block = bf.block_frames
    reads = _read_frames(bf)
    warm_from = own_from if own_from == run.first else max(run.first, own_from - bf.warmup_frames())
    if warm_from == run.first:
        bf.reset(run.first)
    else:
        bf.reset(warm_from, power_origin=run.first)
    stop_at = min(run.end, own_to + d + bf.power_delay_samples + (bf.power_batch_blocks + 1) * block)
    audio_from, audio_to = own_from + d, own_to + d
    float_input = run.sample_format == "float32"

    def emit(result, owned: bool):
        a, n0 = result.audio, result.first_sample
        lo, hi = max(audio_from - n0, 0), min(audio_to - n0, len(a))
        if lo < hi and a.shape[1]:
            on_audio(a[lo:hi] if (lo, hi) != (0, len(a)) else a)
        firsts = result.power_first_sample
        if len(firsts):
            keep = (firsts >= own_from) & (firsts < own_to) & (firsts + (bf.power_delay_samples + block) <= run.end)
            if keep.all():
                on_power(firsts, result.power_db)
            elif keep.any():
                on_power(firsts[keep], result.power_db[keep])
            counts["power_rows"] += int(keep.sum())
        if owned:
            counts["nan"] += result.nan_count
            if float_input:
                counts["clipped"] += result.clip_count

    def pieces(start, stop):
        items = read_span(run, start, stop, reads)
        return _read_ahead(items) if read_ahead else items

    for x, _ in pieces(warm_from, own_from):
        emit(bf.process(x), False)
    for x, clipped in pieces(own_from, own_to):
        counts["clipped"] += clipped  # integer input: full-scale codes
        counts["frames"] += len(x)
        emit(bf.process(x), True)
        if progress is not None:
            progress.update(counts["frames"])
    for x, _ in pieces(own_to, stop_at):
        emit(bf.process(x), False)
    if stop_at == run.end:
        # Push the last D frames of beam audio out so audio.wav has the input's length.
        emit(bf.process(np.zeros((d, run.channels), np.float32)), False)
        emit(bf.flush(), False)


class Outputs:
    """The output folder's files: ``power.csv`` (with ``beams.csv``, ``bands.csv``), ``audio.wav``,
    ``detections.csv``, ``tracks.csv``; rows go through the detection stage in stream order.

    Used as a context manager; :meth:`write_batch` and :meth:`gap` must be
    called in stream order (from one thread at a time).
    """

    def __init__(self, config: Config, bf, out: Path, anchors=(), audio: bool = True):
        self.config, self.out = config, Path(out)
        beams = config.beams
        self.band_delays = [int(ev.filter.group_delay_samples) for ev in bf.band_filters]
        self.power_csv = self.out / "power.csv"
        powertable.write_sidecars(self.power_csv, beams.power_deg, beams.bands_hz, self.band_delays)
        self.utc_of = _utc_mapper(anchors, config.input.samplerate_hz)
        self.n_audio = len(beams.audio_deg)
        self.audio = audio  # False: audio.wav is written by others (the chunks of a Dask run)
        self._stage_for = (bf.beams, bf.band_filters)
        self._stage = None
        self.track_log: dict = {}  # track id -> its summary (first and last seen, confirmed, detections)
        self._files = []

    def __enter__(self) -> "Outputs":
        # A rerun into the same folder makes new files rather than truncating the old ones.
        remove_files(self.out, ["power.csv", "detections.csv", "tracks.csv"] + (["audio.wav"] if self.audio else []))
        try:
            self.pf = open(self.power_csv, "w", encoding="utf-8")
            self._files.append(self.pf)
            self.df = open(self.out / "detections.csv", "w", encoding="utf-8")
            self._files.append(self.df)
            self.tf = open(self.out / "tracks.csv", "w", encoding="utf-8")
            self._files.append(self.tf)
            self.audio_w = WavWriter(self.out / "audio.wav", self.config.input.samplerate_hz, self.n_audio) \
                if self.n_audio and self.audio else None
        except BaseException:
            self.__exit__(None, None, None)
            raise
        self.pf.write(powertable.header(len(self.config.beams.bands_hz), len(self.config.beams.power_deg)) + "\n")
        self.df.write(tracktable.header(tracktable.DETECTION_COLUMNS))
        self.tf.write(tracktable.header(tracktable.TRACK_COLUMNS))
        return self

    def __exit__(self, *exc) -> None:
        try:
            if getattr(self, "audio_w", None) is not None:
                self.audio_w.close(sync=False)  # made again by rerunning: no wait for the disk
        finally:
            for f in self._files:
                f.close()

    def gap(self, frames: int) -> None:
        """Silence (sparse on disk) in ``audio.wav`` for frames the input does not have."""
        if self.audio_w is not None:
            self.audio_w.skip(frames)

    def write_batch(self, audio: list, firsts: list, power_db: list) -> None:
        """Audio blocks, and power rows with their first samples, in stream order."""
        if audio and self.audio_w is not None:
            self.audio_w.write(np.concatenate(audio) if len(audio) > 1 else audio[0])
        if firsts:
            firsts = np.concatenate(firsts)
            power_db = np.concatenate(power_db)
            utcs = [self.utc_of(n) for n in firsts]
            self.pf.write(powertable.rows_text(firsts, utcs, power_db))
            self._detect(firsts, utcs, power_db)

    @property
    def stage(self):
        """The detection stage, built at its first rows: on the writer thread, not before the first
        block (it scans a beamwidth and the background cells)."""
        if self._stage is None:
            self._stage = make_detection(self.config, *self._stage_for)
        return self._stage

    def _detect(self, firsts, utcs, power_db) -> None:
        if not self.config.detect.enabled:  # no detections, no tracks: nothing to write or log
            return
        det_text, trk_text = [], []
        for first, utc, dets, tracks, _ in self.stage.rows(power_db, firsts, utcs):
            det_text.append(tracktable.detections_text(dets))
            trk_text.append(tracktable.tracks_text(first, utc, tracks))
            for t in tracks:
                log = self.track_log.setdefault(t["track"], {"track": t["track"], "first_sample": t["first_sample"],
                                                             "first_utc": t["first_utc"], "confirmed": False})
                log.update(last_sample=t["last_sample"], last_utc=t["last_utc"], detections=t["detections"],
                           last_bearing_deg=t["bearing_deg"], last_rate_deg_per_s=t["rate_deg_per_s"],
                           last_snr_db=t["snr_db"])
                if t["state"] == "confirmed" and not log["confirmed"]:
                    log.update(confirmed=True, confirmed_sample=int(first), confirmed_bearing_deg=t["bearing_deg"])
        self.df.write("".join(det_text))
        self.tf.write("".join(trk_text))


def write_summary(out: Path, plan: InputPlan, counts: dict, outputs: Outputs, bf, extra: dict | None = None) -> dict:
    """``summary.json`` of a finished input; returns it."""
    config = plan.config
    result = {
        "software": f"beamtap {__version__}",
        "input": plan.source,
        "input_format": plan.input_format,
        "config_file": config.where,
        "config_sha256": config.sha256,
        "config": config.text,
        "samplerate_hz": config.input.samplerate_hz,
        "bulk_delay_samples": bf.bulk_delay_samples,
        "band_filter_delay_samples": outputs.band_delays,
        "power_delay_samples": bf.power_delay_samples,
        "power_time_axis": "first_sample is the stream index of the first input sample each power row "
                           "describes (bulk delay and band filter delays removed; all bands of a row describe "
                           "the same span); time_utc its UTC time when known; rows cover whole blocks only",
        "first_sample": int(plan.runs[0].first) if plan.runs else 0,
        "frames_processed": counts["frames"],
        "gaps": max(len(plan.runs) - 1, 0),
        "gap_frames": sum(b.first - a.end for a, b in zip(plan.runs, plan.runs[1:])),
        "power_rows": counts["power_rows"],
        "nan_samples": counts["nan"],
        "clipped_samples": counts["clipped"],
        "engine_threads": bf.threads,
        "detect": config.detect.as_dict(),
        "detections": "detections.csv (first_sample, time_utc, band, beam, bearing_deg, level_db, snr_db)",
        "tracks": sorted(outputs.track_log.values(), key=lambda t: t["track"]),
        "summary": summary(config, bf),
        **(extra or {}),
    }
    text = json.dumps(result, indent=2, default=json_default)
    remove_files(out, ["summary.json"])  # a new file (see Outputs.__enter__)
    (out / "summary.json").write_text(text)
    return result


def _utc_mapper(anchors, fs: float):
    """Stream index -> POSIX UTC seconds from (first_sample, utc) anchors (segment starts); None
    when there are none (a WAV with no known start)."""
    if not anchors:
        return lambda n: None
    firsts = np.array([a[0] for a in anchors], np.int64)
    utcs = np.array([a[1] for a in anchors])

    def utc_of(n):
        i = max(int(np.searchsorted(firsts, n, side="right")) - 1, 0)
        return float(utcs[i] + (int(n) - firsts[i]) / fs)

    return utc_of


def _make_folder(out: Path) -> None:
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UsageError(f"--out {out}: cannot create folder: {exc.strerror}") from None


def _check_input(config: Config, where, samplerate_hz, channels):
    fs = config.input.samplerate_hz
    need = config.geometry.n_input_channels
    if int(round(samplerate_hz)) != int(round(fs)):
        raise UsageError(f"{where}: sample rate {samplerate_hz:g} Hz does not match "
                         f"[input] samplerate_hz = {fs:g} in {config.where}")
    if channels < need:
        raise UsageError(f"{where}: {channels} channels, but the array in {config.where} "
                         f"needs {need} (highest channel in its channel map)")


def _session_runs(config: Config, folder: Path, warn):
    """Contiguous runs of a session's raw segments, and the segments' UTC anchors."""
    from beamtap.session import MANIFEST, segments  # noqa: PLC0415

    if not (folder / MANIFEST).exists():
        raise UsageError(f"{folder}: not a beamtap session (no {MANIFEST})")
    segs = segments(folder, "raw")
    if not segs:
        raise UsageError(f"{folder}: the session has no raw segments to beamform")
    for seg in segs:
        _check_input(config, folder / seg["file"], seg["samplerate_hz"], seg["channels"])
        try:
            with WavReader(folder / seg["file"]) as r:
                on_disk = r.frames
        except UsageError as exc:
            raise UsageError(f"{folder / seg['file']}: {exc}") from None
        if on_disk < seg["frames"]:
            warn(f"{folder / seg['file']}: {on_disk} frames on disk, the manifest says {seg['frames']}; "
                 "the missing end is a gap")
            seg["frames"] = on_disk
    runs, current = [], []
    for seg in segs:
        if current and seg["first_sample"] != current[-1]["first_sample"] + current[-1]["frames"]:
            runs.append(current)
            current = []
        current.append(seg)
    runs.append(current)
    anchors = tuple((int(seg["first_sample"]), float(seg["utc"])) for seg in segs if "utc" in seg)
    return tuple(Run(int(run[0]["first_sample"]), sum(int(s["frames"]) for s in run), int(run[0]["channels"]),
                     run[0].get("sample_format") or "float32",
                     tuple(Segment(str((folder / s["file"]).resolve()), int(s["first_sample"]), int(s["frames"]))
                           for s in run)) for run in runs), anchors


def _read_frames(bf) -> int:
    """Frames per file read: eight engine blocks. The engine takes any number of frames per call
    with the same output, and fewer, larger calls cost less Python around the compiled loops."""
    return 8 * bf.block_frames


def _read_ahead(items, depth: int = 4):
    """``items`` (an iterator of input blocks) advanced on a reader thread, up to ``depth`` ahead.

    File reads release the GIL, so the next blocks arrive while the engine
    works on this one. Leaving the loop early (an error, Ctrl-C) stops the
    reader; an error while reading is raised here, in order.
    """
    box: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()
    end = object()

    def put(entry) -> bool:
        while not stop.is_set():
            try:
                box.put(entry, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def read():
        try:
            for item in items:
                if not put((True, item)):
                    return
            put((True, end))
        except BaseException as exc:  # noqa: BLE001 - handed to the consumer, raised there
            put((False, exc))

    reader = threading.Thread(target=read, name="beamtap-process-reader", daemon=True)
    reader.start()
    try:
        while True:
            ok, item = box.get()
            if not ok:
                raise item
            if item is end:
                return
            yield item
    finally:
        stop.set()
        reader.join()


class _Writer:
    """File writes on one background thread, in the order given, while the engine works on.

    At most ``depth`` writes wait (the engine slows to the disk's pace
    rather than filling memory); a write's failure (a full disk) is raised
    in the caller at its next :meth:`submit` or at :meth:`drain`.
    """

    def __init__(self, depth: int = 16):
        self._pool = ThreadPoolExecutor(1, thread_name_prefix="beamtap-process-writer")
        self._pending: deque = deque()
        self._depth = depth

    def submit(self, fn, *args) -> None:
        self._pending.append(self._pool.submit(fn, *args))
        while self._pending and (self._pending[0].done() or len(self._pending) > self._depth):
            self._pending.popleft().result()

    def drain(self) -> None:
        while self._pending:
            self._pending.popleft().result()

    def __enter__(self) -> "_Writer":
        return self

    def __exit__(self, *exc) -> None:
        try:
            if exc[0] is None:
                self.drain()
        finally:
            for f in self._pending:
                f.cancel()
            self._pool.shutdown(wait=True)
