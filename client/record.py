"""``beamtap record --out DIR``: record a service's stream from anywhere.

Subscribes to the chosen topics (``raw`` needs ``[publish] raw = true`` on
the service) and writes the same session format as the service's own
recorder (:mod:`beamtap.session`). Messages this subscriber misses show up
as gaps in the session, never glued over.

What it watches for: the service's first ``status`` says which topics it
publishes, and a kind it does not publish is refused at once; a new
upstream stream id (the service restarted, or another one took the port)
closes the session and starts a new one beside it (``DIR-2``, ...), or with
``--continue`` goes on in the same session after an ``upstream_restart``
manifest record naming both ids; no message for ``idle_s`` seconds is a
warning and an ``idle`` manifest record. A start line and a status line
every 10 s go to standard error.
"""

from __future__ import annotations

import signal
import sys
import time
from pathlib import Path

from beamtap.errors import UsageError
from beamtap.session import SessionWriter

from .subscriber import Subscriber

#: Seconds between status lines.
STATUS_EVERY_S = 10.0


def _say(text: str) -> None:
    sys.stderr.write(f"beamtap record: {text}\n")
    sys.stderr.flush()


class _Sessions:
    """The session being written and the ones before it (one per upstream stream id)."""

    def __init__(self, out: Path, what, endpoint, segment_s, sample_format, label, keep_going: bool):
        self.out, self.what, self.endpoint = out, list(what), endpoint
        self.segment_s, self.sample_format, self.label = segment_s, sample_format, label
        self.keep_going = keep_going
        self.writer: SessionWriter | None = None
        self.stream = None
        self.folders: list[Path] = []
        self.counts = {k: 0 for k in what}

    def _next_folder(self) -> Path:
        n = len(self.folders) + 1
        return self.out if n == 1 else self.out.with_name(f"{self.out.name}-{n}")

    def open(self, beams_header: dict) -> None:
        folder = self._next_folder()
        if folder.exists() and any(folder.iterdir()):
            raise UsageError(f"--out: {folder} exists and is not empty (a session needs a new folder)")
        if folder.exists():
            folder.rmdir()
        self.writer = SessionWriter(folder, self.what, float(beams_header["samplerate_hz"]), self.segment_s,
                                    self.sample_format, {"label": self.label, "recorded_from": self.endpoint,
                                                         "stream": beams_header.get("stream"),
                                                         "bulk_delay_samples": beams_header.get("bulk_delay_samples")},
                                    power_block_frames=int(beams_header["power_block_frames"]))
        self.folders.append(folder)
        self.stream = beams_header.get("stream")
        _say(f"recording {', '.join(self.what)} from {self.endpoint} (stream {self.stream}) into {folder}")

    def upstream_changed(self, new_stream) -> None:
        """The service restarted (or another took its port): a new session, or a record of it."""
        old = self.stream
        if self.keep_going:
            self.writer.record("upstream_restart", old_stream=old, new_stream=new_stream, utc=time.time())
            self.stream = new_stream
            _say(f"upstream stream changed from {old} to {new_stream}; continuing in the same session (--continue)")
            return
        self.close("upstream restarted")
        _say(f"upstream stream changed from {old} to {new_stream}; starting a new session")

    def close(self, reason: str) -> None:
        if self.writer is not None:
            self.writer.close(reason=reason)
            self.writer = None


def run(endpoint: str, out: str, what, segment_s: float, sample_format: str, seconds: float | None,
        label: str = "", idle_s: float = 5.0, keep_going: bool = False) -> int:
    if not segment_s > 0:
        raise UsageError(f"--segment-s: got {segment_s!r}, expected a positive number of seconds")
    if not idle_s > 0:
        raise UsageError(f"--idle-s: got {idle_s!r}, expected a positive number of seconds")
    folder = Path(out)
    if folder.exists() and (not folder.is_dir() or any(folder.iterdir())):
        raise UsageError(f"--out {folder}: exists and is not an empty folder (a session needs a new folder)")
    stop = {"now": False}
    signal.signal(signal.SIGTERM, lambda *a: stop.update(now=True))
    sessions = _Sessions(folder, what, endpoint, segment_s, sample_format, label, keep_going)
    with Subscriber(endpoint, topics=list(what) + ["beams", "status"], timeout_s=min(1.0, idle_s / 2),
                    queue=10000) as sub:
        end = None if seconds is None else time.monotonic() + seconds
        pending = []
        checked = False
        last_data = time.monotonic()
        idle_noted = False
        next_status = time.monotonic() + STATUS_EVERY_S
        try:
            while not stop["now"] and (end is None or time.monotonic() < end):
                now = time.monotonic()
                if now - last_data >= idle_s and not idle_noted:
                    _say(f"no data from {endpoint} for {now - last_data:.0f} s (is the service still running?)")
                    if sessions.writer is not None:
                        sessions.writer.record("idle", seconds=round(now - last_data, 1), utc=time.time())
                    idle_noted = True
                if now >= next_status and sessions.writer is not None:
                    _say("status: " + ", ".join(f"{sessions.counts[k]} {k} messages" for k in what)
                         + f", {sub.bad_messages} bad, session {sessions.folders[-1]}")
                    next_status = now + STATUS_EVERY_S
                try:
                    f = sub.recv()
                except TimeoutError:
                    continue
                stream = f.header.get("stream")
                if f.topic == "status":
                    if not checked:
                        missing = [k for k in what if k not in f.header.get("publishing", what)]
                        if missing:
                            raise UsageError(f"--what {' '.join(missing)}: the service at {endpoint} does not publish "
                                             f"{', '.join(missing)} (it publishes {', '.join(f.header['publishing'])}"
                                             f"{'; raw needs [publish] raw = true' if 'raw' in missing else ''})")
                        checked = True
                    continue
                if sessions.writer is not None and stream != sessions.stream:
                    sessions.upstream_changed(stream)
                    pending = []
                if f.topic == "beams":
                    if sessions.writer is None:
                        sessions.open(f.header)
                    sessions.writer.beams(f.header)
                    for p in pending:
                        sessions.writer.write(*p)
                    pending = []
                    continue
                if f.data is None:
                    continue
                last_data, idle_noted = time.monotonic(), False
                item = (f.topic, int(f.first_sample), f.data, float(f.time_utc))
                if sessions.writer is None:
                    pending.append(item)  # until the first beam table names the session's settings
                    del pending[:-2000]
                else:
                    sessions.writer.write(*item)
                sessions.counts[f.topic] += 1
        except KeyboardInterrupt:
            pass
        finally:
            sessions.close("recorder stopped")
    if not sessions.folders:
        raise UsageError(f"no beam table from {endpoint}: is a beamtap service publishing there?")
    sys.stdout.write(f"wrote session{'s' if len(sessions.folders) > 1 else ''} "
                     f"{', '.join(str(p) for p in sessions.folders)}: "
                     + ", ".join(f"{sessions.counts[k]} {k} messages" for k in what) + "\n")
    return 0
