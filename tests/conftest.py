"""Shared helpers: independent reference signals for engine tests.

Plane waves here are generated without the engine or the scene simulator:
tones in closed form at the exact arrival times, broadband signals by an
exact whole-signal FFT phase shift of a periodic signal.
"""

from __future__ import annotations

import numpy as np
import pytest

from beamtap.service.engine.directions import unit_vectors


def arrival_leads_s(positions_m, c, az_deg, el_deg=0.0):
    """How much earlier than the origin each sensor hears a plane wave (p·u/c)."""
    return positions_m @ unit_vectors(az_deg, el_deg) / c


def tone_plane_wave(positions_m, c, fs, az_deg, freq_hz, frames, amplitude=0.5, el_deg=0.0):
    t = np.arange(frames)[:, None] / fs + arrival_leads_s(positions_m, c, az_deg, el_deg)[None, :]
    return (amplitude * np.sin(2 * np.pi * freq_hz * t)).astype(np.float32)


def broadband_plane_wave(positions_m, c, fs, az_deg, source, el_deg=0.0, top=0.4):
    """Sensor signals of a periodic source (band-limited to ``top``·fs) by exact FFT shifts.

    Returns (sensors float32 (n, m), band-limited source float64 (n,)).
    """
    n = len(source)
    spec = np.fft.rfft(source)
    f = np.fft.rfftfreq(n)
    spec[f > top] = 0.0
    src = np.fft.irfft(spec, n)
    leads = arrival_leads_s(positions_m, c, az_deg, el_deg) * fs
    x = np.stack([np.fft.irfft(spec * np.exp(2j * np.pi * f * a), n) for a in leads], axis=1)
    return x.astype(np.float32), src


@pytest.fixture
def rng():
    return np.random.default_rng(20261202)


# ---------------------------------------------------------------------------
# Running the service the way a user does: a subprocess on loopback.
# ---------------------------------------------------------------------------
import contextlib  # noqa: E402
import os  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402

from beamtap.processes import stop, wait_ready  # noqa: E402


class RunningService:
    def __init__(self, proc, endpoints, log_path):
        self.proc, self.endpoints, self.log_path = proc, endpoints, log_path

    @property
    def publish(self):
        return self.endpoints["publish"]

    @property
    def control(self):
        return self.endpoints["control"]

    def log(self):
        return open(self.log_path).read()

    def rss_kb(self) -> int:
        for line in open(f"/proc/{self.proc.pid}/status"):
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
        return 0


@contextlib.contextmanager
def running_service(tmp_path, config_text=None, extra_args=(), env=None, expect_rc=0, startup_s=60.0,
                    publish="tcp://127.0.0.1:*"):
    """Start ``beamtap serve`` on ephemeral loopback ports; SIGTERM it at the end.

    Waits on the service's ready file (written once its sockets are bound),
    never on a fixed sleep.
    """
    args = [sys.executable, "-m", "beamtap", "serve", "--publish", publish,
            "--control", "tcp://127.0.0.1:*"]
    if config_text is not None:
        cfg = tmp_path / "service.toml"
        cfg.write_text(config_text)
        args += ["--config", str(cfg)]
    ready = tmp_path / f"ready-{time.monotonic_ns()}.json"
    log_path = tmp_path / f"service-{time.monotonic_ns()}.log"
    args += ["--ready-file", str(ready), *extra_args]
    full_env = dict(os.environ, **(env or {}))
    with open(log_path, "w") as log:
        proc = subprocess.Popen(args, stdout=log, stderr=subprocess.STDOUT, env=full_env)
    try:
        endpoints = wait_ready(proc, ready, startup_s)
    except TimeoutError:
        raise AssertionError(f"service not ready in {startup_s} s:\n{open(log_path).read()}") from None
    if endpoints is None:
        raise AssertionError(f"service exited with {proc.returncode}:\n{open(log_path).read()}")
    service = RunningService(proc, endpoints, log_path)
    try:
        yield service
    finally:
        stop(proc)
    if expect_rc is not None:
        assert proc.returncode == expect_rc, open(log_path).read()
    if expect_rc == 0:
        assert not ready.exists(), "the service left its ready file behind"


def line_config(count=16, spacing_m=0.5, samplerate_hz=48000, block_frames=1024, source="simulated",
                input_extra="", scene=(), fan=(0.0, 180.0, 2.0), band_hz=(300.0, 1400.0), audio_deg=(),
                extra=""):
    """A config for a line array in water at 1500 m/s, as TOML text.

    ``scene`` is a sequence of dicts, one ``[[input.scene]]`` entry each.
    """
    def toml(v):
        if isinstance(v, str):
            return f'"{v}"'
        if isinstance(v, (list, tuple)):
            return "[" + ", ".join(toml(e) for e in v) + "]"
        return repr(v)

    entries = "".join("[[input.scene]]\n" + "".join(f"{k} = {toml(v)}\n" for k, v in s.items()) for s in scene)
    audio = f"audio_deg = {toml([list(a) for a in audio_deg])}\n" if audio_deg else ""
    return (f"[array]\nline = {{ count = {count}, spacing_m = {spacing_m} }}\n"
            f"[medium]\nsound_speed_mps = 1500.0\n"
            f"[input]\nsource = \"{source}\"\nsamplerate_hz = {samplerate_hz}\nblock_frames = {block_frames}\n"
            f"{input_extra}\n{entries}"
            f"[beams]\nfan = {{ from_deg = {fan[0]}, to_deg = {fan[1]}, step_deg = {fan[2]} }}\n"
            f"band_hz = {toml(list(band_hz))}\n{audio}{extra}\n")


def collect_power(sub, count):
    """At least ``count`` power frames, and until the subscriber has seen a beam table."""
    frames = []
    while len(frames) < count or sub.beams is None:
        f = sub.recv()
        if f.topic == "power":
            frames.append(f)
    return frames


def run_in_pty(args, env, timeout_s, send=None, after_s=None, size=(40, 120)):
    """Run ``python -m beamtap *args`` on a pseudo-terminal of ``size`` (rows, columns) until it exits.

    Returns (status, output bytes, terminal modes before, terminal modes after). ``send`` is
    written to the terminal once ``after_s`` seconds have passed. The output is drained all
    along, or the program would block writing to the terminal.
    """
    import fcntl
    import pty
    import select
    import struct
    import termios

    master, slave = pty.openpty()
    os.set_blocking(master, False)
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", size[0], size[1], 0, 0))
    before = termios.tcgetattr(slave)
    proc = subprocess.Popen([sys.executable, "-m", "beamtap", *args], stdin=slave, stdout=slave, stderr=slave,
                            env=env, close_fds=True)
    out = b""
    start = time.monotonic()
    try:
        while proc.poll() is None and time.monotonic() - start < timeout_s:
            r, _, _ = select.select([master], [], [], 0.1)
            if r:
                try:
                    out += os.read(master, 65536)
                except OSError:
                    break
            if send is not None and time.monotonic() - start >= after_s:
                os.write(master, send)
                send = None
        rc = proc.wait(timeout=5)
        while True:
            r, _, _ = select.select([master], [], [], 0.2)
            if not r:
                break
            try:
                chunk = os.read(master, 65536)
            except OSError:
                break
            if not chunk:
                break
            out += chunk
        after = termios.tcgetattr(slave)
    finally:
        if proc.poll() is None:
            proc.kill()
        os.close(slave)
        os.close(master)
    return rc, out, before, after


@contextlib.contextmanager
def running_web(tmp_path, publish, control, extra=(), expect_rc=0):
    """Start ``beamtap web`` on an ephemeral loopback port for a running service; yields (url, log path)."""
    ready = tmp_path / f"web-{time.monotonic_ns()}.json"
    log_path = tmp_path / f"web-{time.monotonic_ns()}.log"
    args = [sys.executable, "-m", "beamtap", "web", "--endpoint", publish, "--control", control,
            "--listen", "127.0.0.1:0", "--ready-file", str(ready), *extra]
    with open(log_path, "w") as log:
        proc = subprocess.Popen(args, stdout=log, stderr=subprocess.STDOUT)
    info = wait_ready(proc, ready, 30)
    assert info is not None, open(log_path).read()
    try:
        yield info["url"], log_path
    finally:
        stop(proc)
    assert proc.returncode == expect_rc, open(log_path).read()
