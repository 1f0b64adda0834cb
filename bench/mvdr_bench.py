"""MVDR beams' speed: real-time factor and the longest block, against delay-and-sum in the same run.

Usage::

    python bench/mvdr_bench.py      # writes bench/mvdr_results.md and mvdr_results.json

The issue's cases: 16 sensors x 91 beams x 4 audio with the weights updated
every 0.1 s (target RTF >= 30), 64 sensors x 181 beams x 8 audio updated
every 0.5 s (target RTF >= 5), and no block longer than half the block
duration. Input: white noise plus two plane waves (made here), 48 kHz,
blocks of 1024, one thread (BLAS too). CPU time of this process; the
longest block is wall time. Delay-and-sum on the same input alternates
with MVDR, repeat by repeat.
"""

from __future__ import annotations

import os

for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_v] = "1"

import json  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from beamtap.service.engine import ArrayGeometry, Beamformer  # noqa: E402
from beamtap.service.engine.beamformer import BeamSet  # noqa: E402
from beamtap.service.engine.directions import fan, unit_vectors  # noqa: E402
from beamtap.service.engine.mvdr import AdaptiveBeamformer, AdaptiveSettings  # noqa: E402
from beamtap.memory import keep_freed_memory  # noqa: E402

keep_freed_memory()  # as the beamtap command does (see beamtap/memory.py)

HERE = Path(__file__).resolve().parent
FS, C, BLOCK = 48000.0, 1500.0, 1024


def signal(geo, seconds, rng):
    n = int(seconds * FS) // BLOCK * BLOCK
    f = np.fft.rfftfreq(n, 1 / FS)
    x = 0.05 * rng.standard_normal((n, geo.n_sensors))
    for az, amp in ((70.0, 0.3), (100.0, 0.1)):
        spec = np.fft.rfft(rng.standard_normal(n)) * amp
        spec[(f < 200) | (f > 3000)] = 0.0
        leads = geo.centred_positions_m @ unit_vectors(az, 0.0) / C
        x += np.stack([np.fft.irfft(spec * np.exp(2j * np.pi * f * a), n) for a in leads], axis=1)
    return x.astype(np.float32)


def measure(sensors, n_beams, n_audio, update_s, repeats=5, seconds=4.0):
    geo = ArrayGeometry.line(sensors, 0.5)
    beams = BeamSet(fan(0.0, 180.0, 180.0 / (n_beams - 1)), fan(30.0, 150.0, 120.0 / max(n_audio - 1, 1))[:n_audio],
                    bands_hz=[(300.0, 1400.0)])
    x = signal(geo, seconds, np.random.default_rng(5))
    blocks = len(x) // BLOCK
    t_das, t_mvdr, worst = [], [], []
    for _ in range(repeats):
        das = Beamformer(geo, C, FS, BLOCK, beams, pair_rows=False)
        t0 = time.process_time()
        for i in range(blocks):
            das.process(x[i * BLOCK:(i + 1) * BLOCK])
        t_das.append((time.process_time() - t0) / blocks)
        mvdr = AdaptiveBeamformer(Beamformer(geo, C, FS, BLOCK, beams, pair_rows=False),
                                  AdaptiveSettings(average_s=1.0, loading_db=10.0, update_s=update_s))
        longest = 0.0
        t0 = time.process_time()
        for i in range(blocks):
            w0 = time.perf_counter()
            mvdr.process(x[i * BLOCK:(i + 1) * BLOCK])
            longest = max(longest, time.perf_counter() - w0)
        t_mvdr.append((time.process_time() - t0) / blocks)
        worst.append(longest)
    block_s = BLOCK / FS
    return {"sensors": sensors, "beams": n_beams, "audio_beams": n_audio, "update_s": update_s,
            "das_rtf": block_s / float(np.median(t_das)), "mvdr_rtf": block_s / float(np.median(t_mvdr)),
            "longest_block_ms": 1e3 * float(np.median(worst)), "block_ms": 1e3 * block_s,
            "longest_share": float(np.median(worst)) / block_s, "updates": mvdr.updates,
            # where the time goes: the engine's own block, and what each weight update adds
            "das_ms_per_block": 1e3 * float(np.median(t_das)),
            "mvdr_extra_ms_per_update": 1e3 * (float(np.median(t_mvdr)) - float(np.median(t_das))) * update_s / block_s}


def main():
    rows = [measure(16, 91, 4, 0.1), measure(64, 181, 8, 0.5)]
    (HERE / "mvdr_results.json").write_text(json.dumps(rows, indent=2))
    md = [f"# MVDR speed ({time.strftime('%Y-%m-%d')})", "",
          "48 kHz, blocks of 1024 (21.3 ms), line arrays, band 300-1400 Hz (adaptive over it), one thread, "
          "medians of 5 repeats of 4 s. MVDR: service/engine/mvdr.py (weights by Cholesky solves per bin, "
          "written slice by slice into a steering the engine is not using, applied at a block boundary).", "",
          "| sensors | power beams | audio beams | update every | delay-and-sum RTF | MVDR RTF "
          "| longest block (ms) | longest / block | delay-and-sum ms / block | MVDR extra ms per update period |",
          "|---|---|---|---|---|---|---|---|---|---|"]
    for r in rows:
        md.append(f"| {r['sensors']} | {r['beams']} | {r['audio_beams']} | {r['update_s']:g} s | "
                  f"{r['das_rtf']:.1f} | {r['mvdr_rtf']:.1f} | {r['longest_block_ms']:.1f} | "
                  f"{100 * r['longest_share']:.0f} % | {r['das_ms_per_block']:.2f} | {r['mvdr_extra_ms_per_update']:.1f} |")
    md += ["", "Targets (issue 22): RTF >= 30 (16 sensors, every 0.1 s) and >= 5 (64, every 0.5 s); no block "
           "longer than half the block duration. Rerun: `python bench/mvdr_bench.py`.", ""]
    (HERE / "mvdr_results.md").write_text("\n".join(md))
    print("\n".join(md))


if __name__ == "__main__":
    main()
