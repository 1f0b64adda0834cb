"""``beamtap tail``: one line per message, for checking a program against the stream."""

from __future__ import annotations

import datetime as dt
import sys

from .subscriber import Subscriber


def format_line(frame) -> str:
    """``topic seq first_sample utc shape gap`` for one frame."""
    h = frame.header
    t = h.get("time_utc")
    utc = dt.datetime.fromtimestamp(t, dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ") if t else "-"
    shape = "x".join(str(s) for s in h.get("shape", [])) or "-"
    if frame.topic == "detections" and isinstance(frame.data, list):
        shape = f"{len(frame.data)} detections" + "".join(
            f" {d.get('bearing_deg')}°/{d.get('snr_db')}dB" for d in frame.data[:4] if isinstance(d, dict))
    elif frame.topic == "tracks" and isinstance(frame.data, dict):
        live = [t for t in frame.data.get("tracks", []) if isinstance(t, dict)]
        shape = f"{len(live)} tracks" + "".join(f" #{t.get('track')}:{t.get('state', '?')[0]}@{t.get('bearing_deg')}°"
                                               for t in live[:4])
        if frame.data.get("ended"):
            shape += f" ended {frame.data['ended']}"
    gap = f"GAP({h.get('frames_lost', 0)} frames)" if h.get("gap") else ("MISSED" if frame.gap else "ok")
    if frame.missed_messages:
        gap += f" missed={frame.missed_messages}"
    return (f"{frame.topic:<6} seq={h.get('seq', '-'):<8} first_sample={h.get('first_sample', '-'):<12} "
            f"{utc} shape={shape:<9} {gap}")


def run(endpoint: str, topics, count: int | None, timeout_s: float, out=sys.stdout) -> int:
    n = 0
    with Subscriber(endpoint, topics=topics, timeout_s=timeout_s) as sub:
        while count is None or n < count:
            out.write(format_line(sub.recv()) + "\n")
            out.flush()
            n += 1
    return 0
