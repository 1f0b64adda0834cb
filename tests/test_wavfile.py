"""WAV files of any length: RF64 (EBU Tech 3306) past the 4 GiB RIFF limit, checked against libsndfile
(through the soundfile package) as the independent reader; truncated files are noticed."""

import os
import subprocess
import sys

import numpy as np
import pytest

from beamtap.wavfile import WavReader, WavWriter

sf = pytest.importorskip("soundfile")  # in the test extra; libsndfile reads RF64


def test_small_rf64_round_trip(tmp_path, rng):
    path = tmp_path / "small.wav"
    x = (0.1 * rng.standard_normal((2000, 3))).astype(np.float32)
    with WavWriter(path, 48000, 3, rf64_at_bytes=1000) as w:  # switch early, so a small file is RF64
        w.write(x[:700])
        w.flush()
        w.write(x[700:])
    assert path.read_bytes()[:4] == b"RF64"
    with WavReader(path) as r:
        mine, _ = r.read(5000)
    theirs, fs = sf.read(path, dtype="float32")
    assert fs == 48000 and np.array_equal(mine, x) and np.array_equal(theirs, x)
    assert sf.info(path).format == "RF64"


def test_past_four_gibibytes_sparse(tmp_path, rng):
    """A file whose sizes need more than 32 bits, without writing 4 GiB: the middle is a sparse gap
    of silence (WavWriter.skip), real frames at both ends."""
    path = tmp_path / "long.wav"
    ch = 16
    a = (0.1 * rng.standard_normal((1024, ch))).astype(np.float32)
    b = (0.1 * rng.standard_normal((1024, ch))).astype(np.float32)
    gap = (2**32 // (ch * 4)) + 12345  # alone more than 4 GiB of samples
    with WavWriter(path, 48000, ch) as w:
        w.write(a)
        w.skip(gap)
        w.write(b)
    total = 2048 + gap
    assert os.path.getsize(path) > 2**32
    assert os.stat(path).st_blocks * 512 < 64 * 2**20  # sparse: nothing like 4 GiB on disk
    assert open(path, "rb").read(4) == b"RF64"
    info = sf.info(path)
    assert info.frames == total and info.channels == ch and info.format == "RF64"
    with sf.SoundFile(path) as f:
        f.seek(total - 1024)
        assert np.array_equal(f.read(1024, dtype="float32"), b)
        f.seek(1020)
        assert np.array_equal(f.read(8, dtype="float32")[4:], np.zeros((4, ch), np.float32))
    with WavReader(path) as r:
        assert r.frames == total and not r.truncated
        first, _ = r.read(1024)
        r.seek(total - 1024)
        last, _ = r.read(4096)
    assert np.array_equal(first, a) and np.array_equal(last, b)


def test_truncated_wav_is_read_to_its_end_and_processed_with_a_warning(tmp_path, rng):
    path = tmp_path / "cut.wav"
    x = (0.1 * rng.standard_normal((48000, 4))).astype(np.float32)
    with WavWriter(path, 48000, 4) as w:
        w.write(x)
    with open(path, "r+b") as f:
        f.truncate(80 + 10000 * 16 + 7)  # 10000 whole frames and a piece of one
    with WavReader(path) as r:
        assert r.truncated and r.frames == 10000 and r.frames_promised == 48000
        y, _ = r.read(48000)
    assert np.array_equal(y, x[:10000])
    cfg = tmp_path / "c.toml"
    cfg.write_text("[array]\nline = { count = 4, spacing_m = 0.5 }\n[medium]\nsound_speed_mps = 1500.0\n"
                   "[beams]\nfan = { from_deg = 0, to_deg = 180, step_deg = 5 }\nband_hz = [300.0, 1400.0]\n")
    r = subprocess.run([sys.executable, "-m", "beamtap", "process", "--config", str(cfg), str(path), "--out",
                        str(tmp_path / "o")], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert "the header promises 48000 frames, the file holds 10000" in r.stderr


@pytest.mark.parametrize("subtype, full", [("PCM_16", 2**15), ("PCM_24", 2**23), ("PCM_32", 2**31), ("FLOAT", None)])
def test_every_sample_format_reads_as_libsndfile_does(tmp_path, rng, subtype, full):
    """Integer codes c read as c / 2^(bits-1) (common practice; libsndfile's float reading of PCM,
    through soundfile, is the reference); codes at either end of the range are counted as clipped;
    block by block reads join up to the whole file, and a cut-off last frame is not read."""
    path = tmp_path / f"{subtype}.wav"
    x = np.clip(0.3 * rng.standard_normal((1000, 5)), -1.0, 1.0).astype(np.float32)
    x[10, 2], x[11, 4] = 1.0, -1.0  # the top and bottom codes
    sf.write(path, x, 8000, subtype=subtype)
    theirs, _ = sf.read(path, dtype="float64")
    with open(path, "ab") as f:  # a partial frame left by a crash mid-write
        f.write(b"\x01\x02")
    with WavReader(path) as r:
        parts = [r.read(333) for _ in range(4)]
        assert r.read(10)[0].shape == (0, 5)
    mine = np.concatenate([p[0] for p in parts])
    assert mine.dtype == np.float32 and mine.shape == (1000, 5)
    np.testing.assert_array_equal(mine, theirs.astype(np.float32))
    clipped = sum(p[1] for p in parts)
    if full is None:
        assert clipped == 0
    else:
        codes = np.round(theirs * full)
        assert clipped == int(np.count_nonzero(codes >= full - 1) + np.count_nonzero(codes <= -full))
        assert clipped >= 2
