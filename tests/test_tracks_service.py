"""Detections and tracks end to end: the service publishes them, records them and takes changes
through the control socket; ``process`` writes them; the demo shows its two sources as tracks.

The service runs as a subprocess on loopback; the demo scene is the built-in one (an invented
harbour: a boat crossing 30°→150° and back at 4°/s, a pinger at 118°).
"""

import csv
import json
import os
import subprocess
import sys

import msgpack
import numpy as np
import pytest
import zmq

from beamtap.client import Controller, ServiceError, Subscriber
from beamtap.client.protocol import decode, encode, pack, unpack
from beamtap.session import read_manifest

from conftest import line_config, running_service


def tracked_config(extra=""):
    """A line with one broadband source fixed at 70° and one tone at 125°, loud against the sea noise."""
    return line_config(input_extra="scene_noise_db = -40.0", fan=(0.0, 180.0, 2.0), band_hz=(300.0, 1400.0),
                       scene=[{"azimuth_deg": 70.0, "signal": "noise", "band_hz": [200.0, 2000.0], "level_db": -24.0},
                              {"azimuth_deg": 125.0, "signal": "tone", "frequency_hz": 900.0, "level_db": -28.0}],
                       extra='shading = "hann"\n' + extra)


@pytest.fixture(scope="module")
def svc(tmp_path_factory):
    folder = tmp_path_factory.mktemp("tracks")
    rec = folder / "rec"
    with running_service(folder, tracked_config() + f'[record]\nfolder = "{rec}"\n') as s:
        s.record_folder = rec
        yield s


def _confirmed(sub, n_rows):
    """The confirmed tracks of the last of ``n_rows`` tracks messages, and every detection seen."""
    last, dets, ended = None, [], []
    seen = 0
    while seen < n_rows:
        f = sub.recv()
        if f.topic == "tracks":
            seen += 1
            last = f
            ended += f.data["ended"]
        elif f.topic == "detections":
            dets += f.data
    return [t for t in last.data["tracks"] if t["state"] == "confirmed"], dets, last, ended


def test_a_subscriber_gets_detections_and_tracks_with_their_documented_keys(svc):
    with Subscriber(svc.publish, topics=["tracks", "detections", "beams"], timeout_s=10) as sub:
        confirmed, dets, last, _ = _confirmed(sub, 150)  # about 3 s of rows
        assert sub.beams["mirror_ambiguous"] is True and sub.beams["array_kind"] == "line"
    bearings = sorted(t["bearing_deg"] for t in confirmed)
    assert len(bearings) == 2, confirmed
    assert abs(bearings[0] - 70.0) < 1.5 and abs(bearings[1] - 125.0) < 1.0
    assert set(confirmed[0]) >= {"track", "state", "bearing_deg", "rate_deg_per_s", "snr_db", "first_sample",
                                 "first_utc", "last_sample", "last_utc", "detections"}
    assert last.header["dtype"] == "msgpack" and last.header["band"] == 0
    assert {"band", "beam", "bearing_deg", "level_db", "snr_db", "first_sample", "time_utc"} <= set(dets[0])
    assert all(d["first_sample"] % 1 == 0 and d["snr_db"] >= 6.0 for d in dets)


def test_detect_request_reads_and_changes_settings_and_refuses_bad_ones(svc):
    with Controller(svc.control, timeout_s=10) as ctl:
        now = ctl.request("detect")
        assert now["detect"]["pfa"] == 1e-4 and now["detect"]["confirm"] == [3, 5]
        changed = ctl.request("detect", set={"pfa": 1e-5, "confirm": [4, 6]})
        assert changed["detect"]["pfa"] == 1e-5 and changed["detect"]["confirm"] == [4, 6]
        assert ctl.request("detect")["detect"]["confirm"] == [4, 6]
        for bad, word in (({"pfa": 2.0}, "pfa"), ({"pfa": "small"}, "pfa"), ({"confirm": [5, 3]}, "confirm"),
                          ({"confirm": [1]}, "confirm"), ({"band": 3}, "band"), ({"gate_deg": -1}, "gate_deg"),
                          ({"speed": 1}, "speed"), ({}, "set"), ([1, 2], "set"), ({"enabled": "yes"}, "enabled")):
            with pytest.raises(ServiceError, match=word):
                ctl.request("detect", set=bad)
        with pytest.raises(ServiceError, match="unknown key"):
            ctl.request("detect", sett={"pfa": 0.1})
        ctl.request("detect", set={"pfa": 1e-4, "confirm": [3, 5]})
    # Switching detection off ends the live tracks (said in 'ended'), and on again starts over.
    with Controller(svc.control, timeout_s=10) as ctl, Subscriber(svc.publish, topics=["tracks"], timeout_s=10) as sub:
        _confirmed(sub, 5)
        ctl.request("detect", set={"enabled": False})
        ended, rows = [], 0
        while rows < 100:
            f = sub.recv()
            rows += 1
            ended += f.data["ended"]
            if not f.data["tracks"] and ended:
                break
        assert ended and not f.data["tracks"]
        ctl.request("detect", set={"enabled": True})


def test_forged_and_repeated_detect_requests_leave_the_service_up(svc):
    ctx = zmq.Context.instance()
    s = ctx.socket(zmq.REQ)
    s.setsockopt(zmq.RCVTIMEO, 10000)
    s.connect(svc.control)
    for raw in (pack({"cmd": "detect", "set": {"pfa": float("nan")}}), pack({"cmd": "detect", "set": None}),
                msgpack.packb({"cmd": "detect", "set": {"confirm": [2**63, 1]}}), b"\xc1\xc1",
                pack({"cmd": "detect", "set": {"min_snr_db": 1e308}})):
        s.send(raw)
        reply = unpack(s.recv())
        assert reply["ok"] is False and reply["error"]
    for _ in range(50):  # the same change again and again
        s.send(pack({"cmd": "detect", "set": {"gate_deg": 4.0}}))
        assert unpack(s.recv())["ok"] is True
    s.close(linger=0)
    with Subscriber(svc.publish, topics=["tracks"], timeout_s=10) as sub:
        assert sub.recv().topic == "tracks"


def test_recording_writes_detection_and_track_tables_with_manifest_records(svc):
    with Controller(svc.control, timeout_s=10) as ctl, Subscriber(svc.publish, topics=["tracks"], timeout_s=10) as sub:
        ctl.record("start", what=["power"], label="tracks")
        _confirmed(sub, 120)
        ctl.record("stop")
    sessions = [p for p in svc.record_folder.iterdir() if p.name.endswith("-tracks")]
    assert len(sessions) == 1
    folder = sessions[0]
    with open(folder / "tracks.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    with open(folder / "detections.csv", newline="") as f:
        dets = list(csv.DictReader(f))
    assert list(rows[0]) == ["first_sample", "time_utc", "track", "state", "bearing_deg", "rate_deg_per_s", "snr_db"]
    assert list(dets[0]) == ["first_sample", "time_utc", "band", "beam", "bearing_deg", "level_db", "snr_db"]
    assert rows[0]["time_utc"].endswith("Z")
    confirmed = {r["track"] for r in rows if r["state"] == "confirmed"}
    assert len(confirmed) >= 2
    recs = read_manifest(folder)
    opened = [r for r in recs if r["type"] == "table_open"]
    closed = {r["kind"]: r["rows"] for r in recs if r["type"] == "table"}
    assert {r["kind"] for r in opened} == {"detections", "tracks"}
    assert closed == {"tracks": len(rows), "detections": len(dets)}


def test_msgpack_payloads_round_trip_and_forged_ones_are_refused():
    frames = encode("tracks", {"first_sample": 5}, {"tracks": [{"track": 1}], "ended": [3]})
    topic, header, data = decode(frames)
    assert topic == "tracks" and data == {"tracks": [{"track": 1}], "ended": [3]}
    bad = [frames[0], frames[1], b"\xc1"]
    from beamtap.client.protocol import ProtocolError

    with pytest.raises(ProtocolError):
        decode(bad)


def _cli(*args, **kw):
    return subprocess.run([sys.executable, "-m", "beamtap", *args], capture_output=True, text=True, timeout=300, **kw)


def test_the_demo_shows_the_boat_and_the_pinger_as_two_tracks_and_process_writes_them(tmp_path):
    """The built-in demo over 31 s (the boat crosses the pinger's bearing at about 22 s): process
    reports two confirmed tracks, the boat's and the pinger's, each keeping its id across the
    crossing, on their bearings before it (10 s: boat at 70°) and after it (29.5 s: boat at
    148°), and the tables hold them."""
    wav = tmp_path / "demo.wav"
    r = _cli("simulate", "--seconds", "31", "--out", str(wav))
    assert r.returncode == 0, r.stderr
    out = tmp_path / "out"
    r = _cli("process", "--config", "builtin:demo", str(wav), "--out", str(out))
    assert r.returncode == 0, r.stderr
    assert "2 confirmed tracks" in r.stdout
    summary = json.loads((out / "summary.json").read_text())
    confirmed = {t["track"] for t in summary["tracks"] if t["confirmed"]}
    assert len(confirmed) == 2
    with open(out / "tracks.csv", newline="") as f:
        rows = [r for r in csv.DictReader(f) if r["state"] != "tentative"]
    assert {int(r["track"]) for r in rows} == confirmed

    def at(t_s):
        first = min(int(r["first_sample"]) for r in rows if int(r["first_sample"]) >= t_s * 48000)
        return {int(r["track"]): float(r["bearing_deg"]) for r in rows if int(r["first_sample"]) == first}

    def who(tracks, bearing, tol):
        near = [tid for tid, b in tracks.items() if abs(b - bearing) < tol]
        assert len(near) == 1, (tracks, bearing)
        return near[0]

    before, after = at(10.0), at(29.5)
    assert who(before, 118.0, 1.0) == who(after, 118.0, 1.0)  # the pinger
    assert who(before, 70.0, 3.0) == who(after, 148.0, 3.0)  # the boat
    r = _cli("picture", str(out / "power.csv"), "--out", str(tmp_path / "p.png"))
    if r.returncode == 0:  # the plot extra is in the test extra
        assert "2 tracks" in r.stdout
        assert os.path.getsize(tmp_path / "p.png") > 10000


def _small_files():
    import resource

    resource.setrlimit(resource.RLIMIT_FSIZE, (50_000, 50_000))


def test_process_on_a_full_disk_is_a_one_line_error(tmp_path, rng):
    """The outputs cannot be written past 50 kB (RLIMIT_FSIZE: writes fail with EFBIG, as on a
    full disk): process stops with one line naming the problem, no traceback, status 2."""
    from beamtap.wavfile import WavWriter

    cfg = tmp_path / "c.toml"
    cfg.write_text(tracked_config())
    with WavWriter(tmp_path / "in.wav", 48000, 16) as w:
        w.write((0.01 * rng.standard_normal((48000 * 4, 16))).astype(np.float32))
    r = subprocess.run([sys.executable, "-m", "beamtap", "process", "--config", str(cfg), str(tmp_path / "in.wav"),
                        "--out", str(tmp_path / "out")], capture_output=True, text=True, timeout=300,
                       preexec_fn=_small_files)
    assert r.returncode == 2, r.stderr
    assert "Traceback" not in r.stderr and len(r.stderr.strip().splitlines()) == 1
    assert "too large" in r.stderr.lower() or "no space" in r.stderr.lower()


def test_watch_marks_confirmed_tracks_and_lists_them():
    """The terminal view: a confirmed track's id over the fan at its bearing, its trail in the
    waterfall, and a list line with id, bearing, rate, SNR and age; tentative ones are not shown."""
    from beamtap.client.watch import View

    view = View(colour=False, unicode=True, range_db=30.0, history_s=60.0)
    az = np.column_stack([np.arange(0.0, 181.0, 2.0), np.zeros(91)])
    row = np.full(91, -60.0)
    row[59] = -30.0  # 118°
    for i in range(20):
        view.add_row(1000.0 + i, row)
        view.add_tracks(1000.0 + i, [
            {"track": 7, "state": "confirmed", "bearing_deg": 118.0, "rate_deg_per_s": -0.4, "snr_db": 14.2,
             "first_utc": 1000.0 - 182.0},
            {"track": 8, "state": "tentative", "bearing_deg": 40.0, "rate_deg_per_s": 0.0, "snr_db": 7.0}])
    screen = view.render(100, 40, "t", az, row, "status", True, now_utc=1019.0)
    assert "T7" in screen and "T8" not in screen
    assert "#7 118.0° -0.40°/s 14.2 dB 3m21s" in screen
    assert screen.count("7") >= 10  # the trail: the id's last digit down the waterfall


def test_tail_shows_the_new_topics():
    from beamtap.client.subscriber import Frame
    from beamtap.client.tail import format_line

    det = Frame("detections", {"seq": 3, "first_sample": 1024, "shape": []},
                [{"bearing_deg": 118.3, "snr_db": 14.0}])
    trk = Frame("tracks", {"seq": 3, "first_sample": 1024, "shape": []},
                {"tracks": [{"track": 7, "state": "confirmed", "bearing_deg": 118.3}], "ended": [5]})
    assert "1 detections 118.3°/14.0dB" in format_line(det)
    line = format_line(trk)
    assert "1 tracks #7:c@118.3°" in line and "ended [5]" in line
    junk = Frame("tracks", {"seq": 4}, {"tracks": ["not a map", 3], "ended": []})
    assert "0 tracks" in format_line(junk)  # a forged payload is shown, not fatal


def test_watch_skips_forged_tracks():
    from beamtap.client.watch import View

    view = View(colour=True, unicode=False, history_s=60.0)
    view.add_tracks(5.0, [{"track": 1, "state": "confirmed", "bearing_deg": "north"}, None, 7,
                          {"track": True, "state": "confirmed", "bearing_deg": 3.0},
                          {"track": 2, "state": "confirmed", "bearing_deg": float("nan")},
                          {"track": 3, "state": "confirmed", "bearing_deg": 33.0}])
    assert [t["track"] for t in view.tracks] == [3]
