"""``process`` on Dask (``--workers``, ``--scheduler``): the same outputs as a serial run.

The reference is beamtap's own serial ``process`` (itself checked against published values and
reference libraries in test_engine.py and test_offline_cli.py); the tolerances are float32
rounding, as the issue states them: power within 1e-4 dB, audio within 1e-6 of full scale. The
session has a gap, segments shorter than a chunk, a few non-finite samples, and chunk joins
that fall inside power blocks.
"""

from __future__ import annotations

import contextlib
import csv
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from beamtap.session import SessionWriter
from beamtap.wavfile import WavReader, WavWriter

from conftest import line_config

pytest.importorskip("distributed")

FS, BLOCK = 16000, 512
CHUNK_S = 1.37  # 21920 frames: 42.8 power blocks, so every join falls inside a power block
CONFIG = line_config(count=8, samplerate_hz=FS, block_frames=BLOCK, fan=(0.0, 180.0, 3.0), band_hz=(300.0, 1400.0),
                     audio_deg=[(60.0, 0.0), (120.0, 0.0)],
                     scene=[{"azimuth_deg": 70.0, "signal": "noise", "band_hz": [300.0, 1400.0], "level_db": -20.0,
                             "sweep_deg_per_s": 3.0}])


def _beamtap(*args, timeout=240):
    return subprocess.run([sys.executable, "-m", "beamtap", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout)


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    """A WAV of the scene, and a session of it with a gap (4.0 s to 4.7 s missing) and NaNs."""
    tmp = tmp_path_factory.mktemp("cluster")
    cfg = tmp / "array.toml"
    cfg.write_text(CONFIG)
    wav = tmp / "scene.wav"
    r = _beamtap("simulate", cfg, "--seconds", 9, "--out", wav)
    assert r.returncode == 0, r.stderr
    with WavReader(wav) as rd:
        x, _ = rd.read(rd.frames)
    x = np.array(x)
    x[12345, 3] = np.nan
    x[90001, 0] = np.inf
    with WavWriter(wav, FS, x.shape[1]) as w:  # the scene with the non-finite samples
        w.write(x)
    session = tmp / "session"
    sw = SessionWriter(session, ["raw"], FS, segment_s=0.9, session_info={"config": CONFIG})
    t0 = 1.8e9
    for lo in range(0, len(x), BLOCK):
        if int(4.0 * FS) <= lo < int(4.7 * FS):
            continue  # lost: the gap
        sw.write("raw", lo, x[lo:lo + BLOCK], t0 + lo / FS)
    sw.close()
    serial = {}
    for name, inp in (("session", session), ("wav", wav)):
        out = tmp / f"serial-{name}"
        r = _beamtap("process", "--config", cfg, inp, "--out", out, "--threads", 1)
        assert r.returncode == 0, r.stderr
        serial[name] = out
    return {"tmp": tmp, "cfg": cfg, "wav": wav, "session": session, "serial": serial}


def _power(folder):
    with open(folder / "power.csv") as f:
        rows = list(csv.reader(f))
    return np.array([[int(r[0])] for r in rows[1:]]), np.array([[float(v) for v in r[2:]] for r in rows[1:]])


def _assert_same(serial: Path, other: Path):
    firsts_a, pa = _power(serial)
    firsts_b, pb = _power(other)
    np.testing.assert_array_equal(firsts_a, firsts_b)
    # power.csv holds 3 decimals: equal text up to a last-digit rounding flip, i.e. within 1e-4 dB of
    # the same float32 value rounded the same way; the tolerance.
    assert np.max(np.abs(pa - pb)) <= 1e-3 + 1e-9 and np.mean(pa != pb) < 1e-3
    with WavReader(serial / "audio.wav") as r:
        a, _ = r.read(r.frames)
    with WavReader(other / "audio.wav") as r:
        b, _ = r.read(r.frames)
    assert a.shape == b.shape
    assert np.max(np.abs(a - b)) <= 1e-6
    for name in ("detections.csv", "tracks.csv", "beams.csv", "bands.csv"):
        assert (serial / name).read_text() == (other / name).read_text(), name
    sa, sb = json.loads((serial / "summary.json").read_text()), json.loads((other / "summary.json").read_text())
    for key in ("frames_processed", "power_rows", "gaps", "gap_frames", "nan_samples", "clipped_samples",
                "bulk_delay_samples", "first_sample", "tracks"):
        assert sa[key] == sb[key], key
    assert sb["chunks"] >= 2


def test_two_workers_give_the_serial_outputs(data):
    out = data["tmp"] / "workers2"
    r = _beamtap("process", data["session"], "--out", out, "--workers", 2, "--chunk-s", CHUNK_S)
    assert r.returncode == 0, r.stderr
    _assert_same(data["serial"]["session"], out)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["gaps"] == 1 and summary["nan_samples"] == 2 and summary["workers"] == 2
    assert not (out / ".beamtap-parts").exists()


@contextlib.contextmanager
def dask_cluster(tmp, workers=2, prefix=()):
    """A scheduler and workers started with Dask's own commands (``python -m dask ...``)."""
    sched_file = tmp / f"scheduler-{time.monotonic_ns()}.json"
    procs = [subprocess.Popen([sys.executable, "-m", "dask", "scheduler", "--host", "127.0.0.1", "--port", "0",
                               "--no-dashboard", "--scheduler-file", str(sched_file)],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)]
    try:
        deadline = time.monotonic() + 60
        while not sched_file.exists():
            assert time.monotonic() < deadline and procs[0].poll() is None, "dask scheduler did not start"
            time.sleep(0.1)  # waiting for another process's file
        address = json.loads(sched_file.read_text())["address"]
        for k in range(workers):
            procs.append(subprocess.Popen([*prefix, sys.executable, "-m", "dask", "worker", address, "--nthreads", "1",
                                           "--no-dashboard", "--name", f"w{k}", "--local-directory", str(tmp)],
                                          stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        from distributed import Client

        with Client(address, timeout="30s") as c:
            c.wait_for_workers(workers, timeout=60)
        yield address, sched_file
    finally:
        for p in reversed(procs):
            p.terminate()
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                p.kill()


def test_existing_scheduler_and_several_inputs(data):
    """Two inputs on a scheduler and two workers started with Dask's own commands: one folder
    each under --out, and index.csv."""
    out = data["tmp"] / "scheduled"
    with dask_cluster(data["tmp"]) as (address, _):
        r = _beamtap("process", "--config", data["cfg"], data["session"], data["wav"], "--out", out,
                     "--scheduler", address, "--chunk-s", CHUNK_S)
    assert r.returncode == 0, r.stderr
    _assert_same(data["serial"]["session"], out / "session")
    _assert_same(data["serial"]["wav"], out / "scene")
    with open(out / "index.csv") as f:
        index = list(csv.DictReader(f))
    assert [Path(row["output"]).name for row in index] == ["session", "scene"]
    assert [row["status"] for row in index] == ["done", "done"]
    assert int(index[1]["frames"]) == 9 * FS and abs(float(index[1]["seconds"]) - 9.0) < 1e-9


def _can_hide_folders() -> bool:
    r = subprocess.run(["unshare", "-m", "--propagation", "private", "true"], capture_output=True)
    return r.returncode == 0


@pytest.mark.skipif(not _can_hide_folders(), reason="needs unshare -m (root): a worker that cannot see the data")
def test_input_missing_on_a_worker_is_reported_not_hung(data):
    """A worker without the shared filesystem (a tmpfs mounted over the data folder in its own
    mount namespace): each chunk fails there twice and is reported with its input, time range and
    error; the job ends with status 1."""
    hide = ["unshare", "-m", "--propagation", "private", "sh", "-c",
            f'mount -t tmpfs none "{data["tmp"]}" && exec "$0" "$@"']
    out = Path(str(data["tmp"]) + "-out") / "blind"
    out.parent.mkdir(exist_ok=True)
    with dask_cluster(out.parent, workers=1, prefix=hide) as (_, scheduler_file):
        started = time.monotonic()
        r = _beamtap("process", data["wav"], "--config", data["cfg"], "--out", out, "--scheduler-file",
                     scheduler_file, "--chunk-s", 4.0, timeout=180)
    assert r.returncode == 1, r.stderr
    assert time.monotonic() - started < 120
    errors = [line for line in r.stderr.splitlines() if line.startswith("beamtap process: error:")]
    assert len(errors) == 3  # 9 s in chunks of 4 s: three chunks
    assert str(data["wav"]) in errors[0] and "s of stream" in errors[0] and "tried twice" in errors[0]
    assert "Traceback" not in r.stderr


@pytest.mark.parametrize("args,expect", [
    (["--workers", "0"], "--workers 0"),
    (["--workers", "2", "--chunk-s", "-1"], "--chunk-s -1"),
    (["--workers", "2", "--chunk-s", "nan"], "--chunk-s nan"),
    (["--scheduler", "tcp://127.0.0.1:9", "--scheduler-file", "x.json"], "not both"),
    (["--scheduler", "tcp://127.0.0.1:9"], "cannot reach the Dask scheduler"),
])
def test_cluster_usage_errors_in_one_line(data, args, expect):
    r = _beamtap("process", "--config", data["cfg"], data["wav"], "--out", data["tmp"] / "never", *args, timeout=120)
    assert r.returncode == 2, r.stderr
    assert r.stderr.count("\n") == 1 and expect in r.stderr and "Traceback" not in r.stderr
    assert not (data["tmp"] / "never" / "power.csv").exists()


def test_folder_of_sessions_and_bad_inputs(data, tmp_path):
    from beamtap.errors import UsageError
    from beamtap.service.offline import campaign

    (tmp_path / "trial").mkdir()
    os.symlink(data["session"], tmp_path / "trial" / "run-a")
    (tmp_path / "trial" / "notes").mkdir()
    assert [p.name for p in campaign.expand_inputs([tmp_path / "trial"])] == ["run-a"]
    with pytest.raises(UsageError, match="neither a session"):
        campaign.expand_inputs([tmp_path / "trial" / "notes"])
    with pytest.raises(UsageError, match="no such file"):
        campaign.expand_inputs([tmp_path / "missing.wav"])
    names = [p.name for p in campaign.output_folders(tmp_path / "o", [Path("a/x.wav"), Path("b/x.wav")])]
    assert names == ["x", "x-2"]


def test_adaptive_inputs_are_not_cut_in_time(data):
    """MVDR's covariance average has a long memory: an MVDR input is one chunk, whatever --chunk-s."""
    from beamtap.service import config as cfgmod
    from beamtap.service.offline import campaign
    from beamtap.service.offline.process import plan_input

    das = cfgmod.load(data["cfg"])
    mvdr = cfgmod.loads(CONFIG + 'method = "mvdr"\n', str(data["cfg"]))
    parts = data["tmp"] / "parts"
    assert len(campaign.chunk_tasks(plan_input(das, data["session"]), 0, CHUNK_S, parts, 1)) > 4
    tasks = campaign.chunk_tasks(plan_input(mvdr, data["session"], allow_mismatch=True), 0, CHUNK_S, parts, 1)
    assert len(tasks) == 1 and len(tasks[0].spans) == 2  # both runs, in order, in one engine


def test_ctrl_c_cancels_the_whole_job(data, tmp_path):
    """SIGINT while chunks run: exit status 130, the workers and the parts folder gone."""
    import signal

    wav = tmp_path / "long.wav"
    r = _beamtap("simulate", data["cfg"], "--seconds", 300, "--out", wav)
    assert r.returncode == 0, r.stderr
    out = tmp_path / "cancelled"
    proc = subprocess.Popen([sys.executable, "-m", "beamtap", "process", "--config", str(data["cfg"]), str(wav),
                             "--out", str(out), "--workers", "2", "--chunk-s", "0.5"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    for line in proc.stdout:  # the job is submitted right after this line
        if line.startswith("process:"):
            break
    workers = subprocess.run(["pgrep", "-P", str(proc.pid)], capture_output=True, text=True).stdout.split()
    assert len(workers) >= 2, workers  # the LocalCluster's worker processes
    proc.send_signal(signal.SIGINT)
    try:
        rest, err = proc.communicate(timeout=60)
    except subprocess.TimeoutExpired:
        proc.kill()
        raise AssertionError("process did not stop on Ctrl-C") from None
    assert proc.returncode == 130, (proc.returncode, rest, err)
    assert "cancelled" in rest and "Traceback" not in err, (rest, err)
    assert not (out / ".beamtap-parts").exists()
    deadline = time.monotonic() + 20
    while any(os.path.exists(f"/proc/{pid}") for pid in workers) and time.monotonic() < deadline:
        time.sleep(0.1)  # waiting for other processes to exit
    assert not [pid for pid in workers if os.path.exists(f"/proc/{pid}")], "workers outlived the cancelled job"


@pytest.mark.parametrize("mode", [[], ["--workers", "2", "--chunk-s", CHUNK_S]])
def test_full_disk_is_reported_in_one_line(data, tmp_path, mode):
    """The output disk fills up (a file-size limit: the kernel refuses writes past it, as on a full
    disk): serial and on Dask, the job ends with one line naming what could not be written."""
    import resource

    def small_files():
        resource.setrlimit(resource.RLIMIT_FSIZE, (300_000, 300_000))

    out = tmp_path / "full"
    r = subprocess.run([sys.executable, "-m", "beamtap", "process", "--config", str(data["cfg"]), str(data["wav"]),
                        str(data["session"]), "--out", str(out), *map(str, mode)], capture_output=True, text=True,
                       timeout=240, preexec_fn=small_files)
    assert r.returncode in (1, 2), r.stderr
    errors = [line for line in r.stderr.splitlines() if line.startswith("beamtap process: error:")]
    assert errors and "Traceback" not in r.stderr, r.stderr
    assert "File too large" in errors[0] and str(out) in errors[0], errors
