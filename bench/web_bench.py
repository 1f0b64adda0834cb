"""What the browser view costs the live service: block time with no web server, with the
service's own ``[web]`` view and no page, and with 10 synthetic pages connected.

Usage::

    python bench/web_bench.py          # writes bench/web_results.md and web_results.json

The service is the live bench's (16 hydrophones, 91-beam fan, 4 audio beams, 48 kHz, blocks
of 1024, the simulated source paced in real time). The pages are WebSocket clients (aiohttp) in
a second process, not browsers: each reads every frame it is sent (power rows, status, beams,
tracks) and all ten listen to the listening beam's audio; they run at nice 10, standing in for
browsers on other machines. Block times are the service's own
status figures over the last 1024 blocks. Cases alternate within each run; medians over runs.
Limit (issue): 10 pages add at most 5 % to the service's block time.
"""

from __future__ import annotations

import asyncio
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import zmq

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from beamtap.client.protocol import decode  # noqa: E402
from beamtap.processes import stop, wait_ready  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from hoststat import cpu_ticks, steal_share  # noqa: E402
from service_bench import CONFIG  # noqa: E402

HERE = Path(__file__).resolve().parent
PAGES = 10


def pages(url: str, n: int, seconds: float) -> None:
    """``n`` synthetic pages for ``seconds``; prints per-page frame counts and merged rows as JSON."""
    import aiohttp

    async def page(i, session, out):
        async with session.ws_connect(url + "ws") as ws:
            await ws.send_str(json.dumps({"type": "listen", "azimuth_deg": 70.0}))
            frames, merged, end = 0, 0, time.monotonic() + seconds
            while time.monotonic() < end:
                try:
                    msg = await ws.receive(timeout=1.0)
                except asyncio.TimeoutError:
                    continue
                if msg.type == aiohttp.WSMsgType.BINARY:
                    frames += 1
                    merged += msg.data[1]
                elif msg.type != aiohttp.WSMsgType.TEXT:
                    break
            out[i] = {"frames": frames, "merged": merged}

    async def main():
        out = {}
        async with aiohttp.ClientSession() as session:
            await asyncio.gather(*(page(i, session, out) for i in range(n)))
        print(json.dumps(out))

    asyncio.run(main())


def run_case(case: str, seconds: float, folder: Path) -> dict:
    text = CONFIG + ('\n[web]\nlisten = "127.0.0.1:0"\n' if case != "service alone" else "")
    cfg = folder / f"bench-{case.replace(' ', '-')}.toml"
    cfg.write_text(text)
    ready = folder / "ready.json"
    ready.unlink(missing_ok=True)
    proc = subprocess.Popen([sys.executable, "-m", "beamtap", "serve", "--config", str(cfg), "--publish",
                             "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*", "--ready-file", str(ready),
                             "--log-level", "WARNING"])
    clients = None
    try:
        ep = wait_ready(proc, ready, 60)
        if ep is None:
            raise RuntimeError("service did not start")
        if case == f"{PAGES} pages":
            # Nicer than the service: they stand in for browsers on other machines, whose work is not
            # this machine's (on two cores they would otherwise compete with the DSP for a core).
            clients = subprocess.Popen(["nice", "-n", "10", sys.executable, __file__, "--pages", ep["web"], str(PAGES),
                                        str(seconds + 4)], stdout=subprocess.PIPE, text=True)
        ctx = zmq.Context()
        s = ctx.socket(zmq.SUB)
        s.connect(ep["publish"])
        s.setsockopt(zmq.SUBSCRIBE, b"status")
        warm = time.monotonic() + 3.0
        end = warm + seconds
        ticks0, status = None, []
        while time.monotonic() < end:
            if ticks0 is None and time.monotonic() >= warm:
                ticks0 = cpu_ticks()
            if s.poll(500):
                _, h, _ = decode(s.recv_multipart())
                if time.monotonic() >= warm:
                    status.append(h)
        ticks1 = cpu_ticks()
        s.close(linger=0)
        ctx.term()
        seen = json.loads(clients.communicate(timeout=60)[0]) if clients is not None else {}
    finally:
        stop(proc)
        if clients is not None and clients.poll() is None:
            clients.kill()
    last = status[-1]
    frames = [v["frames"] for v in seen.values()]
    return {"case": case, "seconds": seconds, "block_ms_p50": last["block_ms_p50"], "block_ms_p99": last["block_ms_p99"],
            "block_cpu_ms_p50": last["block_cpu_ms_p50"], "block_cpu_ms_p99": last["block_cpu_ms_p99"],
            "service_cpu_share": float(np.median([h["cpu_share"] for h in status])),
            "page_frames_min": min(frames) if frames else None, "page_frames_max": max(frames) if frames else None,
            "rows_merged": sum(v["merged"] for v in seen.values()) if seen else None,
            "host_steal_share": steal_share(ticks0, ticks1)}


def main():
    if len(sys.argv) > 1 and sys.argv[1] == "--pages":
        pages(sys.argv[2], int(sys.argv[3]), float(sys.argv[4]))
        return
    seconds = float(os.environ.get("BENCH_SECONDS", "20"))
    runs = int(os.environ.get("BENCH_RUNS", "3"))
    cases = ("service alone", "web view, no page", f"{PAGES} pages")
    with tempfile.TemporaryDirectory() as tmp:
        rows = [dict(run_case(c, seconds, Path(tmp)), run=k + 1) for k in range(runs) for c in cases]
    (HERE / "web_results.json").write_text(json.dumps(rows, indent=2))
    md = [f"# Browser view cost ({time.strftime('%Y-%m-%d')})", "", __doc__.split("\n\n")[2].replace("\n", " "), "",
          "| run | case | block p50 / p99 (ms) | block CPU p50 / p99 (ms) | service CPU share | binary frames per page "
          "| rows merged | host steal |", "|---|---|---|---|---|---|---|---|"]
    for r in rows:
        frames = "–" if r["page_frames_min"] is None else f"{r['page_frames_min']}–{r['page_frames_max']}"
        md.append(f"| {r['run']} | {r['case']} | {r['block_ms_p50']:.3f} / {r['block_ms_p99']:.3f} | "
                  f"{r['block_cpu_ms_p50']:.3f} / {r['block_cpu_ms_p99']:.3f} | {100 * r['service_cpu_share']:.1f} % | "
                  f"{frames} | {r['rows_merged'] if r['rows_merged'] is not None else '–'} | "
                  f"{100 * r['host_steal_share']:.1f} % |")
    med = {c: {k: float(np.median([r[k] for r in rows if r["case"] == c])) for k in
               ("block_ms_p50", "block_ms_p99", "block_cpu_ms_p50")} for c in cases}
    base = med["service alone"]
    md += ["", "Medians over the runs, against the service alone:", "",
           "| case | block p50 (ms) | ratio | block p99 (ms) | ratio | block CPU p50 (ms) | ratio |", "|---|---|---|---|---|---|---|"]
    for c in cases:
        m = med[c]
        md.append(f"| {c} | {m['block_ms_p50']:.3f} | {m['block_ms_p50'] / base['block_ms_p50']:.3f} | "
                  f"{m['block_ms_p99']:.3f} | {m['block_ms_p99'] / base['block_ms_p99']:.3f} | "
                  f"{m['block_cpu_ms_p50']:.3f} | {m['block_cpu_ms_p50'] / base['block_cpu_ms_p50']:.3f} |")
    md += ["", "Limit (issue): 10 pages add at most 5 % to the block time (ratio <= 1.05).", "",
           "Rerun: `python bench/web_bench.py` (BENCH_SECONDS per case, BENCH_RUNS runs).", ""]
    (HERE / "web_results.md").write_text("\n".join(md))
    print("\n".join(md))


if __name__ == "__main__":
    main()
