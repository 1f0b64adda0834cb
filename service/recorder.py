"""The service's recorder: its own thread, a bounded queue, a session writer.

The processing thread offers blocks (``raw``, ``audio``, ``power``) with
:meth:`Recorder.offer`, which never blocks: when the queue is full the block
is dropped, counted, and becomes a gap in the session. The recorder thread
writes them with :class:`beamtap.session.SessionWriter`. Free disk space is
checked before a start and every second while recording; below
``[record] min_free_mb``, or on any write error (disk full, drive removed),
recording stops with the error in the status and the log, while
beamforming and publishing go on. Nothing already written is touched.
"""

from __future__ import annotations

import logging
import queue
import re
import shutil
import threading
import time
from pathlib import Path

from beamtap.session import TABLES, SessionWriter, iso

log = logging.getLogger("beamtap.recorder")

#: Seconds without data while recording before a warning and an ``idle`` manifest record.
IDLE_S = 5.0
#: Seconds between the recording status lines in the log.
STATUS_EVERY_S = 10.0


class Recorder:
    """Recording control and the writer thread.

    Parameters
    ----------
    config : Config
    service : object with ``pipeline`` (for the beam table and D) and ``stream_id``.
    """

    def __init__(self, config, service):
        self.config = config
        self.service = service
        rc = config.record
        self.folder = Path(rc.folder)
        blocks_per_s = config.input.samplerate_hz / config.input.block_frames
        self._queue: queue.Queue = queue.Queue(maxsize=max(8, int(rc.queue_s * blocks_per_s * 3)))
        self._lock = threading.Lock()  # guards start/stop/mark against each other (control thread)
        self._writer: SessionWriter | None = None
        self._what: tuple = ()
        self._thread = None
        self._stopping = threading.Event()
        self.queue_dropped = 0
        self.error: str | None = None
        self.last_session: str | None = None
        self._next_disk_check = 0.0

    # ---- processing-thread side (never blocks) -------------------------------
    def wants(self, kind: str) -> bool:
        return kind in self._what

    def offer(self, kind: str, first_sample: int, data, header: dict) -> None:
        # detections and tracks come from power: recorded whenever power is
        if kind not in self._what and not (kind in TABLES and "power" in self._what):
            return
        try:
            self._queue.put_nowait((kind, first_sample, data, header["time_utc"], header["beam_table"]))
        except queue.Full:
            self.queue_dropped += 1

    # ---- control-thread side -------------------------------------------------
    def start(self, what, label: str = "") -> dict:
        with self._lock:
            if self._writer is not None:
                return self.status()
            what = tuple(what or self.config.record.kinds)
            free_mb = _free_mb(self.folder)
            if free_mb < self.config.record.min_free_mb:
                self.error = (f"not started: {free_mb:.0f} MB free in {self.folder}, below [record] min_free_mb = "
                              f"{self.config.record.min_free_mb:g}")
                log.error(self.error)
                return self.status()
            stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime())
            safe = re.sub(r"[^A-Za-z0-9_.-]+", "-", label).strip("-")[:60]
            folder = self.folder / (stamp + (f"-{safe}" if safe else ""))
            n = 1
            while folder.exists():
                n += 1
                folder = self.folder / f"{stamp}-{n}{('-' + safe) if safe else ''}"
            p = self.service.pipeline
            info = {"label": label, "config_file": self.config.where, "config_sha256": self.config.sha256,
                    "config": self.config.text, "stream": self.service.stream_id,
                    "bulk_delay_samples": p.bulk_delay, "input_channels": self.config.geometry.n_input_channels,
                    "block_frames": self.config.input.block_frames}
            try:
                self.folder.mkdir(parents=True, exist_ok=True)
                writer = SessionWriter(folder, what, self.config.input.samplerate_hz, self.config.record.segment_s,
                                       self.config.record.sample_format, info,
                                       power_block_frames=self.config.input.block_frames)
                writer.beams(p.beam_table)
            except (OSError, ValueError) as exc:
                self.error = f"not started: {exc}"
                log.error("recording %s", self.error)
                return self.status()
            self.error = None
            self.queue_dropped = 0
            self._writer = writer
            self.last_session = str(folder)
            self._what = what
            log.info("recording %s to %s", ", ".join(what), folder)
            return self.status()

    def stop(self, reason: str = "stopped by request") -> dict:
        with self._lock:
            if self._writer is None:
                return self.status()
            self._what = ()
            self._queue.put(("stop", reason))  # after every block already queued
        deadline = time.monotonic() + 5
        while self._writer is not None and time.monotonic() < deadline and self._thread and self._thread.is_alive():
            time.sleep(0.01)
        return self.status()

    def mark(self, text: str, sample: int) -> dict:
        with self._lock:
            if self._writer is None:
                from .control import RequestError  # noqa: PLC0415

                raise RequestError("not recording: start recording before marking events")
            utc = self.service.pipeline.source.clock.utc(sample)
            self._queue.put(("mark", text, sample, utc))
            return {"sample": int(sample), "utc": utc, "utc_iso": iso(utc), "text": text}

    def note(self, type_: str, **fields) -> None:
        """A manifest record in the open session (e.g. who changed the beams); nothing when not recording."""
        if self._writer is None:
            return
        try:
            self._queue.put_nowait(("note", type_, dict(fields, utc=time.time())))
        except queue.Full:
            self.queue_dropped += 1

    def status(self) -> dict:
        w = self._writer
        return {
            "recording": w is not None,
            "what": list(self._what),
            "session": self.last_session,
            "segments": (w.segments_closed + w.open_segments) if w else 0,
            "frames_written": dict(w.frames_written) if w else {},
            "queue_dropped": self.queue_dropped,
            "queue_depth": self._queue.qsize(),
            "error": self.error,
            "free_mb": _free_mb(self.folder),
        }

    # ---- the writer thread -----------------------------------------------------
    def start_thread(self) -> None:
        self._thread = threading.Thread(target=self._run, name="beamtap-recorder", daemon=True)
        self._thread.start()

    def _run(self):
        dropped_seen = 0
        last_data = next_line = time.monotonic()
        idle_noted = False
        while not (self._stopping.is_set() and self._queue.empty()):
            try:
                item = self._queue.get(timeout=0.2)
            except queue.Empty:
                item = None
            w = self._writer
            if w is None:
                last_data, idle_noted = time.monotonic(), False
                continue
            try:
                now = time.monotonic()
                if item is not None and item[0] in ("raw", "audio", "power"):
                    last_data, idle_noted = now, False
                elif now - last_data >= IDLE_S and not idle_noted:
                    # The pipeline gave nothing to record: say so, here and in the session itself.
                    log.warning("recording: no data for %.0f s (source stalled?)", now - last_data)
                    w.record("idle", seconds=round(now - last_data, 1), utc=time.time())
                    idle_noted = True
                if now >= next_line:
                    log.info("recording %s: %s written, %d blocks dropped", w.folder.name,
                             ", ".join(f"{k} {v} frames" for k, v in w.frames_written.items() if k in self._what),
                             self.queue_dropped)
                    next_line = now + STATUS_EVERY_S
                if item is not None:
                    if item[0] == "stop":
                        self._finish(item[1])
                        continue
                    if item[0] == "mark":
                        w.mark(item[1], item[2], item[3])
                        continue
                    if item[0] == "note":
                        w.record(item[1], **item[2])
                        continue
                    kind, first, data, utc, table = item
                    if table != w.beam_table_id:
                        w.beams(self.service.pipeline.beam_table)
                    w.write(kind, first, data, utc)
                if self.queue_dropped != dropped_seen:
                    w.record("error", utc=time.time(), error=f"recorder queue full: {self.queue_dropped - dropped_seen} "
                             "blocks dropped (they appear as gaps)")
                    dropped_seen = self.queue_dropped
                self._check_disk()
            except OSError as exc:
                self._fail(f"write error in {w.folder}: {exc.strerror or exc}")
            except Exception as exc:  # a recorder fault must not take the service down
                self._fail(f"recorder failed: {type(exc).__name__}: {exc}")

    def _check_disk(self):
        now = time.monotonic()
        if now < self._next_disk_check:
            return
        self._next_disk_check = now + 1.0
        free = _free_mb(self.folder)
        if free < self.config.record.min_free_mb:
            self._fail(f"{free:.0f} MB free in {self.folder}, below [record] min_free_mb = "
                       f"{self.config.record.min_free_mb:g}")

    def _fail(self, message: str):
        self.error = "recording stopped: " + message
        log.error(self.error + "; beamforming and publishing go on")
        w = self._writer
        self._what = ()
        self._writer = None
        if w is not None:
            try:
                w.record("error", utc=time.time(), error=self.error)
                w.close(reason="error")
            except OSError:
                pass  # the disk is gone; what was written stays as it was

    def _finish(self, reason: str):
        w = self._writer
        self._writer = None
        if w is not None:
            w.close(reason=reason)
            log.info("recording stopped (%s): %s", reason, w.folder)

    def stop_thread(self):
        """Close any session cleanly and end the thread (service shutdown)."""
        if self._writer is not None:
            self.stop("service stopped")
        self._stopping.set()
        if self._thread is not None:
            self._thread.join(timeout=5)


def _free_mb(folder: Path) -> float:
    probe = folder
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    try:
        return shutil.disk_usage(probe).free / 2**20
    except OSError:
        return 0.0
