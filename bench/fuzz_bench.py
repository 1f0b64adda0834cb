"""Long fuzz run (not in CI): random control requests and forged stream messages against live services.

Usage::

    python bench/fuzz_bench.py [--control 100000] [--stream 100000]   # → bench/fuzz_results.md / .json

Part 1 starts ``beamtap serve`` (8 hydrophones, 16 kHz, recording into a temporary folder, with a
temporary HOME) and sends ``--control`` requests on one REQ socket: a third random msgpack of any
shape, the rest built from the real schema (every command and key, nested beam tables) with
random values including nil, NaN, infinities, huge and negative numbers; about one in twenty is
a legal beam change, so retargets really happen. Every request must be answered within 30 s
with ``ok`` and, when false, a one-line error. A subscriber follows the power topic throughout:
its sequence numbers must be contiguous or the gap counted by the publisher.

Part 2 starts a ``stream``-source service fed by this script's own PUB socket: genuine raw blocks
paced in real time, and ``--stream`` forged messages among them (random headers, dtypes, shapes,
payloads, frame counts). Afterwards every break in the downstream power stream must be a flagged
gap and the service must still run.

Reported: requests answered, service deaths, RSS before and after, retargets, refusals.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import random
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import msgpack
import numpy as np
import zmq

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from beamtap.client import Controller, Subscriber  # noqa: E402
from beamtap.client.protocol import encode, unpack  # noqa: E402
from beamtap.processes import stop, wait_ready  # noqa: E402

FS, BLOCK, CH = 16000, 512, 8
BASE = """[array]
line = {{ count = {ch}, spacing_m = 0.5 }}
[medium]
sound_speed_mps = 1500.0
[input]
source = "{source}"
samplerate_hz = {fs}
block_frames = {block}
{input_extra}
[beams]
fan = {{ from_deg = 0.0, to_deg = 180.0, step_deg = 2.0 }}
band_hz = [300.0, 3000.0]
audio_deg = [[60.0, 0.0]]
[record]
folder = "{rec}"
what = ["power"]
segment_s = 30.0
min_free_mb = 1.0
"""
SPECIAL = [None, True, False, 0, -1, 1, 2**63 - 1, -2**63, 2**64 - 1, float("nan"), float("inf"), -float("inf"),
           1e308, -1e308, 1e-300, "", "x" * 300, b"\x00\xff", [], {}]


def rand_scalar(r: random.Random):
    k = r.randrange(6)
    if k == 0:
        return r.choice(SPECIAL)
    if k == 1:
        return r.uniform(-400, 400)
    if k == 2:
        return r.randint(-400, 400)
    if k == 3:
        return "".join(chr(r.randrange(32, 0x2FF)) for _ in range(r.randrange(10)))
    if k == 4:
        return bytes(r.randrange(256) for _ in range(r.randrange(10)))
    return r.random() < 0.5


def rand_any(r: random.Random, depth=0):
    if depth > 4 or r.random() < 0.5:
        return rand_scalar(r)
    if r.random() < 0.5:
        return [rand_any(r, depth + 1) for _ in range(r.randrange(5))]
    return {(r.choice(["cmd", "set", "fan", "x", ""]) if r.random() < 0.5 else r.randrange(-3, 3)):
            rand_any(r, depth + 1) for _ in range(r.randrange(5))}


def legal_set(r: random.Random) -> dict:
    lo = r.uniform(0, 90)
    low = r.uniform(100, 3000)
    return {"fan": {"from_deg": lo, "to_deg": r.uniform(lo, 180), "step_deg": r.uniform(0.5, 10)},
            "audio_deg": [[r.uniform(0, 180), 0.0] for _ in range(r.randrange(5))],
            "band_hz": [low, r.uniform(low + 50, 7000)],
            "shading": r.choice(["uniform", "hann", "hamming", "chebyshev", "taylor"])}


def schema_request(r: random.Random) -> dict:
    cmd = r.choice(["ping", "status", "config", "beams", "beams", "record", "mark", "nope"])
    req = {"cmd": cmd if r.random() > 0.05 else rand_scalar(r)}
    if cmd == "beams":
        s = legal_set(r)
        if r.random() < 0.7:  # one key made random
            s[r.choice(list(s) + ["grid", "directions_deg", "sidelobe_db", "transition_hz", "nbar"])] = rand_any(r)
        if r.random() < 0.9:
            req["set"] = s
    elif cmd == "record":
        req["action"] = r.choice(["start", "stop", "status", rand_scalar(r)])
        if r.random() < 0.5:
            req["what"] = r.choice([["power"], ["raw", "video"], rand_any(r)])
        if r.random() < 0.3:
            req["label"] = rand_scalar(r)
    elif cmd == "mark":
        req["text"] = r.choice(["event", rand_scalar(r)])
    if r.random() < 0.1:
        req[r.choice(["extra", "set", "text"])] = rand_any(r)
    return req


def rss_kb(pid: int) -> int:
    for line in open(f"/proc/{pid}/status"):
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    return 0


def start(tmp: Path, source="simulated", input_extra=""):
    home = tmp / "home"
    home.mkdir(exist_ok=True)
    cfg = tmp / f"{source}.toml"
    cfg.write_text(BASE.format(ch=CH, source=source, fs=FS, block=BLOCK, input_extra=input_extra, rec=tmp / "rec"))
    ready = tmp / f"ready-{source}.json"
    log = open(tmp / f"log-{source}.txt", "w")
    proc = subprocess.Popen([sys.executable, "-m", "beamtap", "serve", "--config", str(cfg), "--publish",
                             "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*", "--ready-file", str(ready)],
                            stdout=log, stderr=subprocess.STDOUT, env=dict(os.environ, HOME=str(home)))
    ep = wait_ready(proc, ready, 60)
    assert ep, (tmp / f"log-{source}.txt").read_text()
    return proc, ep, log


class PowerWatch:
    """Follows the power topic; afterwards, breaks not counted as drops or flagged gaps."""

    def __init__(self, endpoint):
        self.frames = []
        self.stop = threading.Event()
        self.t = threading.Thread(target=self._run, args=(endpoint,), daemon=True)
        self.t.start()

    def _run(self, endpoint):
        with Subscriber(endpoint, topics=["power"], timeout_s=0.5, queue=1000000) as sub:
            while not self.stop.is_set():
                try:
                    f = sub.recv()
                except TimeoutError:
                    continue
                self.frames.append((f.seq, f.first_sample, bool(f.gap)))

    def finish(self):
        self.stop.set()
        self.t.join(timeout=70)
        seq = np.array([f[0] for f in self.frames])
        missing = int(np.sum(np.diff(seq) - 1)) if len(seq) > 1 else 0
        unflagged = sum(1 for a, b in zip(self.frames, self.frames[1:])
                        if b[1] - a[1] != BLOCK and not b[2] and b[0] == a[0] + 1)
        return len(self.frames), missing, unflagged


def control_part(n: int, tmp: Path, r: random.Random) -> dict:
    proc, ep, log = start(tmp)
    watch = PowerWatch(ep["publish"])
    time.sleep(1.0)  # let the watcher subscribe (a bench, not a test: a fixed settle time is fine)
    rss0 = rss_kb(proc.pid)
    out = {"sent": 0, "answered": 0, "ok": 0, "refused": 0, "internal_errors": 0, "unanswered": 0}
    ctx = zmq.Context.instance()
    req = ctx.socket(zmq.REQ)
    req.setsockopt(zmq.LINGER, 0)
    req.connect(ep["control"])
    t0 = time.monotonic()
    for i in range(n):
        obj = rand_any(r) if r.random() < 1 / 3 else schema_request(r)
        req.send(msgpack.packb(obj, use_bin_type=True))
        out["sent"] += 1
        if not req.poll(30000):
            out["unanswered"] += 1
            req.close()
            req = ctx.socket(zmq.REQ)
            req.setsockopt(zmq.LINGER, 0)
            req.connect(ep["control"])
            continue
        reply = unpack(req.recv())
        out["answered"] += 1
        if reply.get("ok"):
            out["ok"] += 1
        else:
            out["refused"] += 1
            err = reply.get("error", "")
            if "internal error" in err or "\n" in err:
                out["internal_errors"] += 1
                print("internal:", obj, err, flush=True)
        if proc.poll() is not None:
            break
        if (i + 1) % 10000 == 0:
            print(f"control {i + 1}: {out} rss {rss_kb(proc.pid)} kB, {time.monotonic() - t0:.0f} s", flush=True)
    req.close()
    alive = proc.poll() is None
    rss1 = rss_kb(proc.pid) if alive else 0
    with Controller(ep["control"]) as ctl:
        ctl.record("stop")
        st = ctl.status()
    frames, missing, unflagged = watch.finish()
    text = (tmp / "log-simulated.txt").read_text()
    out.update(deaths=0 if alive else 1, rss_before_kb=rss0, rss_after_kb=rss1,
               retargets=text.count("beams retargeted"), power_messages=frames, power_missing=missing,
               publisher_dropped=st["messages_dropped"], unflagged_breaks=unflagged, gaps=st["gaps"],
               seconds=round(time.monotonic() - t0, 1))
    stop(proc)
    log.close()
    return out


def forged(r: random.Random, last: int) -> list:
    h = {}
    for key, good in (("v", 2), ("first_sample", last + r.choice([-BLOCK, 0, BLOCK, 10 * BLOCK, 10**12])),
                      ("time_utc", 1.8e9), ("stream", "up"), ("dtype", "<f4"), ("shape", [BLOCK, CH]),
                      ("samplerate_hz", FS)):
        k = r.randrange(4)
        if k == 0:
            continue
        h[key] = good if k == 1 else rand_scalar(r) if k == 2 else r.choice(
            [-5000, 2**63, "5", "<f8", "<i2", "|S4", [BLOCK, CH // 2], [0, CH], [BLOCK * 4, CH], float("nan")])
    payload = r.choice([b"", b"\x00" * 7, np.zeros((BLOCK, CH), np.float32).tobytes(), os.urandom(r.randrange(100))])
    parts = [r.choice([b"raw", b"raw", b"power", os.urandom(3)]), msgpack.packb(h, use_bin_type=True)
             if r.random() < 0.95 else os.urandom(8), payload]
    return parts[:r.choice([1, 2, 3, 3, 3, 3])] + ([b"extra"] if r.random() < 0.05 else [])


def stream_part(n: int, tmp: Path, r: random.Random) -> dict:
    ctx = zmq.Context.instance()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.SNDHWM, 100000)
    pub.bind("tcp://127.0.0.1:*")
    endpoint = pub.getsockopt(zmq.LAST_ENDPOINT).decode()
    proc, ep, log = start(tmp, "stream", f'endpoint = "{endpoint}"')
    lock = threading.Lock()
    state = {"next": 0, "stop": False}
    rng = np.random.default_rng(1)

    def genuine():
        t0 = time.monotonic()
        while not state["stop"]:
            left = t0 + (state["next"] + BLOCK) / FS - time.monotonic()
            if left > 0:
                time.sleep(min(left, 0.02))
                continue
            data = (0.01 * rng.standard_normal((BLOCK, CH))).astype(np.float32)
            with lock:
                pub.send_multipart(encode("raw", {"first_sample": state["next"], "samplerate_hz": FS,
                                                  "time_utc": 1.8e9 + state["next"] / FS, "stream": "up"}, data))
                state["next"] += BLOCK

    g = threading.Thread(target=genuine, daemon=True)
    g.start()
    with Controller(ep["control"]) as ctl:
        while ctl.status()["frames_captured"] == 0:
            time.sleep(0.05)
    watch = PowerWatch(ep["publish"])
    time.sleep(1.0)
    rss0 = rss_kb(proc.pid)
    t0 = time.monotonic()
    for i in range(n):
        with lock:
            pub.send_multipart(forged(r, state["next"]))
        if i % 200 == 199:
            time.sleep(0.01)  # keep the forged traffic from starving the genuine blocks entirely
        if (i + 1) % 10000 == 0:
            print(f"stream {i + 1} forged, rss {rss_kb(proc.pid)} kB, {time.monotonic() - t0:.0f} s", flush=True)
        if proc.poll() is not None:
            break
    time.sleep(2.0)
    alive = proc.poll() is None
    with Controller(ep["control"]) as ctl:
        st = ctl.status()
    frames, missing, unflagged = watch.finish()
    state["stop"] = True
    g.join()
    out = {"forged_sent": n, "deaths": 0 if alive else 1, "rss_before_kb": rss0, "rss_after_kb": rss_kb(proc.pid),
           "rejected": st["source_rejected"], "rejected_total": sum(st["source_rejected"].values()),
           "gaps": st["gaps"], "state": st["state"], "power_messages": frames, "power_missing": missing,
           "publisher_dropped": st["messages_dropped"], "unflagged_breaks": unflagged,
           "seconds": round(time.monotonic() - t0, 1)}
    stop(proc)
    log.close()
    pub.close()
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--control", type=int, default=100000)
    ap.add_argument("--stream", type=int, default=100000)
    args = ap.parse_args()
    r = random.Random(20261205)
    with tempfile.TemporaryDirectory() as tmp:
        c = control_part(args.control, Path(tmp), r)
        print("control:", c, flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        s = stream_part(args.stream, Path(tmp), r)
        print("stream:", s, flush=True)
    out = {"date": time.strftime("%Y-%m-%d"), "control": c, "stream": s}
    here = Path(__file__).resolve().parent
    (here / "fuzz_results.json").write_text(json.dumps(out, indent=1) + "\n")
    lines = [f"# Long fuzz run, {out['date']}", "", "`python bench/fuzz_bench.py "
             f"--control {args.control} --stream {args.stream}`", "", "| part | figure | value |", "|---|---|---|"]
    lines += [f"| control | {k} | {v} |" for k, v in c.items()]
    lines += [f"| stream | {k} | {v} |" for k, v in s.items()]
    (here / "fuzz_results.md").write_text("\n".join(lines) + "\n")
    return 0 if c["deaths"] == 0 and s["deaths"] == 0 and c["unanswered"] == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
