"""What CURVE encryption costs the live service: CPU per block and latency, secured against not.

Usage::

    python bench/curve_bench.py [--seconds 10] [--repeats 3]   # → bench/curve_results.md / .json

Two cases, each run with and without ``[security]`` alternately in the same bench run (the
machine's speed drifts, so pairs are compared, and medians reported):

- ``beams``: 16 hydrophones, 91-beam fan, 4 audio beams, 48 kHz, blocks of 1024 (power + audio);
- ``raw``: 64 channels published raw (12.3 MB/s) beside a small 19-beam fan.

One subscriber on loopback (with operator keys when secured) takes every message. Measured: the
service process's CPU time (user + system, from /proc, which includes ZeroMQ's I/O thread where
the encryption runs) per block, and the p99 of arrival time minus the moment the message's last
input frame was captured.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from beamtap.client import Subscriber  # noqa: E402
from beamtap.processes import stop, wait_ready  # noqa: E402

FS, BLOCK = 48000, 1024
CASES = {
    "beams": ("[array]\nline = {{ count = 16, spacing_m = 0.5 }}\n", 'fan = { from_deg = 0.0, to_deg = 180.0, '
              'step_deg = 2.0 }\naudio_deg = [[30.0, 0.0], [70.0, 0.0], [110.0, 0.0], [150.0, 0.0]]\n', False,
              ["power", "audio"]),
    "raw": ("[array]\nline = {{ count = 64, spacing_m = 0.5 }}\n", 'fan = { from_deg = 0.0, to_deg = 180.0, '
            'step_deg = 10.0 }\n', True, ["power", "raw"]),
}


def config(case: str, security: str) -> str:
    array, beams, raw, _ = CASES[case]
    return (array.format() + "[medium]\nsound_speed_mps = 1500.0\n[input]\nsource = \"simulated\"\n"
            f"samplerate_hz = {FS}\nblock_frames = {BLOCK}\nscene_noise_db = -50.0\n[beams]\n{beams}"
            f"band_hz = [300.0, 1400.0]\n[publish]\nraw = {'true' if raw else 'false'}\nsend_queue = 1000\n{security}")


def cpu_s(pid: int) -> float:
    fields = open(f"/proc/{pid}/stat").read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def run(case: str, secure: bool, keys: dict, seconds: float, tmp: Path) -> dict:
    sec = (f'[security]\nserver_key = "{keys["server_secret"]}"\nclients = "{keys["clients"]}"\n' if secure else "")
    cfg = tmp / f"{case}-{secure}.toml"
    cfg.write_text(config(case, sec))
    ready = tmp / f"ready-{case}-{secure}.json"
    ready.unlink(missing_ok=True)
    proc = subprocess.Popen([sys.executable, "-m", "beamtap", "serve", "--config", str(cfg), "--publish",
                             "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*", "--ready-file", str(ready),
                             "--log-level", "WARNING"])
    try:
        ep = wait_ready(proc, ready, 60)
        client = {"key": keys["op_secret"], "server_key": keys["server_public"]} if secure else {}
        lat = []
        with Subscriber(ep["publish"], topics=CASES[case][3], timeout_s=10, queue=100000, **client) as sub:
            warm = time.monotonic() + 2.0
            while time.monotonic() < warm:
                sub.recv()
            c0, t0, blocks = cpu_s(proc.pid), time.monotonic(), 0
            while time.monotonic() < t0 + seconds:
                f = sub.recv()
                now = time.time()
                n = len(f.data) if f.topic in ("audio", "raw") else BLOCK
                if f.topic in ("audio", "raw"):
                    blocks += 1
                    lat.append(now - (f.time_utc + n / FS))  # since the block's last input frame
            cpu = cpu_s(proc.pid) - c0
    finally:
        stop(proc)
    return {"cpu_ms_per_block": 1e3 * cpu / max(blocks, 1), "latency_p99_ms": 1e3 * float(np.percentile(lat, 99)),
            "blocks": blocks}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="beamtap-curve-"))
    keys = {}
    for name in ("service", "operator"):
        subprocess.run([sys.executable, "-m", "beamtap", "keys", name, "--out", str(tmp / "keys")], check=True,
                       capture_output=True)
    (tmp / "clients").mkdir()
    shutil.copy(tmp / "keys" / "operator.key", tmp / "clients")
    keys = {"server_secret": tmp / "keys" / "service.key_secret", "server_public": tmp / "keys" / "service.key",
            "op_secret": tmp / "keys" / "operator.key_secret", "clients": tmp / "clients"}
    results = {c: {"plain": [], "curve": []} for c in CASES}
    for r in range(args.repeats):
        for case in CASES:
            for secure in (False, True) if r % 2 == 0 else (True, False):
                out = run(case, secure, keys, args.seconds, tmp)
                results[case]["curve" if secure else "plain"].append(out)
                print(case, "curve" if secure else "plain", out, flush=True)
    block_ms = 1e3 * BLOCK / FS
    summary = {}
    for case, modes in results.items():
        med = {m: {k: float(np.median([x[k] for x in v])) for k in ("cpu_ms_per_block", "latency_p99_ms")}
               for m, v in modes.items()}
        added = med["curve"]["cpu_ms_per_block"] - med["plain"]["cpu_ms_per_block"]
        summary[case] = {"plain": med["plain"], "curve": med["curve"], "added_cpu_ms_per_block": added,
                         "added_cpu_share_of_core": added / block_ms,
                         "added_latency_p99_ms": med["curve"]["latency_p99_ms"] - med["plain"]["latency_p99_ms"]}
    out = {"date": time.strftime("%Y-%m-%d"), "seconds": args.seconds, "repeats": args.repeats, "summary": summary,
           "runs": results}
    here = Path(__file__).resolve().parent
    (here / "curve_results.json").write_text(json.dumps(out, indent=1) + "\n")
    lines = [f"# CURVE cost, {out['date']}", "", f"`python bench/curve_bench.py --seconds {args.seconds:g} --repeats "
             f"{args.repeats}`; medians over the repeats, secured and plain alternating.", "",
             "| case | CPU ms/block plain | CURVE | added (share of a core) | latency p99 ms plain | CURVE |",
             "|---|---|---|---|---|---|"]
    for case, s in summary.items():
        lines.append(f"| {case} | {s['plain']['cpu_ms_per_block']:.2f} | {s['curve']['cpu_ms_per_block']:.2f} | "
                     f"{s['added_cpu_ms_per_block']:+.2f} ({100 * s['added_cpu_share_of_core']:+.1f} %) | "
                     f"{s['plain']['latency_p99_ms']:.1f} | {s['curve']['latency_p99_ms']:.1f} |")
    (here / "curve_results.md").write_text("\n".join(lines) + "\n")
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    sys.exit(main())
