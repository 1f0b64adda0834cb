"""Capture through the real PortAudio path, from a virtual ALSA sound card,
and beam workers fed by another service's raw stream."""

import numpy as np
import pytest

from beamtap.client import Controller, Subscriber

from conftest import broadband_plane_wave, collect_power, line_config, running_service

FS = 48000
N_CH = 8
BEARING = 117.0


def _portaudio_available():
    try:
        import sounddevice  # noqa: F401 - probing for PortAudio
    except OSError:
        return False
    return True


def soundcard_config(device):
    return line_config(count=N_CH, samplerate_hz=FS, source="soundcard", fan=(0.0, 180.0, 1.0),
                       input_extra=f'device = "{device}"\nring_s = 0.5', audio_deg=[(BEARING, 0.0)])


@pytest.fixture
def virtual_card(tmp_path):
    """An ALSA ``file`` PCM (slave ``null``) fed by a raw file, wrapped in ``plug``.

    The file PCM is not paced and repeats its last period when the file runs
    out, so the plane wave is made periodic (4096 frames, a whole number of
    periods) and stays valid however far the capture runs.
    """
    rng = np.random.default_rng(7)
    from beamtap.service.engine import ArrayGeometry

    geo = ArrayGeometry.line(N_CH, 0.5)
    x, _ = broadband_plane_wave(geo.centred_positions_m, 1500.0, FS, BEARING, 0.2 * rng.standard_normal(4096))
    raw = tmp_path / "array.raw"
    np.tile(x, (64, 1)).astype("<f4").tofile(raw)
    home = tmp_path / "home"
    home.mkdir()
    (home / ".asoundrc").write_text(f"""
pcm.arrayfile {{
    type file
    slave.pcm "null"
    file "/dev/null"
    infile "{raw}"
    format "raw"
}}
pcm.arraycap {{
    type plug
    slave {{
        pcm "arrayfile"
        format FLOAT_LE
        channels {N_CH}
        rate {FS}
    }}
}}
""")
    return {"HOME": str(home)}


@pytest.mark.skipif(not _portaudio_available(), reason="needs libportaudio2 (installed by .ci/run)")
def test_capture_from_virtual_alsa_card_points_at_the_plane_wave(tmp_path, virtual_card):
    with running_service(tmp_path, soundcard_config("arraycap"), env=virtual_card) as svc:
        with Subscriber(svc.publish, topics=["power", "beams"], timeout_s=20) as sub:
            frames = collect_power(sub, 30)
        with Controller(svc.control) as ctl:
            st = ctl.status()
    assert "sound card 'arraycap'" in st["source"]
    beams = sub.beams["power_deg"]
    peaks = [beams[int(np.argmax(f.data[0]))][0] for f in frames[3:]]
    assert np.median(peaks) == pytest.approx(BEARING, abs=1.0)
    # The file PCM delivers far faster than real time: the losses are counted, never silent.
    assert st["frames_captured"] > 0
    assert st["ring_overflows"] > 0 and st["frames_lost"] > 0 and st["gaps"] > 0
    assert any(f.gap and f.frames_lost > 0 for f in frames)


@pytest.mark.skipif(not _portaudio_available(), reason="needs libportaudio2 (installed by .ci/run)")
@pytest.mark.parametrize("device_line", ["", 'device = ""'])
def test_default_sound_card_when_no_device_is_named(tmp_path, virtual_card, device_line):
    """`device` absent or empty: PortAudio's default input, here ALSA's `default` PCM declared as the
    virtual card."""
    home = virtual_card["HOME"]
    rc = open(f"{home}/.asoundrc").read()
    open(f"{home}/.asoundrc", "w").write(rc + "\npcm.!default {\n    type plug\n    slave.pcm \"arraycap\"\n}\n")
    cfg = soundcard_config("arraycap").replace('device = "arraycap"', device_line)
    with running_service(tmp_path, cfg, env=virtual_card) as svc:
        with Subscriber(svc.publish, topics=["power", "beams"], timeout_s=20) as sub:
            frames = collect_power(sub, 30)
        with Controller(svc.control) as ctl:
            st = ctl.status()
    assert st["source"].startswith("sound card") and st["state"] == "running"
    beams = sub.beams["power_deg"]
    peaks = [beams[int(np.argmax(f.data[0]))][0] for f in frames[3:]]
    assert np.median(peaks) == pytest.approx(BEARING, abs=1.0)


@pytest.mark.skipif(not _portaudio_available(), reason="needs libportaudio2 (installed by .ci/run)")
def test_input_overflow_without_adc_time_is_a_gap_of_the_lost_length(virtual_card):
    """The callback as PortAudio calls it, on a real source for the virtual card (in a child process
    whose HOME holds the card): an overflow whose time info carries no ADC timestamp (some drivers
    give none) still becomes a gap, sized by the frames the callbacks delivered against the time
    that passed (the monotonic clock is stepped by the script, so the sizes are exact)."""
    import json
    import os
    import subprocess
    import sys

    r = subprocess.run([sys.executable, "-c", _OVERFLOW_SCRIPT.format(ch=N_CH, fs=FS)], capture_output=True,
                       text=True, timeout=60, env={**os.environ, **virtual_card})
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["overflows"] == 2
    assert out["first"] == [0, 1024, 2048, 3072, 4096, 8 * 1024, 9 * 1024 + out["gaps"][1]]
    assert out["gaps"][0] == 3 * 1024  # three buffers lost
    assert out["gaps"][1] >= 1  # an overflow with no measurable loss is still a gap, never glued


_OVERFLOW_SCRIPT = """
import json, types
import numpy as np
import beamtap.service.sources.soundcard as sources
clock = {{"now": 100.0}}
sources.time.monotonic = lambda: clock["now"]
src = sources.SoundcardSource("arraycap", {ch}, {fs}, 1024, 48000)
no_time = types.SimpleNamespace(inputBufferAdcTime=0.0, currentTime=0.0)
ok, overflow = types.SimpleNamespace(input_overflow=False), types.SimpleNamespace(input_overflow=True)
block = np.zeros((1024, {ch}), np.float32)
for i in range(5):
    clock["now"] = 100.0 + (i + 1) * 1024 / {fs}
    src._timed_callback(block, 1024, no_time, ok)
clock["now"] = 100.0 + 9 * 1024 / {fs}  # three buffers lost, then this one arrives
src._timed_callback(block, 1024, no_time, overflow)
clock["now"] += 1024 / {fs}
src._timed_callback(block, 1024, no_time, overflow)  # on time, flagged anyway
chunks = [src.ring.read(1024, timeout=0) for _ in range(7)]
print(json.dumps({{"overflows": src.input_overflows, "first": [c.first_sample for c in chunks],
                  "gaps": [c.gap_frames for c in chunks if c.gap_frames]}}))
"""


@pytest.mark.skipif(not _portaudio_available(), reason="needs libportaudio2 (installed by .ci/run)")
def test_unknown_capture_device_is_a_one_line_error(tmp_path, virtual_card):
    import subprocess
    import sys

    cfg = tmp_path / "bad.toml"
    cfg.write_text(soundcard_config("no-such-card"))
    r = subprocess.run([sys.executable, "-m", "beamtap", "serve", "--config", str(cfg)], capture_output=True,
                       text=True, timeout=60, env={**__import__("os").environ, **virtual_card})
    assert r.returncode == 2
    assert "no-such-card" in r.stderr and "Traceback" not in r.stderr


UPSTREAM = line_config(count=8, samplerate_hz=16000, block_frames=512, input_extra="scene_noise_db = -60.0",
                       scene=[{"azimuth_deg": 48.0, "signal": "noise", "band_hz": [300.0, 1400.0], "level_db": -20.0}],
                       extra="[publish]\nraw = true\n")


def downstream(endpoint):
    return line_config(count=8, samplerate_hz=16000, block_frames=512, source="stream",
                       input_extra=f'endpoint = "{endpoint}"', fan=(0.0, 180.0, 1.0))


def test_beam_worker_on_another_services_raw_stream_and_upstream_restart_is_a_gap(tmp_path):
    up_dir, down_dir = tmp_path / "up", tmp_path / "down"
    up_dir.mkdir()
    down_dir.mkdir()
    with running_service(up_dir, UPSTREAM) as up:
        port = up.publish
        with running_service(down_dir, downstream(port)) as down:
            with Subscriber(down.publish, topics=["power", "beams"], timeout_s=20) as sub:
                frames = collect_power(sub, 40)
                beams = sub.beams["power_deg"]
                peaks = [beams[int(np.argmax(f.data[0]))][0] for f in frames[5:]]
                assert np.median(peaks) == pytest.approx(48.0, abs=2.0)
                assert not any(f.gap for f in frames[1:])
                # Stop the upstream service and start it again on the same port.
                up.proc.terminate()
                up.proc.wait(timeout=10)
                with _restart(up_dir, port):
                    gap = None
                    while gap is None:
                        f = sub.recv()
                        if f.topic == "power" and f.gap:
                            gap = f
                    assert gap.frames_lost > 0
            with Controller(down.control) as ctl:
                assert ctl.status()["gaps"] >= 1


def _restart(directory, endpoint):
    """The upstream again, bound to the port the downstream is connected to."""
    return running_service(directory, UPSTREAM, publish=endpoint)


@pytest.fixture
def jack_server(tmp_path):
    """A private JACK server with the dummy driver (paces capture in real time)."""
    import os
    import shutil
    import subprocess
    import time

    from beamtap.processes import stop

    if not shutil.which("jackd"):
        pytest.skip("needs jackd2 (installed by .ci/run)")
    name = f"beamtap{os.getpid()}"
    env = dict(os.environ, JACK_NO_AUDIO_RESERVATION="1", JACK_DEFAULT_SERVER=name)
    log = open(tmp_path / "jack.log", "w")
    proc = subprocess.Popen(["jackd", "-n", name, "-R", "-d", "dummy", "-r", str(FS), "-p", "1024",
                             "-C", str(N_CH), "-P", "2"], stdout=log, stderr=subprocess.STDOUT, env=env)
    deadline = time.monotonic() + 20
    while "self-connect-mode" not in open(tmp_path / "jack.log").read():  # the server's ready line
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            raise AssertionError("jackd did not start:\n" + open(tmp_path / "jack.log").read())
        time.sleep(0.05)
    try:
        yield {"JACK_NO_AUDIO_RESERVATION": "1", "JACK_DEFAULT_SERVER": name}
    finally:
        stop(proc)
        log.close()


@pytest.mark.skipif(not _portaudio_available(), reason="needs libportaudio2 (installed by .ci/run)")
def test_paced_capture_through_jack_is_contiguous_and_on_time(tmp_path, virtual_card, jack_server):
    """The same file PCM over an ALSA ``jack`` PCM, paced by a JACK dummy-driver server."""
    home = virtual_card["HOME"]
    rc = open(f"{home}/.asoundrc").read()
    ports = "\n".join(f"        {i} system:capture_{i + 1}" for i in range(N_CH))
    rc = rc.replace('slave.pcm "null"', 'slave.pcm "jackslave"')
    rc = f"pcm.jackslave {{\n    type jack\n    capture_ports {{\n{ports}\n    }}\n}}\n" + rc
    open(f"{home}/.asoundrc", "w").write(rc)
    env = dict(virtual_card, **jack_server)
    cfg = soundcard_config("arraycap").replace("ring_s = 0.5", "ring_s = 2.0")
    with running_service(tmp_path, cfg, env=env) as svc:
        with Subscriber(svc.publish, topics=["power", "audio", "beams"], timeout_s=20) as sub:
            power, audio = [], []
            while len(power) < 220 or len(audio) < 220 or sub.beams is None:
                f = sub.recv()
                (power if f.topic == "power" else audio if f.topic == "audio" else []).append(f)
        with Controller(svc.control) as ctl:
            st = ctl.status()
    power, audio = power[10:], audio[10:]  # past the start-up transient
    for frames in (power, audio):
        assert np.all(np.diff([f.seq for f in frames]) == 1)
        assert np.all(np.diff([f.first_sample for f in frames]) == 1024)
        assert not any(f.gap for f in frames)
    assert st["overflows"] == 0 and st["frames_lost"] == 0 and st["gaps"] == 0
    # paced: 1024 frames per 21.3 ms of the server's clock
    span = audio[-1].published_utc - audio[0].published_utc
    assert span == pytest.approx((len(audio) - 1) * 1024 / FS, rel=0.05)
    beams = sub.beams["power_deg"]
    peaks = [beams[int(np.argmax(f.data[0]))][0] for f in power]
    assert np.median(peaks) == pytest.approx(BEARING, abs=1.0)
    # latency from the headers: capture of the earliest frame held -> publication (block + D + 5 ms)
    d = audio[0].bulk_delay_samples
    lat = [f.published_utc - (f.time_utc - d / FS) for f in audio]
    print(f"\npaced capture latency p50 {1e3 * np.median(lat):.2f} ms, limit {1e3 * ((1024 + d) / FS + 0.005):.2f} ms")
    assert np.median(lat) <= (1024 + d) / FS + 0.005


@pytest.mark.skipif(not _portaudio_available(), reason="needs libportaudio2 (installed by .ci/run)")
def test_devices_lists_the_virtual_card(virtual_card):
    import os
    import subprocess
    import sys

    r = subprocess.run([sys.executable, "-m", "beamtap", "devices"], capture_output=True, text=True, timeout=60,
                       env={**os.environ, **virtual_card})
    assert r.returncode == 0, r.stderr
    line = next(ln for ln in r.stdout.splitlines() if ln.endswith("arraycap"))
    index, inputs = line.split()[:2]
    assert int(inputs.rstrip("*")) >= N_CH
    # exactly one device starred as the default input, and the legend says what the star means
    starred = [ln for ln in r.stdout.splitlines() if ln[:6].rstrip().endswith("*")]
    assert len(starred) == 1 and "* default input" in r.stdout


def test_file_source_as_fast_as_possible(tmp_path):
    """[input] source = "file": a WAV through the live pipeline; realtime = false waits for the
    engine instead of dropping."""
    from beamtap.service.engine import ArrayGeometry
    from beamtap.wavfile import WavWriter

    geo = ArrayGeometry.line(N_CH, 0.5)
    rng = np.random.default_rng(3)
    x, _ = broadband_plane_wave(geo.centred_positions_m, 1500.0, FS, 33.0, 0.2 * rng.standard_normal(8 * FS))
    wav = tmp_path / "trial.wav"
    with WavWriter(wav, FS, N_CH) as w:
        w.write(x)
    cfg = line_config(count=N_CH, samplerate_hz=FS, source="file", fan=(0.0, 180.0, 1.0),
                      input_extra=f'path = "{wav}"\nrealtime = false\nloop = true')
    with running_service(tmp_path, cfg) as svc:
        with Subscriber(svc.publish, topics=["power", "beams"], timeout_s=20) as sub:
            frames = collect_power(sub, 200)
        with Controller(svc.control) as ctl:
            st = ctl.status()
    assert st["frames_lost"] == 0 and st["overflows"] == 0  # fast mode applies back-pressure
    assert not any(f.header["gap"] for f in frames)  # the service lost nothing
    # Faster than real time, this subscriber may miss messages (seq jumps); where it did not, the
    # stream is contiguous.
    seq = np.array([f.seq for f in frames])
    first = np.array([f.first_sample for f in frames])
    consecutive = np.diff(seq) == 1
    assert consecutive.sum() > 100
    assert np.all(np.diff(first)[consecutive] == 1024)
    assert np.all(np.diff(first) == 1024 * np.diff(seq))
    beams = sub.beams["power_deg"]
    assert np.median([beams[int(np.argmax(f.data[0]))][0] for f in frames]) == pytest.approx(33.0, abs=1.0)
