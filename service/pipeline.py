"""The processing thread: ring buffer → engine → publisher (and recorder).

One thread does all DSP. It takes whole blocks from the source's ring
buffer, restarts the engine's history at every gap, applies retargets
prepared by the control thread at block boundaries, publishes every output
with its stream position and time, hands copies to the recorder, and
publishes ``status`` (with the beam table) once a second.
"""

from __future__ import annotations

import logging
import queue
import threading
import time

import numpy as np

from .engine.beamformer import BeamSet
from .assembly import make_beamformer, make_detection, summary
from .engine.basis import mirror_pair_rows_for
from .engine.mvdr import base_engine, engine_for, wants_pair_rows
from .tracking import TrackingThread

log = logging.getLogger("beamtap.pipeline")

STATUS_INTERVAL_S = 1.0


class Pipeline:
    """Processing thread of the live service.

    Parameters
    ----------
    config : Config
    source : Source
    publisher : Publisher
    recorder : Recorder or None
    """

    def __init__(self, config, source, publisher, recorder=None):
        self.config = config
        self.source = source
        self.publisher = publisher
        self.recorder = recorder
        self.guard = None  # set by the service: its security status goes into every status
        inp = config.input
        self.block_frames = inp.block_frames
        self.samplerate_hz = inp.samplerate_hz
        self.engine = make_beamformer(config, threads=config.engine_threads(offline=False), live=True)
        self.bulk_delay = self.engine.bulk_delay_samples
        # detections and tracks on their own thread, fed each block's power rows
        self.tracking = TrackingThread(make_detection(config, self.engine.beams, self.engine.band_filters),
                                       publisher, recorder)
        geo = config.geometry
        self._gain_cols = geo.active_channel_index
        self._gain = geo.active_gain.astype(np.float32)
        self.beam_table_id = 1
        self.beam_table = self._beam_table(config.beams)
        self._retargets: queue.Queue = queue.Queue(maxsize=4)
        self._deferred = None  # a retarget waiting for a crossfade to end
        self._stop = threading.Event()
        self._thread = None
        # Wall time and this thread's CPU time per block, the last 1024 blocks: when the first is
        # much larger than the second, the thread was waiting for a CPU (other load, host steal).
        self._durations = np.zeros(1024, np.float64)
        self._cpu_durations = np.zeros(1024, np.float64)
        self._n_durations = 0
        self.counts = {"blocks": 0, "gaps": 0, "frames_lost_seen": 0, "nan_samples": 0, "clipped_samples": 0,
                       "retargets": 0}
        self._gap_pending = {"audio": 0, "power": 0, "raw": 0}
        self.started_utc = time.time()
        self.stopped = threading.Event()
        self._cpu_mark = (time.process_time(), time.monotonic())
        self._cpu_share = 0.0
        self._next_gap_log = 0.0
        self._gaps_unlogged = self._frames_unlogged = 0

    # ---- beam table ---------------------------------------------------
    def _beam_table(self, beams: BeamSet) -> dict:
        return {
            "beam_table": self.beam_table_id,
            "power_deg": beams.power_deg.tolist(),
            "audio_deg": beams.audio_deg.tolist(),
            "shading": beams.shading,
            "sidelobe_db": beams.sidelobe_db,
            "bands_hz": [list(b) for b in beams.bands_hz],
            "band_delay_samples": [int(ev.filter.group_delay_samples) for ev in self.engine.band_filters],
            "power_delay_samples": self.engine.power_delay_samples,
            "band_effective_hz": [ev.filter.effective_bandwidth_hz for ev in self.engine.band_filters],
            "power_block_frames": self.block_frames,
            "power_batch_blocks": self.engine.power_batch_blocks,
            "bulk_delay_samples": self.bulk_delay,
            "samplerate_hz": self.samplerate_hz,
            "array_kind": self.config.geometry.kind,
            "method": beams.method,
            "adaptive": beams.adaptive.as_dict() if beams.method == "mvdr" else None,
            # A line cannot tell a bearing from its mirror image across the line's axis: bearings
            # (beams, detections, tracks) are on 0-180°.
            "mirror_ambiguous": self.config.geometry.kind == "line",
        }

    # ---- control-thread side ---------------------------------------------
    def request_retarget(self, beams: BeamSet, timeout: float = 5.0) -> int:
        """Prepare steering for ``beams`` (in the caller's thread) and queue it.

        Returns the beam table id it will carry. Raises ``queue.Full`` if
        retargets pile up faster than blocks are processed.
        """
        done = threading.Event()
        slot = {"beams": beams, "done": done, "id": None, "cancelled": False}
        wants_pairs = wants_pair_rows(beams) and mirror_pair_rows_for(self.config.geometry)
        if wants_pairs != self.engine.mirror_pair_rows:
            # Adaptive beams need one history row per sensor, and delay-and-sum on a large symmetric
            # array is faster on mirror-pair rows: a new engine with the layout the beams want takes
            # the stream over at the block boundary (its history from this one's).
            slot["engine"] = make_beamformer(self.config, beams, threads=self.engine.threads, live=True)
            bands = slot["engine"].band_filters
        else:
            slot["prepared"] = self.engine.prepare(beams)
            bands = slot["prepared"][0].bands
        # the new beams' detection stage, built here rather than on the processing thread
        slot["detection"] = make_detection(self.config, beams, bands, self.tracking.settings)
        self._retargets.put(slot, timeout=timeout)
        if not done.wait(timeout):
            slot["cancelled"] = True  # the caller is told it failed, so it must not happen later
            if not done.is_set():
                raise TimeoutError("the processing thread did not take the new beams in time")
        return slot["id"]

    # ---- thread --------------------------------------------------------
    def start(self):
        self._thread = threading.Thread(target=self._run_guarded, name="beamtap-dsp", daemon=True)
        self._thread.start()

    def stop(self):
        self._stop.set()
        self.source.ring.wake()
        if self._thread is not None:
            self._thread.join(timeout=2.0)
        self.tracking.close()  # the rows already handed over are published (and recorded) first

    def _run_guarded(self):
        try:
            self._run()
        except Exception:
            log.exception("processing thread failed")
            raise
        finally:
            self.stopped.set()

    def _run(self):
        ring = self.source.ring
        next_status = time.monotonic()
        self.publisher.publish("beams", self.beam_table)
        while not self._stop.is_set():
            self._apply_retargets()
            chunk = ring.read(self.block_frames, timeout=0.1)
            now = time.monotonic()
            if chunk is not None:
                self._process(chunk)
            elif self.source.finished.is_set() and ring.available == 0:
                self._release(self.engine.flush())  # a finite source ran out: release what is pending
                self._stop.wait(0.05)
            if now >= next_status:
                self.publish_status()
                next_status = now + STATUS_INTERVAL_S
        self._release(self.engine.flush())
        self.publish_status()

    @property
    def detect_settings(self):
        """The detection settings in force from the next power row."""
        return self.tracking.settings

    def request_detect(self, settings) -> None:
        """New detection settings (control thread): in force from the next power row handed over."""
        self.tracking.set_settings(settings)

    def _apply_retargets(self):
        while True:
            if self._deferred is not None:
                slot, self._deferred = self._deferred, None
            else:
                try:
                    slot = self._retargets.get_nowait()
                except queue.Empty:
                    return
            if slot["cancelled"]:
                continue
            if "engine" in slot:
                if self.engine._fade_from is not None:  # mid-crossfade: take over a block later
                    self._deferred = slot
                    return
                self._release(self.engine.flush())
                new = slot["engine"]
                base_engine(new).take_over(base_engine(self.engine))
                self.engine.close()
                self.engine = new
            else:
                self._release(self.engine.apply(slot["prepared"]))
                self.engine = engine_for(None, slot["beams"], current=self.engine)  # MVDR over it, or not
            # New beams: a new background and new tracks (the old ones end, said in the next message).
            self.tracking.new_stage(slot["detection"])
            self.beam_table_id += 1
            self.beam_table = self._beam_table(slot["beams"])
            self.counts["retargets"] += 1
            slot["id"] = self.beam_table_id
            slot["done"].set()
            self.publisher.publish("beams", self.beam_table)
            log.info("beams retargeted: table %d, %d power beams, %d audio beams", self.beam_table_id,
                     len(slot["beams"].power_deg), len(slot["beams"].audio_deg))

    def _process(self, chunk):
        t0, c0 = time.perf_counter(), time.thread_time()
        if chunk.gap_frames or chunk.first_sample != self.engine.next_sample:
            lost = chunk.gap_frames or (chunk.first_sample - self.engine.next_sample)
            self._release(self.engine.flush())
            self.engine.reset(chunk.first_sample)
            self.counts["gaps"] += 1
            self.counts["frames_lost_seen"] += max(lost, 0)
            for k in self._gap_pending:
                self._gap_pending[k] += max(lost, 1)
            self._log_gap(lost, chunk.first_sample)
        result = self.engine.process(chunk.frames)
        self.counts["nan_samples"] += result.nan_count
        self.counts["clipped_samples"] += result.clip_count
        first = chunk.first_sample
        common = self._common(first)
        if len(self.engine.beams.audio_deg):
            self._send("audio", common, result.audio)
        if self.config.publish.raw or (self.recorder is not None and self.recorder.wants("raw")):
            raw = self.calibrated(chunk.frames)
            if self.config.publish.raw:
                self._send("raw", common, raw)
            if self.recorder is not None:
                self.recorder.offer("raw", first, raw, common)
        if self.recorder is not None and len(result.audio):
            self.recorder.offer("audio", first, result.audio, common)
        self._release(result)
        self.counts["blocks"] += 1
        slot = self._n_durations % len(self._durations)
        self._durations[slot] = time.perf_counter() - t0
        self._cpu_durations[slot] = time.thread_time() - c0
        self._n_durations += 1

    def _log_gap(self, lost: int, first_sample: int) -> None:
        # Every gap is counted; the log gets the first one and then a summary at most once a second.
        now = time.monotonic()
        self._gaps_unlogged += 1
        self._frames_unlogged += max(lost, 0)
        if now >= self._next_gap_log:
            log.warning("gap: %d frames lost in %d gap(s), latest before sample %d; engine history restarted",
                        self._frames_unlogged, self._gaps_unlogged, first_sample)
            self._gaps_unlogged = self._frames_unlogged = 0
            self._next_gap_log = now + 1.0

    def calibrated(self, frames: np.ndarray) -> np.ndarray:
        """Input channels with calibration gains applied (input channel layout)."""
        raw = np.array(frames, dtype=np.float32)
        raw[:, self._gain_cols] *= self._gain
        bad = ~np.isfinite(raw)
        if bad.any():
            raw[bad] = 0.0
        return raw

    def _common(self, first_sample: int) -> dict:
        return {"first_sample": int(first_sample), "samplerate_hz": self.samplerate_hz,
                "time_utc": self.source.clock.utc(first_sample), "bulk_delay_samples": self.bulk_delay,
                "beam_table": self.beam_table_id}

    def _send(self, topic: str, common: dict, payload) -> None:
        lost = self._gap_pending[topic]
        header = dict(common, gap=bool(lost), frames_lost=int(lost))
        self._gap_pending[topic] = 0
        self.publisher.publish(topic, header, payload)

    def _release(self, result) -> None:
        commons = [self._common(int(first)) for first in result.power_first_sample]
        for common, rows in zip(commons, result.power_db):
            self._send("power", common, rows)
            if self.recorder is not None:
                self.recorder.offer("power", common["first_sample"], rows, common)
        self.tracking.offer(result.power_db, result.power_first_sample, commons)

    # ---- status ----------------------------------------------------------
    def status(self) -> dict:
        n = min(self._n_durations, len(self._durations))
        d = self._durations[:n] if n else np.zeros(1)
        dc = self._cpu_durations[:n] if n else np.zeros(1)
        src = self.source.stats()
        out = {
            "state": "failed" if self.source.error else "running" if not self._stop.is_set() else "stopping",
            "source": self.source.describe(),
            "source_error": self.source.error,
            "source_finished": self.source.finished.is_set(),
            "uptime_s": time.time() - self.started_utc,
            "next_sample": self.engine.next_sample,
            "blocks": self.counts["blocks"],
            "frames_captured": src["frames_captured"],
            "input_overflows": src["input_overflows"],
            "ring_overflows": src["ring_overflows"],
            "overflows": src["input_overflows"] + src["ring_overflows"],
            "gaps": self.counts["gaps"],
            "frames_lost": src["frames_lost"],
            "source_rejected": src.get("rejected", {}),
            "nan_samples": self.counts["nan_samples"],
            "clipped_samples": self.counts["clipped_samples"],
            "block_ms_p50": 1e3 * float(np.percentile(d, 50)),
            "block_ms_p99": 1e3 * float(np.percentile(d, 99)),
            "block_cpu_ms_p50": 1e3 * float(np.percentile(dc, 50)),
            "block_cpu_ms_p99": 1e3 * float(np.percentile(dc, 99)),
            "block_budget_ms": 1e3 * self.block_frames / self.samplerate_hz,
            "cpu_share": self._cpu_share,
            "messages_sent": self.publisher.sent,
            "messages_dropped": self.publisher.dropped,
            "retargets": self.counts["retargets"],
            "bulk_delay_samples": self.bulk_delay,
            "latency_budget_ms": 1e3 * (self.block_frames + self.bulk_delay) / self.samplerate_hz,
            "clock": self.source.clock.as_dict(),
            "beam_table": self.beam_table_id,
            "publishing": ["power", "detections", "tracks"] + (["audio"] if len(self.engine.beams.audio_deg) else [])
            + (["raw"] if self.config.publish.raw else []),
            **self.tracking.status(),
            "adaptive": self.engine.status() if self.engine.method == "mvdr" else None,
            "engine_rows": "mirror pairs" if self.engine.mirror_pair_rows else "sensors",
        }
        if self.recorder is not None:
            out["record"] = self.recorder.status()
        if self.guard is not None:
            out["security"] = self.guard.status()
        return out

    def publish_status(self):
        """Publish ``status`` and ``beams`` (processing thread only)."""
        cpu_now = (time.process_time(), time.monotonic())
        wall = cpu_now[1] - self._cpu_mark[1]
        if wall > 0.2:
            self._cpu_share = (cpu_now[0] - self._cpu_mark[0]) / wall
            self._cpu_mark = cpu_now
        st = self.status()
        self.publisher.publish("status", dict(st, first_sample=st["next_sample"],
                                              samplerate_hz=self.samplerate_hz,
                                              time_utc=self.source.clock.utc(st["next_sample"])))
        self.publisher.publish("beams", self.beam_table)

    def array_summary(self) -> dict:
        return summary(self.config, self.engine)
