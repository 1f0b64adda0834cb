"""Sources: where frames come from, behind one small interface.

Every source fills a :class:`~beamtap.service.ringbuffer.RingBuffer` with
float32 frames shaped (frames, input channels) and keeps a
:class:`~beamtap.service.clock.SampleClock` of their capture times.

``soundcard``  a PortAudio input stream (sounddevice); its callback only
               copies into the ring and notes status flags.
``file``       a multichannel WAV, paced in real time or as fast as the
               engine takes it, optionally looped.
``simulated``  the config's scene, generated block by block in real time.
``stream``     the ``raw`` topic of another beamtap service.
``session``    a recorded session folder (see :mod:`.session`).
"""

from __future__ import annotations

import logging
import math
import threading
import time
from pathlib import Path

import numpy as np

from beamtap.errors import UsageError, load_sounddevice

from .clock import SampleClock
from .ringbuffer import RingBuffer

log = logging.getLogger("beamtap.source")


class Source:
    """Base class: a producer thread (or callback) feeding a ring buffer.

    Attributes
    ----------
    ring : RingBuffer
    clock : SampleClock
    channels : int
    samplerate_hz : float
    finished : threading.Event
        Set when a finite source (a file without looping) has delivered
        everything.
    """

    kind = "source"

    def __init__(self, channels: int, samplerate_hz: float, ring_frames: int):
        self.channels = int(channels)
        self.samplerate_hz = float(samplerate_hz)
        self.ring = RingBuffer(ring_frames, self.channels)
        self.clock = SampleClock(self.samplerate_hz)
        self.finished = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.input_overflows = 0
        self.error: str | None = None

    def describe(self) -> str:
        return self.kind

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run_guarded, name=f"beamtap-{self.kind}", daemon=True)
        self._thread.start()

    def _run_guarded(self):
        try:
            self._run()
        except Exception as exc:  # a source failure is reported, never a silent stop
            self.error = f"{self.kind} source stopped: {exc}"
            log.error(self.error)
        finally:
            self.finished.set()
            self.ring.wake()

    def _run(self):
        raise NotImplementedError

    def stop(self) -> None:
        self._stop.set()
        self.ring.wake()
        if self._thread is not None:
            self._thread.join(timeout=2.0)

    def stats(self) -> dict:
        r = self.ring
        return {"frames_captured": int(r.frames_offered), "ring_overflows": int(r.overflow_events),
                "input_overflows": int(self.input_overflows), "frames_lost": int(r.frames_dropped)}

    # Pacing shared by the generated and file sources.
    def _paced_write(self, block: np.ndarray, start_time: float, realtime: bool) -> None:
        if realtime:
            due = start_time + (self.ring.next_stream_index + len(block)) / self.samplerate_hz
            _sleep_until(due, self._stop)
            self.ring.write(block)
        else:
            # As fast as the engine takes it: wait for room instead of dropping.
            while self.ring.capacity - self.ring.available < len(block) and not self._stop.is_set():
                self._stop.wait(0.002)
            self.ring.write(block)


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
    from .config import loads  # noqa: PLC0415
    from .offline import make_scene  # noqa: PLC0415

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


def _sleep_until(deadline: float, stop) -> bool:
    """Sleep until ``time.monotonic()`` reaches ``deadline``; True if ``stop`` was set meanwhile.

    ``time.sleep`` (a high-resolution timer) wakes closer to the deadline than
    a timed wait on an event; ``stop`` (a threading or multiprocessing event)
    is checked at least every 50 ms.
    """
    while not stop.is_set():
        left = deadline - time.monotonic()
        if left <= 0:
            return False
        time.sleep(min(left, 0.05))
    return True


def _widen_pipe(conn, nbytes: int) -> None:
    """Make a pipe hold a few whole blocks (Linux; elsewhere a no-op), so that
    sending one block never waits for the reader to drain part of it."""
    try:
        import fcntl  # noqa: PLC0415

        fcntl.fcntl(conn.fileno(), fcntl.F_SETPIPE_SZ, int(nbytes))
    except (ImportError, AttributeError, OSError):
        pass


class FileSource(Source):
    """A multichannel WAV played into the pipeline."""

    kind = "file"

    def __init__(self, path, channels, samplerate_hz, block_frames, ring_frames, realtime=True, loop=False):
        from beamtap.wavfile import WavReader  # noqa: PLC0415

        self.path = str(path)
        with WavReader(self.path) as r:
            if r.samplerate_hz != int(round(samplerate_hz)):
                raise UsageError(f"[input] path = {self.path}: sample rate {r.samplerate_hz} Hz does not "
                                 f"match samplerate_hz = {samplerate_hz:g}")
            if r.channels < channels:
                raise UsageError(f"[input] path = {self.path}: {r.channels} channels, the array needs {channels}")
            self.file_channels = r.channels
        super().__init__(channels, samplerate_hz, ring_frames)
        self.block_frames, self.realtime, self.loop = int(block_frames), realtime, loop
        self.clipped = 0

    def describe(self) -> str:
        return f"file {self.path}" + (" (looped)" if self.loop else "") + ("" if self.realtime else " (fast)")

    def _run(self):
        from beamtap.wavfile import WavReader  # noqa: PLC0415

        t0 = time.monotonic()
        self.clock = SampleClock(self.samplerate_hz, time.time())
        while not self._stop.is_set():
            with WavReader(self.path) as r:
                while not self._stop.is_set():
                    block, clipped = r.read(self.block_frames)
                    if len(block) == 0:
                        break
                    self.clipped += clipped
                    self._paced_write(block[:, : self.channels], t0, self.realtime)
            if not self.loop:
                break


class SoundcardSource(Source):
    """A sound card through PortAudio.

    The callback copies into the ring buffer and notes status flags; an
    input overflow reported by PortAudio becomes a gap whose length is
    estimated from the ADC timestamps (or the callback clock when the
    driver gives none).
    """

    kind = "soundcard"

    def __init__(self, device, channels, samplerate_hz, block_frames, ring_frames):
        super().__init__(channels, samplerate_hz, ring_frames)
        self.sd = load_sounddevice()
        self.block_frames = int(block_frames)
        self.device = _find_device(self.sd, device)
        try:
            self.sd.check_input_settings(device=self.device, channels=self.channels, dtype="float32",
                                         samplerate=self.samplerate_hz)
        except Exception as exc:
            info = _device_info(self.sd, self.device)
            raise UsageError(
                f"[input] device = {device!r} ({info['name']}): cannot capture {self.channels} channels at "
                f"{self.samplerate_hz:g} Hz ({exc}); it offers {info['max_input_channels']} input channels, "
                f"default rate {info['default_samplerate']:g} Hz") from None
        self.device_name = _device_info(self.sd, self.device)["name"]
        self._t0 = self._last_adc = None
        self._expected_adc = None
        self._stream = None

    def describe(self) -> str:
        return f"sound card {self.device_name!r}"

    def _callback(self, indata, frames, t, status):
        # Real-time thread: copy, count and note flags only.
        adc = t.inputBufferAdcTime
        if status.input_overflow:
            self.input_overflows += 1
            self.ring.lost(self._overflow_frames(adc, frames))
        self.ring.write(indata)
        if adc > 0:
            self._expected_adc = adc + frames / self.samplerate_hz
            self._last_adc = (self.ring.next_stream_index - frames, adc)

    def _overflow_frames(self, adc: float, frames: int) -> int:
        """Frames lost before this callback's buffer (an input overflow is always at least one frame).

        With ADC timestamps: the time between the expected and the actual
        first frame. Without them (some drivers give none): the frames the
        callbacks delivered against the monotonic time since the first
        callback, to the nearest whole buffer, since hosts lose whole buffers
        and the callback's own arrival time jitters by up to one.
        """
        if self._expected_adc is not None and adc > 0:
            return max(1, int(round((adc - self._expected_adc) * self.samplerate_hz)))
        if self._t0 is None:
            return frames
        due = (time.monotonic() - self._t0) * self.samplerate_hz - frames  # this buffer's first frame
        missing = due - self.ring.next_stream_index  # frames delivered and frames already counted lost
        return max(frames, int(round(missing / frames)) * frames)

    def start(self):
        self._last_adc = None
        self._t0 = None
        self._stream = self.sd.InputStream(device=self.device, channels=self.channels, dtype="float32",
                                           samplerate=self.samplerate_hz, blocksize=self.block_frames,
                                           callback=self._timed_callback, finished_callback=self._finished)
        self._offset = time.time() - self._stream.time  # PortAudio stream time to UTC
        self.clock = SampleClock(self.samplerate_hz, time.time())
        self._stream.start()
        self._thread = threading.Thread(target=self._watch_clock, name="beamtap-adc-clock", daemon=True)
        self._thread.start()

    def _timed_callback(self, indata, frames, t, status):
        if self._t0 is None:  # the arrival of the first buffer's last frame
            self._t0 = time.monotonic() - frames / self.samplerate_hz
        self._callback(indata, frames, t, status)

    def _finished(self):
        # PortAudio ended the stream (device unplugged, driver failure) without our asking.
        if not self._stop.is_set():
            self.error = f"sound card {self.device_name!r}: the input stream stopped"
            self.finished.set()
            self.ring.wake()

    def _watch_clock(self):
        # Feed ADC timestamps to the sample clock outside the callback; notice a stream that died.
        while not self._stop.wait(0.5):
            last = self._last_adc
            if last is not None:
                self.clock.observe(last[0], last[1] + self._offset)
            if not self._stream.active and not self._stop.is_set() and self.error is None:
                self.error = f"sound card {self.device_name!r}: the input stream is no longer active"
                self.finished.set()

    def stop(self):
        self._stop.set()
        if self._stream is not None:
            self._stream.stop()
            self._stream.close()
        super().stop()


def _device_info(sd, device) -> dict:
    """The device's info; ``None`` is PortAudio's default input device (``query_devices(None)`` would
    list every device instead)."""
    if device is None:
        try:
            return sd.query_devices(kind="input")
        except Exception as exc:
            raise UsageError(f"[input] device: there is no default input device ({exc}); name one, see "
                             "'beamtap devices'") from None
    return sd.query_devices(device)


def _find_device(sd, device):
    if device is None or device == "":
        return None
    if isinstance(device, int):
        try:
            sd.query_devices(device)
        except Exception:
            raise UsageError(f"[input] device = {device}: no such device (see 'beamtap devices')") from None
        return device
    matches = [i for i, d in enumerate(sd.query_devices())
               if device.lower() in d["name"].lower() and d["max_input_channels"] > 0]
    exact = [i for i in matches if sd.query_devices(i)["name"].lower() == device.lower()]
    if exact:
        return exact[0]
    if not matches:
        raise UsageError(f"[input] device = {device!r}: no input device has that name (see 'beamtap devices')")
    return matches[0]


#: Most frames one upstream ``raw`` message may carry (the config's largest block).
MAX_STREAM_FRAMES = 65536
#: Largest first_sample accepted from upstream (far beyond any real stream: 3e6 years at 48 kHz).
MAX_FIRST_SAMPLE = 2**62
#: How far an upstream stream may run ahead of real time since its first message, seconds.
STREAM_AHEAD_S = 10.0


class StreamSource(Source):
    """The ``raw`` topic of another beamtap service.

    Every message is checked before use: an integer ``first_sample`` in
    0..2**62, strictly after the previous message's frames and not further
    ahead of real time than the time that passed (plus
    :data:`STREAM_AHEAD_S`); a finite ``time_utc``; float32 little-endian
    samples shaped (frames, channels) with at least the array's channels
    and at most :data:`MAX_STREAM_FRAMES` frames. A bad message is dropped
    and counted by reason (``rejected`` in the status) and never moves the
    sample counter. A forward jump in ``first_sample`` (messages lost
    upstream or on the way) or a new upstream ``stream`` id (a restart) is a
    flagged gap here too.
    """

    kind = "stream"

    def __init__(self, endpoint, channels, samplerate_hz, ring_frames):
        super().__init__(channels, samplerate_hz, ring_frames)
        self.endpoint = endpoint
        self.upstream_gaps = 0
        self.rejected: dict[str, int] = {}
        self._expect = None  # upstream first_sample of the next message
        self._stream_id = None
        self._origin = None  # (upstream first_sample, monotonic time) of the stream's first message
        self._next_warning = 0.0

    def describe(self) -> str:
        return f"raw stream from {self.endpoint}"

    def stats(self) -> dict:
        return dict(super().stats(), rejected=dict(self.rejected), upstream_gaps=self.upstream_gaps)

    def _run(self):
        import zmq  # noqa: PLC0415

        ctx = zmq.Context.instance()
        with ctx.socket(zmq.SUB) as sock:
            sock.setsockopt(zmq.RCVHWM, 1000)
            sock.setsockopt(zmq.LINGER, 0)
            # A message larger than twice the largest block this source accepts is never read.
            sock.setsockopt(zmq.MAXMSGSIZE, 2 * max(self.channels, 64) * MAX_STREAM_FRAMES * 4 + 65536)
            sock.connect(self.endpoint)
            sock.setsockopt(zmq.SUBSCRIBE, b"raw")
            while not self._stop.is_set():
                if not sock.poll(200):
                    continue
                try:
                    frames = sock.recv_multipart(copy=False)
                except zmq.ZMQError:
                    continue
                try:
                    self.accept(frames)
                except Exception as exc:  # noqa: BLE001 - no message may stop the source
                    self._reject(f"internal error ({type(exc).__name__})", str(exc))

    def accept(self, frames) -> bool:
        """Check one upstream message and, if good, put its frames in the ring; False if rejected."""
        from beamtap.client.protocol import ProtocolError, decode  # noqa: PLC0415

        try:
            topic, header, data = decode(frames)
        except ProtocolError as exc:
            return self._reject("malformed", str(exc))
        if topic != "raw":
            return self._reject("wrong topic", repr(topic))
        first, utc = header.get("first_sample"), header.get("time_utc")
        if isinstance(first, bool) or not isinstance(first, int) or not 0 <= first <= MAX_FIRST_SAMPLE:
            return self._reject("bad first_sample", f"first_sample = {first!r}, expected a whole number "
                                "from 0 to 2**62")
        if isinstance(utc, bool) or not isinstance(utc, (int, float)) or not math.isfinite(utc) or utc <= 0:
            return self._reject("bad time_utc", f"time_utc = {utc!r}, expected a finite positive number")
        if data is None or header.get("dtype") != "<f4":
            return self._reject("bad dtype", f"dtype = {header.get('dtype')!r}, expected '<f4' (float32)")
        if data.ndim != 2 or not 1 <= data.shape[0] <= MAX_STREAM_FRAMES or data.shape[1] < self.channels:
            return self._reject("bad shape", f"shape {list(data.shape)}, expected (1..{MAX_STREAM_FRAMES} frames, "
                                f">= {self.channels} channels)")
        stream_id = header.get("stream")
        now = time.monotonic()
        if self._expect is None or stream_id != self._stream_id:
            if self._expect is not None:  # upstream restarted: a loss of unknown length
                self.upstream_gaps += 1
                self.ring.lost(1)
                log.warning("stream source: upstream %s restarted (stream %r); gap flagged", self.endpoint, stream_id)
            else:
                self.clock = SampleClock(self.samplerate_hz, float(utc))
            self._stream_id, self._expect, self._origin = stream_id, first, (first, now)
        if first < self._expect:
            return self._reject("repeated or backward", f"first_sample {first} before {self._expect}")
        ahead = (first - self._origin[0]) / self.samplerate_hz - (now - self._origin[1])
        if ahead > STREAM_AHEAD_S:
            return self._reject("ahead of real time", f"first_sample {first} is {ahead:.1f} s ahead of the "
                                "time since the stream began")
        if first > self._expect:
            self.upstream_gaps += 1
            self.ring.lost(first - self._expect)
        self._expect = first + len(data)
        self.ring.write(data[:, : self.channels])
        return True

    def _reject(self, reason: str, detail: str) -> bool:
        # Counted every time; logged at most once a second with the latest detail.
        self.rejected[reason] = self.rejected.get(reason, 0) + 1
        now = time.monotonic()
        if now >= self._next_warning:
            log.warning("stream source: message from %s dropped (%s): %s; %d dropped so far", self.endpoint,
                        reason, detail, sum(self.rejected.values()))
            self._next_warning = now + 1.0
        return False


class SessionSource(Source):
    """A recorded session's raw segments, played back contiguously; its gaps stay gaps."""

    kind = "session"

    def __init__(self, path, channels, samplerate_hz, block_frames, ring_frames, realtime=True):
        from beamtap.session import MANIFEST, segments  # noqa: PLC0415

        self.path = str(path)
        if not (Path(path) / MANIFEST).exists():
            raise UsageError(f"[input] path = {self.path}: not a beamtap session folder (no {MANIFEST})")
        self.segments = segments(path, "raw")
        if not self.segments:
            raise UsageError(f"[input] path = {self.path}: the session has no raw segments")
        for seg in self.segments:
            if int(round(seg["samplerate_hz"])) != int(round(samplerate_hz)) or seg["channels"] < channels:
                raise UsageError(f"[input] path = {self.path}: segment {seg['file']} has {seg['channels']} channels "
                                 f"at {seg['samplerate_hz']:g} Hz; the config needs {channels} at {samplerate_hz:g} Hz")
        super().__init__(channels, samplerate_hz, ring_frames)
        self.block_frames, self.realtime = int(block_frames), realtime

    def describe(self) -> str:
        return f"session {self.path}" + ("" if self.realtime else " (fast)")

    def _run(self):
        from beamtap.wavfile import WavReader  # noqa: PLC0415

        t0 = time.monotonic()
        first0 = self.segments[0]["first_sample"]
        self.clock = SampleClock(self.samplerate_hz, self.segments[0]["utc"])
        for seg in self.segments:
            gap = seg["first_sample"] - first0 - self.ring.next_stream_index
            if gap > 0:
                self.ring.lost(gap)
            with WavReader(Path(self.path) / seg["file"]) as r:
                left = seg["frames"]
                while left > 0 and not self._stop.is_set():
                    block, _ = r.read(min(self.block_frames, left))
                    if len(block) == 0:
                        break
                    left -= len(block)
                    self._paced_write(block[:, : self.channels], t0, self.realtime)
            if self._stop.is_set():
                return


def make_source(config):
    """The source a config asks for."""
    inp, geo = config.input, config.geometry
    ring = max(int(inp.ring_s * inp.samplerate_hz), 2 * inp.block_frames)
    ch = geo.n_input_channels
    if inp.source == "simulated":
        return SimulatedSource(config.text, config.where, ch, inp.samplerate_hz, inp.block_frames, ring,
                               inp.realtime)
    if inp.source == "file":
        return FileSource(inp.path, ch, inp.samplerate_hz, inp.block_frames, ring, inp.realtime, inp.loop)
    if inp.source == "soundcard":
        return SoundcardSource(inp.device, ch, inp.samplerate_hz, inp.block_frames, ring)
    if inp.source == "stream":
        return StreamSource(inp.endpoint, ch, inp.samplerate_hz, ring)
    if inp.source == "session":
        return SessionSource(inp.path, ch, inp.samplerate_hz, inp.block_frames, ring, inp.realtime)
    raise UsageError(f"[input] source = {inp.source!r} is not supported")
