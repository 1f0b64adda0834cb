"""``simulated``: the config's scene, rendered in a child process and released in real time."""

from __future__ import annotations

import time

import numpy as np

from ..clock import SampleClock
from .base import Source, _sleep_until

class SimulatedSource(Source):
    """The config's simulated scene, generated in real time in a child process.

    Rendering a scene is Python-heavy; in its own process it never holds the
    processing thread's interpreter lock, so the simulated source loads the
    service the way a sound card does: blocks arrive, get copied into the
    ring, and that is all. The child paces the blocks (or, with
    ``realtime = false``, renders as fast as the pipe takes them).
    """

    kind = "simulated"

    def __init__(self, config_text, where, channels, samplerate_hz, block_frames, ring_frames, realtime=True):
        super().__init__(channels, samplerate_hz, ring_frames)
        self.config_text, self.where = config_text, where
        self.block_frames, self.realtime = int(block_frames), realtime
        self._proc = None

    def _run(self):
        import multiprocessing as mp  # noqa: PLC0415

        ctx = mp.get_context("spawn")
        receiver, sender = ctx.Pipe(duplex=False)
        _widen_pipe(receiver, 4 * self.block_frames * self.channels * 4)
        stop = ctx.Event()
        self._proc = ctx.Process(target=_render_scene, name="beamtap-scene", daemon=True,
                                 args=(self.config_text, self.where, self.block_frames, self.realtime, sender, stop))
        self._proc.start()
        sender.close()
        try:
            frame_bytes = self.block_frames * self.channels * 4
            start_monotonic = time.monotonic()  # replaced by the child's own start in its first message
            while not self._stop.is_set():
                if not receiver.poll(0.2):
                    if not self._proc.is_alive():
                        raise RuntimeError(f"scene process ended (exit code {self._proc.exitcode})")
                    continue
                msg = receiver.recv_bytes()
                if len(msg) != frame_bytes:  # the first message: UTC and monotonic time of sample 0
                    utc0, start_monotonic = (float(v) for v in msg.decode().split())
                    self.clock = SampleClock(self.samplerate_hz, utc0)
                    continue
                block = np.frombuffer(msg, np.float32).reshape(self.block_frames, self.channels)
                self._paced_write(block, start_monotonic, self.realtime)
        except EOFError:
            if not self._stop.is_set():  # the renderer went away without being asked to
                self._proc.join(timeout=1.0)
                raise RuntimeError(f"scene process ended (exit code {self._proc.exitcode})") from None
        finally:
            stop.set()
            receiver.close()
            self._proc.join(timeout=2.0)
            if self._proc.is_alive():
                self._proc.terminate()


def _render_scene(config_text, where, block_frames, realtime, conn, stop):
    """Child process: render the config's scene block by block, paced in real time."""
    import signal as _signal  # noqa: PLC0415

    _signal.signal(_signal.SIGINT, _signal.SIG_IGN)  # the parent decides when to stop
    from ..config import loads  # noqa: PLC0415
    from ..assembly import make_scene  # noqa: PLC0415

    config = loads(config_text, where)
    scene = make_scene(config)
    fs = config.input.samplerate_hz
    t0 = time.monotonic()
    conn.send_bytes(f"{time.time()!r} {t0!r}".encode())
    n = 0
    try:
        while not stop.is_set():
            block = scene.render(block_frames)
            n += block_frames
            # Hand the block over half a block before its last frame is due; the parent releases it
            # into the ring on time. The pipe's delay is then off the latency path, and rendering
            # happens between hand-overs rather than competing with the processing of each block.
            if realtime and _sleep_until(t0 + (n - block_frames / 2) / fs, stop):
                break
            conn.send_bytes(np.ascontiguousarray(block, np.float32).tobytes())
    except (BrokenPipeError, EOFError, OSError):
        pass


def _widen_pipe(conn, nbytes: int) -> None:
    """Make a pipe hold a few whole blocks (Linux; elsewhere a no-op), so that
    sending one block never waits for the reader to drain part of it."""
    try:
        import fcntl  # noqa: PLC0415

        fcntl.fcntl(conn.fileno(), fcntl.F_SETPIPE_SZ, int(nbytes))
    except (ImportError, AttributeError, OSError):
        pass
