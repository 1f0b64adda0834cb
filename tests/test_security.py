"""Remote operation with CURVE keys, with real sockets on loopback (CURVE works on 127.0.0.1).

Sources: CurveZMQ and ZAP as specified in the ZeroMQ RFCs 26 and 27 (from memory), implemented
by libzmq and pyzmq's zmq.auth, which these tests drive through beamtap's own commands.
"""

import os
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
import zmq

from beamtap.client import Controller, ServiceError, Subscriber

from conftest import line_config, running_service


def _keys(folder, name):
    r = subprocess.run([sys.executable, "-m", "beamtap", "keys", name, "--out", str(folder)], capture_output=True,
                       text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    return folder / f"{name}.key", folder / f"{name}.key_secret"


@pytest.fixture(scope="module")
def secured(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("secured")
    mine, clients, readers = tmp / "mine", tmp / "clients", tmp / "readers"
    for d in (mine, clients, readers):
        d.mkdir()
    svc_pub, svc_sec = _keys(mine, "pier-service")
    op_pub, op_sec = _keys(mine, "operator")
    rd_pub, rd_sec = _keys(mine, "reader")
    _, stranger_sec = _keys(mine, "stranger")
    shutil.copy(op_pub, clients)
    shutil.copy(rd_pub, readers)
    cfg = line_config(count=8, samplerate_hz=16000, block_frames=512, audio_deg=[(60.0, 0.0)],
                      extra=f'[security]\nserver_key = "{svc_sec}"\nclients = "{clients}"\nreaders = "{readers}"\n'
                            f'[record]\nfolder = "{tmp / "rec"}"\n')
    with running_service(tmp, cfg) as svc:
        yield {"svc": svc, "server": svc_pub, "op": op_sec, "reader": rd_sec, "stranger": stranger_sec,
               "clients": clients, "mine": mine}


def test_keys_are_made_private_and_never_overwritten(tmp_path):
    pub, sec = _keys(tmp_path, "lab")
    assert oct(sec.stat().st_mode & 0o777) == "0o600" and pub.read_text().count("public-key") == 1
    r = subprocess.run([sys.executable, "-m", "beamtap", "keys", "lab", "--out", str(tmp_path)],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "never overwritten" in r.stderr


def test_operator_key_gets_power_and_audio_and_may_change_beams(secured):
    svc = secured["svc"]
    with Subscriber(svc.publish, topics=["power", "audio"], timeout_s=10, key=secured["op"],
                    server_key=secured["server"]) as sub:
        topics = {sub.recv().topic for _ in range(20)}
    assert topics == {"power", "audio"}
    with Controller(svc.control, key=secured["op"], server_key=secured["server"]) as ctl:
        reply = ctl.beams(set={"audio_deg": [[75.0, 0.0]]})
        assert reply["beams"]["audio_deg"] == [[75.0, 0.0]]
        assert ctl.status()["security"]["curve"] is True
    assert "control: beams {'set': {'audio_deg': [[75.0, 0.0]]}} by operator" in svc.log()


@pytest.mark.parametrize("who", ["no key", "wrong server key", "unknown key"])
def test_others_get_nothing_within_three_seconds(secured, who):
    svc = secured["svc"]
    kwargs = {"no key": {}, "wrong server key": {"key": secured["op"], "server_key": secured["op"].with_suffix(".key")},
              "unknown key": {"key": secured["stranger"], "server_key": secured["server"]}}[who]
    env = {k: os.environ.pop(k) for k in ("BEAMTAP_KEY", "BEAMTAP_SERVER_KEY") if k in os.environ}
    try:
        with Subscriber(svc.publish, topics=["power", "status", "beams"], timeout_s=3, **kwargs) as sub:
            with pytest.raises(TimeoutError):
                sub.recv()
        with Controller(svc.control, timeout_s=3, **kwargs) as ctl:
            with pytest.raises(ServiceError):
                ctl.status()
    finally:
        os.environ.update(env)


def test_unknown_keys_are_counted_and_logged(secured):
    svc = secured["svc"]
    with Subscriber(svc.publish, topics=["power"], timeout_s=2, key=secured["stranger"],
                    server_key=secured["server"]) as sub:
        with pytest.raises(TimeoutError):
            sub.recv()
    with Controller(svc.control, key=secured["op"], server_key=secured["server"]) as ctl:
        assert ctl.status()["security"]["denied"] >= 1
    assert "refused a connection with an unknown key" in svc.log()


def test_reader_reads_but_changes_nothing(secured):
    svc = secured["svc"]
    with Subscriber(svc.publish, topics=["power"], timeout_s=10, key=secured["reader"],
                    server_key=secured["server"]) as sub:
        assert sub.recv().topic == "power"
    with Controller(svc.control, key=secured["reader"], server_key=secured["server"]) as ctl:
        assert ctl.status()["state"] == "running"
        assert ctl.beams()["beams"]["directions_deg"]
        for change in (lambda: ctl.beams(set={"audio_deg": [[10.0, 0.0]]}), lambda: ctl.mark("from a reader"),
                       lambda: ctl.record("start"), lambda: ctl.request("reload_keys")):
            with pytest.raises(ServiceError, match="'reader' is a reader; readers may watch"):
                change()


def test_cli_with_keys_and_a_clear_line_without(secured):
    svc = secured["svc"]
    base = [sys.executable, "-m", "beamtap", "ctl", "--control", svc.control]
    env = {k: v for k, v in os.environ.items() if not k.startswith("BEAMTAP_")}
    r = subprocess.run(base + ["status", "--key", str(secured["op"]), "--server-key", str(secured["server"])],
                       capture_output=True, text=True, timeout=60, env=env)
    assert r.returncode == 0 and "gaps" in r.stdout, r.stderr
    r = subprocess.run(base + ["--timeout", "2", "status", "--key", str(secured["stranger"]), "--server-key",
                               str(secured["server"])], capture_output=True, text=True, timeout=60, env=env)
    assert r.returncode == 2 and "check --server-key and that your public key is in its clients" in r.stderr
    assert r.stderr.count("\n") == 1
    r = subprocess.run([sys.executable, "-m", "beamtap", "tail", "--endpoint", svc.publish, "--count", "3",
                        "--topics", "power"], capture_output=True, text=True, timeout=60,
                       env=dict(env, BEAMTAP_KEY=str(secured["op"]), BEAMTAP_SERVER_KEY=str(secured["server"])))
    assert r.returncode == 0 and r.stdout.count("power") == 3, r.stderr


def test_new_keys_by_reload_request_and_by_sighup(secured):
    svc = secured["svc"]
    late_pub, late_sec = _keys(secured["mine"], f"late{time.monotonic_ns()}")
    shutil.copy(late_pub, secured["clients"])
    with Controller(svc.control, key=secured["op"], server_key=secured["server"]) as ctl:
        assert ctl.request("reload_keys")["keys"]["operators"] == 2
    with Controller(svc.control, key=late_sec, server_key=secured["server"]) as ctl:
        assert ctl.status()["state"] == "running"
    (secured["clients"] / late_pub.name).unlink()
    svc.proc.send_signal(signal.SIGHUP)
    deadline = time.monotonic() + 10
    while svc.log().count("operator and 1 reader keys loaded") < 3:  # start, reload_keys, SIGHUP
        assert time.monotonic() < deadline, svc.log()
        time.sleep(0.05)
    with Controller(svc.control, timeout_s=2, key=late_sec, server_key=secured["server"]) as ctl:
        with pytest.raises(ServiceError):
            ctl.status()


def test_c_subscriber_with_keys(secured, tmp_path):
    from test_client_tools import _c_toolchain

    flags = _c_toolchain()
    if flags is None:
        pytest.skip("needs gcc, libzmq3-dev and libmsgpack-dev (installed by .ci/run)")
    src = os.path.join(os.path.dirname(__file__), "..", "docs", "examples", "power_peak.c")
    exe = tmp_path / "power_peak"
    build = subprocess.run(["gcc", "-O2", "-Wall", "-Werror", "-o", str(exe), src, *flags], capture_output=True,
                           text=True)
    assert build.returncode == 0, build.stderr
    r = subprocess.run([str(exe), secured["svc"].publish, "20", "--server-key", str(secured["server"]), "--key",
                        str(secured["op"])], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0 and r.stdout.count("bearing_deg=") == 20, r.stderr


def test_off_loopback_needs_keys_or_allow_insecure(tmp_path):
    cfg = line_config(count=8, samplerate_hz=16000, block_frames=512)
    (tmp_path / "c.toml").write_text(cfg)
    r = subprocess.run([sys.executable, "-m", "beamtap", "serve", "--config", str(tmp_path / "c.toml"), "--publish",
                        "tcp://0.0.0.0:0", "--control", "tcp://127.0.0.1:*"], capture_output=True, text=True,
                       timeout=60)
    assert r.returncode == 2 and "beamtap keys NAME --out DIR" in r.stderr and r.stderr.count("\n") == 1
    insecure = cfg + "[security]\nallow_insecure = true\n"
    with running_service(tmp_path, insecure, publish="tcp://0.0.0.0:*") as svc:
        with Controller(svc.control) as ctl:
            assert "allow_insecure" in ctl.status()["security"]["warning"]
    assert "NO KEYS, reachable from other machines" in svc.log()


class Relay:
    """A TCP relay on loopback that keeps every byte it forwards (what a network tap would see)."""

    def __init__(self, target):
        host, port = target[6:].rsplit(":", 1)
        self.target = (host, int(port))
        self.server = socket.socket()
        self.server.bind(("127.0.0.1", 0))
        self.server.listen()
        self.endpoint = f"tcp://127.0.0.1:{self.server.getsockname()[1]}"
        self.seen = bytearray()
        self.lock = threading.Lock()
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self):
        while True:
            try:
                a, _ = self.server.accept()
            except OSError:
                return
            b = socket.create_connection(self.target)
            for src, dst in ((a, b), (b, a)):
                threading.Thread(target=self._pump, args=(src, dst), daemon=True).start()

    def _pump(self, src, dst):
        try:
            while data := src.recv(65536):
                with self.lock:
                    self.seen += data
                dst.sendall(data)
        except OSError:
            pass
        finally:
            for s in (src, dst):
                try:
                    s.shutdown(socket.SHUT_RDWR)
                except OSError:
                    pass

    def close(self):
        self.server.close()


@pytest.mark.parametrize("secure", [True, False])
def test_the_wire_shows_no_plaintext_when_secured(secured, tmp_path, secure):
    if secure:
        svc, keys = secured["svc"], {"key": secured["op"], "server_key": secured["server"]}
        ctx = None
    else:
        ctx = running_service(tmp_path, line_config(count=8, samplerate_hz=16000, block_frames=512))
        svc, keys = ctx.__enter__(), {}
    try:
        relay = Relay(svc.publish)
        with Subscriber(relay.endpoint, topics=["power", "status"], timeout_s=10, **keys) as sub:
            frames = [sub.recv() for _ in range(15)]
        relay.close()
        assert {f.topic for f in frames} >= {"power"}
        seen = bytes(relay.seen)
        assert len(seen) > 1000
        plain = [w for w in (b"power", b"first_sample", b"time_utc", b"samplerate_hz") if w in seen]
        assert (plain == []) if secure else (len(plain) == 4), plain
    finally:
        if ctx is not None:
            ctx.__exit__(None, None, None)
    assert np.isfinite(frames[-1].first_sample)


def test_changes_are_noted_in_the_recording_with_the_key_name(secured):
    from beamtap.session import read_manifest

    svc = secured["svc"]
    with Controller(svc.control, key=secured["op"], server_key=secured["server"]) as ctl:
        session = ctl.record("start", what=["power"])["session"]
        ctl.beams(set={"audio_deg": [[80.0, 0.0]]})
        ctl.mark("buoy in")
        ctl.record("stop")
    notes = [r for r in read_manifest(session) if r["type"] == "control"]
    assert [(n["cmd"], n["by"]) for n in notes] == [("record", "operator"), ("beams", "operator"),
                                                     ("mark", "operator")]
    assert notes[1]["request"] == {"set": {"audio_deg": [[80.0, 0.0]]}}
