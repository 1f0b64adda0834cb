"""What detection and tracking add to a block: 64 sensors, 181 power beams, 8 audio beams, 20 sources.

Usage::

    python bench/detect_bench.py        # writes bench/detect_results.md and detect_results.json

The input is made here: 20 broadband sources (exact FFT phase shifts, each
at its own bearing and level) and white sensor noise, 3 s at 48 kHz. The
engine alone and the engine followed by the detection stage run over the
same blocks, alternating repeat by repeat, one thread (BLAS too); the
figure is the median over repeats of the added time over the engine's
time. The issue's limit: at most 5 %.
"""

from __future__ import annotations

import os

for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_v] = "1"

import json  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from beamtap.service.engine import ArrayGeometry, Beamformer  # noqa: E402
from beamtap.service.engine.beamformer import BeamSet  # noqa: E402
from beamtap.service.engine.detect import DetectionStage, DetectSettings  # noqa: E402
from beamtap.service.engine.directions import fan, unit_vectors  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from hoststat import cpu_ticks, steal_share  # noqa: E402

HERE = Path(__file__).resolve().parent
FS, C, BLOCK, SENSORS = 48000.0, 1500.0, 1024, 64


def scene(seconds: float, n_sources: int, seed: int = 3) -> np.ndarray:
    geo = ArrayGeometry.line(SENSORS, 0.5)
    n = int(seconds * FS) // BLOCK * BLOCK
    rng = np.random.default_rng(seed)
    f = np.fft.rfftfreq(n, 1.0 / FS)
    x = np.zeros((n, SENSORS))
    bearings = np.linspace(12.0, 168.0, n_sources) + rng.uniform(-2, 2, n_sources)
    for az, level in zip(bearings, rng.uniform(-18.0, -10.0, n_sources)):
        spec = np.fft.rfft(rng.standard_normal(n)) * 10 ** (level / 20)
        spec[(f < 150) | (f > 3000)] = 0.0
        leads = geo.centred_positions_m @ unit_vectors(az, 0.0) / C
        x += np.stack([np.fft.irfft(spec * np.exp(2j * np.pi * f * a), n) for a in leads], axis=1)
    x += 10 ** (-40 / 20) * rng.standard_normal(x.shape)
    return x.astype(np.float32)


def main():
    from beamtap.service.publisher import Publisher  # noqa: PLC0415
    from beamtap.service.tracking import TrackingThread  # noqa: PLC0415

    repeats = int(os.environ.get("BENCH_REPEATS", "7"))
    x = scene(3.0, 20)
    geo = ArrayGeometry.line(SENSORS, 0.5)
    beams = BeamSet(fan(0.0, 180.0, 1.0), fan(30.0, 170.0, 20.0), bands_hz=[(800.0, 1450.0)], shading="hann")
    blocks = len(x) // BLOCK
    publisher = Publisher("tcp://127.0.0.1:*", "bench")

    def stage_for(bf):
        return DetectionStage(beams.power_deg, [ev.filter.taps for ev in bf.band_filters], BLOCK, FS,
                              DetectSettings(), lobe_deg=5.0)

    def run(mode: str, paced: bool = False) -> tuple:
        """Per block: the processing thread's wall time (alone, and handing rows to the detection
        thread: the block time the service reports), and (inline) the stage's own CPU time."""
        bf = Beamformer(geo, C, FS, BLOCK, beams)
        stage = stage_for(bf)
        thread = TrackingThread(stage, publisher) if mode == "thread" else None
        t_main = t_stage = 0.0
        dets = 0
        start = time.perf_counter()
        for i in range(blocks):
            if paced:  # blocks arrive at the stream's pace, as from a sound card
                time.sleep(max(0.0, start + i * BLOCK / FS - time.perf_counter()))
            t0, c0 = time.perf_counter(), time.thread_time()
            out = bf.process(x[i * BLOCK:(i + 1) * BLOCK])
            if mode == "thread":
                thread.offer(out.power_db, out.power_first_sample,
                             [{"first_sample": int(n), "time_utc": None} for n in out.power_first_sample])
            t1, c1 = time.perf_counter(), time.thread_time()
            if mode == "inline":
                rows = stage.rows(out.power_db, out.power_first_sample, [None] * len(out.power_db))
                dets += sum(len(r[2]) for r in rows)
                t_stage += time.thread_time() - c1
            t_main += (t1 - t0) if mode != "inline" else (c1 - c0)
        if thread is not None:
            thread.close()
            assert thread.dropped == 0, "the detection thread fell behind"
        return t_main / blocks, t_stage / blocks, dets / blocks

    run("inline")  # warm
    alone, handed, stage_t, added, dets_per_row = [], [], [], [], 0.0
    tight_added = []
    ticks0 = cpu_ticks()
    for _ in range(repeats):
        a0, _, _ = run("alone", paced=True)  # wall time per block, at the stream's pace
        a1, s1, dets_per_row = run("inline")
        a2, _, _ = run("thread", paced=True)
        b0, _, _ = run("alone")  # and back to back (an offline run's pace)
        b2, _, _ = run("thread")
        alone.append(a0)
        handed.append(a2)
        stage_t.append(s1)
        added.append((a2 - a0) / a0)
        tight_added.append((b2 - b0) / b0)
    steal = steal_share(ticks0, cpu_ticks())
    publisher.close()
    res = {"sensors": SENSORS, "power_beams": len(beams.power_deg), "audio_beams": len(beams.audio_deg),
           "sources": 20, "blocks": blocks, "repeats": repeats,
           "engine_ms_per_block": 1e3 * float(np.median(alone)),
           "processing_thread_ms_per_block": 1e3 * float(np.median(handed)),
           "added_to_block": float(np.median(added)),
           "added_back_to_back": float(np.median(tight_added)),
           "detection_thread_ms_per_row": 1e3 * float(np.median(stage_t)),
           "detection_share_of_engine": float(np.median(np.array(stage_t) / np.array(alone))),  # CPU / wall
           "detections_per_row": float(dets_per_row),
           "host_steal_share": steal, "date": time.strftime("%Y-%m-%d")}
    (HERE / "detect_results.json").write_text(json.dumps(res, indent=2))
    md = [f"# Detection and tracking cost ({res['date']})", "",
          f"{SENSORS} sensors (line), {res['power_beams']} power beams, {res['audio_beams']} audio beams, band "
          f"800-1450 Hz, Hann shading, 48 kHz, blocks of {BLOCK}, 20 broadband sources, {blocks} blocks per "
          f"repeat, medians of {repeats} repeats (wall time of the processing thread per block, as the service's "
          "block time; the detection thread's CPU time per row; one BLAS thread). The "
          "service runs detection and tracking on their own thread (service/tracking.py): the processing "
          "thread only hands each block's power rows over. Blocks come at the stream's pace (one every "
          "21.3 ms, as from a sound card), so the detection thread works while the processing thread "
          "waits; back to back (no wait, as offline) the two threads contend for the GIL. Host steal: share "
          "of the machine's CPU time the hypervisor gave to others meanwhile.", "",
          "| engine ms/block | processing thread with the hand-over, ms/block | added to the block "
          "| added, blocks back to back | detection thread ms per row | its CPU over the engine's "
          "| detections per row | host steal |",
          "|---|---|---|---|---|---|---|---|",
          f"| {res['engine_ms_per_block']:.3f} | {res['processing_thread_ms_per_block']:.3f} | "
          f"{100 * res['added_to_block']:.1f} % | {100 * res['added_back_to_back']:.1f} % | "
          f"{res['detection_thread_ms_per_row']:.3f} | "
          f"{100 * res['detection_share_of_engine']:.1f} % | {res['detections_per_row']:.1f} | "
          f"{100 * steal:.1f} % |", "",
          "Limit (issue): detection and tracking add at most 5 % to the block time. Rerun: "
          "`python bench/detect_bench.py` (BENCH_REPEATS sets the repeats).", ""]
    (HERE / "detect_results.md").write_text("\n".join(md))
    print("\n".join(md))


if __name__ == "__main__":
    main()
