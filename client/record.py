"""``beamtap record --out DIR``: record a service's stream from anywhere.

Subscribes to the chosen topics (``raw`` needs ``[publish] raw = true`` on
the service) and writes the same session format as the service's own
recorder (:mod:`beamtap.session`). Messages this subscriber misses show up
as gaps in the session, never glued over.
"""

from __future__ import annotations

import signal
import sys
import time
from pathlib import Path

from beamtap.errors import UsageError
from beamtap.session import SessionWriter

from .subscriber import Subscriber


def run(endpoint: str, out: str, what, segment_s: float, sample_format: str, seconds: float | None,
        label: str = "") -> int:
    folder = Path(out)
    if folder.exists() and any(folder.iterdir()):
        raise UsageError(f"--out {folder}: folder exists and is not empty (a session needs a new folder)")
    if folder.exists():
        folder.rmdir()
    stop = {"now": False}
    signal.signal(signal.SIGTERM, lambda *a: stop.update(now=True))
    writer = None
    counts = {k: 0 for k in what}
    with Subscriber(endpoint, topics=list(what) + ["beams"], timeout_s=1.0, queue=10000) as sub:
        end = None if seconds is None else time.monotonic() + seconds
        pending = []
        try:
            while not stop["now"] and (end is None or time.monotonic() < end):
                try:
                    f = sub.recv()
                except TimeoutError:
                    continue
                if f.topic == "beams":
                    if writer is None:
                        writer = SessionWriter(folder, what, float(f.header["samplerate_hz"]), segment_s,
                                               sample_format, {"label": label, "recorded_from": endpoint,
                                                               "stream": f.header.get("stream"),
                                                               "bulk_delay_samples": f.header.get("bulk_delay_samples")},
                                               power_block_frames=int(f.header["power_block_frames"]))
                    writer.beams(f.header)
                    for p in pending:
                        writer.write(*p)
                    pending = []
                    continue
                if f.data is None:
                    continue
                item = (f.topic, int(f.first_sample), f.data, float(f.time_utc))
                if writer is None:
                    pending.append(item)  # until the first beam table names the session's settings
                    del pending[:-2000]
                else:
                    writer.write(*item)
                counts[f.topic] += 1
        except KeyboardInterrupt:
            pass
        finally:
            if writer is not None:
                writer.close(reason="recorder stopped")
    if writer is None:
        raise UsageError(f"no beam table from {endpoint}: is a beamtap service publishing there?")
    sys.stdout.write(f"wrote session {folder}: " + ", ".join(f"{counts[k]} {k} messages" for k in what) + "\n")
    return 0
