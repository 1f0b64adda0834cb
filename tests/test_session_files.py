"""Session files on a full disk: every file stays whole and parses.

The disk is "full" for a child process through a file-size limit (RLIMIT_FSIZE): the kernel
then writes what fits and refuses the rest (EFBIG), the same partial-write behaviour as
ENOSPC. The child writes a session until each of its files (manifest, power CSV, raw WAV) has
refused a write; the files are then read with independent readers: ``json`` line by line,
``csv``, and ``scipy.io.wavfile``.
"""

import csv
import json
import os
import subprocess
import sys

import numpy as np
import pytest
from scipy.io import wavfile

LIMIT = 150_000

_SCRIPT = r"""
import json, resource, sys
import numpy as np
from beamtap.session import SessionWriter
resource.setrlimit(resource.RLIMIT_FSIZE, ({limit}, {limit}))
folder = sys.argv[1]
# A long config text makes manifest lines large, so the manifest too reaches the limit.
w = SessionWriter(folder, ["raw", "power"], 16000.0, segment_s=3600.0, power_block_frames=512,
                  session_info={{"config": "# " + "x" * 3000}})
rng = np.random.default_rng(1)
failed = set()
n = 0
for i in range(100000):
    if len(failed) == 3:
        break
    for kind, do in (
            ("raw", lambda: w.write("raw", 512 * i, rng.standard_normal((512, 3)).astype(np.float32) * 0.1,
                                    1.8e9 + i)),
            ("power", lambda: w.write("power", 512 * i, rng.standard_normal((2, 37)).astype(np.float32) - 40,
                                      1.8e9 + i)),
            ("manifest", lambda: w.mark("m" * 2500 + str(i), 512 * i, 1.8e9 + i))):
        if kind in failed:
            continue
        try:
            do()
        except OSError as exc:
            failed.add(kind)
print(json.dumps(sorted(failed)))
"""


@pytest.fixture(scope="module")
def full_session(tmp_path_factory):
    folder = tmp_path_factory.mktemp("full") / "session"
    r = subprocess.run([sys.executable, "-c", _SCRIPT.format(limit=LIMIT), str(folder)], capture_output=True,
                       text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout) == ["manifest", "power", "raw"]  # each file met the full disk
    return folder


def test_manifest_ends_with_a_whole_line(full_session):
    data = (full_session / "manifest.jsonl").read_bytes()
    assert data.endswith(b"\n") and len(data) <= LIMIT
    records = [json.loads(line) for line in data.decode().splitlines()]  # every line parses
    assert records[0]["type"] == "session"
    assert any(r["type"] == "mark" for r in records)


def test_power_csv_ends_with_a_whole_row(full_session):
    (path,) = full_session.glob("power-*.csv")
    data = path.read_bytes()
    assert data.endswith(b"\n")
    rows = list(csv.reader(data.decode().splitlines()))
    assert rows[0][:2] == ["first_sample", "time_utc"] and len(rows) > 2
    assert {len(r) for r in rows} == {2 + 2 * 37}
    assert [int(r[0]) for r in rows[1:]] == [512 * i for i in range(len(rows) - 1)]


def test_wav_has_whole_frames_and_no_stray_bytes(full_session):
    (path,) = full_session.glob("raw-*.wav")
    fs, x = wavfile.read(path)  # an independent reader
    assert fs == 16000 and x.shape[1] == 3 and len(x) > 0
    assert os.path.getsize(path) == 80 + x.size * 4  # header (with room for RF64) + data, nothing after
    assert len(x) % 512 == 0 and np.all(np.isfinite(x))
