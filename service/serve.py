"""``beamtap serve``: the live service, wired together and run until a signal.

source → ring buffer → pipeline (engine) → publisher; control socket;
recorder. SIGINT and SIGTERM stop capture, close files and sockets, and
exit with status 0.
"""

from __future__ import annotations

import gc
import json
import logging
import os
import signal
import threading
import time
import uuid
from dataclasses import replace

import zmq

from beamtap.errors import UsageError

from .config import Config
from .engine.beamformer import KERNELS_MISSING
from .engine.cost import AdmissionError
from .assembly import cost_model
from .control import ControlServer
from .pipeline import Pipeline
from .publisher import Publisher
from .security import Guard
from .recorder import Recorder
from .sources import make_source
from .webview import WebView

log = logging.getLogger("beamtap.serve")


class Service:
    """The running service (also usable from Python and tests).

    Parameters
    ----------
    config : Config
    builtin : bool
        True when running the built-in demo scene (said in the first log line).
    """

    def __init__(self, config: Config, builtin: bool = False):
        self.config = config
        self.builtin = builtin
        self.stream_id = uuid.uuid4().hex[:12]
        self.context = zmq.Context()
        self.source = None
        self.publisher = None
        self.control = None
        self.pipeline = None
        self.recorder = None
        self.cost = None
        self.guard = None
        self.webview = None

    def start(self) -> None:
        cfg = self.config
        if self.builtin:
            log.info("no config given: running the built-in demo scene (16 hydrophones off a pier, "
                     "a passing boat, a 1.5 kHz pinger, sea noise)")
        for warning in cfg.medium.warnings:
            log.warning(warning)
        self.guard = Guard(cfg.security, self.context, {"publish": cfg.publish.endpoint,
                                                          "control": cfg.control.endpoint})
        self.source = make_source(cfg)
        self.publisher = Publisher(cfg.publish.endpoint, self.stream_id, cfg.publish.send_queue, self.context,
                                   secure=self.guard.apply)
        self.recorder = Recorder(cfg, self)
        self.pipeline = Pipeline(cfg, self.source, self.publisher, self.recorder)
        self.pipeline.guard = self.guard
        # The one admission check: calibrated once here, then the same answer for the same request.
        self.cost = cost_model(cfg, self.pipeline.engine)
        try:
            start_cost = self.cost.admit(cfg.beams)
        except AdmissionError as exc:
            raise UsageError(f"{cfg.where}: [beams] refused for live use: {exc}") from None
        self.control = ControlServer(cfg.control.endpoint, self, self.context)
        s = self.pipeline.array_summary()
        log.info("publishing on %s (topics power, audio%s, status, beams); control on %s; %s",
                 self.publisher.endpoint, ", raw" if cfg.publish.raw else "", self.control.endpoint,
                 "CURVE keys required" if self.guard.enabled else "no keys (loopback)" if not self.guard.insecure
                 else "NO KEYS, reachable from other machines (allow_insecure)")
        log.info("source: %s; %g Hz, blocks of %d frames", self.source.describe(), cfg.input.samplerate_hz,
                 cfg.input.block_frames)
        log.info("array: %s, %d of %d sensors active, aperture %.3f m, sound speed %.2f m/s (%s)",
                 s["array_kind"], s["active_sensors"], s["sensors"], s["aperture_m"], s["sound_speed_mps"],
                 s["sound_speed_from"])
        log.info("recordings go to %s (one session folder per recording)", cfg.record.folder)
        log.info("cost: %s (admission limit %g of the block)", start_cost.describe(), self.cost.max_block_share)
        log.info("beams: %d power, %d audio; bulk delay D = %d samples (%.3f ms); latency budget block + D = "
                 "%.2f ms", s["power_beams"], s["audio_beams"], s["bulk_delay_samples"], s["bulk_delay_ms"],
                 s["latency_budget_ms"])
        if not self.pipeline.engine.compiled:
            log.warning("engine: %s", KERNELS_MISSING or "the numpy path was chosen")
        for w in s["warnings"]:
            log.warning(w)
        # Everything built so far lives for the whole run: keep it out of the cyclic garbage
        # collector's full passes, whose length would otherwise grow with it and land on some block.
        gc.collect()
        gc.freeze()
        self.control.start()
        self.pipeline.start()
        self.source.start()
        if cfg.web.enabled:
            self.webview = WebView(cfg, self.publisher.endpoint, self.control.endpoint)
            log.info("browser view on %s", self.webview.start())
        if self.recorder is not None:
            self.recorder.start_thread()
            if cfg.record.on_start:
                self.recorder.start(None, "on start")

    def stop(self) -> None:
        for part in (self.webview, self.source, self.pipeline, self.recorder, self.control):
            if part is not None:
                try:
                    part.stop_thread() if part is self.recorder else part.stop()
                except Exception:  # stopping must finish even if one part misbehaves
                    log.exception("while stopping %s", type(part).__name__)
        if self.publisher is not None:
            self.publisher.close()
        if self.guard is not None:
            self.guard.stop()
        self.context.term()

    def endpoints(self) -> dict:
        out = {"publish": self.publisher.endpoint, "control": self.control.endpoint, "stream": self.stream_id,
               "pid": os.getpid()}
        if self.webview is not None:
            out["web"] = self.webview.url
        return out


def run(config: Config, builtin: bool, publish: str | None = None, control: str | None = None,
        ready_file: str | None = None, seconds: float | None = None, threads: int | None = None) -> int:
    """Run the service until SIGINT/SIGTERM (or ``seconds``); returns the exit status."""
    if threads is not None:
        config = replace(config, engine=replace(config.engine, threads=threads))
    if publish:
        config = replace(config, publish=replace(config.publish, endpoint=publish))
    if control:
        config = replace(config, control=replace(config.control, endpoint=control))
    stop = threading.Event()

    def on_signal(signum, frame):
        log.info("signal %s: stopping", signal.Signals(signum).name)
        stop.set()

    signal.signal(signal.SIGINT, on_signal)
    signal.signal(signal.SIGTERM, on_signal)
    service = Service(config, builtin)
    reload = threading.Event()
    signal.signal(signal.SIGHUP, lambda signum, frame: reload.set())  # read the key folders again
    try:
        service.start()
        if ready_file:
            tmp = f"{ready_file}.tmp"
            with open(tmp, "w") as f:
                json.dump(service.endpoints(), f)
            os.replace(tmp, ready_file)
        deadline = None if seconds is None else time.monotonic() + seconds
        while not stop.wait(0.2):
            if deadline is not None and time.monotonic() >= deadline:
                break
            if service.webview is not None:
                service.webview.check()
            if reload.is_set():
                reload.clear()
                log.info("SIGHUP: reading the key folders again")
                service.guard.reload()
            # A part that cannot go on ends the service, so a supervisor restarts it.
            if service.pipeline.stopped.is_set():
                log.error("processing thread stopped unexpectedly; exiting so a supervisor can restart the service")
                return 1
            if service.source.error:
                log.error("%s; exiting so a supervisor can restart the service", service.source.error)
                return 1
    finally:
        service.stop()
        if ready_file:
            try:
                os.unlink(ready_file)  # a stale ready file would tell a supervisor the service is up
            except OSError:
                pass
    log.info("stopped")
    return 0


def setup_logging(level: str = "INFO") -> None:
    logging.basicConfig(level=getattr(logging, level.upper(), logging.INFO),
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
