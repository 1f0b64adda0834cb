"""The live service as a subprocess, with real ZeroMQ sockets on loopback."""

import os
import signal
import time

import numpy as np
import pytest
import zmq

from beamtap.client import Controller, ServiceError, Subscriber
from beamtap.client.protocol import pack, unpack

from conftest import line_config, running_service

FS = 48000
CHIRP = dict(f0=400.0, f1=1400.0, period=0.5, level_db=-20.0)


def scene_config(extra=""):
    return line_config(input_extra="scene_noise_db = -50.0", fan=(0.0, 180.0, 1.0), band_hz=(400.0, 1400.0),
                       scene=[{"azimuth_deg": 63.0, "signal": "chirp", "band_hz": [CHIRP["f0"], CHIRP["f1"]],
                               "period_s": CHIRP["period"], "level_db": CHIRP["level_db"]}],
                       audio_deg=[(63.0, 0.0), (120.0, 0.0)], extra=extra)


def chirp(t):
    """The scene's chirp in closed form (the simulated source's definition)."""
    amp = np.sqrt(2) * 10 ** (CHIRP["level_db"] / 20)
    tp = np.mod(t, CHIRP["period"])
    return amp * np.sin(2 * np.pi * (CHIRP["f0"] * tp + 0.5 * (CHIRP["f1"] - CHIRP["f0"]) / CHIRP["period"] * tp**2))


def collect(sub, want, topics=("power", "audio")):
    got = {t: [] for t in topics}
    while min(len(got[t]) for t in topics) < want:
        f = sub.recv()
        if f.topic in got:
            got[f.topic].append(f)
    return got


@pytest.fixture(scope="module")
def line_service(tmp_path_factory):
    with running_service(tmp_path_factory.mktemp("line"), scene_config()) as svc:
        yield svc


def test_stream_is_contiguous_points_at_the_source_and_carries_it(line_service):
    with Subscriber(line_service.publish, topics=["power", "audio", "beams"], timeout_s=10) as sub:
        got = collect(sub, 210)
    power, audio = got["power"][:210], got["audio"][:210]
    for frames in (power, audio):
        seq = np.array([f.seq for f in frames])
        first = np.array([f.first_sample for f in frames])
        assert np.all(np.diff(seq) == 1)
        assert np.all(np.diff(first) == 1024)
        assert not any(f.gap for f in frames[1:])
        assert len({f.stream for f in frames}) == 1
    d = audio[0].bulk_delay_samples
    assert all(f.bulk_delay_samples == d and f.samplerate_hz == FS for f in audio)
    # Strongest beam: the source's bearing.
    beams = power[-1].beams
    mean_power = 10 * np.log10(np.mean([10 ** (f.data[0] / 10) for f in power[5:]], axis=0))
    assert beams["power_deg"][int(np.argmax(mean_power))][0] == pytest.approx(63.0, abs=1.0)
    # The audio beam toward the source carries its signal, delayed by D.
    y = np.concatenate([f.data[:, 0] for f in audio[5:]])
    n = audio[5].first_sample + np.arange(len(y))
    want = chirp((n - d) / FS)
    r = np.corrcoef(y, want)[0, 1]
    assert r >= 0.95
    # time_utc follows the sample count
    t = np.array([f.time_utc for f in audio])
    assert np.allclose(np.diff(t), 1024 / FS, atol=1e-6)


def test_retarget_changes_the_beam_table_and_nothing_else(line_service):
    with Subscriber(line_service.publish, topics=["power", "audio"], timeout_s=10) as sub, \
            Controller(line_service.control) as ctl:
        before = collect(sub, 5)
        old_table = before["power"][-1].beam_table
        reply = ctl.beams(set={"fan": {"from_deg": 0.0, "to_deg": 180.0, "step_deg": 2.0}})
        assert reply["beam_table"] == old_table + 1
        after = collect(sub, 40)
    power = before["power"] + after["power"]
    audio = before["audio"] + after["audio"]
    assert np.all(np.diff([f.seq for f in power]) == 1) and np.all(np.diff([f.first_sample for f in power]) == 1024)
    assert np.all(np.diff([f.seq for f in audio]) == 1) and np.all(np.diff([f.first_sample for f in audio]) == 1024)
    tables = [f.beam_table for f in power]
    switch = tables.index(old_table + 1)
    assert set(tables[:switch]) == {old_table} and set(tables[switch:]) == {old_table + 1}
    assert {f.data.shape for f in power[:switch]} == {(1, 181)}
    assert {f.data.shape for f in power[switch:]} == {(1, 91)}
    assert {f.data.shape for f in audio} == {(1024, 2)}
    assert not any(f.gap for f in power + audio)
    with Controller(line_service.control) as ctl:
        assert len(ctl.beams()["beams"]["directions_deg"]) == 91
        ctl.beams(set={"fan": {"from_deg": 0.0, "to_deg": 180.0, "step_deg": 1.0}})


BAD_REQUESTS = [
    ([b"\xc1\xc1 not msgpack"], "not a msgpack"),
    ([pack([1, 2, 3])], "must be a map"),
    ([pack({"cmd": 5})], "'cmd' must be a string"),
    ([pack({"command": "ping"})], "'cmd' must be a string"),
    ([pack({"cmd": "fly"})], "unknown cmd 'fly'"),
    ([pack({"cmd": "beams", "set": {"shading": "kaiser"}})], "set.shading"),
    ([pack({"cmd": "beams", "set": {"band_hz": [1400.0, 300.0]}})], "set.band_hz"),
    ([pack({"cmd": "beams", "set": {"fan": {"from_deg": 0, "to_deg": 180, "step_deg": "two"}}})], "set.fan.step_deg"),
    ([pack({"cmd": "beams", "set": {"audio_deg": [[1e9, 0.0]]}})], "set.audio_deg"),
    ([pack({"cmd": "beams", "set": []})], "'set' must be a non-empty map"),
    ([pack({"cmd": "beams", "set": {"colour": "red"}})], "unknown key"),
    ([pack({"cmd": "ping", "pad": "x"})], "unknown key 'pad' in ping"),
    ([pack({"cmd": "status", "verbose": True})], "unknown key 'verbose' in status"),
    ([pack({"cmd": "record", "action": "stop", "label": "x"})], "unknown key 'label' in record stop"),
    ([pack({"cmd": "beams", "set": {"fan": {"from_deg": None, "to_deg": 180, "step_deg": 1}}})],
     "set.fan.from_deg: nil"),
    ([pack({"cmd": "beams", "set": {"sidelobe_db": None}})], "set.sidelobe_db: nil"),
    ([pack({"cmd": "beams", "set": {"sidelobe_db": float("nan")}})], "set.sidelobe_db: nan is not a finite"),
    ([pack({"cmd": "beams", "set": {"audio_deg": [[float("inf"), 0.0]]}})], "set.audio_deg[0][0]: inf"),
    ([pack({"cmd": "record", "action": "start", "what": None})], "what: nil"),
    ([pack({"cmd": "beams", "set": {"fan": {"from_deg": 0, "to_deg": 180, "step_deg": 1e-5}}})],
     "18000001 directions"),
    ([pack({"cmd": "beams", "set": {"grid": {"az_from_deg": 0, "az_to_deg": 360, "az_step_deg": 0.01,
                                            "el_from_deg": -90, "el_to_deg": 90, "el_step_deg": 0.01}}})],
     "at most 20000 power beams"),
    # Legal counts, but 19,981 beams over 64 audio beams cannot be formed in real time here.
    ([pack({"cmd": "beams", "set": {"fan": {"from_deg": 0, "to_deg": 180, "step_deg": 0.0091},
                                    "audio_deg": [[float(a), 0.0] for a in range(10, 138, 2)]}})],
     "above max_block_share = 0.7"),
    ([pack({"cmd": "ping"}), b"second frame"], "one msgpack frame"),
    ([pack({"cmd": "mark", "text": 12})], "mark needs 'text'"),
]


def test_bad_control_requests_get_error_replies_and_publishing_goes_on(line_service):
    ctx = zmq.Context.instance()
    with Subscriber(line_service.publish, topics=["power"], timeout_s=10) as sub:
        first_seq = sub.recv().seq
        with ctx.socket(zmq.REQ) as req:
            req.setsockopt(zmq.LINGER, 0)
            req.connect(line_service.control)
            for frames, words in BAD_REQUESTS:
                req.send_multipart(frames)
                assert req.poll(10000), f"no reply to {frames[0][:20]!r}"
                reply = unpack(req.recv())
                assert reply["ok"] is False, reply
                assert words in reply["error"], reply["error"]
                assert "\n" not in reply["error"]
            req.send(pack({"cmd": "ping"}))
            assert req.poll(10000) and unpack(req.recv())["ok"] is True
        later = [sub.recv() for _ in range(5)]
    assert later[-1].seq > first_seq
    assert np.all(np.diff([f.seq for f in later]) == 1)
    with Controller(line_service.control) as ctl:
        st = ctl.status()
        assert st["state"] == "running" and st["gaps"] == 0
        assert len(ctl.beams()["beams"]["directions_deg"]) == 181  # nothing changed half-way
        with pytest.raises(ServiceError, match="unknown cmd"):
            ctl.request("reboot")


def test_oversized_request_is_never_read(line_service):
    """A 64 MB request: ZeroMQ's MAXMSGSIZE drops the connection before the message is stored, so
    the service's memory does not grow by it; other clients are served as before."""
    ctx = zmq.Context.instance()
    before = line_service.rss_kb()
    with ctx.socket(zmq.REQ) as req:
        req.setsockopt(zmq.LINGER, 0)
        req.connect(line_service.control)
        req.send(pack({"cmd": "ping", "pad": b"x" * (64 << 20)}))
        assert not req.poll(3000)  # no reply: the message was not read
    with Controller(line_service.control) as ctl:
        assert ctl.ping()["stream"]
        assert ctl.status()["state"] == "running"
    assert line_service.rss_kb() - before < 32 * 1024


def test_stalled_subscriber_does_not_slow_others_or_grow_memory(line_service):
    ctx = zmq.Context.instance()
    stalled = ctx.socket(zmq.SUB)
    stalled.setsockopt(zmq.RCVHWM, 4)
    stalled.setsockopt(zmq.RCVBUF, 4096)
    stalled.setsockopt(zmq.LINGER, 0)
    stalled.connect(line_service.publish)
    stalled.setsockopt(zmq.SUBSCRIBE, b"")
    try:
        with Subscriber(line_service.publish, topics=["audio"], timeout_s=10) as sub:
            warm = [sub.recv() for _ in range(50)]
            rss_a = line_service.rss_kb()
            frames = [sub.recv() for _ in range(200)]
            rss_b = line_service.rss_kb()
        seq = [f.seq for f in warm + frames]
        assert np.all(np.diff(seq) == 1)  # the reader loses nothing
        # 200 blocks arrive at the source's pace: 200 × 21.3 ms, not slower
        span = frames[-1].published_utc - frames[0].published_utc
        assert span == pytest.approx(199 * 1024 / FS, rel=0.1)
        # bounded: the stalled peer's queue is capped by the send high-water mark
        assert rss_b - rss_a < 30_000, (rss_a, rss_b)
    finally:
        stalled.close()


def test_sigterm_stops_within_two_seconds_with_status_zero(tmp_path):
    with running_service(tmp_path, scene_config()) as svc:
        with Subscriber(svc.publish, topics=["power"], timeout_s=10) as sub:
            sub.recv()
        t0 = time.monotonic()
        svc.proc.terminate()
        rc = svc.proc.wait(timeout=10)
        elapsed = time.monotonic() - t0
    assert rc == 0 and elapsed < 2.0
    assert "stopped" in svc.log()


def test_serve_without_config_runs_the_builtin_demo(tmp_path):
    with running_service(tmp_path) as svc:
        with Subscriber(svc.publish, topics=["power", "beams"], timeout_s=10) as sub:
            got = collect(sub, 3, topics=("power",))
        first_line = svc.log().splitlines()[0]
    assert "built-in demo scene" in first_line
    assert got["power"][0].data.shape == (1, 91)


def test_status_topic_reports_counters(line_service):
    with Subscriber(line_service.publish, topics=["status"], timeout_s=10) as sub:
        st = sub.recv().header
    for key in ("frames_captured", "overflows", "gaps", "frames_lost", "nan_samples", "clipped_samples",
                "block_ms_p50", "block_ms_p99", "block_cpu_ms_p50", "block_cpu_ms_p99", "cpu_share",
                "messages_dropped", "beam_table"):
        assert key in st
    assert st["frames_captured"] > 0 and st["block_ms_p50"] > 0
    # a thread's CPU time within a block cannot exceed the wall time of that block (1 µs of clock rounding)
    assert 0 < st["block_cpu_ms_p50"] <= st["block_ms_p50"] + 1e-3


def _children(pid):
    out = []
    for tid in os.listdir(f"/proc/{pid}/task"):
        out += [int(c) for c in open(f"/proc/{pid}/task/{tid}/children").read().split()]
    return out


def test_dead_scene_renderer_ends_the_service_with_a_failure_status(tmp_path):
    """A part that cannot go on ends the service (non-zero exit, reason logged) within 2 s, so
    systemd's Restart=on-failure brings it back; checked with a generous 10 s margin here."""
    with running_service(tmp_path, scene_config(), expect_rc=None) as svc:
        # the scene renderer: the spawned child (the other child is multiprocessing's resource tracker)
        with Subscriber(svc.publish, topics=["power"], timeout_s=20) as sub:
            sub.recv()  # rendering has begun, so the renderer exists
        kids = [k for k in _children(svc.proc.pid) if b"spawn_main" in open(f"/proc/{k}/cmdline", "rb").read()]
        assert len(kids) == 1
        os.kill(kids[0], signal.SIGKILL)
        t0 = time.monotonic()
        rc = svc.proc.wait(timeout=30)
        took = time.monotonic() - t0
    assert rc == 1
    assert took < 10.0
    log = svc.log()
    assert "scene process ended" in log and "exiting so a supervisor can restart" in log


def test_ctl_config_is_one_document_that_checks_and_serves_the_same_beams(tmp_path):
    """`ctl config` after a retarget: one TOML document (TOML 1.0: a table is declared once),
    accepted by `check`, and a service started from it forms the same beams."""
    import subprocess
    import sys

    with running_service(tmp_path, scene_config()) as svc:
        with Controller(svc.control) as ctl:
            ctl.beams(set={"fan": {"from_deg": 10.0, "to_deg": 170.0, "step_deg": 4.0},
                           "audio_deg": [[75.0, 0.0]], "shading": "hann"})
            before = ctl.beams()["beams"]
        r = subprocess.run([sys.executable, "-m", "beamtap", "ctl", "--control", svc.control, "config"],
                           capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert r.stdout.count("[beams]") == 1
    doc = tmp_path / "again.toml"
    doc.write_text(r.stdout)
    chk = subprocess.run([sys.executable, "-m", "beamtap", "check", str(doc)], capture_output=True, text=True,
                         timeout=60)
    assert chk.returncode == 0, chk.stderr
    with running_service(tmp_path, r.stdout) as again:
        with Controller(again.control) as ctl:
            after = ctl.beams()["beams"]
    assert after == before
