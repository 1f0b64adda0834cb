"""The offline commands run the way a user runs them: as a subprocess."""

import csv
import json
import subprocess
import sys

import numpy as np
import pytest
from scipy.io import wavfile

from beamtap.wavfile import WavReader, WavWriter

CONFIG = """
[array]
line = {{ count = 12, spacing_m = 0.5 }}
[medium]
sound_speed_mps = 1500.0
[input]
samplerate_hz = 16000
block_frames = 512
scene_noise_db = -70.0
[[input.scene]]
azimuth_deg = {az}
signal = "tone"
frequency_hz = 1000.0
level_db = -13.0103
[beams]
fan = {{ from_deg = 0.0, to_deg = 180.0, step_deg = 1.0 }}
band_hz = [600.0, 1400.0]
audio_deg = [[{az}, 0.0], [20.0, 0.0]]
"""


def run(*args, **kw):
    return subprocess.run([sys.executable, "-m", "beamtap", *args], capture_output=True, text=True,
                          timeout=300, **kw)


@pytest.fixture
def scene(tmp_path):
    cfg = tmp_path / "tank.toml"
    cfg.write_text(CONFIG.format(az=71.5))
    wav = tmp_path / "tank.wav"
    r = run("simulate", str(cfg), "--seconds", "3", "--out", str(wav))
    assert r.returncode == 0, r.stderr
    return cfg, wav


def test_help_and_version():
    r = run("--help")
    assert r.returncode == 0
    for name in ("check", "simulate", "process", "pattern"):
        assert name in r.stdout
    v = run("--version")
    assert v.returncode == 0 and v.stdout.startswith("beamtap ")


def test_check_prints_summary(scene):
    cfg, _ = scene
    r = run("check", str(cfg))
    assert r.returncode == 0, r.stderr
    assert "bulk delay D = " in r.stdout and "mirror image" in r.stdout


def test_simulate_then_process(scene, tmp_path):
    cfg, wav = scene
    fs, raw = wavfile.read(wav)  # a reference reader can read what simulate wrote
    assert fs == 16000 and raw.shape == (48000, 12) and raw.dtype == np.float32
    out = tmp_path / "out"
    r = run("process", str(cfg), str(wav), "--out", str(out))
    assert r.returncode == 0, r.stderr
    beams = list(csv.reader(open(out / "beams.csv")))
    assert beams[0] == ["beam", "azimuth_deg", "elevation_deg"] and len(beams) == 182
    with open(out / "power.csv", newline="") as f:  # the one power table format, read with plain csv
        table = list(csv.reader(f))
    assert table[0][:3] == ["first_sample", "time_utc", "b0_0"] and len(table[0]) == 2 + 181
    assert all(r[1] == "" for r in table[1:])  # a WAV with no --start-utc has no UTC
    firsts = np.array([int(r[0]) for r in table[1:]])
    rows = np.array([[float(v) for v in r[2:]] for r in table[1:]])
    summary = json.loads((out / "summary.json").read_text())
    # each row's first_sample: its block's start less D and the band filter delay; none before the input
    delay = summary["power_delay_samples"]
    assert delay == summary["bulk_delay_samples"] + max(summary["band_filter_delay_samples"])
    assert np.all(np.diff(firsts) == 512) and firsts[0] >= 0 and (firsts[0] + delay) % 512 == 0
    assert len(rows) == 48000 // 512 - -(-delay // 512)
    bands = list(csv.reader(open(out / "bands.csv")))
    assert bands[0] == ["band", "low_hz", "high_hz", "filter_delay_samples"] and len(bands) == 2
    peak = np.argmax(rows[5:].mean(axis=0))
    assert float(beams[peak + 1][1]) == pytest.approx(71.5, abs=1.0)
    # level: a -13.01 dB RMS tone (amplitude 0.316) from the look direction, unity gain
    assert rows[5:, 71].mean() == pytest.approx(-13.01, abs=0.2)  # beam 71° is within 0.5° of 71.5°
    fs_a, audio = wavfile.read(out / "audio.wav")
    assert audio.shape == (48000, 2) and audio.dtype == np.float32
    # aligned to the input time axis: the look beam equals the tone at the phase centre
    t = np.arange(48000) / 16000
    want = np.sqrt(2) * 10 ** (-13.0103 / 20) * np.sin(2 * np.pi * 1000 * t)
    assert np.max(np.abs(audio[2000:-2000, 0] - want[2000:-2000])) < 2e-3
    assert summary["frames_processed"] == 48000 and summary["nan_samples"] == 0
    assert summary["bulk_delay_samples"] > 0 and "[array]" in summary["config"]


def test_integer_wav_input_and_clip_count(scene, tmp_path):
    cfg, wav = scene
    _, x = wavfile.read(wav)
    x16 = np.round(x * 32767).astype(np.int16)
    x16[100, 0] = -32768  # two full-scale codes
    x16[200, 3] = 32767
    p16 = tmp_path / "i16.wav"
    wavfile.write(p16, 16000, x16)
    r = run("process", str(cfg), str(p16), "--out", str(tmp_path / "o16"))
    assert r.returncode == 0, r.stderr
    s = json.loads((tmp_path / "o16/summary.json").read_text())
    assert s["input_format"] == "int16" and s["clipped_samples"] == 2


def test_int24_writer_read_by_scipy(tmp_path, rng):
    x = (0.5 * rng.standard_normal((1000, 3))).clip(-1, 1).astype(np.float32)
    p = tmp_path / "a24.wav"
    with WavWriter(p, 8000, 3, "int24") as w:
        w.write(x[:400])
        w.write(x[400:])
    fs, y = wavfile.read(p)  # scipy returns 24-bit PCM left-justified in int32
    assert fs == 8000 and y.shape == (1000, 3)
    assert np.max(np.abs(y / 2.0**31 - x)) <= 2.0**-23
    with WavReader(p) as r:
        z, _ = r.read(5000)
    assert r.sample_format == "int24" and np.max(np.abs(z - x)) <= 2.0**-23


def test_process_mismatches_are_one_line_errors(scene, tmp_path):
    cfg, wav = scene
    few = tmp_path / "few.wav"
    wavfile.write(few, 16000, np.zeros((1000, 4), np.float32))
    r = run("process", str(cfg), str(few), "--out", str(tmp_path / "x"))
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "4 channels" in r.stderr
    other = tmp_path / "rate.wav"
    wavfile.write(other, 44100, np.zeros((1000, 12), np.float32))
    r = run("process", str(cfg), str(other), "--out", str(tmp_path / "y"))
    assert r.returncode == 2 and "44100" in r.stderr and "Traceback" not in r.stderr
    junk = tmp_path / "junk.wav"
    junk.write_bytes(b"not a wav at all")
    r = run("process", str(cfg), str(junk), "--out", str(tmp_path / "z"))
    assert r.returncode == 2 and "not a readable WAV" in r.stderr
    r = run("process", str(tmp_path / "none.toml"), str(wav), "--out", str(tmp_path / "z"))
    assert r.returncode == 2 and "none.toml" in r.stderr
    r = run("simulate", str(cfg), "--seconds", "-1", "--out", str(tmp_path / "n.wav"))
    assert r.returncode == 2 and "--seconds" in r.stderr
    r = run("simulate", str(cfg), "--seconds", "abc", "--out", str(tmp_path / "n.wav"))
    assert r.returncode == 2 and r.stderr.count("\n") == 1


def test_pattern_csv(scene, tmp_path):
    cfg, _ = scene
    out = tmp_path / "p.csv"
    r = run("pattern", str(cfg), "--freq", "1500", "--look", "90", "--out", str(out))
    assert r.returncode == 0, r.stderr
    table = np.genfromtxt(out, delimiter=",", names=True)
    i = np.argmax(table["response_db"])
    assert table["azimuth_deg"][i] in (90.0, -90.0)
    assert table["response_db"][i] == pytest.approx(0.0, abs=1e-6)
    # 12 sensors at λ/2 (1500 Hz, 0.5 m): first null at cos θ = λ/(N d) = 1/6 (Van Trees 2002, §2.4)
    az = table["azimuth_deg"]
    u = np.cos(np.radians(az))
    near = (u > 0.05) & (u < 0.3)
    assert u[near][np.argmin(table["response_db"][near])] == pytest.approx(1 / 6, abs=0.002)


def test_pattern_png_with_the_plot_extra(scene, tmp_path):
    pytest.importorskip("matplotlib")
    cfg, _ = scene
    out = tmp_path / "p.png"
    r = run("pattern", str(cfg), "--freq", "1000", "--out", str(out))
    assert r.returncode == 0, r.stderr
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_commands_without_portaudio(tmp_path):
    """Without PortAudio, commands that do not touch a sound card work; one that does says
    in one line which package to install."""
    fake = tmp_path / "fake"
    fake.mkdir()
    (fake / "sounddevice.py").write_text("raise OSError('PortAudio library not found')\n")
    env = dict(__import__("os").environ, PYTHONPATH=str(fake))
    r = run("devices", env=env)
    assert r.returncode == 2 and "libportaudio2" in r.stderr and r.stderr.count("\n") == 1
    assert "Traceback" not in r.stderr
    r = run("check", env=env)
    assert r.returncode == 0 and "bulk delay" in r.stdout
    r = run("--help", env=env)
    assert r.returncode == 0


def test_unwritable_output_is_a_one_line_error(scene, tmp_path):
    cfg, wav = scene
    r = run("simulate", str(cfg), "--seconds", "1", "--out", str(tmp_path / "missing" / "x.wav"))
    assert r.returncode == 2 and "cannot write" in r.stderr and r.stderr.count("\n") == 1


def test_one_overwrite_rule(scene, tmp_path):
    """Existing outputs are refused in one line unless --overwrite; a session is never written into."""
    cfg, wav = scene
    out = tmp_path / "o"
    assert run("process", str(cfg), str(wav), "--out", str(out)).returncode == 0
    (out / "notes.txt").write_text("mine")
    r = run("process", str(cfg), str(wav), "--out", str(out))
    assert r.returncode == 2 and "exists and is not empty (add --overwrite" in r.stderr
    r = run("process", str(cfg), str(wav), "--out", str(out), "--overwrite")
    assert r.returncode == 0, r.stderr
    assert (out / "notes.txt").read_text() == "mine"  # only process's own files are replaced
    sim = tmp_path / "s.wav"
    assert run("simulate", str(cfg), "--seconds", "0.2", "--out", str(sim)).returncode == 0
    r = run("simulate", str(cfg), "--seconds", "0.2", "--out", str(sim))
    assert r.returncode == 2 and "exists (add --overwrite" in r.stderr
    assert run("simulate", str(cfg), "--seconds", "0.2", "--out", str(sim), "--overwrite").returncode == 0
    r = run("pattern", str(cfg), "--freq", "1000", "--out", str(tmp_path))
    assert r.returncode == 2 and "is a folder" in r.stderr
    session = tmp_path / "session"
    session.mkdir()
    (session / "manifest.jsonl").write_text("{}\n")
    r = run("process", str(cfg), str(wav), "--out", str(session), "--overwrite")
    assert r.returncode == 2 and "recorded session" in r.stderr


def test_process_start_utc_dates_the_power_rows(scene, tmp_path):
    cfg, wav = scene
    out = tmp_path / "dated"
    r = run("process", str(cfg), str(wav), "--out", str(out), "--start-utc", "2026-12-05T10:15:00Z")
    assert r.returncode == 0, r.stderr
    from beamtap import powertable

    table = powertable.read(out)
    start = 1796465700.0  # 2026-12-05T10:15:00Z as POSIX seconds
    assert np.allclose(table.time_utc, start + table.first_sample / 16000, atol=1e-6)
    r = run("process", str(cfg), str(wav), "--out", str(tmp_path / "x"), "--start-utc", "yesterday")
    assert r.returncode == 2 and "--start-utc 'yesterday'" in r.stderr


@pytest.mark.parametrize("audio_deg", ["[]", "[[71.5, 0.0]]"])
def test_outputs_reach_the_writer_every_half_second_with_or_without_audio_beams(scene, tmp_path, monkeypatch,
                                                                               audio_deg):
    """``process`` hands its outputs to the writer thread about every half second of stream, so a long
    input never piles up in memory; without audio beams too (the rows alone set the pace). The
    count of rows written is spied on the real writer (its output is checked as well)."""
    import importlib

    from beamtap import powertable
    from beamtap.service import offline
    from beamtap.service.config import loads

    proc = importlib.import_module("beamtap.service.offline.process")  # the module (offline.process is its function)

    cfg, wav = scene
    text = cfg.read_text().replace("audio_deg = [[71.5, 0.0], [20.0, 0.0]]", f"audio_deg = {audio_deg}")
    config = loads(text, "tank.toml")
    batches, write_batch = [], proc.Outputs.write_batch

    def counted(self, audio, firsts, power_db):
        batches.append(sum(len(f) for f in firsts))
        return write_batch(self, audio, firsts, power_db)

    monkeypatch.setattr(proc.Outputs, "write_batch", counted)
    offline.process(config, wav, tmp_path / "out")
    per_half_second = 16000 // 2 // 512  # 15 rows of 512 frames at 16 kHz
    table = powertable.read(tmp_path / "out" / "power.csv")
    assert sum(batches) == len(table.first_sample) > 4 * per_half_second  # 3 s of input
    assert max(batches) <= per_half_second + 1, batches
