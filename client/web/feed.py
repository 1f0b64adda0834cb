"""What one browser is still to be sent: an ordered, bounded queue that never grows without limit.

A page that cannot keep up (a tablet on a weak link) is given fewer power
rows, not older ones: once :attr:`Feed.max_rows` rows wait, each new row is
averaged (in power, not in dB) into the newest waiting row, and the page is
told how many rows were merged. Audio blocks beyond ``max_audio_frames``
are dropped oldest first and counted; of ``status`` and ``beams`` only the
latest waiting one is kept. Nothing here blocks: it runs on the web
server's event loop.

Binary frames (little-endian) are our own small layout, read by
``static/app.js``::

    offset 0   uint8   kind (1 power row, 2 audio block)
    offset 1   uint8   rows merged into this one (power; 0 otherwise), capped at 255
    offset 2   uint16  0
    offset 4   uint32  a: bands (power) or frames (audio)
    offset 8   uint32  b: beams (power) or 1 (audio: the listening beam only)
    offset 12  uint32  beam table id
    offset 16  float64 time_utc of the first input sample (NaN when unknown)
    offset 24  float32[a*b] the values, row-major (power in dB re full scale; audio in full scale)
"""

from __future__ import annotations

import json
import math
import struct
from collections import deque

import numpy as np

POWER, AUDIO = 1, 2
HEADER = struct.Struct("<BBHIIId")


def encode(kind: int, values: np.ndarray, beam_table: int, time_utc, merged: int = 0) -> bytes:
    """One binary frame (see the module's layout)."""
    v = np.ascontiguousarray(values, dtype="<f4")
    a, b = (v.shape[0], v.shape[1]) if v.ndim == 2 else (v.shape[0], 1)
    t = float(time_utc) if isinstance(time_utc, (int, float)) and math.isfinite(time_utc) else math.nan
    return HEADER.pack(kind, min(int(merged), 255), 0, a, b, int(beam_table) & 0xFFFFFFFF, t) + v.tobytes()


def decode(frame: bytes) -> tuple[int, int, int, float, np.ndarray]:
    """(kind, merged, beam_table, time_utc, values) of a binary frame (for tests and other clients)."""
    kind, merged, _, a, b, table, t = HEADER.unpack_from(frame)
    values = np.frombuffer(frame, "<f4", offset=HEADER.size)
    if values.size != a * b:
        raise ValueError(f"binary frame: {values.size} values, the header says {a}x{b}")
    return kind, merged, table, t, values.reshape(a, b)


def json_text(obj) -> str:
    """JSON a browser can parse: NaN and infinities become null (JSON has no such numbers)."""
    return json.dumps(_finite(obj), separators=(",", ":"))


def _finite(o):
    if isinstance(o, float):
        return o if math.isfinite(o) else None
    if isinstance(o, dict):
        return {str(k): _finite(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_finite(v) for v in o]
    if isinstance(o, (np.floating, np.integer)):
        return _finite(o.item())
    if isinstance(o, np.ndarray):
        return _finite(o.tolist())
    if isinstance(o, (bytes, bytearray)):
        return None
    return o


class _Row:
    __slots__ = ("db", "linear", "count", "table", "utc", "frame")

    def __init__(self, db: np.ndarray, table: int, utc, frame: bytes | None = None):
        self.db, self.linear, self.count, self.table, self.utc = db, None, 1, table, utc
        self.frame = frame  # the row already encoded (shared by every page), until merged

    def absorb(self, db: np.ndarray) -> bool:
        """Average ``db`` into this row (in power); False when the shapes differ."""
        if db.shape != self.db.shape:
            return False
        if self.linear is None:
            self.linear = 10.0 ** (self.db.astype(np.float64) / 10.0)
        self.linear += 10.0 ** (db.astype(np.float64) / 10.0)
        self.count += 1
        self.frame = None
        with np.errstate(divide="ignore"):
            self.db = (10.0 * np.log10(self.linear / self.count)).astype(np.float32)
        return True


class Feed:
    """The queue of one connected page.

    Parameters
    ----------
    max_rows : int
        Power rows that may wait before new ones are merged into the newest.
    max_audio_frames : int
        Audio frames that may wait before the oldest blocks are dropped.
    """

    def __init__(self, max_rows: int = 8, max_audio_frames: int = 48000):
        self.max_rows, self.max_audio_frames = int(max_rows), int(max_audio_frames)
        self._items: deque = deque()  # ("json", kind, obj) | ("power", _Row) | ("audio", array, table, utc)
        self._rows = 0
        self._audio_frames = 0
        self.rows_merged = 0
        self.audio_dropped = 0
        self.wanted = None  # set by the server: wakes its sender
        self.listening = False  # the page wants the listening beam's audio

    def __len__(self) -> int:
        return len(self._items)

    def _wake(self):
        if self.wanted is not None:
            self.wanted()

    def put_json(self, kind: str, obj: dict, latest_only: bool = False, text: str | None = None) -> None:
        """A JSON message ``{"type": kind, **obj}``; ``text`` is it already encoded (shared by every
        page); ``latest_only`` replaces one of the same kind still waiting."""
        if latest_only:
            for i, item in enumerate(self._items):
                if item[0] == "json" and item[1] == kind:
                    del self._items[i]
                    break
        self._items.append(("json", kind, obj, text))
        self._wake()

    def put_power(self, db: np.ndarray, table: int, utc, frame: bytes | None = None) -> None:
        """A power row (bands, beams) in dB; ``frame`` is it already encoded (shared by every page)."""
        if self._rows >= self.max_rows:
            for item in reversed(self._items):
                if item[0] == "power":
                    if item[1].table == table and item[1].absorb(db):
                        self.rows_merged += 1
                        return
                    break
        self._items.append(("power", _Row(np.asarray(db, np.float32), table, utc, frame)))
        self._rows += 1
        self._wake()

    def put_audio(self, samples: np.ndarray, table: int, utc) -> None:
        self._items.append(("audio", np.asarray(samples, np.float32), table, utc))
        self._audio_frames += len(samples)
        while self._audio_frames > self.max_audio_frames:
            for i, item in enumerate(self._items):
                if item[0] == "audio":
                    del self._items[i]
                    self._audio_frames -= len(item[1])
                    self.audio_dropped += 1
                    break
        self._wake()

    def take(self):
        """The next thing to send: ``str`` (a JSON text frame) or ``bytes`` (binary), or None."""
        if not self._items:
            return None
        item = self._items.popleft()
        if item[0] == "json":
            return item[3] if item[3] is not None else json_text({"type": item[1], **item[2]})
        if item[0] == "power":
            self._rows -= 1
            row = item[1]
            return row.frame if row.frame is not None else encode(POWER, row.db, row.table, row.utc, row.count - 1)
        self._audio_frames -= len(item[1])
        return encode(AUDIO, item[1], item[2], item[3])
