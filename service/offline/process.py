"""``beamtap process``: the engine over a WAV file or a recorded session, offline."""

from __future__ import annotations

import json
import queue
import threading
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

from beamtap import __version__, powertable, tracktable
from beamtap.errors import UsageError
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


def process(config: Config | None, input_path, out_dir, allow_mismatch: bool = False, warn=None,
            start_utc: float | None = None, threads: int | None = None) -> dict:
    """Beamform a WAV file or a recorded session folder (the ``process`` command).

    ``config`` None takes a session's own stored config (a WAV needs one).
    A given config that differs from a session's in array, channels, medium
    or sample rate is refused unless ``allow_mismatch``. ``warn`` (a
    callable taking one line) hears about segments shorter than the
    manifest says. Outputs are created only once the inputs are checked.
    ``start_utc`` (POSIX seconds) dates a WAV's first sample; a session's
    rows are dated from its segments. ``threads`` (``--threads``) overrides
    the config's engine threads (default offline: every core).
    Returns the summary it writes to ``summary.json``.
    """
    out = Path(out_dir)
    warn = warn or (lambda line: None)
    if KERNELS_MISSING:
        warn(KERNELS_MISSING)
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
        _make_folder(out)
        return _process_runs(config, runs, out, str(input_path), "session", anchors, threads)
    if config is None:
        raise UsageError(f"{input_path}: a WAV file needs --config FILE (only a session holds its own config)")
    with WavReader(input_path, mapped=True) as reader:
        _check_input(config, input_path, reader.samplerate_hz, reader.channels)
        total = reader.frames
        if reader.truncated:
            warn(f"{input_path}: the header promises {reader.frames_promised} frames, the file holds {total}; "
                 "processing what is there")
        _make_folder(out)

        def blocks():
            while True:
                x, clipped = reader.read(_read_frames(config))
                if len(x) == 0:
                    return
                yield x, clipped

        runs = [(0, total, reader.channels, reader.sample_format, blocks())]
        anchors = [] if start_utc is None else [(0, float(start_utc))]
        return _process_runs(config, runs, out, reader.path, reader.sample_format, anchors, threads)


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
    """Contiguous runs of a session's raw segments: (first, frames, channels, format, blocks)."""
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
    block = _read_frames(config)

    def blocks(run):
        for seg in run:
            with WavReader(folder / seg["file"], mapped=True) as r:
                left = seg["frames"]
                while left > 0:
                    x, clipped = r.read(min(block, left))
                    if len(x) == 0:
                        break
                    left -= len(x)
                    yield x, clipped

    anchors = [(int(seg["first_sample"]), float(seg["utc"])) for seg in segs if "utc" in seg]
    return [(run[0]["first_sample"], sum(s["frames"] for s in run), run[0]["channels"],
             run[0].get("sample_format") or "float32", blocks(run)) for run in runs], anchors


def _read_frames(config: Config) -> int:
    """Frames per file read: eight engine blocks. The engine takes any number of frames per call
    with the same output, and fewer, larger calls cost less Python around the compiled loops."""
    return 8 * config.input.block_frames


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


def _process_runs(config: Config, runs, out: Path, source: str, input_format: str, anchors=(),
                  threads: int | None = None) -> dict:
    bf = make_beamformer(config, threads=config.engine_threads(offline=True, override=threads))
    threads_used = bf.threads
    fs = config.input.samplerate_hz
    d = bf.bulk_delay_samples
    block = config.input.block_frames
    beams = config.beams
    band_delays = [int(ev.filter.group_delay_samples) for ev in bf.band_filters]
    power_csv = out / "power.csv"
    powertable.write_sidecars(power_csv, beams.power_deg, beams.bands_hz, band_delays)
    utc_of = _utc_mapper(anchors, fs)
    counts = {"nan": 0, "clipped": 0, "frames": 0, "power_rows": 0, "gaps": 0, "gap_frames": 0}
    n_audio = len(beams.audio_deg)
    audio_w = WavWriter(out / "audio.wav", fs, n_audio) if n_audio else None
    origin = runs[0][0] if runs else 0
    total = sum(r[1] for r in runs)
    batch_blocks = max(2, int(fs / 2 / block))  # about half a second of outputs per write
    bar = Progress(total, fs)
    batch_audio, batch_firsts, batch_power = [], [], []
    stage = make_detection(config, bf.beams, bf.band_filters)
    track_log: dict = {}  # track id -> its summary (first and last seen, confirmed, detections)

    def detect_rows(firsts, utcs, power_db):
        """Detections and tracks of the batch's rows (on the writer thread, in order), as CSV."""
        det_text, trk_text = [], []
        for first, utc, dets, tracks, _ in stage.rows(power_db, firsts, utcs):
            det_text.append(tracktable.detections_text(dets))
            trk_text.append(tracktable.tracks_text(first, utc, tracks))
            for t in tracks:
                log = track_log.setdefault(t["track"], {"track": t["track"], "first_sample": t["first_sample"],
                                                        "first_utc": t["first_utc"], "confirmed": False})
                log.update(last_sample=t["last_sample"], last_utc=t["last_utc"], detections=t["detections"],
                           last_bearing_deg=t["bearing_deg"], last_rate_deg_per_s=t["rate_deg_per_s"],
                           last_snr_db=t["snr_db"])
                if t["state"] == "confirmed" and not log["confirmed"]:
                    log.update(confirmed=True, confirmed_sample=int(first), confirmed_bearing_deg=t["bearing_deg"])
        df.write("".join(det_text))
        tf.write("".join(trk_text))

    def write_batch(audio, firsts, power_db):
        if audio:
            audio_w.write(np.concatenate(audio))
        if firsts:
            firsts = np.concatenate(firsts)
            power_db = np.concatenate(power_db)
            utcs = [utc_of(n) for n in firsts]
            pf.write(powertable.rows_text(firsts, utcs, power_db))
            detect_rows(firsts, utcs, power_db)

    def hand_over():
        """The collected outputs to the writer thread: one hand-over per half second of audio."""
        writer.submit(write_batch, batch_audio[:], batch_firsts[:], batch_power[:])
        batch_audio.clear(), batch_firsts.clear(), batch_power.clear()

    try:
        with (open(power_csv, "w", encoding="utf-8") as pf,
              open(out / "detections.csv", "w", encoding="utf-8") as df,
              open(out / "tracks.csv", "w", encoding="utf-8") as tf, _Writer() as writer, bf):
            pf.write(powertable.header(len(beams.bands_hz), len(beams.power_deg)) + "\n")
            df.write(tracktable.header(tracktable.DETECTION_COLUMNS))
            tf.write(tracktable.header(tracktable.TRACK_COLUMNS))
            end_prev = None
            for first, frames, channels, fmt, blocks in runs:
                if end_prev is not None:  # a gap: silence in audio.wav keeps it on the session's time axis
                    gap = first - end_prev
                    counts["gaps"] += 1
                    counts["gap_frames"] += gap
                    if audio_w is not None:
                        hand_over()
                        writer.submit(audio_w.skip, gap)  # silence, sparse on disk
                bf.reset(first)
                run_end = first + frames
                skip = d  # the first D output frames precede the run's first input frame

                def emit(result):
                    nonlocal skip
                    if audio_w is not None and len(result.audio) > skip:
                        batch_audio.append(result.audio[skip:])
                    skip = max(0, skip - len(result.audio))
                    # rows computed from input only (not from the zero tail that flushes the audio)
                    firsts = result.power_first_sample
                    if len(firsts):
                        keep = firsts + (bf.power_delay_samples + block) <= run_end
                        if keep.all():
                            batch_firsts.append(firsts)
                            batch_power.append(result.power_db)
                        elif keep.any():
                            batch_firsts.append(firsts[keep])
                            batch_power.append(result.power_db[keep])
                        counts["power_rows"] += int(keep.sum())
                    counts["nan"] += result.nan_count
                    if fmt == "float32":
                        counts["clipped"] += result.clip_count
                    if len(batch_audio) + len(batch_firsts) >= batch_blocks:
                        hand_over()

                for x, clipped in (_read_ahead(blocks) if bf.threads < available_cores() else blocks):
                    counts["clipped"] += clipped  # integer input: full-scale codes
                    counts["frames"] += len(x)
                    emit(bf.process(x))
                    bar.update(counts["frames"])
                # Push the last D frames of beam audio out so audio.wav has the input's length.
                emit(bf.process(np.zeros((d, channels), np.float32)))
                emit(bf.flush())
                hand_over()
                end_prev = run_end
    finally:
        if audio_w is not None:
            audio_w.close(sync=False)  # made again by rerunning: no wait for the disk
    result = {
        "software": f"beamtap {__version__}",
        "input": source,
        "input_format": input_format,
        "config_file": config.where,
        "config_sha256": config.sha256,
        "config": config.text,
        "samplerate_hz": fs,
        "bulk_delay_samples": d,
        "band_filter_delay_samples": band_delays,
        "power_delay_samples": bf.power_delay_samples,
        "power_time_axis": "first_sample is the stream index of the first input sample each power row "
                           "describes (bulk delay and band filter delays removed; all bands of a row describe "
                           "the same span); time_utc its UTC time when known; rows cover whole blocks only",
        "first_sample": int(origin),
        "frames_processed": counts["frames"],
        "gaps": counts["gaps"],
        "gap_frames": counts["gap_frames"],
        "power_rows": counts["power_rows"],
        "nan_samples": counts["nan"],
        "clipped_samples": counts["clipped"],
        "engine_threads": threads_used,
        "detect": config.detect.as_dict(),
        "detections": "detections.csv (first_sample, time_utc, band, beam, bearing_deg, level_db, snr_db)",
        "tracks": sorted(track_log.values(), key=lambda t: t["track"]),
        "summary": summary(config, bf),
    }
    (out / "summary.json").write_text(json.dumps(result, indent=2, default=json_default))
    return result
