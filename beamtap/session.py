"""Recorded sessions: a folder of rotating segments and a JSON Lines manifest.

Layout of a session folder::

    manifest.jsonl          one JSON object per line, appended and fsynced as it goes
    raw-000001.wav ...      calibrated input channels, float32 (or 24-bit) WAV
    audio-000001.wav ...    audio beams
    power-000001.csv ...    band power rows

Manifest records (``type``): ``session`` (first line: config text and its
SHA-256, software version, host, start time, what is recorded), ``beams``
(the beam table, whenever it changes), ``segment_open`` and ``segment``
(a segment's file, kind, channels, ``first_sample``, UTC of its first
sample, sample rate, beam table and the frames lost just before it; the
closing record adds ``frames``), ``gap``, ``mark``, ``error`` and
``stop``. Every segment is contiguous in stream samples; a loss starts a
new segment.

Crash safety: every write reaches the kernel as it is made (no user-space
buffers), WAV headers are rewritten every :data:`HEADER_S` (a quarter
second) and files fsynced every ``flush_s`` (one second by default), and
every manifest line is written with one write call and fsynced, so a
killed process loses at most the last quarter second of the open segments
and a power cut at most the last second; the files stay readable by any WAV
reader. A segment with a ``segment_open`` record but no ``segment`` record
was open at the crash; its length is whatever its (valid) header says.

Full disk: a manifest line, a power row or a block of WAV frames that does
not fit whole is cut back to the last whole one before the error is raised,
so every file still parses (no half line, no half row, no stray bytes after
a WAV's data).

Used by the service's recorder and by the standalone ``beamtap record``;
needs only numpy and the standard library.
"""

from __future__ import annotations

import errno
import json
import os
import socket
import time
from pathlib import Path

import numpy as np

from beamtap import __version__, powertable, tracktable
from beamtap.wavfile import WavReader, WavWriter

MANIFEST = "manifest.jsonl"
KINDS = ("raw", "audio", "power")
#: Tables recorded beside power when detection is on (see beamtap.tracktable).
TABLES = ("detections", "tracks")
FORMAT_VERSION = 1
#: Keep every WAV segment well below the 4 GiB RIFF limit.
MAX_SEGMENT_BYTES = 2**31
#: Interval of WAV header rewrites, seconds: what a killed process can lose of an open segment.
HEADER_S = 0.25


class WholeRecordFile:
    """A file appended to in whole records (manifest lines, CSV rows).

    Each record is one ``write`` call on an ``O_APPEND`` descriptor; a
    record that does not fit whole (full disk, file-size limit) is cut back
    to the last whole one and the error re-raised, so the file always ends
    at a record boundary.
    """

    def __init__(self, path):
        self.path = str(path)
        self._fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
        self.size = os.fstat(self._fd).st_size

    def append(self, data: bytes) -> None:
        try:
            n = os.write(self._fd, data)
            if n != len(data):
                raise OSError(errno.ENOSPC, f"{self.path}: only {n} of {len(data)} bytes written")
        except OSError:
            try:
                os.ftruncate(self._fd, self.size)
            except OSError:
                pass
            raise
        self.size += n

    def sync(self) -> None:
        os.fsync(self._fd)

    def close(self) -> None:
        if self._fd >= 0:
            os.close(self._fd)
            self._fd = -1


#: ISO 8601 UTC with microseconds (the one formatter, shared with the power tables).
iso = powertable.iso_utc


class SessionWriter:
    """Write one session folder.

    Parameters
    ----------
    folder : path
        The session folder (created; must not exist yet).
    what : sequence of str
        Kinds to record, from ``raw``, ``audio``, ``power``.
    samplerate_hz : float
    segment_s : float
        Segment length in seconds of stream time.
    sample_format : {"float32", "int24"}
    session_info : dict
        Extra keys for the ``session`` record (config text, hash, D, label…).
    flush_s : float
        Interval of header rewrites and fsyncs.
    power_block_frames : int
        Frames each power row covers.
    """

    def __init__(self, folder, what, samplerate_hz: float, segment_s: float = 60.0,
                 sample_format: str = "float32", session_info: dict | None = None, flush_s: float = 1.0,
                 power_block_frames: int = 1024):
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=False)
        self.what = tuple(what)
        self.fs = float(samplerate_hz)
        self.segment_frames = max(1, int(round(segment_s * self.fs)))
        self.sample_format = sample_format
        self.flush_s = flush_s
        self.power_block_frames = int(power_block_frames)
        self._manifest = WholeRecordFile(self.folder / MANIFEST)
        self._open: dict = {}  # kind -> dict(writer, record, next_sample, ...)
        self._tables: dict = {}  # detections / tracks -> dict(file, name, rows)
        self._counter = {k: 0 for k in KINDS}
        self._last_flush = self._last_header = time.monotonic()
        self.beam_table_id = None
        self._beam_table: dict = {}
        self.frames_written = {k: 0 for k in KINDS}
        self.segments_closed = 0
        now = time.time()
        self.record("session", format="beamtap-session", format_version=FORMAT_VERSION,
                    software=f"beamtap {__version__}", host=socket.gethostname(), started_utc=now,
                    started_iso=iso(now), what=list(self.what), samplerate_hz=self.fs, segment_s=segment_s,
                    sample_format=sample_format, **(session_info or {}))

    # ---- manifest ---------------------------------------------------------
    def record(self, type_: str, **fields) -> dict:
        rec = {"type": type_, **fields}
        self._manifest.append((json.dumps(rec, default=json_default) + "\n").encode())
        self._manifest.sync()
        return rec

    def beams(self, table: dict) -> None:
        """Note the beam table in force; audio and power segments rotate when it changes."""
        if table.get("beam_table") == self.beam_table_id:
            return
        changed = self.beam_table_id is not None
        self.beam_table_id = table.get("beam_table")
        self._beam_table = table
        self.record("beams", **table)
        if changed:
            for kind in ("audio", "power"):
                if kind in self._open:
                    self._close(kind)

    def mark(self, text: str, sample: int, utc: float) -> dict:
        return self.record("mark", sample=int(sample), utc=utc, utc_iso=iso(utc), text=text)

    # ---- data ---------------------------------------------------------------
    def write(self, kind: str, first_sample: int, data: np.ndarray, utc_first: float) -> None:
        """Append a block of ``kind`` starting at stream sample ``first_sample``.

        ``data`` is (frames, channels) float for raw and audio; for power it
        is one row (n_bands, n_beams) describing the power block that starts
        at ``first_sample``.
        """
        if kind == "power":
            self._write_power(first_sample, data, utc_first)
            return
        if kind in TABLES:
            self._write_table(kind, first_sample, data, utc_first)
            return
        data = np.asarray(data, np.float32)
        pos = 0
        while pos < len(data):
            seg = self._segment_for(kind, first_sample + pos, data.shape[1], utc_first + pos / self.fs)
            room = self.segment_frames - seg["frames"]
            n = min(room, len(data) - pos)
            seg["writer"].write(data[pos:pos + n])
            seg["frames"] += n
            seg["next"] += n
            self.frames_written[kind] += n
            pos += n
            if seg["frames"] >= self.segment_frames:
                self._close(kind)
        self._maybe_flush()

    def _segment_for(self, kind, first_sample, channels, utc):
        seg = self._open.get(kind)
        gap = 0
        if seg is not None and (seg["next"] != first_sample or seg["channels"] != channels):
            gap = max(0, first_sample - seg["next"])
            self.record("gap", kind=kind, at_sample=int(first_sample), frames_lost=int(gap))
            self._close(kind)
            seg = None
        if seg is None:
            seg = self._new_segment(kind, first_sample, channels, utc, gap)
        return seg

    def _new_segment(self, kind, first_sample, channels, utc, gap):
        self._counter[kind] += 1
        width = 4 if self.sample_format == "float32" else 3
        if kind != "power" and 44 + self.segment_frames * channels * width > MAX_SEGMENT_BYTES:
            raise ValueError(f"segment_s gives {self.segment_frames * channels * width / 2**30:.1f} GiB "
                             f"segments of {channels} channels; keep segments under 2 GiB")
        if kind == "power":
            name = f"power-{self._counter[kind]:06d}.csv"
            seg = {"file": WholeRecordFile(self.folder / name), "frames": 0, "rows": 0}
            t = self._beam_table
            if t.get("power_deg") is not None:  # what the columns are, beside the segment
                powertable.write_sidecars(self.folder / name, t["power_deg"], t.get("bands_hz", []),
                                          t.get("band_delay_samples", [0] * len(t.get("bands_hz", []))))
        else:
            name = f"{kind}-{self._counter[kind]:06d}.wav"
            seg = {"writer": WavWriter(self.folder / name, self.fs, channels, self.sample_format), "frames": 0}
        seg.update(name=name, kind=kind, channels=channels, first=int(first_sample), next=int(first_sample),
                   utc=utc, gap=int(gap))
        seg["record"] = dict(file=name, kind=kind, channels=channels, first_sample=int(first_sample),
                             utc=utc, utc_iso=iso(utc), samplerate_hz=self.fs, beam_table=self.beam_table_id,
                             gap_before_frames=int(gap), sample_format=None if kind == "power" else self.sample_format)
        self.record("segment_open", **seg["record"])
        self._open[kind] = seg
        return seg

    def _write_power(self, first_sample, rows, utc_first):
        rows = np.asarray(rows, np.float32)
        seg = self._segment_for("power", first_sample, rows.size, utc_first)
        if seg["file"].size == 0:
            seg["file"].append((powertable.header(rows.shape[0], rows.shape[1]) + "\n").encode())
        seg["file"].append(powertable.rows_text([first_sample], [utc_first], rows[None]).encode())
        seg["rows"] += 1
        seg["frames"] += self.power_block_frames
        self.frames_written["power"] += self.power_block_frames  # input frames the rows cover
        seg["next"] = int(first_sample) + self.power_block_frames
        if seg["frames"] >= self.segment_frames:
            self._close("power")
        self._maybe_flush()

    def _write_table(self, kind, first_sample, data, utc_first):
        """A power row's detections (a list of maps) or tracks (``(tracks, ended)``), appended to
        the session's ``detections.csv`` or ``tracks.csv`` (opened, with its manifest record, at
        the first row)."""
        table = self._tables.get(kind)
        if table is None:
            name = f"{kind}.csv"
            columns = tracktable.DETECTION_COLUMNS if kind == "detections" else tracktable.TRACK_COLUMNS
            table = {"file": WholeRecordFile(self.folder / name), "name": name, "rows": 0}
            table["file"].append(tracktable.header(columns).encode())
            self.record("table_open", kind=kind, file=name, columns=list(columns), first_sample=int(first_sample),
                        utc=utc_first, utc_iso=iso(utc_first), beam_table=self.beam_table_id)
            self._tables[kind] = table
        if kind == "detections":
            text, n = tracktable.detections_text(data), len(data)
        else:
            tracks, _ = data
            text, n = tracktable.tracks_text(first_sample, utc_first, tracks), len(tracks)
        if text:
            table["file"].append(text.encode())
            table["rows"] += n
        self._maybe_flush()

    # ---- housekeeping -----------------------------------------------------------
    def _maybe_flush(self, force=False):
        now = time.monotonic()
        sync = force or now - self._last_flush >= self.flush_s
        if sync or now - self._last_header >= HEADER_S:
            for seg in self._open.values():
                if "writer" in seg:
                    seg["writer"].flush(sync=sync)
                elif sync:
                    seg["file"].sync()
            if sync:
                for table in self._tables.values():
                    table["file"].sync()
            self._last_header = now
            if sync:
                self._last_flush = now

    def _close(self, kind):
        seg = self._open.pop(kind)
        if "writer" in seg:
            seg["writer"].close()
            frames = seg["frames"]
        else:
            try:
                seg["file"].sync()
            finally:
                seg["file"].close()
            frames = seg["rows"]
        rec = dict(seg["record"], closed_utc=time.time())
        rec["frames" if kind != "power" else "rows"] = int(frames)
        self.record("segment", **rec)
        self.segments_closed += 1

    def close(self, reason: str = "stopped") -> None:
        for kind in list(self._open):
            try:
                self._close(kind)
            except OSError:
                pass
        for kind, table in list(self._tables.items()):
            try:
                table["file"].sync()
                table["file"].close()
                self.record("table", kind=kind, file=table["name"], rows=int(table["rows"]), closed_utc=time.time())
            except OSError:
                pass
        self._tables = {}
        now = time.time()
        try:
            self.record("stop", stopped_utc=now, stopped_iso=iso(now), reason=reason,
                        frames_written=self.frames_written)
        finally:
            self._manifest.close()

    @property
    def open_segments(self) -> int:
        return len(self._open)


def json_default(o):
    """``json.dumps`` fallback for numpy values."""
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    return str(o)


# ---------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------
def read_manifest(folder) -> list[dict]:
    """All manifest records; a line cut off by a crash is ignored."""
    out = []
    with open(Path(folder) / MANIFEST, encoding="utf-8") as f:
        for line in f:
            try:
                out.append(json.loads(line))
            except json.JSONDecodeError:
                break
    return out


def segments(folder, kind: str) -> list[dict]:
    """The segments of one kind in stream order, with ``frames`` filled in.

    A segment still open at a crash gets its frame count from its WAV header.
    """
    folder = Path(folder)
    recs = read_manifest(folder)
    closed = {r["file"]: r for r in recs if r["type"] == "segment" and r["kind"] == kind}
    out = []
    for r in recs:
        if r["type"] != "segment_open" or r["kind"] != kind:
            continue
        seg = dict(closed.get(r["file"], r))
        seg["closed"] = r["file"] in closed
        if kind != "power" and "frames" not in seg:
            try:
                with WavReader(folder / r["file"]) as w:
                    seg["frames"] = w.frames
            except Exception:
                seg["frames"] = 0
        out.append(seg)
    return sorted(out, key=lambda s: s["first_sample"])


def read_kind(folder, kind: str):
    """Yield ``(first_sample, frames float32 (n, channels))`` for every segment of ``kind``."""
    folder = Path(folder)
    for seg in segments(folder, kind):
        with WavReader(folder / seg["file"]) as w:
            data, _ = w.read(seg["frames"])
        yield seg["first_sample"], data
