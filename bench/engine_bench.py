"""Engine speed: real-time factor and ratio to a plain reference, measured in one run.

Usage::

    python bench/engine_bench.py            # full run, writes bench/results.md and results.json
    python bench/engine_bench.py --quick    # fewer repeats

Real-time factor (RTF) = seconds of audio processed per second of one core.
BLAS and the FFT are pinned to one thread. Each figure is the median of
several repeats; the machine is shared, so ratios measured in the same run
are the figures to trust.

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


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer repeats (noisier)")
    args = ap.parse_args()
    repeats = 3 if args.quick else 7
    blocks = 32 if args.quick else 64
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
    (HERE / "results.json").write_text(json.dumps({"info": info, "headline": headline, "scaling": scaling},
                                                  indent=2))
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
    md += ["", "Rerun: `python bench/engine_bench.py` (under a minute here; longer on a slow host).", ""]
    (HERE / "results.md").write_text("\n".join(md))
    print("\n".join(md))


if __name__ == "__main__":
    main()
