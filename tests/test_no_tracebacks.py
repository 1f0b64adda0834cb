"""Careless and hostile inputs to the command line: one line on stderr naming where and what,
exit status 2, no traceback, no partial output, and no long work before the refusal."""

import os
import subprocess
import sys
import time

import pytest

BASE = "[medium]\nsound_speed_mps = 1500.0\n[beams]\nfan = { from_deg = 0, to_deg = 180, step_deg = 1 }\n"


def _config(array="line = { count = 16, spacing_m = 0.5 }", band="[300.0, 1400.0]"):
    return f"[array]\n{array}\n{BASE}band_hz = {band}\n"


CASES = {
    # name: (file bytes, extra args, words the one line must hold)
    "binary config": (os.urandom(64) + b"\xff\xfe", [], "not a UTF-8 text file"),
    "TOML syntax": (b"[array\nline = 1\n", [], "bad.toml: is not valid TOML"),
    "a hundred million sensors": (_config("line = { count = 100000000, spacing_m = 0.5 }").encode(), [],
                                  "[array.line.count] got 100000000"),
    "a grid too large": (_config("grid = { rows = 2000, columns = 2000, spacing_m = 0.1 }").encode(), [],
                         "array.grid"),
    "spacing of a million km": (_config("line = { count = 16, spacing_m = 1e9 }").encode(), [], "frames of"),
    "band up to Nyquist": (_config(band="[300.0, 23999.0]").encode(), [], "MB of steering data"),
    "band from 1 Hz": (_config(band="[1.0, 1600.0]").encode(), [], "MB of steering data"),
}


def _run(args, cwd, timeout=60):
    t0 = time.monotonic()
    r = subprocess.run([sys.executable, "-m", "beamtap", *args], capture_output=True, text=True, timeout=timeout,
                       cwd=cwd)
    return r, time.monotonic() - t0


@pytest.mark.parametrize("name", list(CASES))
def test_check_refuses_in_one_line(tmp_path, name):
    content, extra, words = CASES[name]
    (tmp_path / "bad.toml").write_bytes(content)
    r, took = _run(["check", "bad.toml", *extra], tmp_path)
    assert r.returncode == 2, r.stderr
    assert "Traceback" not in r.stderr and len(r.stderr.strip().splitlines()) == 1, r.stderr
    assert "bad.toml" in r.stderr and words in r.stderr, r.stderr
    assert took < 30  # refused from the estimate, not after building (the slowest case took 49 s before)


def test_simulate_refuses_more_than_a_wav_holds_and_leaves_nothing(tmp_path):
    (tmp_path / "ok.toml").write_text(_config())
    r, _ = _run(["simulate", "ok.toml", "--seconds", "1e9", "--out", "big.wav"], tmp_path)
    assert r.returncode == 2 and "more than a WAV file holds" in r.stderr and "Traceback" not in r.stderr
    assert not (tmp_path / "big.wav").exists()


@pytest.mark.parametrize("suffix", [".jpg", ".bmp", ""])
def test_picture_names_the_formats_it_writes(tmp_path, suffix):
    (tmp_path / "ok.toml").write_text(_config())
    r, _ = _run(["simulate", "ok.toml", "--seconds", "1", "--out", "in.wav"], tmp_path)
    assert r.returncode == 0, r.stderr
    r, _ = _run(["process", "ok.toml", "in.wav", "--out", "out"], tmp_path)
    assert r.returncode == 0, r.stderr
    r, _ = _run(["picture", "out/power.csv", "--out", f"x{suffix}"], tmp_path)
    assert r.returncode == 2 and ".png, .svg, .pdf" in r.stderr and "Traceback" not in r.stderr
    assert not (tmp_path / f"x{suffix}").exists()


def test_check_tries_the_input_the_endpoints_and_the_array_shape(tmp_path):
    (tmp_path / "co.toml").write_text(_config("positions_m = [[0, 0, 0], [1, 0, 0], [1, 0, 0.0001]]"))
    r, _ = _run(["check", "co.toml"], tmp_path)
    assert r.returncode == 2 and "sensors 2 and 3 at the same place" in r.stderr
    (tmp_path / "ok.toml").write_text(_config())
    assert _run(["simulate", "ok.toml", "--seconds", "0.1", "--out", "sixteen.wav"], tmp_path)[0].returncode == 0
    wide = _config("line = { count = 20, spacing_m = 0.5 }")
    (tmp_path / "in.toml").write_text(wide + '[input]\nsource = "file"\npath = "sixteen.wav"\n'
                                      '[publish]\nendpoint = "tcp://192.0.2.1:5560"\n')  # TEST-NET-1, not ours
    r, _ = _run(["check", "in.toml"], tmp_path)
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert "16 channels, the array needs 20" in r.stderr and "cannot bind now" in r.stderr
    (tmp_path / "col.toml").write_text(_config("positions_m = [[0, 0, 0], [0.5, 0, 0], [1.7, 0, 0]]"))
    r, _ = _run(["check", "col.toml"], tmp_path)
    assert r.returncode == 0 and "the sensors lie on one line" in r.stdout


@pytest.mark.parametrize("args, words", [(["--freq", "30000"], "--freq 30000"), (["--freq", "-5"], "--freq -5"),
                                         (["--freq", "1000", "--look", "400"], "--look"),
                                         (["--freq", "1000", "--look", "90,nan"], "--look")])
def test_pattern_refuses_what_cannot_be_drawn(tmp_path, args, words):
    (tmp_path / "ok.toml").write_text(_config())
    r, _ = _run(["pattern", "ok.toml", *args, "--out", "p.csv"], tmp_path)
    assert r.returncode == 2 and words in r.stderr and "Traceback" not in r.stderr
    assert not (tmp_path / "p.csv").exists()


def test_output_paths_that_cannot_be_written_are_one_line(tmp_path):
    (tmp_path / "ok.toml").write_text(_config())
    assert _run(["simulate", "ok.toml", "--seconds", "0.3", "--out", "in.wav"], tmp_path)[0].returncode == 0
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "power.csv").mkdir()  # a folder where an output file should go
    r, _ = _run(["process", "ok.toml", "in.wav", "--out", "out", "--overwrite"], tmp_path)
    assert r.returncode == 2 and "power.csv" in r.stderr and "Traceback" not in r.stderr, r.stderr
    r, _ = _run(["pattern", "ok.toml", "--freq", "1000", "--out", "/missing/p.csv"], tmp_path)
    assert r.returncode == 2 and "/missing" in r.stderr and r.stderr.count("\n") == 1
    (tmp_path / "afile").write_text("x")
    r, _ = _run(["record", "--out", "afile", "--seconds", "1"], tmp_path)
    assert r.returncode == 2 and "afile" in r.stderr and "Traceback" not in r.stderr


def test_fft_refuses_what_it_would_misread():
    """A float64 frame read as float32 memory gives garbage (NaN): refused at the boundary instead."""
    import numpy as np

    from beamtap.service.engine.beamformer import COMPILED_AVAILABLE
    from beamtap.service.engine.transform import ColumnFFT

    fft = ColumnFFT(64, compiled=COMPILED_AVAILABLE)
    with pytest.raises(ValueError, match="float32"):
        fft(np.zeros((64, 8)))
    with pytest.raises(ValueError, match="not C-contiguous"):
        fft(np.zeros((8, 64), np.float32).T)
    assert fft(np.ones((64, 8), np.float32))[0, 0] == pytest.approx(64.0)


def test_a_band_near_zero_hertz_is_refused_before_its_filter_is_built(tmp_path):
    (tmp_path / "bad.toml").write_text(_config(band="[0.02, 0.2]"))
    r, took = _run(["check", "bad.toml"], tmp_path)
    assert r.returncode == 2 and "a band edge close to 0 Hz" in r.stderr and r.stderr.count("\n") == 1
    assert took < 30


def test_compiled_sums_refuse_what_they_would_misread():
    import numpy as np

    from beamtap.service.engine import ArrayGeometry, Beamformer, BeamSet, fan
    from beamtap.service.engine.beamformer import COMPILED_AVAILABLE

    if not COMPILED_AVAILABLE:
        pytest.skip("the compiled kernels are not installed")
    bf = Beamformer(ArrayGeometry.line(8, 0.5), 1500.0, 48000.0, 1024, BeamSet(fan(0, 180, 10)), compiled=True)
    product = bf._steer[0].power
    with pytest.raises(ValueError, match="spec: expected a C-contiguous complex64"):
        product(np.zeros((1, 200, 8), np.complex128), offset=0)
    with pytest.raises(ValueError, match="chunk: expected a C-contiguous float32"):
        bf._write_rows(np.zeros((16, 8), np.float64))


def test_check_notes_an_endpoint_in_use_without_failing(tmp_path):
    """The port may be this config's own running service: a note, not an error."""
    import zmq

    with zmq.Context.instance().socket(zmq.PUB) as sock:
        sock.bind("tcp://127.0.0.1:*")
        busy = sock.getsockopt(zmq.LAST_ENDPOINT).decode()
        (tmp_path / "ok.toml").write_text(_config() + f'[publish]\nendpoint = "{busy}"\n')
        r, _ = _run(["check", "ok.toml"], tmp_path)
    assert r.returncode == 0 and "is in use now (is the service already running?)" in r.stdout, r.stderr
