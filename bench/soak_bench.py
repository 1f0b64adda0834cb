"""Paced soak (not in CI): the live service on a JACK-paced virtual sound card for 10 minutes,
with a CPU hog on both cores for part of it.

Usage::

    python bench/soak_bench.py [--minutes 10] [--hog-from 3 --hog-to 6]   # → bench/soak_results.md / .json

Needs jackd2, libasound2-plugins and libportaudio2 (``sh deploy/quickstart.sh test`` installs them).
A private JACK server with the dummy driver paces 8 capture channels at 48 kHz; ALSA's ``jack``
PCM under a ``file`` PCM fed by a raw plane-wave file (in a temporary HOME's ``.asoundrc``) is the
sound card PortAudio captures. ``beamtap serve`` runs on it (8 hydrophones, 181-beam fan, 2 audio
beams); this script subscribes to power and audio for the whole run and samples the service's
RSS every second. Between ``--hog-from`` and ``--hog-to`` minutes two busy processes load both
cores. Reported: input overflows, gaps flagged, frames lost, max RSS, and unflagged breaks (a
jump in ``first_sample`` or ``seq`` that the message does not flag and the publisher did not count)
— which must be zero.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from beamtap.client import Controller, Subscriber  # noqa: E402
from beamtap.processes import stop, wait_ready  # noqa: E402

FS, CH, BLOCK = 48000, 8, 1024


def _hog(until: float) -> None:
    x = 0
    while time.time() < until:
        x += 1


def asoundrc(raw: Path) -> str:
    ports = "\n".join(f"        {i} system:capture_{i + 1}" for i in range(CH))
    return f"""pcm.jackslave {{
    type jack
    capture_ports {{
{ports}
    }}
}}
pcm.arrayfile {{
    type file
    slave.pcm "jackslave"
    file "/dev/null"
    infile "{raw}"
    format "raw"
}}
pcm.arraycap {{
    type plug
    slave {{
        pcm "arrayfile"
        format FLOAT_LE
        channels {CH}
        rate {FS}
    }}
}}
"""


def config() -> str:
    return f"""[array]
line = {{ count = {CH}, spacing_m = 0.5 }}
[medium]
sound_speed_mps = 1500.0
[input]
source = "soundcard"
device = "arraycap"
samplerate_hz = {FS}
block_frames = {BLOCK}
ring_s = 2.0
[beams]
fan = {{ from_deg = 0.0, to_deg = 180.0, step_deg = 1.0 }}
band_hz = [300.0, 1400.0]
audio_deg = [[117.0, 0.0], [40.0, 0.0]]
"""


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=10.0)
    ap.add_argument("--hog-from", type=float, default=3.0)
    ap.add_argument("--hog-to", type=float, default=6.0)
    args = ap.parse_args()
    if not shutil.which("jackd"):
        print("soak: needs jackd (apt-get install jackd2)", file=sys.stderr)
        return 2
    tmp = Path(tempfile.mkdtemp(prefix="beamtap-soak-"))
    home = tmp / "home"
    home.mkdir()
    rng = np.random.default_rng(7)
    # A periodic broadband plane wave from 117° (exact FFT shifts), long enough that repeats do not matter.
    n = 4096
    pos = (np.arange(CH) - (CH - 1) / 2) * 0.5
    spec = np.fft.rfft(0.2 * rng.standard_normal(n))
    f = np.fft.rfftfreq(n)
    spec[f > 0.4] = 0
    lead = pos * np.cos(np.radians(117.0)) / 1500.0 * FS
    x = np.stack([np.fft.irfft(spec * np.exp(2j * np.pi * f * a), n) for a in lead], axis=1)
    raw = tmp / "array.raw"
    np.tile(x, (64, 1)).astype("<f4").tofile(raw)
    (home / ".asoundrc").write_text(asoundrc(raw))
    name = f"beamtapsoak{os.getpid()}"
    env = dict(os.environ, HOME=str(home), JACK_NO_AUDIO_RESERVATION="1", JACK_DEFAULT_SERVER=name)
    jlog = open(tmp / "jack.log", "w")
    jack = subprocess.Popen(["jackd", "-n", name, "-R", "-d", "dummy", "-r", str(FS), "-p", str(BLOCK), "-C", str(CH),
                             "-P", "2"], stdout=jlog, stderr=subprocess.STDOUT, env=env)
    deadline = time.monotonic() + 20
    while "self-connect-mode" not in (tmp / "jack.log").read_text():
        assert jack.poll() is None and time.monotonic() < deadline, (tmp / "jack.log").read_text()
        time.sleep(0.05)
    cfg = tmp / "soak.toml"
    cfg.write_text(config())
    slog = open(tmp / "service.log", "w")
    proc = subprocess.Popen([sys.executable, "-m", "beamtap", "serve", "--config", str(cfg), "--publish",
                             "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*", "--ready-file",
                             str(tmp / "ready.json")], stdout=slog, stderr=subprocess.STDOUT, env=env)
    hogs = []
    try:
        ep = wait_ready(proc, tmp / "ready.json", 60)
        assert ep, (tmp / "service.log").read_text()
        t0 = time.monotonic()
        end = t0 + 60 * args.minutes
        last = {}
        counts = {"power": 0, "audio": 0}
        unflagged, flagged, frames_lost_msgs, seq_missing = 0, 0, 0, 0
        max_rss = 0
        next_rss = 0.0
        hog_started = False
        with Subscriber(ep["publish"], topics=["power", "audio"], timeout_s=10, queue=1000000) as sub:
            while time.monotonic() < end:
                now = time.monotonic()
                if not hog_started and now - t0 >= 60 * args.hog_from:
                    until = time.time() + 60 * (args.hog_to - args.hog_from)
                    hogs = [mp.Process(target=_hog, args=(until,)) for _ in range(2)]
                    for h in hogs:
                        h.start()
                    hog_started = True
                    print(f"{(now - t0) / 60:.1f} min: CPU hog on both cores", flush=True)
                if now >= next_rss:
                    for line in open(f"/proc/{proc.pid}/status"):
                        if line.startswith("VmRSS:"):
                            max_rss = max(max_rss, int(line.split()[1]))
                    next_rss = now + 1.0
                fr = sub.recv()
                counts[fr.topic] += 1
                prev = last.get(fr.topic)
                if prev is not None:
                    seq_missing += fr.seq - prev.seq - 1
                    expected = prev.first_sample + (BLOCK if fr.topic == "power" else len(prev.data))
                    if fr.first_sample != expected:
                        if fr.gap:
                            flagged += 1
                        elif fr.seq == prev.seq + 1:
                            unflagged += 1
                if fr.gap:
                    frames_lost_msgs += fr.frames_lost
                last[fr.topic] = fr
        with Controller(ep["control"]) as ctl:
            st = ctl.status()
    finally:
        for h in hogs:
            h.join(timeout=5)
            if h.is_alive():
                h.terminate()
        rc = stop(proc)
        stop(jack)
        slog.close()
        jlog.close()
    out = {"date": time.strftime("%Y-%m-%d"), "minutes": args.minutes, "hog_minutes": [args.hog_from, args.hog_to],
           "power_messages": counts["power"], "audio_messages": counts["audio"],
           "input_overflows": st["input_overflows"], "ring_overflows": st["ring_overflows"], "gaps": st["gaps"],
           "frames_lost": st["frames_lost"], "breaks_flagged": flagged, "unflagged_breaks": unflagged,
           "seq_missing": seq_missing, "publisher_dropped": st["messages_dropped"], "max_rss_mb": round(max_rss / 1024, 1),
           "block_ms_p99": round(st["block_ms_p99"], 2), "exit_status": rc, "state": st["state"]}
    print(json.dumps(out, indent=1))
    here = Path(__file__).resolve().parent
    (here / "soak_results.json").write_text(json.dumps(out, indent=1) + "\n")
    (here / "soak_results.md").write_text(f"# Paced soak, {out['date']}\n\n`python bench/soak_bench.py --minutes "
                                          f"{args.minutes:g}`\n\n| figure | value |\n|---|---|\n"
                                          + "".join(f"| {k} | {v} |\n" for k, v in out.items()))
    return 0 if unflagged == 0 and rc == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
