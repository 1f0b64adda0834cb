"""Engine speed: real-time factor and ratio to a plain reference, measured in one run.

Usage::

    python bench/engine_bench.py            # full run, writes bench/results.md and results.json
    python bench/engine_bench.py --quick    # fewer repeats

Real-time factor (RTF) = seconds of audio processed per second of one core.
BLAS and the FFT are pinned to one thread. Each figure is the median of
several repeats; the machine is shared, so ratios measured in the same run
are the figures to trust.

Threads: the same engine with 1 and with N threads (``Beamformer(threads=N)``),
timed by the wall clock (the point of more threads is less waiting), the two
alternating repeat by repeat, the N-thread engine after four untimed blocks
that wake its helpers; the speed-up is the median of the per-repeat
ratios. ``process`` end to end: ``beamtap process`` on a 10 s, 64-channel
float WAV (made here) against the engine's own time on the same samples
from memory (its construction, every block, the tail that flushes D, and
the flush), both with the same threads, alternating.

The reference implementation is the plain method: per block, for every
beam and channel, a whole-sample shift of the channel's history added into
the beam (numpy slice adds), then band power of every beam by an FFT of the
block summed over the band's bins.
"""

from __future__ import annotations

import os

for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_v] = "1"

import argparse  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import tracemalloc  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from beamtap.service.engine import ArrayGeometry, Beamformer  # noqa: E402
from beamtap.service.engine.beamformer import BeamSet  # noqa: E402
from beamtap.service.engine.directions import fan, unit_vectors  # noqa: E402
from beamtap.memory import keep_freed_memory  # noqa: E402

keep_freed_memory()  # as the beamtap command does (see beamtap/memory.py)

sys.path.insert(0, str(Path(__file__).resolve().parent))
from hoststat import cpu_ticks, steal_share  # noqa: E402

FS, C, BLOCK, SPACING = 48000.0, 1500.0, 1024, 0.5
BAND = (300.0, 1400.0)
HERE = Path(__file__).resolve().parent


class ReferenceBeamformer:
    """Whole-sample shift-and-add per beam and channel; band power by FFT per block."""

    def __init__(self, geometry, power_deg, audio_deg, block):
        pos = geometry.centred_positions_m
        delays = lambda d: unit_vectors(d[:, 0], d[:, 1]) @ pos.T / C * FS  # noqa: E731
        self.d_power = delays(power_deg)
        self.d_audio = delays(audio_deg)
        span = int(np.ceil(np.abs(self.d_power).max()))
        self.bulk = span
        self.shift_p = np.round(self.bulk + self.d_power).astype(int)
        self.shift_a = np.round(self.bulk + self.d_audio).astype(int)
        self.hist = np.zeros((2 * span + block, pos.shape[0]), np.float32)
        f = np.fft.rfftfreq(block, 1 / FS)
        self.band = (f >= BAND[0]) & (f <= BAND[1])
        self.block = block

    def process(self, x):
        b = self.block
        self.hist = np.concatenate([self.hist[b:], x])
        end = len(self.hist)
        out_a = np.zeros((b, len(self.shift_a)), np.float32)
        for i, shifts in enumerate(self.shift_a):
            for m, s in enumerate(shifts):
                out_a[:, i] += self.hist[end - b - s:end - s, m]
        beams = np.zeros((len(self.shift_p), b), np.float32)
        for i, shifts in enumerate(self.shift_p):
            for m, s in enumerate(shifts):
                beams[i] += self.hist[end - b - s:end - s, m]
        spec = np.fft.rfft(beams, axis=1)
        power = 10 * np.log10(np.sum(np.abs(spec[:, self.band]) ** 2, axis=1) + 1e-30)
        return out_a, power


def _seconds_per_block(process, x, blocks, block=BLOCK):
    t0 = time.process_time()
    for i in range(blocks):
        process(x[i * block:(i + 1) * block])
    return (time.process_time() - t0) / blocks


def measure(n_sensors, n_beams, n_audio, batch, blocks, repeats, reference=True, block=BLOCK, compiled=None):
    geo = ArrayGeometry.line(n_sensors, SPACING)
    power = fan(0.0, 180.0, 180.0 / (n_beams - 1))
    audio = fan(30.0, 150.0, 120.0 / max(n_audio - 1, 1))[:n_audio]
    rng = np.random.default_rng(1)
    x = (0.1 * rng.standard_normal((block * blocks, n_sensors))).astype(np.float32)
    tracemalloc.start()
    bf = Beamformer(geo, C, FS, block, BeamSet(power, audio, bands_hz=[BAND]), power_batch_blocks=batch,
                    compiled=compiled)
    for i in range(4):  # warm up
        bf.process(x[i * block:(i + 1) * block])
    tracemalloc.reset_peak()
    base = tracemalloc.get_traced_memory()[0]
    for i in range(blocks):
        bf.process(x[i * block:(i + 1) * block])
    grow = tracemalloc.get_traced_memory()[0] - base
    tracemalloc.stop()
    # Engine and reference alternate repeat by repeat, so that both see the same machine load;
    # the ratio is the median of the per-repeat ratios.
    ref = ReferenceBeamformer(geo, power, audio, block) if reference else None
    t_engine, t_ref = [], []
    ticks0 = cpu_ticks()
    for _ in range(repeats):
        t_engine.append(_seconds_per_block(bf.process, x, blocks, block))
        if ref is not None:
            t_ref.append(_seconds_per_block(ref.process, x, min(blocks, 24), block))
    steal = steal_share(ticks0, cpu_ticks())
    ratios = np.array(t_ref) / np.array(t_engine) if ref is not None else None
    t_engine = float(np.median(t_engine))
    row = {
        "sensors": n_sensors, "beams": len(power), "audio_beams": n_audio, "block": block,
        "power_batch_blocks": batch, "fft_size": bf.fft_size, "mirror_pair_rows": bf.mirror_pair_rows,
        "compiled": bf.compiled,
        "power_extra_latency_ms": 1e3 * (batch - 1) * block / FS,
        "steering_mb": bf.steering_bytes / 2**20, "memory_growth_bytes": int(grow),
        "engine_ms_per_block": 1e3 * t_engine, "engine_rtf": block / FS / t_engine, "host_steal_share": steal,
    }
    if ref is not None:
        t_ref = float(np.median(t_ref))
        row.update({"reference_ms_per_block": 1e3 * t_ref, "reference_rtf": block / FS / t_ref,
                    "speedup_vs_reference": float(np.median(ratios))})
    return row


def _wall_per_block(process, x, blocks, block=BLOCK):
    t0 = time.perf_counter()
    for i in range(blocks):
        process(x[i * block:(i + 1) * block])
    return (time.perf_counter() - t0) / blocks


def measure_threads(n_sensors, n_beams, n_audio, batch, blocks, repeats, threads=2, block=BLOCK):
    """Wall-clock RTF with 1 and ``threads`` threads, and against the reference, in one run."""
    geo = ArrayGeometry.line(n_sensors, SPACING)
    power = fan(0.0, 180.0, 180.0 / (n_beams - 1))
    audio = fan(30.0, 150.0, 120.0 / max(n_audio - 1, 1))[:n_audio]
    x = (0.1 * np.random.default_rng(1).standard_normal((block * blocks, n_sensors))).astype(np.float32)
    beams = BeamSet(power, audio, bands_hz=[BAND])
    one = Beamformer(geo, C, FS, block, beams, power_batch_blocks=batch)
    many = Beamformer(geo, C, FS, block, beams, power_batch_blocks=batch, threads=threads)
    ref = ReferenceBeamformer(geo, power, audio, block)
    for bf in (one, many):
        for i in range(4):
            bf.process(x[i * block:(i + 1) * block])
    t1, tn, tr, cpu_n = [], [], [], []
    ticks0 = cpu_ticks()
    for _ in range(repeats):
        t1.append(_wall_per_block(one.process, x, blocks, block))
        # Helpers that slept while the other engine ran start on the caller's core and run the
        # first few blocks near one-thread speed (measured 2026-12-05: 670, 530, 470, 450 us, then
        # 380-400); a continuous run, offline or live (whose helpers spin two block periods), does
        # not pay that, so a few untimed blocks wake them first.
        _wall_per_block(many.process, x, 4, block)
        c0 = time.process_time()
        tn.append(_wall_per_block(many.process, x, blocks, block))
        cpu_n.append((time.process_time() - c0) / blocks)
        tr.append(_wall_per_block(ref.process, x, min(blocks, 24), block))
    steal = steal_share(ticks0, cpu_ticks())
    many.close()
    t1, tn, tr = np.array(t1), np.array(tn), np.array(tr)
    sec = block / FS
    return {"sensors": n_sensors, "beams": len(power), "audio_beams": n_audio, "block": block,
            "power_batch_blocks": batch, "threads": threads,
            "rtf_1": sec / float(np.median(t1)), "rtf_n": sec / float(np.median(tn)),
            "speedup": float(np.median(t1 / tn)), "ratio_ref_1": float(np.median(tr / t1)),
            "ratio_ref_n": float(np.median(tr / tn)), "reference_rtf": sec / float(np.median(tr)),
            "cpu_ms_per_block_n": 1e3 * float(np.median(cpu_n)), "host_steal_share": steal}


def measure_process(threads, repeats, seconds=10.0, n_sensors=64, n_beams=181, n_audio=8, detect=False):
    """``process`` end to end against the engine's own time on the same input, alternating; with
    ``detect`` false the detection stage is off (the same work as the engine's), else on (its
    cost shows as the difference)."""
    import tempfile  # noqa: PLC0415

    from beamtap.service import offline  # noqa: PLC0415
    from beamtap.service.config import loads  # noqa: PLC0415
    from beamtap.wavfile import WavWriter  # noqa: PLC0415

    audio = ", ".join(f"[{a:g}, 0.0]" for a in np.linspace(30.0, 170.0, n_audio))
    text = (f"[array]\nline = {{ count = {n_sensors}, spacing_m = {SPACING} }}\n[medium]\nsound_speed_mps = {C}\n"
            f"[input]\nsamplerate_hz = {FS:g}\nblock_frames = {BLOCK}\n[beams]\n"
            f"fan = {{ from_deg = 0.0, to_deg = 180.0, step_deg = {180.0 / (n_beams - 1)!r} }}\n"
            f"band_hz = [{BAND[0]}, {BAND[1]}]\naudio_deg = [{audio}]\n"
            f"[detect]\nenabled = {'true' if detect else 'false'}\n")
    config = loads(text, "<bench>")
    frames = int(seconds * FS)
    x = (0.1 * np.random.default_rng(2).standard_normal((frames, n_sensors))).astype(np.float32)
    with tempfile.TemporaryDirectory() as tmp:
        wav = Path(tmp) / "in.wav"
        with WavWriter(wav, FS, n_sensors) as w:
            w.write(x)

        def engine_run():
            t0 = time.perf_counter()
            bf = Beamformer(config.geometry, C, FS, BLOCK, config.beams, threads=threads)
            for i in range(0, frames, BLOCK):
                bf.process(x[i:i + BLOCK])
            bf.process(np.zeros((bf.bulk_delay_samples, n_sensors), np.float32))
            bf.flush()
            bf.close()
            return time.perf_counter() - t0

        def process_run():
            t0 = time.perf_counter()
            offline.process(config, wav, Path(tmp) / "out", threads=threads)
            return time.perf_counter() - t0

        process_run()  # warm: imports, page cache
        t_engine, t_process = [], []
        ticks0 = cpu_ticks()
        for _ in range(repeats):
            t_engine.append(engine_run())
            t_process.append(process_run())
        steal = steal_share(ticks0, cpu_ticks())
    t_engine, t_process = np.array(t_engine), np.array(t_process)
    return {"threads": threads, "detect": detect, "seconds": seconds, "sensors": n_sensors, "beams": n_beams,
            "audio_beams": n_audio,
            "engine_s": float(np.median(t_engine)), "process_s": float(np.median(t_process)),
            "engine_rtf": seconds / float(np.median(t_engine)), "process_rtf": seconds / float(np.median(t_process)),
            "process_over_engine": float(np.median(t_process / t_engine)), "host_steal_share": steal}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer repeats (noisier)")
    ap.add_argument("--threads-only", action="store_true", help="only the thread and process sections")
    args = ap.parse_args()
    repeats = 3 if args.quick else 7
    blocks = 32 if args.quick else 64
    thread_rows = [measure_threads(s, nb, na, b, blocks, repeats) for s, nb, na in ((64, 181, 8), (16, 91, 4))
                   for b in (1, 4)]
    process_rows = [measure_process(t, max(5, repeats // 2 + 2), detect=d) for d in (False, True) for t in (1, 2)]
    thread_md = ["## Threads (wall clock, one run)", "",
                 "| sensors | power beams | audio beams | power batch | threads | RTF 1 thread | RTF N threads "
                 "| N / 1 | reference RTF | N threads / reference | CPU ms per block (N) | host steal |",
                 "|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in thread_rows:
        thread_md.append(f"| {r['sensors']} | {r['beams']} | {r['audio_beams']} | {r['power_batch_blocks']} | "
                         f"{r['threads']} | {r['rtf_1']:.1f} | {r['rtf_n']:.1f} | {r['speedup']:.2f}x | "
                         f"{r['reference_rtf']:.2f} | {r['ratio_ref_n']:.1f}x | {r['cpu_ms_per_block_n']:.3f} | "
                         f"{100 * r['host_steal_share']:.1f} % |")
    thread_md += ["", "## process end to end against the engine (10 s, 64 channels, float WAV)", "",
                  "| threads | detection | engine s | process s | engine RTF | process RTF | process / engine "
                  "| host steal |",
                  "|---|---|---|---|---|---|---|---|"]
    for r in process_rows:
        thread_md.append(f"| {r['threads']} | {'on' if r['detect'] else 'off'} | {r['engine_s']:.3f} | "
                         f"{r['process_s']:.3f} | {r['engine_rtf']:.1f} | "
                         f"{r['process_rtf']:.1f} | {r['process_over_engine']:.3f} | "
                         f"{100 * r['host_steal_share']:.1f} % |")
    if args.threads_only:
        print("\n".join(thread_md))
        return
    headline = [measure(16, 91, 4, b, blocks, repeats) for b in (1, 4)]
    headline += [measure(64, 181, 8, b, blocks, repeats) for b in (1, 4)]
    # the same with numpy forming the sums (an install without a C compiler)
    headline += [measure(s, nb, na, 4, blocks, repeats, compiled=False) for s, nb, na in ((16, 91, 4), (64, 181, 8))]
    scaling = []
    for s in (16, 32, 64):
        scaling.append(measure(s, 91, 4, 4, blocks // 2, repeats, reference=False))
    for nb in (46, 181, 361):
        scaling.append(measure(32, nb, 4, 4, blocks // 2, repeats, reference=False))
    for blk in (256, 512, 2048, 4096):
        scaling.append(measure(32, 91, 4, 4, max(8, blocks * BLOCK // blk // 2), repeats, reference=False, block=blk))
    info = {"machine": platform.processor() or platform.machine(), "python": platform.python_version(),
            "numpy": np.__version__, "cpus": os.cpu_count(), "date": time.strftime("%Y-%m-%d"),
            "repeats": repeats, "blocks": blocks}
    (HERE / "results.json").write_text(json.dumps({"info": info, "headline": headline, "scaling": scaling,
                                                   "threads": thread_rows, "process": process_rows}, indent=2))
    md = [f"# Engine benchmark ({info['date']}, {info['machine']}, Python {info['python']}, "
          f"numpy {info['numpy']}, one thread)", "",
          f"48 kHz, line arrays of {SPACING} m at {C:g} m/s, band {BAND[0]:g}-{BAND[1]:g} Hz; "
          f"medians of {repeats} repeats of {blocks} blocks; CPU time of this process. Engine and "
          "reference alternate repeat by repeat; engine / reference is the median of the per-repeat ratios. "
          "rows: what the engine's history holds (sensor signals, or sums and differences of mirror pairs). "
          "sums: the compiled kernels or numpy (an install without a C compiler). "
          "Host steal: share of the machine's CPU time the hypervisor gave to others meanwhile (/proc/stat).", "",
          "## Required cases", "",
          "| sensors | power beams | audio beams | block | power batch (extra latency) | FFT | rows | sums "
          "| steering MB | engine ms/block | engine RTF | reference RTF | engine / reference | host steal |",
          "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in headline:
        md.append(f"| {r['sensors']} | {r['beams']} | {r['audio_beams']} | {r['block']} | "
                  f"{r['power_batch_blocks']} ({r['power_extra_latency_ms']:.1f} ms) | {r['fft_size']} | "
                  f"{'mirror pairs' if r['mirror_pair_rows'] else 'sensors'} | "
                  f"{'compiled' if r['compiled'] else 'numpy'} | {r['steering_mb']:.1f} | "
                  f"{r['engine_ms_per_block']:.3f} | {r['engine_rtf']:.1f} | "
                  f"{r['reference_rtf']:.2f} | {r['speedup_vs_reference']:.1f}x | {100 * r['host_steal_share']:.1f} % |")
    md += ["", "## How cost grows (power batch 4)", "",
           "| sensors | power beams | audio beams | block | FFT | ms/block | µs per frame | RTF | memory growth |",
           "|---|---|---|---|---|---|---|---|---|"]
    for r in scaling:
        md.append(f"| {r['sensors']} | {r['beams']} | {r['audio_beams']} | {r['block']} | {r['fft_size']} | "
                  f"{r['engine_ms_per_block']:.3f} | {1e3 * r['engine_ms_per_block'] / r['block']:.2f} | "
                  f"{r['engine_rtf']:.1f} | {r['memory_growth_bytes']} B |")
    md += [""] + thread_md
    md += ["", "Rerun: `python bench/engine_bench.py` (a few minutes here; `--threads-only` for the last two "
           "tables).", ""]
    (HERE / "results.md").write_text("\n".join(md))
    print("\n".join(md))


if __name__ == "__main__":
    main()
