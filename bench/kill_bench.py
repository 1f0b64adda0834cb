"""Crash loss of a recording: SIGKILL the recording service N times, measure what was lost.

Usage::

    python bench/kill_bench.py [--runs 10]    # writes bench/kill_results.md and kill_results.json

Each run starts ``beamtap serve`` (8 hydrophones, 16 kHz, blocks of 512, the simulated scene,
raw published and recorded in 2 s segments), subscribes to ``raw``, waits a random 3–8 s of
recording, notes the end of the newest raw message published, SIGKILLs the service, and reads
the session back (manifest and WAV headers as they were left). Loss = stream time published
but not in the session's raw segments. Every segment must read with scipy.io.wavfile and join
the previous one sample-exactly.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy.io import wavfile

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from beamtap.client import Controller, Subscriber  # noqa: E402
from beamtap.processes import wait_ready  # noqa: E402
from beamtap.session import read_manifest, segments  # noqa: E402

FS, BLOCK = 16000, 512
CONFIG = """[array]
line = {{ count = 8, spacing_m = 0.5 }}
[medium]
sound_speed_mps = 1500.0
[input]
source = "simulated"
samplerate_hz = {fs}
block_frames = {block}
[[input.scene]]
azimuth_deg = 70.0
signal = "noise"
band_hz = [300.0, 1400.0]
level_db = -20.0
[beams]
fan = {{ from_deg = 0.0, to_deg = 180.0, step_deg = 2.0 }}
band_hz = [300.0, 1400.0]
audio_deg = [[70.0, 0.0]]
[publish]
raw = true
[record]
folder = "{rec}"
what = ["raw", "audio", "power"]
segment_s = 2.0
on_start = true
min_free_mb = 1.0
"""


def one_run(tmp: Path, wait_s: float) -> float:
    rec = tmp / "rec"
    cfg = tmp / "c.toml"
    cfg.write_text(CONFIG.format(fs=FS, block=BLOCK, rec=rec))
    ready = tmp / "ready.json"
    log = open(tmp / "log.txt", "w")
    proc = subprocess.Popen([sys.executable, "-m", "beamtap", "serve", "--config", str(cfg), "--publish",
                             "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*", "--ready-file", str(ready)],
                            stdout=log, stderr=subprocess.STDOUT)
    try:
        ep = wait_ready(proc, ready, 60)
        with Subscriber(ep["publish"], topics=["raw"], timeout_s=10, queue=100000) as sub, \
                Controller(ep["control"]) as ctl:
            deadline = time.monotonic() + 30
            while ctl.request("record", action="status")["record"]["frames_written"].get("raw", 0) == 0:
                assert time.monotonic() < deadline, "not recording"
                time.sleep(0.05)
            end = time.monotonic() + wait_s
            last = sub.recv()
            while time.monotonic() < end:
                last = sub.recv()
            while sub.socket.poll(0):
                last = sub.recv()
            end_published = last.first_sample + len(last.data)
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
        log.close()
    session = rec / os.listdir(rec)[0]
    read_manifest(session)
    segs = segments(session, "raw")
    data = [wavfile.read(session / s["file"])[1] for s in segs]
    for a, b, d in zip(segs, segs[1:], data):
        assert b["first_sample"] == a["first_sample"] + len(d), "segments do not join"
    recorded_end = segs[-1]["first_sample"] + len(data[-1])
    return (end_published - recorded_end) / FS


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=10)
    args = ap.parse_args()
    rng = random.Random(20261205)
    losses = []
    for i in range(args.runs):
        with tempfile.TemporaryDirectory() as tmp:
            lost = one_run(Path(tmp), rng.uniform(3.0, 8.0))
        losses.append(lost)
        print(f"run {i + 1}: {1e3 * lost:.0f} ms lost", flush=True)
    out = {"date": time.strftime("%Y-%m-%d"), "runs": len(losses), "lost_ms": [round(1e3 * x, 1) for x in losses],
           "worst_ms": round(1e3 * max(losses), 1), "median_ms": round(1e3 * float(np.median(losses)), 1)}
    here = Path(__file__).resolve().parent
    (here / "kill_results.json").write_text(json.dumps(out, indent=1) + "\n")
    (here / "kill_results.md").write_text(
        f"# SIGKILL crash loss, {out['date']}\n\n`python bench/kill_bench.py --runs {len(losses)}`\n\n"
        f"Lost per run (ms of published raw stream not in the session): {', '.join(map(str, out['lost_ms']))}\n\n"
        f"Worst {out['worst_ms']} ms, median {out['median_ms']} ms.\n")
    print(f"worst {out['worst_ms']} ms, median {out['median_ms']} ms")
    return 0


if __name__ == "__main__":
    sys.exit(main())
