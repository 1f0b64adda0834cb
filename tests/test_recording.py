"""Trial recording through the running service: continuity, crash safety,
write errors, marks, and replay of a session through the same engine."""

import json
import os
import resource
import signal
import subprocess
import sys
import time

import numpy as np
from scipy.io import wavfile

from beamtap.client import Controller, Subscriber
from beamtap.session import read_manifest, segments

from conftest import line_config, running_service

FS = 16000
BLOCK = 512


def config(folder, segment_s=3.0, on_start=False, min_free_mb=1.0, what='["raw", "audio", "power"]'):
    return line_config(count=8, samplerate_hz=FS, block_frames=BLOCK, input_extra="scene_noise_db = -50.0",
                       scene=[{"azimuth_deg": 70.0, "signal": "noise", "band_hz": [300.0, 1400.0], "level_db": -20.0}],
                       audio_deg=[(70.0, 0.0), (20.0, 0.0)],
                       extra=f"""[publish]
raw = true
[record]
folder = "{folder}"
what = {what}
segment_s = {segment_s}
on_start = {"true" if on_start else "false"}
min_free_mb = {min_free_mb}
""")


def wait_recording(ctl, frames, timeout=30):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        st = ctl.request("record", action="status")["record"]
        if st["frames_written"].get("raw", 0) >= frames:
            return st
        time.sleep(0.1)  # polling the recorder's own counter
    raise AssertionError(f"recording did not reach {frames} frames: {st}")


def concat_raw(session):
    segs = segments(session, "raw")
    data = [wavfile.read(session / s["file"])[1] for s in segs]  # a standard reader
    return segs, data


def test_ten_seconds_recorded_sample_exact_across_segments(tmp_path):
    rec = tmp_path / "rec"
    with running_service(tmp_path, config(rec, segment_s=3.0)) as svc:
        published = {}
        with Subscriber(svc.publish, topics=["raw"], timeout_s=10, queue=100000) as sub, \
                Controller(svc.control) as ctl:
            sub.recv()
            reply = ctl.record("start", label="run 1")
            assert reply["recording"] is True
            mark = ctl.mark("run 1 starts")
            end = time.monotonic() + 10.5
            while time.monotonic() < end:
                f = sub.recv()
                published[f.first_sample] = np.array(f.data)
            stopped = ctl.record("stop")
            assert stopped["recording"] is False
            for _ in range(10):
                f = sub.recv()
                published[f.first_sample] = np.array(f.data)
    session = rec / os.listdir(rec)[0]
    assert session.name.endswith("-run-1")
    segs, data = concat_raw(session)
    # every segment but the last is exactly 3 s, and each starts where the previous ended
    assert all(s["frames"] == 3 * FS for s in segs[:-1]) and len(segs) >= 4
    assert all(b["first_sample"] == a["first_sample"] + a["frames"] for a, b in zip(segs, segs[1:]))
    assert all(s["closed"] for s in segs)
    recorded = np.concatenate(data)
    first = segs[0]["first_sample"]
    assert len(recorded) >= 10 * FS
    # concatenated segments = the published raw stream, sample for sample
    compared = 0
    for start, block in published.items():
        i = start - first
        if 0 <= i and i + len(block) <= len(recorded):
            assert np.array_equal(recorded[i:i + len(block)], block)
            compared += len(block)
    assert compared >= 9.5 * FS
    recs = read_manifest(session)
    head = recs[0]
    assert head["type"] == "session" and head["label"] == "run 1" and "[array]" in head["config"]
    assert len(head["config_sha256"]) == 64 and head["software"].startswith("beamtap ")
    assert head["host"] and head["started_iso"].endswith("Z")
    marks = [r for r in recs if r["type"] == "mark"]
    assert marks[0]["text"] == "run 1 starts" and marks[0]["sample"] == mark["sample"]
    assert recs[-1]["type"] == "stop"
    seg_recs = [r for r in recs if r["type"] == "segment"]
    assert {r["kind"] for r in seg_recs} == {"raw", "audio", "power"}
    assert all(r["beam_table"] == 1 and r["samplerate_hz"] == FS and "utc" in r for r in seg_recs)


def test_sigkill_loses_at_most_the_last_second(tmp_path):
    rec = tmp_path / "rec"
    with running_service(tmp_path, config(rec, segment_s=2.0, on_start=True), expect_rc=None) as svc:
        with Subscriber(svc.publish, topics=["raw"], timeout_s=10, queue=100000) as sub, \
                Controller(svc.control) as ctl:
            wait_recording(ctl, int(4.5 * FS))  # mid-way through the third 2 s segment
            last = sub.recv()
            while sub.socket.poll(0):  # the newest message published so far
                last = sub.recv()
            end_published = last.first_sample + len(last.data)
            svc.proc.send_signal(signal.SIGKILL)
            svc.proc.wait(timeout=10)
    session = rec / os.listdir(rec)[0]
    recs = read_manifest(session)  # parses after the kill
    assert recs[0]["type"] == "session" and recs[-1]["type"] != "stop"
    segs, data = concat_raw(session)  # every segment, the open one too, reads with scipy.io.wavfile
    assert not segs[-1]["closed"]
    recorded_end = segs[-1]["first_sample"] + len(data[-1])
    lost_s = (end_published - recorded_end) / FS
    print(f"\nSIGKILL test: {lost_s * 1e3:.0f} ms of published raw audio not on disk")
    assert lost_s <= 0.5  # headers every 0.25 s; ten runs of bench/kill_bench.py: worst 0.22 s
    assert all(b["first_sample"] == a["first_sample"] + len(d) for a, b, d in zip(segs, segs[1:], data))
    for kind in ("audio",):
        for s in segments(session, kind):
            wavfile.read(session / s["file"])


def _small_files():
    resource.setrlimit(resource.RLIMIT_FSIZE, (400_000, 400_000))


def test_write_error_stops_recording_not_beamforming(tmp_path):
    """Write-error injection at the file layer: the service runs with a 400 kB file-size
    limit (RLIMIT_FSIZE), so its WAV writes fail with EFBIG partway through a segment."""
    rec = tmp_path / "rec"
    args = [sys.executable, "-m", "beamtap", "serve", "--config", str(tmp_path / "c.toml"), "--publish",
            "tcp://127.0.0.1:*", "--control", "tcp://127.0.0.1:*", "--ready-file", str(tmp_path / "ready.json")]
    (tmp_path / "c.toml").write_text(config(rec, segment_s=30.0, on_start=True))
    log = open(tmp_path / "log.txt", "w")
    proc = subprocess.Popen(args, stdout=log, stderr=subprocess.STDOUT, preexec_fn=_small_files)
    try:
        end = time.monotonic() + 60
        while not (tmp_path / "ready.json").exists() and time.monotonic() < end and proc.poll() is None:
            time.sleep(0.05)
        ep = json.loads((tmp_path / "ready.json").read_text())
        with Controller(ep["control"]) as ctl:
            end = time.monotonic() + 30
            while time.monotonic() < end:
                st = ctl.status()
                if st["record"]["error"]:
                    break
                time.sleep(0.1)
            assert "recording stopped" in st["record"]["error"] and "too large" in st["record"]["error"].lower()
            assert st["record"]["recording"] is False
        with Subscriber(ep["publish"], topics=["power"], timeout_s=10) as sub:
            frames = [sub.recv() for _ in range(20)]
        assert np.all(np.diff([f.seq for f in frames]) == 1)  # beamforming and publishing go on
    finally:
        proc.send_signal(signal.SIGTERM)
        rc = proc.wait(timeout=10)
        log.close()
    assert rc == 0
    text = open(tmp_path / "log.txt").read()
    assert "recording stopped" in text and "beamforming and publishing go on" in text
    session = rec / os.listdir(rec)[0]
    for s in segments(session, "raw"):
        fs, x = wavfile.read(session / s["file"])  # nothing already written is damaged
        assert fs == FS and len(x) > 0
    assert any(r["type"] == "error" for r in read_manifest(session))


def test_free_space_floor_refuses_to_start(tmp_path):
    rec = tmp_path / "rec"
    with running_service(tmp_path, config(rec, min_free_mb=1e12)) as svc:
        with Controller(svc.control) as ctl:
            st = ctl.record("start")
            assert st["recording"] is False and "below [record] min_free_mb" in st["error"]
            assert ctl.status()["state"] == "running"
        r = subprocess.run([sys.executable, "-m", "beamtap", "mark", "--control", svc.control, "too early"],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 2 and "not recording" in r.stderr


def test_session_replayed_offline_and_live_reproduces_the_live_beams(tmp_path):
    rec = tmp_path / "rec"
    cfg_text = config(rec, segment_s=1.0)
    with running_service(tmp_path, cfg_text) as svc:
        with Controller(svc.control) as ctl:
            r = subprocess.run([sys.executable, "-m", "beamtap", "ctl", "--control", svc.control, "record", "start",
                                "--label", "replay"], capture_output=True, text=True, timeout=60)
            assert r.returncode == 0 and "recording" in r.stdout, r.stderr
            wait_recording(ctl, 3 * FS)
            r = subprocess.run([sys.executable, "-m", "beamtap", "mark", "--control", svc.control, "buoy", "deployed"],
                               capture_output=True, text=True, timeout=60)
            assert r.returncode == 0 and "buoy deployed" in r.stdout
            ctl.record("stop")
    session = rec / os.listdir(rec)[0]
    cfg = tmp_path / "service.toml"
    out = tmp_path / "offline"
    r = subprocess.run([sys.executable, "-m", "beamtap", "process", str(cfg), str(session), "--out", str(out)],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    summary = json.loads((out / "summary.json").read_text())
    d = summary["bulk_delay_samples"]
    first = summary["first_sample"]
    _, offline = wavfile.read(out / "audio.wav")
    live_segs = segments(session, "audio")
    live = np.concatenate([wavfile.read(session / s["file"])[1] for s in live_segs])
    live_first = live_segs[0]["first_sample"]
    # offline audio.wav[n] is aligned to the input (D removed); live sample n holds input n - D
    settle = 4 * BLOCK + 2 * d
    n = np.arange(first + settle, first + len(offline) - BLOCK)
    n = n[(n + d - live_first >= 0) & (n + d - live_first < len(live))]
    assert len(n) > 2 * FS
    a = offline[n - first]
    b = live[n + d - live_first]
    assert np.max(np.abs(a - b)) <= 1e-5 * max(1.0, np.max(np.abs(b)))
    assert any(rec_["type"] == "mark" and rec_["text"] == "buoy deployed" for rec_ in read_manifest(session))
    # and through the live pipeline: [input] source = "session"
    replay = cfg_text.replace('source = "simulated"', f'source = "session"\npath = "{session}"')
    replay = replay.replace("raw = true", "raw = false")
    (tmp_path / "r").mkdir()
    with running_service(tmp_path / "r", replay) as svc:
        got = []
        with Subscriber(svc.publish, topics=["audio"], timeout_s=10) as sub:
            while len(got) < 40:
                got.append(sub.recv())
    firsts = np.array([f.first_sample for f in got])
    assert np.all(np.diff(firsts) == BLOCK)


def test_standalone_record_from_the_stream_and_sigterm_closes_the_session(tmp_path):
    rec = tmp_path / "rec"
    with running_service(tmp_path, config(rec, segment_s=1.0, on_start=True)) as svc:
        out = tmp_path / "remote"
        r = subprocess.run([sys.executable, "-m", "beamtap", "record", "--endpoint", svc.publish, "--out", str(out),
                            "--what", "raw", "audio", "power", "--segment-s", "1", "--seconds", "3"],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 0, r.stderr
        assert "wrote session" in r.stdout
    # the remote session: contiguous raw segments, the manifest closed
    recs = read_manifest(out)
    assert recs[0]["type"] == "session" and recs[-1]["type"] == "stop"
    segs = segments(out, "raw")
    assert len(segs) >= 2 and all(s["closed"] for s in segs)
    assert all(b["first_sample"] == a["first_sample"] + a["frames"] for a, b in zip(segs, segs[1:]))
    assert segments(out, "power") and segments(out, "audio")
    # the service's own session, closed cleanly by SIGTERM at the end of the with-block
    local = rec / os.listdir(rec)[0]
    last = read_manifest(local)[-1]
    assert last["type"] == "stop" and last["reason"] == "service stopped"
    assert all(s["closed"] for s in segments(local, "raw"))


def _free_port_endpoint():
    import zmq

    with zmq.Context.instance().socket(zmq.PUB) as s:
        s.bind("tcp://127.0.0.1:*")
        return s.getsockopt(zmq.LAST_ENDPOINT).decode()


def _wait_for(predicate, timeout_s=30):
    end = time.monotonic() + timeout_s
    while not predicate():
        assert time.monotonic() < end, "condition not reached"
        time.sleep(0.05)  # polling files another process writes


def test_record_notices_a_restarted_service_and_a_silent_one(tmp_path):
    """Two services one after the other on the same port: the recorder warns when data stops,
    notes it in the manifest, and records the second service into a new session of its own."""
    endpoint = _free_port_endpoint()
    out = tmp_path / "trial"
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    cfg = config(tmp_path / "unused")
    proc = subprocess.Popen([sys.executable, "-m", "beamtap", "record", "--endpoint", endpoint, "--out", str(out),
                             "--what", "power", "--idle-s", "1"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    try:
        with running_service(tmp_path / "a", cfg, publish=endpoint):
            _wait_for(lambda: (out / "manifest.jsonl").exists() and segments(out, "power"))
        _wait_for(lambda: any(r["type"] == "idle" for r in read_manifest(out)))  # the silence is noted
        with running_service(tmp_path / "b", cfg, publish=endpoint):
            second = tmp_path / "trial-2"
            _wait_for(lambda: (second / "manifest.jsonl").exists() and segments(second, "power"))
    finally:
        proc.send_signal(signal.SIGTERM)
        stdout, stderr = proc.communicate(timeout=30)
    assert proc.returncode == 0, stderr
    assert "no data from" in stderr and "starting a new session" in stderr
    assert "recording power from" in stderr  # the start line
    first_recs, second_recs = read_manifest(out), read_manifest(second)
    assert first_recs[0]["stream"] != second_recs[0]["stream"]
    assert any(r["type"] == "idle" for r in first_recs)
    assert first_recs[-1]["type"] == "stop" and first_recs[-1]["reason"] == "upstream restarted"
    assert first_recs[-1]["frames_written"]["power"] > 0  # power counted like every kind
    assert str(out) in stdout and str(second) in stdout


def test_record_refuses_a_kind_the_service_does_not_publish(tmp_path):
    cfg = config(tmp_path / "unused").replace("[publish]\nraw = true\n", "")
    with running_service(tmp_path, cfg) as svc:
        r = subprocess.run([sys.executable, "-m", "beamtap", "record", "--endpoint", svc.publish, "--out",
                            str(tmp_path / "x"), "--what", "raw", "power", "--seconds", "20"],
                           capture_output=True, text=True, timeout=60)
    assert r.returncode == 2
    assert "does not publish raw" in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1


def test_default_record_folder_is_absolute_under_the_data_home(tmp_path):
    """No [record] folder: sessions go to $XDG_DATA_HOME/beamtap/recordings (XDG Base Directory
    Specification 0.8: ~/.local/share when XDG_DATA_HOME is unset), whatever the working directory."""
    home = tmp_path / "home"
    home.mkdir()
    cfg = line_config(count=8, samplerate_hz=FS, block_frames=BLOCK)
    env = {"HOME": str(home), "XDG_DATA_HOME": ""}
    with running_service(tmp_path, cfg, env=env) as svc:
        with Controller(svc.control) as ctl:
            st = ctl.record("start", what=["power"])
            ctl.record("stop")
        log = svc.log()
    expected = home / ".local" / "share" / "beamtap" / "recordings"
    assert st["session"].startswith(str(expected) + os.sep)
    assert f"recordings go to {expected}" in log
    assert read_manifest(st["session"])[0]["type"] == "session"


def _run_cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "beamtap", *map(str, args)], capture_output=True, text=True,
                          timeout=300, cwd=cwd)


def test_process_uses_the_sessions_own_config_and_refuses_a_mismatch(tmp_path):
    rec = tmp_path / "rec"
    cfg_text = config(rec, segment_s=1.0, what='["raw"]')
    with running_service(tmp_path, cfg_text) as svc:
        with Controller(svc.control) as ctl:
            ctl.record("start")
            wait_recording(ctl, int(2.5 * FS))
            ctl.record("stop")
    session = rec / os.listdir(rec)[0]
    # no --config: the session's stored config
    r = _run_cli("process", session, "--out", tmp_path / "own")
    assert r.returncode == 0, r.stderr
    assert json.loads((tmp_path / "own" / "summary.json").read_text())["frames_processed"] >= int(2.5 * FS)
    # a different array, or another medium: refused, the difference named, no output folder made
    four = tmp_path / "four.toml"
    four.write_text(line_config(count=4, samplerate_hz=FS, block_frames=BLOCK))
    r = _run_cli("process", "--config", four, session, "--out", tmp_path / "bad")
    assert r.returncode == 2 and "array: the session has 8 sensors" in r.stderr and "4" in r.stderr, r.stderr
    assert not (tmp_path / "bad").exists()
    air = tmp_path / "air.toml"
    air.write_text(config(rec).replace("sound_speed_mps = 1500.0", "air = { temperature_c = 20.0 }"))
    r = _run_cli("process", "--config", air, session, "--out", tmp_path / "bad")
    assert r.returncode == 2 and "medium: sound speed 1500.00 m/s" in r.stderr and "343" in r.stderr, r.stderr
    r = _run_cli("process", "--config", air, session, "--out", tmp_path / "anyway", "--allow-mismatch")
    assert r.returncode == 0 and "warning" in r.stderr and "medium" in r.stderr, r.stderr
    # a raw segment cut short on disk: a one-line warning with both numbers
    seg = segments(session, "raw")[0]
    path = session / seg["file"]
    with open(path, "r+b") as f:
        f.truncate(80 + 1000 * 8 * 4)  # the 80-byte header, then 1000 frames
    r = _run_cli("process", session, "--out", tmp_path / "short")
    assert r.returncode == 0, r.stderr
    assert f"1000 frames on disk, the manifest says {seg['frames']}" in r.stderr
    # a WAV needs a config; the older CONFIG INPUT form still works
    r = _run_cli("simulate", four, "--seconds", "0.5", "--out", tmp_path / "four.wav")
    assert r.returncode == 0, r.stderr
    r = _run_cli("process", tmp_path / "four.wav", "--out", tmp_path / "w")
    assert r.returncode == 2 and "needs --config" in r.stderr
    r = _run_cli("process", four, tmp_path / "four.wav", "--out", tmp_path / "w")
    assert r.returncode == 0, r.stderr


def test_one_power_table_format_from_recorder_and_process_through_picture(tmp_path):
    """The recorder's power segments and `process` over the same session write the same table
    (same columns, same first_sample for the same span, values to float32 rounding), and
    `picture` draws a recorder segment, a whole session and a process output alike."""
    import csv as csv_mod

    from beamtap import powertable

    rec = tmp_path / "rec"
    with running_service(tmp_path, config(rec, segment_s=30.0, what='["raw", "power"]')) as svc:
        with Controller(svc.control) as ctl:
            ctl.record("start")
            wait_recording(ctl, int(1.5 * FS))
            mark = ctl.mark("buoy in")
            wait_recording(ctl, 3 * FS)
            ctl.record("stop")
    session = rec / os.listdir(rec)[0]
    seg_csv = sorted(session.glob("power-*.csv"))[0]
    header = next(csv_mod.reader(open(seg_csv)))
    assert header[:3] == ["first_sample", "time_utc", "b0_0"]
    live = powertable.read(session)
    assert np.all(np.isfinite(live.time_utc))  # the recorder knows UTC
    r = _run_cli("process", session, "--out", tmp_path / "again")
    assert r.returncode == 0, r.stderr
    offline = powertable.read(tmp_path / "again")
    assert next(csv_mod.reader(open(tmp_path / "again" / "power.csv"))) == header
    assert np.array_equal(offline.power_deg, live.power_deg) and offline.bands_hz == live.bands_hz
    common, i_live, i_off = np.intersect1d(live.first_sample, offline.first_sample, return_indices=True)
    assert len(common) > 40
    settled = slice(8, None)  # past the engine's start-up in the live run and the offline run
    assert np.allclose(live.power_db[i_live][settled], offline.power_db[i_off][settled], atol=0.01)
    # the session's UTC carried into process's rows for the same spans (to a microsecond)
    assert np.allclose(live.time_utc[i_live], offline.time_utc[i_off], atol=2e-6)
    for source in (seg_csv, session, tmp_path / "again" / "power.csv"):
        png = tmp_path / f"{source.name}.png"
        r = _run_cli("picture", source, "--out", png)
        assert r.returncode == 0, (source, r.stderr)
        assert png.stat().st_size > 1000
    # the session's picture: UTC time axis, newest at the top, the mark drawn as a light line
    from PIL import Image

    im = Image.open(tmp_path / f"{session.name}.png")
    info = json.loads(im.info["Description"])
    assert info["time_axis"] == "utc" and info["newest"] == "top" and info["time"][0] > info["time"][1]
    x0, y0, x1, y1 = info["axes_px"]
    t_top, t_bottom = info["time"]
    y = int(round(y0 + (t_top - mark["utc"]) / (t_top - t_bottom) * (y1 - y0)))
    rgb = np.asarray(im.convert("RGB"), float)
    band = rgb[y - 1:y + 2, int(x0) + 40:int(x1) - 5]
    assert np.max(band.min(axis=2).mean(axis=1)) > 200  # a near-white dashed line across the plot
