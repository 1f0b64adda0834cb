"""The everyday client commands against a live service subprocess."""

import json
import os
import re
import subprocess
import sys

import numpy as np
import pytest

from beamtap.client import Controller, Subscriber

from conftest import line_config, run_in_pty, running_service

SCENE = line_config(input_extra="scene_noise_db = -50.0",
                    scene=[{"azimuth_deg": 52.0, "signal": "noise", "band_hz": [300.0, 1400.0], "level_db": -20.0}],
                    audio_deg=[(52.0, 0.0), (140.0, 0.0)])


@pytest.fixture(scope="module")
def svc(tmp_path_factory):
    with running_service(tmp_path_factory.mktemp("tools"), SCENE) as s:
        yield s


def beamtap(*args, **kw):
    return subprocess.run([sys.executable, "-m", "beamtap", *args], capture_output=True, text=True, timeout=120, **kw)


def test_tail_prints_one_line_per_message(svc):
    r = beamtap("tail", "--endpoint", svc.publish, "--topics", "power", "audio", "--count", "12")
    assert r.returncode == 0, r.stderr
    lines = r.stdout.strip().splitlines()
    assert len(lines) == 12
    pat = re.compile(r"^(power|audio)\s+seq=\d+\s+first_sample=\d+\s+\d{4}-\d\d-\d\dT[\d:.]+Z shape=\S+\s+ok")
    assert all(pat.match(line) for line in lines), lines


def test_tail_says_when_no_service_answers():
    r = beamtap("tail", "--endpoint", "tcp://127.0.0.1:9", "--count", "1", "--timeout", "0.5")
    assert r.returncode == 2 and "no message" in r.stderr and "Traceback" not in r.stderr


def test_ctl_retargets_and_reads_back(svc):
    r = beamtap("ctl", "--control", svc.control, "beams", "--audio", "75", "100,0", "--fan", "0,180,3")
    assert r.returncode == 0, r.stderr
    assert "61 power beams" in r.stdout
    r = beamtap("ctl", "--control", svc.control, "--json", "beams")
    got = json.loads(r.stdout)
    assert got["beams"]["audio_deg"] == [[75.0, 0.0], [100.0, 0.0]]
    assert len(got["beams"]["directions_deg"]) == 61
    r = beamtap("ctl", "--control", svc.control, "status")
    assert r.returncode == 0 and "gaps" in r.stdout and "block_ms_p99" in r.stdout
    r = beamtap("ctl", "--control", svc.control, "config")
    assert r.returncode == 0 and "[array]" in r.stdout and "directions_deg" in r.stdout
    r = beamtap("ctl", "--control", svc.control, "beams", "--shading", "kaiser")
    assert r.returncode == 2
    r = beamtap("ctl", "--control", svc.control, "beams", "--set-json", '{"band_hz": [2000, 100]}')
    assert r.returncode == 2 and "band_hz" in r.stderr and r.stderr.count("\n") == 1
    with Controller(svc.control) as ctl:  # put the fan back for the other tests
        ctl.beams(set={"fan": {"from_deg": 0.0, "to_deg": 180.0, "step_deg": 2.0}, "audio_deg": [[52.0, 0.0]]})


def test_ctl_without_service_is_a_clear_error():
    r = beamtap("ctl", "--control", "tcp://127.0.0.1:9", "--timeout", "0.5", "status")
    assert r.returncode == 2 and "no reply" in r.stderr


def test_watch_in_a_pseudo_terminal_marks_the_peak_and_restores_the_terminal(svc):
    env = dict(os.environ, TERM="xterm-256color", PYTHONIOENCODING="utf-8")
    rc, out, before, after = run_in_pty(["watch", "--endpoint", svc.publish, "--rate", "10"], env, 15.0,
                                        send=b"q", after_s=5.0)
    assert rc == 0
    text = out.decode("utf-8", "replace")
    peaks = [float(m) for m in re.findall(r"peak (-?\d+\.\d)°", text)]
    assert len(peaks) >= 5
    assert np.median(peaks[-5:]) == pytest.approx(52.0, abs=2.0)
    assert "waterfall" in text and "gaps 0" in text
    assert "\x1b[48;5;" in text  # colour cells on a colour terminal
    assert text.rstrip().endswith("\x1b[?1049l") or "\x1b[?1049l" in text[-200:]  # main screen back
    assert "\x1b[?25h" in text[-200:]  # cursor shown again
    assert after == before  # terminal modes restored


def test_watch_falls_back_to_plain_characters(svc):
    env = dict(os.environ, TERM="dumb", PYTHONIOENCODING="ascii")
    rc, out, _, _ = run_in_pty(["watch", "--endpoint", svc.publish, "--seconds", "3"], env, 15.0)
    assert rc == 0
    text = out.decode("ascii", "replace")
    assert "\x1b[48;5;" not in text and "#" in text
    peaks = [float(m) for m in re.findall(r"peak (-?\d+\.\d)d", text)]
    assert peaks and np.median(peaks) == pytest.approx(52.0, abs=2.0)


def test_listen_plays_to_a_virtual_alsa_output(svc, tmp_path):
    home = tmp_path / "home"
    home.mkdir()
    (home / ".asoundrc").write_text(
        "pcm.nullout {\n type plug\n slave { pcm { type null } format FLOAT_LE rate 48000 channels 1 }\n}\n")
    with Controller(svc.control) as ctl:
        before = ctl.beams()["beams"]["audio_deg"]
    r = beamtap("listen", "--endpoint", svc.publish, "--control", svc.control, "--beam", "0", "--look", "60",
                "--device", "nullout", "--seconds", "3", env=dict(os.environ, HOME=str(home)))
    assert r.returncode == 0, r.stderr
    assert "CAUTION" in r.stderr and "loud" in r.stderr
    m = re.search(r"played ([\d.]+) s of beam 0", r.stdout)
    assert m and float(m.group(1)) > 0.5, r.stdout
    with Controller(svc.control) as ctl:
        assert ctl.beams()["beams"]["audio_deg"] == before  # restored on exit
    r = beamtap("listen", "--endpoint", svc.publish, "--control", svc.control, "--beam", "0", "--look", "60",
                "--device", "nullout", "--seconds", "1", "--keep", env=dict(os.environ, HOME=str(home)))
    assert r.returncode == 0, r.stderr
    with Controller(svc.control) as ctl:
        assert ctl.beams()["beams"]["audio_deg"][0] == [60.0, 0.0]  # --keep leaves it
        ctl.beams(set={"audio_deg": [[52.0, 0.0]]})


def test_clients_derive_endpoints_take_options_after_subcommands_and_find_peaks(svc):
    from beamtap.client.subscriber import control_for

    assert control_for("tcp://boat.local:7000") == "tcp://boat.local:5561"
    assert control_for("tcp://[::1]:5560") == "tcp://[::1]:5561"
    r = beamtap("ctl", "status", "--control", svc.control, "--timeout", "2")  # options after the subcommand
    assert r.returncode == 0 and "gaps" in r.stdout, r.stderr
    r = beamtap("ctl", "--control", "tcp://127.0.0.1:9", "status", "--timeout", "0.3")  # the later one wins
    assert r.returncode == 2 and "within 0.3 s" in r.stderr and "may still be busy" in r.stderr
    with Subscriber(svc.publish, topics=["power", "beams"], timeout_s=10) as sub:
        peaks = []
        while len(peaks) < 10:
            f = sub.recv()
            if f.topic == "power" and f.beams is not None and f.beams["beam_table"] == f.beam_table:
                (az, el), level = f.peak()
                peaks.append(az)
        with pytest.raises(ValueError, match="band"):
            f.peak(band=3)
    assert np.median(peaks) == pytest.approx(52.0, abs=2.0)


def test_devices_with_no_sound_card_says_so(tmp_path):
    home = tmp_path / "home"
    home.mkdir()
    r = beamtap("devices", env=dict(os.environ, HOME=str(home)))
    # this machine has no sound card: PortAudio finds no input (with one, the list has a starred default)
    assert r.returncode == 0
    assert "no input devices found" in r.stdout or "* default input" in r.stdout, r.stdout


def test_limiter_and_jitter_buffer():
    from beamtap.client.listen import JitterBuffer, Limiter

    lim = Limiter(gain_db=0.0, limit_db=-6.0, fade_frames=100)
    y = lim(np.ones(1000, np.float32))
    assert np.max(np.abs(y)) <= 10 ** (-6 / 20) + 1e-7
    assert y[0] < 0.02 and lim.limited > 0  # fades in, then limits
    jb = JitterBuffer(target_frames=300, max_frames=1000)
    out = np.empty(256, np.float32)
    assert jb.take(out) == 0  # not started before the target is queued
    jb.put(np.arange(400, dtype=np.float32))
    assert jb.take(out) == 256 and out[0] == 0 and out[-1] == 255
    assert jb.take(out) == 144 and jb.underruns == 1


def _brightest_bearing(png):
    from PIL import Image

    im = Image.open(png)
    info = json.loads(im.info["Description"])
    x0, y0, x1, y1 = (int(round(v)) for v in info["axes_px"])
    rgb = np.asarray(im.convert("RGB"), float)[y0 + 2:y1 - 2, x0 + 2:x1 - 2]
    luminance = rgb @ np.array([0.2126, 0.7152, 0.0722])  # beamtap palette: lightness rises with power
    col = int(np.argmax(luminance.mean(axis=0)))
    b0, b1 = info["bearing_deg"]
    return b0 + (col + 0.5) / luminance.shape[1] * (b1 - b0)


def test_picture_from_process_output_has_its_ridge_at_the_source(tmp_path):
    cfg = tmp_path / "scene.toml"
    cfg.write_text(SCENE.replace("block_frames = 1024", "block_frames = 2048"))
    wav, out = tmp_path / "s.wav", tmp_path / "out"
    assert beamtap("simulate", str(cfg), "--seconds", "4", "--out", str(wav)).returncode == 0
    assert beamtap("process", str(cfg), str(wav), "--out", str(out)).returncode == 0
    png = tmp_path / "p.png"
    r = beamtap("picture", str(out / "power.csv"), "--out", str(png))
    assert r.returncode == 0, r.stderr
    assert _brightest_bearing(png) == pytest.approx(52.0, abs=3.0)


def test_picture_live(svc, tmp_path):
    png = tmp_path / "live.png"
    r = beamtap("picture", "--live", "--seconds", "2", "--endpoint", svc.publish, "--out", str(png))
    assert r.returncode == 0, r.stderr
    assert _brightest_bearing(png) == pytest.approx(52.0, abs=3.0)
    r = beamtap("picture", "--out", str(png))
    assert r.returncode == 2 and "--live" in r.stderr


def _c_toolchain():
    import shutil

    if not shutil.which("gcc") or not shutil.which("pkg-config"):
        return None
    r = subprocess.run(["pkg-config", "--cflags", "--libs", "libzmq", "msgpack"], capture_output=True, text=True)
    return r.stdout.split() if r.returncode == 0 else None


@pytest.mark.skipif(_c_toolchain() is None, reason="needs gcc, libzmq3-dev and libmsgpack-dev (installed by .ci/run)")
def test_c_subscriber_from_the_protocol_document(svc, tmp_path):
    from pathlib import Path

    src = Path(__file__).resolve().parents[1] / "docs/examples/power_peak.c"
    exe = tmp_path / "power_peak"
    build = subprocess.run(["gcc", "-O2", "-Wall", "-Werror", "-o", str(exe), str(src), *_c_toolchain()],
                           capture_output=True, text=True)
    assert build.returncode == 0, build.stderr
    r = subprocess.run([str(exe), svc.publish, "120"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    rows = [dict(kv.split("=") for kv in line.split()) for line in r.stdout.splitlines()]
    assert len(rows) == 120
    seq = [int(row["seq"]) for row in rows]
    assert np.all(np.diff(seq) == 1)
    bearings = [float(row["bearing_deg"]) for row in rows]  # every line has its bearing: the example waits
    assert np.median(bearings) == pytest.approx(52.0, abs=2.0)  # for the beam table before printing


def test_subscriber_reports_sequence_and_sample_jumps_as_gaps():
    import zmq

    from beamtap.client import Subscriber
    from beamtap.client.protocol import encode

    ctx = zmq.Context.instance()
    pub = ctx.socket(zmq.PUB)
    port = pub.bind_to_random_port("tcp://127.0.0.1")
    try:
        with Subscriber(f"tcp://127.0.0.1:{port}", topics=["audio"], timeout_s=0.2) as sub:
            block = np.zeros((256, 1), np.float32)

            def send(seq, first):
                pub.send_multipart(encode("audio", {"stream": "s1", "seq": seq, "first_sample": first,
                                                    "gap": False, "frames_lost": 0}, block))

            # the slow-joiner handshake: publish until the subscriber hears one
            got = None
            while got is None:
                send(0, 0)
                try:
                    got = sub.recv()
                except TimeoutError:
                    pass
            send(1, 256)
            send(3, 768)        # one message dropped
            send(4, 1280)       # samples jump with contiguous sequence numbers
            frames = [sub.recv() for _ in range(3)]
    finally:
        pub.close(linger=0)
    assert [f.seq for f in frames] == [1, 3, 4]
    assert [f.gap for f in frames] == [False, True, True]
    assert frames[1].missed_messages == 1 and frames[2].missed_messages == 0


def test_demo_starts_service_and_view_and_stops_both(tmp_path):
    env = dict(os.environ, TERM="xterm-256color", PYTHONIOENCODING="utf-8")
    rc, out, _, _ = run_in_pty(["demo", "--seconds", "6"], env, 60.0)
    text = out.decode("utf-8", "replace")
    assert rc == 0
    assert "demo: service publishing on" in text
    peaks = [float(m) for m in re.findall(r"peak (-?\d+\.\d)°", text)]
    assert peaks  # the view drew the demo scene
    # the boat starts at 30° and moves 4°/s; the pinger sits at 118°
    assert all(20.0 <= p <= 60.0 or 110.0 <= p <= 126.0 for p in peaks), peaks
    leftover = subprocess.run(["pgrep", "-f", "beamtap serve --publish tcp://127.0.0.1:5560"], capture_output=True)
    assert leftover.returncode == 1  # the demo's service is gone


@pytest.mark.parametrize("args", [["tail", "--endpoint", "nonsense", "--count", "1"],
                                  ["ctl", "--control", "udp:/bad", "status"],
                                  ["watch", "--endpoint", "nonsense", "--seconds", "1"],
                                  ["record", "--endpoint", "nonsense", "--out", "/tmp/never-made", "--seconds", "1"]])
def test_malformed_endpoints_are_one_line_errors(args):
    r = beamtap(*args)
    assert r.returncode == 2
    assert "endpoint" in r.stderr and "Traceback" not in r.stderr


def test_watch_view_fits_80_columns_with_true_ticks_and_a_steady_scale():
    from beamtap.client.watch import MARGIN, View, axis

    az = np.column_stack([np.arange(0.0, 181.0, 1.0), np.zeros(181)])
    # ticks: the '|' of 0°, 90° and 180° on the columns whose bearing is nearest (common practice)
    cols = np.round(np.linspace(0, 180, 71)).astype(int)
    text = axis(az[cols, 0], 71)
    for tick in (0, 90, 180):
        c = int(np.argmin(np.abs(az[cols, 0] - tick)))
        assert text[c] == "|", (tick, text)
        assert f"{tick}°" in text
    view = View(colour=False, unicode=True, range_db=30.0, history_s=120.0)
    loud = np.full(181, -60.0)
    loud[90] = -10.0
    t0 = 1.8e9
    view.add_row(t0, loud)
    quiet = np.full(181, -60.0)
    quiet[90] = -40.0
    view.add_row(t0 + 1.0, quiet)
    assert view.scale_top == pytest.approx(-10.0 - 0.5)  # down by 0.5 dB in 1 s, not to the new peak
    screen = view.render(80, 30, "title " * 30, az, quiet, "overflows 0  gaps 0  lost 0 frames  " * 4, True,
                         now_utc=t0 + 1.0)
    lines = [seg.split("\x1b[")[0] for seg in screen.split("\x1b[2K")[1:]]  # each line's text
    assert all(len(ln) <= 80 for ln in lines), max(lines, key=len)
    assert "UTC" in screen and "gaps 0" in screen
    # the waterfall spans 120 s over the lines left, whatever the height
    rows = view.waterfall(10, t0 + 1.0)
    assert len(rows) == 10 and rows[0][1] is not None and rows[-1][1] is None
    assert MARGIN + 71 == 80


def test_watch_to_a_pipe_is_plain_text(svc):
    r = beamtap("watch", "--endpoint", svc.publish, "--seconds", "2", "--rate", "4")
    assert r.returncode == 0, r.stderr
    assert "\x1b" not in r.stdout
    peaks = [float(m) for m in re.findall(r"peak (-?\d+\.\d) deg", r.stdout)]
    assert peaks and np.median(peaks) == pytest.approx(52.0, abs=2.0)
    assert re.search(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ peak", r.stdout, re.M)


@pytest.mark.parametrize("args, words", [(["--band", "5"], "--band 5: the service forms 1 band"),
                                         (["--range-db", "-3"], "--range-db -3"),
                                         (["--rate", "0"], "--rate 0"),
                                         (["--history-s", "nan"], "--history-s nan")])
def test_watch_options_are_checked(svc, args, words):
    r = beamtap("watch", "--endpoint", svc.publish, "--seconds", "3", *args)
    assert r.returncode == 2 and words in r.stderr and "Traceback" not in r.stderr, r.stderr


def test_a_beam_change_too_big_to_build_is_refused_at_once(svc):
    """Band 10-23999 Hz at 48 kHz needs a 125 GiB band evaluator: priced and refused in one line,
    well inside the client's timeout, and the service runs on."""
    r = beamtap("ctl", "--control", svc.control, "beams", "--band", "10,23999")
    assert r.returncode == 2 and "MB of steering data" in r.stderr and r.stderr.count("\n") == 1, r.stderr
    with Controller(svc.control) as ctl:
        assert ctl.status()["state"] == "running"
