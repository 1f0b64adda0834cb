"""The detection thread: power rows → ``detections`` and ``tracks`` (published, and offered to the
recorder), off the processing thread.

Detection and tracking are Python per row (about 30–100 µs with a crowded
fan, bench/detect_bench.py); on the processing thread that would add 5–15 %
to a 64-sensor block. Here the processing thread hands each block's power
rows over (one queue put) and this thread does the rest, on another core
while the engine's compiled loops run without the GIL. Rows are processed
in order; settings changes and new beam sets travel through the same queue,
so they apply between the rows they were made between. When this thread
falls behind by more than the queue holds, rows are dropped and counted
(``detect_rows_dropped`` in the status), never silently.
"""

from __future__ import annotations

import logging
import queue
import threading
import time

log = logging.getLogger("beamtap.tracking")

_STOP = object()


class TrackingThread:
    """Runs a :class:`~beamtap.service.engine.detect.DetectionStage` on its own thread.

    Parameters
    ----------
    stage : DetectionStage
    publisher : Publisher
    recorder : Recorder or None
    max_rows : int
        Rows the hand-over queue holds.
    """

    def __init__(self, stage, publisher, recorder=None, max_rows: int = 256):
        self.stage = stage
        self.settings = stage.settings
        self.publisher, self.recorder = publisher, recorder
        self._queue: queue.Queue = queue.Queue(maxsize=max_rows)
        self.dropped = 0
        self.processed = 0
        self.tracks_live = 0
        self.error: str | None = None
        self._ended_pending: list = []
        self._next_drop_log = 0.0
        self._thread = threading.Thread(target=self._run, name="beamtap-tracking", daemon=True)
        self._thread.start()

    # ---- processing-thread side (never blocks) ------------------------------
    def offer(self, power_db, first_samples, commons) -> None:
        """One block's power rows with their message headers (``common`` maps)."""
        if len(commons):
            self._put(("rows", power_db, first_samples, commons), len(commons))

    def new_stage(self, stage) -> None:
        """New beams: the tracks so far end, a new stage takes over (in order with the rows)."""
        self._put(("stage", stage), 0, force=True)

    def set_settings(self, settings) -> None:
        self.settings = settings
        self._put(("settings", settings), 0, force=True)

    def _put(self, item, rows: int, force: bool = False) -> None:
        try:
            self._queue.put(item, block=force, timeout=1.0 if force else None)
        except queue.Full:
            self.dropped += rows
            now = time.monotonic()
            if now >= self._next_drop_log:  # every drop is counted; the log says so once a second
                self._next_drop_log = now + 1.0
                log.warning("tracking: %d power rows dropped so far (the detection thread is behind)", self.dropped)

    # ---- the thread ------------------------------------------------------------
    def _run(self) -> None:
        while True:
            item = self._queue.get()
            if item is _STOP:
                return
            try:
                self._handle(item)
            except Exception as exc:  # a fault here must not stop beamforming: report it, go on
                self.error = f"{type(exc).__name__}: {exc}"
                log.exception("tracking failed on a row; the next rows go on")

    def _handle(self, item) -> None:
        kind = item[0]
        if kind == "settings":
            if not item[1].enabled:
                self._ended_pending += self.stage.tracker.reset()
            self.stage.set_settings(item[1])
            return
        if kind == "stage":
            self._ended_pending += self.stage.tracker.reset()
            self.stage = item[1]
            self.stage.set_settings(self.settings)  # the latest asked for, whenever the stage was built
            return
        _, power_db, firsts, commons = item
        band = self.stage.settings.band
        for common, (first, _, dets, tracks, ended) in zip(commons, self.stage.rows(
                power_db, firsts, [c["time_utc"] for c in commons])):
            ended = self._ended_pending + ended
            self._ended_pending = []
            header = dict(common, band=band)
            self.publisher.publish("detections", header, dets)
            self.publisher.publish("tracks", header, {"tracks": tracks, "ended": ended})
            if self.recorder is not None:
                self.recorder.offer("detections", first, dets, common)
                self.recorder.offer("tracks", first, (tracks, ended), common)
            self.processed += 1
            self.tracks_live = len(tracks)

    def status(self) -> dict:
        return {"detect": self.settings.as_dict(), "tracks_live": self.tracks_live,
                "detect_rows_dropped": self.dropped, "detect_error": self.error}

    def close(self, timeout: float = 2.0) -> None:
        """Finish the queued rows (within ``timeout``) and stop."""
        try:
            self._queue.put(_STOP, timeout=timeout)
        except queue.Full:
            pass
        self._thread.join(timeout=timeout)
