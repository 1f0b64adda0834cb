"""The offline commands: check, simulate, process, pattern.

Each function takes a validated :class:`~beamtap.service.config.Config`
(and paths), does its job with the same engine the live service runs, and
returns what it would print, so the command line and tests share it.
"""

from __future__ import annotations

import csv
import json
import shutil
import sys
from pathlib import Path

import numpy as np

from beamtap import __version__, powertable
from beamtap.errors import UsageError

from .config import Config, loads
from .engine import cost, diagnostics
from .engine.beamformer import KERNELS_MISSING, Beamformer
from .engine.directions import fan, unit_vectors
from .engine.scene import Scene
from .engine.shading import shading_weights
from beamtap.session import json_default
from beamtap.wavfile import WavReader, WavWriter


def make_beamformer(config: Config, beams=None) -> Beamformer:
    """The engine as a config describes it (a set-up it cannot build is a usage error)."""
    try:
        return Beamformer(config.geometry, config.sound_speed_mps, config.input.samplerate_hz,
                          config.input.block_frames, beams or config.beams, config.power_batch_blocks)
    except ValueError as exc:
        raise UsageError(f"{config.where}: [beams] {exc}") from None


def cost_model(config: Config, engine: Beamformer) -> cost.CostModel:
    """The admission check's time formula for this array, calibrated once on ``engine`` (which is
    reset to sample 0 afterwards)."""
    inp = config.input
    base = cost.model_for(config.geometry, config.sound_speed_mps, inp.samplerate_hz, inp.block_frames,
                          config.control.max_block_share)
    return cost.calibrate(base, engine, engine.beams)


def make_scene(config: Config) -> Scene:
    """The config's simulated scene."""
    inp = config.input
    return Scene(config.geometry, config.sound_speed_mps, inp.samplerate_hz, inp.scene,
                 inp.scene_noise_db, inp.seed)


def beam_weights(config: Config, look_deg) -> np.ndarray:
    """Shading weights of one look direction over the active sensors."""
    geo, beams = config.geometry, config.beams
    u = unit_vectors(look_deg[0], look_deg[1])[None, :]
    return shading_weights(geo.kind, geo.positions_m, geo.active, u, beams.shading,
                           beams.sidelobe_db, beams.nbar)[0]


def summary(config: Config, bf: Beamformer | None = None) -> dict:
    """Array summary as a dict (what ``check`` prints)."""
    geo, inp, beams = config.geometry, config.input, config.beams
    bf = bf or make_beamformer(config)
    fs = inp.samplerate_hz
    d = bf.bulk_delay_samples
    centre_hz = float(np.mean([np.mean(b) for b in beams.bands_hz]))
    top_hz = max(b[1] for b in beams.bands_hz)
    mid = beams.power_deg[len(beams.power_deg) // 2]
    pos = geo.centred_positions_m
    weights_all = shading_weights(geo.kind, geo.positions_m, geo.active,
                                  unit_vectors(beams.power_deg[:, 0], beams.power_deg[:, 1]),
                                  beams.shading, beams.sidelobe_db, beams.nbar)
    warnings = list(config.medium.warnings) + diagnostics.aliasing_warnings(
        geo.kind, pos, geo.spacing_m, beams.power_deg, weights_all, top_hz, config.sound_speed_mps)
    return {
        "sensors": int(geo.n_sensors),
        "active_sensors": int(geo.active.sum()),
        "array_kind": geo.kind,
        "input_channels": int(geo.n_input_channels),
        "aperture_m": geo.aperture_m,
        "sound_speed_mps": config.sound_speed_mps,
        "sound_speed_from": config.medium.source,
        "samplerate_hz": fs,
        "block_frames": inp.block_frames,
        "max_steering_delay_ms": 1e3 * geo.max_steering_delay_s(config.sound_speed_mps),
        "bulk_delay_samples": d,
        "bulk_delay_ms": 1e3 * d / fs,
        "latency_budget_ms": 1e3 * (inp.block_frames + d) / fs,
        "power_extra_latency_ms": 1e3 * (config.power_batch_blocks - 1) * inp.block_frames / fs,
        "power_beams": int(len(beams.power_deg)),
        "audio_beams": int(len(beams.audio_deg)),
        "shading": beams.shading,
        "bands_hz": [list(b) for b in beams.bands_hz],
        "band_effective_bandwidth_hz": [ev_bw for ev_bw in _effective_bandwidths(bf)],
        "beamwidth_at_hz": centre_hz,
        "beamwidth_look_deg": [float(mid[0]), float(mid[1])],
        "beamwidth_deg": diagnostics.beamwidth_deg(pos, beam_weights(config, mid), mid, centre_hz,
                                                   config.sound_speed_mps),
        "fft_size": bf.fft_size,
        "steering_mb": bf.steering_bytes / 2**20,
        "warnings": warnings,
    }


def _effective_bandwidths(bf: Beamformer):
    return [float(bf.samplerate_hz / 2.0 * np.sum(ev.filter.taps**2)) for ev in bf.band_filters]


def check_problems(config: Config) -> list:
    """What would stop this config from running, beyond the config itself: the input (file,
    session, sound card), the endpoints (can they be bound now), and the array's shape."""
    problems = []
    from .sources import make_source  # noqa: PLC0415

    try:
        make_source(config)  # opens a file or session, looks up a sound card; starts nothing
    except UsageError as exc:
        problems.append(f"input: {exc}")
    import zmq  # noqa: PLC0415

    ctx = zmq.Context.instance()
    for name, endpoint in (("publish", config.publish.endpoint), ("control", config.control.endpoint)):
        with ctx.socket(zmq.PUB) as sock:
            sock.setsockopt(zmq.LINGER, 0)
            try:
                sock.bind(endpoint)
            except zmq.ZMQError as exc:
                problems.append(f"[{name}] endpoint = {endpoint!r}: cannot bind now ({exc.strerror})")
    return problems


def shape_warnings(config: Config) -> list:
    """Warnings about the array's shape: sensors in a line that the config did not declare as one
    (so the display would not say that a line cannot tell a bearing from its mirror image)."""
    geo = config.geometry
    p = geo.centred_positions_m
    if geo.kind != "line" and len(p) >= 2:
        s = np.linalg.svd(p, compute_uv=False)
        if s[1] < 1e-6 * max(s[0], 1e-12):
            return ["the sensors lie on one line: declare [array] line if they are evenly spaced; a line "
                    "cannot tell a direction from its mirror image about its axis"]
    return []


def check_text(config: Config) -> str:
    engine = make_beamformer(config)
    s = summary(config, engine)
    model = cost_model(config, engine)
    try:
        s["cost"] = model.admit(config.beams).describe() + f"; accepted live (limit {model.max_block_share:g})"
    except cost.AdmissionError as exc:
        s["cost"] = f"the live service would refuse these beams: {exc}"
    line = config.geometry.kind == "line"
    lines = [
        f"config        {config.where}",
        f"array         {s['array_kind']}, {s['active_sensors']} of {s['sensors']} sensors active, "
        f"{s['input_channels']} input channels, aperture {s['aperture_m']:.3f} m",
        f"sound speed   {s['sound_speed_mps']:.2f} m/s ({s['sound_speed_from']})",
        f"sampling      {s['samplerate_hz']:g} Hz, blocks of {s['block_frames']} frames "
        f"({1e3 * s['block_frames'] / s['samplerate_hz']:.2f} ms)",
        f"steering      max delay {s['max_steering_delay_ms']:.3f} ms; bulk delay D = "
        f"{s['bulk_delay_samples']} samples ({s['bulk_delay_ms']:.3f} ms)",
        f"latency       block + D = {s['latency_budget_ms']:.2f} ms"
        + (f" (power stream +{s['power_extra_latency_ms']:.1f} ms for batching)"
           if s['power_extra_latency_ms'] else ""),
        f"beams         {s['power_beams']} power, {s['audio_beams']} audio, shading {s['shading']}",
        "bands         " + ", ".join(f"{a:g}-{b:g} Hz (effective {bw:.0f} Hz)"
                                     for (a, b), bw in zip(s['bands_hz'], s['band_effective_bandwidth_hz'])),
        f"beamwidth     {s['beamwidth_deg']:.2f}° (-3 dB, azimuth) at {s['beamwidth_at_hz']:g} Hz, "
        f"look {s['beamwidth_look_deg'][0]:g}°/{s['beamwidth_look_deg'][1]:g}°",
        f"engine        FFT frames of {s['fft_size']}, steering data {s['steering_mb']:.1f} MB",
        f"live cost     {s['cost']}",
    ]
    if line:
        lines.append("note          a line array cannot tell a bearing from its mirror image about its axis")
    if KERNELS_MISSING:
        lines.append(f"warning       {KERNELS_MISSING}")
    lines += [f"warning       {w}" for w in s["warnings"] + shape_warnings(config)]
    return "\n".join(lines)


def simulate(config: Config, seconds: float, out_path) -> int:
    """Write the config's scene as a float32 multichannel WAV; returns frames written."""
    if not seconds > 0:
        raise UsageError(f"--seconds: got {seconds!r}, expected a positive number of seconds")
    fs = config.input.samplerate_hz
    total = int(round(seconds * fs))
    block = config.input.block_frames
    channels = config.geometry.n_input_channels
    size = 44 + total * channels * 4
    if size > 2**32 - 1:  # a RIFF WAV's sizes are 32-bit
        raise UsageError(f"--seconds {seconds:g}: {size / 2**30:.1f} GiB of {channels}-channel float32, more than "
                         f"a WAV file holds (4 GiB, {(2**32 - 45) / (channels * 4 * fs):.0f} s here)")
    folder = Path(out_path).resolve().parent
    if not folder.is_dir():
        raise UsageError(f"{out_path}: cannot write: the folder {folder} does not exist")
    free = shutil.disk_usage(folder).free
    if size > free:
        raise UsageError(f"{out_path}: the simulation needs {size / 2**20:.0f} MB, {folder} has "
                         f"{free / 2**20:.0f} MB free")
    scene = make_scene(config)
    try:
        with WavWriter(out_path, fs, channels) as w:
            done = 0
            while done < total:
                n = min(block, total - done)
                w.write(scene.render(n))
                done += n
                _progress(done, total, fs)
    except BaseException:
        Path(out_path).unlink(missing_ok=True)  # no partial file left behind (error or Ctrl-C)
        raise
    return total


def _progress(done: int, total: int, fs: float):
    if total / fs > 5.0 and sys.stderr.isatty():
        width = 40
        filled = int(width * done / total)
        sys.stderr.write(f"\r[{'#' * filled}{'.' * (width - filled)}] {done / fs:7.1f} / {total / fs:.1f} s")
        if done >= total:
            sys.stderr.write("\n")
        sys.stderr.flush()


#: The files ``process`` writes into its output folder.
PROCESS_OUTPUTS = ("power.csv", "beams.csv", "bands.csv", "audio.wav", "summary.json")


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
            start_utc: float | None = None) -> dict:
    """Beamform a WAV file or a recorded session folder (the ``process`` command).

    ``config`` None takes a session's own stored config (a WAV needs one).
    A given config that differs from a session's in array, channels, medium
    or sample rate is refused unless ``allow_mismatch``. ``warn`` (a
    callable taking one line) hears about segments shorter than the
    manifest says. Outputs are created only once the inputs are checked.
    ``start_utc`` (POSIX seconds) dates a WAV's first sample; a session's
    rows are dated from its segments.
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
        return _process_runs(config, runs, out, str(input_path), "session", anchors)
    if config is None:
        raise UsageError(f"{input_path}: a WAV file needs --config FILE (only a session holds its own config)")
    with WavReader(input_path) as reader:
        _check_input(config, input_path, reader.samplerate_hz, reader.channels)
        total = reader.frames
        if reader.truncated:
            warn(f"{input_path}: the header promises {reader.frames_promised} frames, the file holds {total}; "
                 "processing what is there")
        _make_folder(out)

        def blocks():
            while True:
                x, clipped = reader.read(config.input.block_frames)
                if len(x) == 0:
                    return
                yield x, clipped

        runs = [(0, total, reader.channels, reader.sample_format, blocks())]
        anchors = [] if start_utc is None else [(0, float(start_utc))]
        return _process_runs(config, runs, out, reader.path, reader.sample_format, anchors)


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
    block = config.input.block_frames

    def blocks(run):
        for seg in run:
            with WavReader(folder / seg["file"]) as r:
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


def _process_runs(config: Config, runs, out: Path, source: str, input_format: str, anchors=()) -> dict:
    bf = make_beamformer(config)
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
    try:
        with open(power_csv, "w", encoding="utf-8") as pf:
            pf.write(powertable.header(len(beams.bands_hz), len(beams.power_deg)) + "\n")
            end_prev = None
            for first, frames, channels, fmt, blocks in runs:
                if end_prev is not None:  # a gap: silence in audio.wav keeps it on the session's time axis
                    gap = first - end_prev
                    counts["gaps"] += 1
                    counts["gap_frames"] += gap
                    if audio_w is not None:
                        audio_w.skip(gap)  # silence, sparse on disk
                bf.reset(first)
                run_end = first + frames
                skip = d  # the first D output frames precede the run's first input frame

                def emit(result):
                    nonlocal skip
                    if audio_w is not None and len(result.audio):
                        audio_w.write(result.audio[skip:])
                        skip = max(0, skip - len(result.audio))
                    # rows computed from input only (not from the zero tail that flushes the audio)
                    keep = result.power_first_sample + bf.power_delay_samples + block <= run_end
                    firsts = result.power_first_sample[keep]
                    if len(firsts):
                        pf.write(powertable.rows_text(firsts, [utc_of(n) for n in firsts], result.power_db[keep]))
                        counts["power_rows"] += len(firsts)
                    counts["nan"] += result.nan_count
                    if fmt == "float32":
                        counts["clipped"] += result.clip_count

                for x, clipped in blocks:
                    counts["clipped"] += clipped  # integer input: full-scale codes
                    counts["frames"] += len(x)
                    emit(bf.process(x))
                    _progress(counts["frames"], total, fs)
                # Push the last D frames of beam audio out so audio.wav has the input's length.
                emit(bf.process(np.zeros((d, channels), np.float32)))
                emit(bf.flush())
                end_prev = run_end
    finally:
        if audio_w is not None:
            audio_w.close()
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
        "summary": summary(config, bf),
    }
    (out / "summary.json").write_text(json.dumps(result, indent=2, default=json_default))
    return result


def pattern(config: Config, frequency_hz: float, look_deg, out_path, step_deg: float = 0.1) -> np.ndarray:
    """Theoretical response against azimuth at the look elevation; CSV (and PNG if asked).

    Returns
    -------
    ndarray, shape (n, 3): azimuth_deg, elevation_deg, response_db.
    """
    if not frequency_hz > 0:
        raise UsageError(f"--freq: got {frequency_hz!r}, expected a positive frequency in Hz")
    geo = config.geometry
    directions = fan(-180.0, 180.0, step_deg, look_deg[1])
    units = unit_vectors(directions[:, 0], directions[:, 1])
    look = unit_vectors(look_deg[0], look_deg[1])
    level = diagnostics.response_db(geo.centred_positions_m, beam_weights(config, look_deg), look, units,
                                    frequency_hz, config.sound_speed_mps)
    table = np.column_stack([directions, level])
    out = Path(out_path)
    if out.suffix.lower() == ".png":
        _pattern_png(table, config, frequency_hz, look_deg, out)
    else:
        with open(out, "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(["azimuth_deg", "elevation_deg", "response_db"])
            for az, el, r in table:
                w.writerow([f"{az:.2f}", f"{el:g}", f"{r:.3f}"])
    return table


def _pattern_png(table, config, frequency_hz, look_deg, out):
    try:
        import matplotlib  # noqa: PLC0415 - optional extra
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt  # noqa: PLC0415
    except ImportError:
        raise UsageError("a PNG pattern needs the plotting extra: pip install 'beamtap[plot]' "
                         "(or give --out a .csv name)") from None
    fig, ax = plt.subplots(figsize=(8, 4))
    ax.plot(table[:, 0], np.maximum(table[:, 2], -80))
    ax.set_xlabel("azimuth (deg)")
    ax.set_ylabel("response (dB)")
    ax.set_ylim(-80, 3)
    ax.grid(True, alpha=0.3)
    ax.set_title(f"{config.geometry.kind} array, {config.geometry.active.sum()} sensors, "
                 f"{frequency_hz:g} Hz, look {look_deg[0]:g}°/{look_deg[1]:g}°, {config.beams.shading}")
    fig.tight_layout()
    fig.savefig(out, dpi=100)
    plt.close(fig)

