"""Multichannel WAV files, read and written block by block, of any length.

Reads PCM 16/24/32-bit integer and 32-bit IEEE float (plain or
WAVE_FORMAT_EXTENSIBLE), as RIFF WAVE or RF64; writes 32-bit float or
24-bit integer. The writer keeps the sizes in the header true after every
flush, so a file cut off by a crash or power loss is still a valid WAV of
everything flushed before (any WAV reader, scipy.io.wavfile included, reads
it). Its header reserves room for an RF64 ``ds64`` chunk (a ``JUNK`` chunk
of that size): when the file outgrows the 32-bit sizes of RIFF (4 GiB) the
header becomes RF64 in place, with the 64-bit sizes in ``ds64``.

References
----------
Microsoft/IBM, "Multimedia Programming Interface and Data Specifications
1.0" (1991), RIFF WAVE format; Microsoft, "WAVEFORMATEXTENSIBLE" (2017);
EBU Tech 3306, "MBWF / RF64: An extended File Format for Audio" (2009):
the ``ds64`` chunk, and the ``JUNK`` chunk reserved for it.
"""

from __future__ import annotations

import errno
import mmap
import os
import struct
import sys

import numpy as np

from beamtap.errors import UsageError

PCM, IEEE_FLOAT, EXTENSIBLE = 1, 3, 0xFFFE
#: Largest RIFF size field; past it the writer switches to RF64 (EBU Tech 3306).
RIFF_LIMIT = 0xFFFFFFFF
#: The ds64 chunk body: RIFF size, data size, sample count (64-bit each), table length (32-bit).
DS64_BYTES = 28


class WavError(UsageError):
    """A WAV file that cannot be read: the message says which and why."""


class WavReader:
    """Read a WAV file in blocks of float32 (frames, channels).

    Parameters
    ----------
    path : str or path-like
    mapped : bool
        Float files: hand out read-only views of the file's pages (memory
        mapped) instead of copies; the views stay valid after :meth:`close`.
        A file that shrinks while it is read raises :class:`WavError` at the
        next read (checked before the pages are touched).

    Attributes
    ----------
    samplerate_hz : int
    channels : int
    frames : int
        Frames in the data chunk that are in the file.
    truncated : bool
        The header promises more frames (``frames_promised``) than the file holds.
    sample_format : str
        ``"int16"``, ``"int24"``, ``"int32"`` or ``"float32"``.

    Notes
    -----
    Integer samples map to ±1 full scale; :meth:`read` also counts integer
    samples at the most negative or most positive code (clipped).
    """

    def __init__(self, path, mapped: bool = False):
        self.path = str(path)
        self._mapped = bool(mapped) and sys.byteorder == "little"
        self._map = None
        try:
            self._f = open(self.path, "rb")
        except OSError as exc:
            raise WavError(f"{self.path}: cannot open: {exc.strerror}") from None
        try:
            self._parse()
        except Exception:
            self._f.close()
            raise

    def _fail(self, what):
        raise WavError(f"{self.path}: not a readable WAV file: {what}")

    def _parse(self):
        head = self._f.read(12)
        if len(head) < 12 or head[:4] not in (b"RIFF", b"RF64") or head[8:12] != b"WAVE":
            self._fail("no RIFF/WAVE or RF64 header")
        rf64 = head[:4] == b"RF64"
        data_size64 = None
        fmt = None
        size_on_disk = os.fstat(self._f.fileno()).st_size
        while True:
            ch = self._f.read(8)
            if len(ch) < 8:
                self._fail("no data chunk")
            cid, size = ch[:4], struct.unpack("<I", ch[4:])[0]
            if cid == b"ds64":
                body = self._f.read(size + (size & 1))
                if len(body) < 24:
                    self._fail("ds64 chunk too short")
                data_size64 = struct.unpack("<Q", body[8:16])[0]
            elif cid == b"fmt ":
                body = self._f.read(size + (size & 1))
                if len(body) < 16:
                    self._fail("fmt chunk too short")
                tag, nch, rate, _, align, bits = struct.unpack("<HHIIHH", body[:16])
                if tag == EXTENSIBLE and len(body) >= 40:
                    tag = struct.unpack("<H", body[24:26])[0]
                fmt = (tag, nch, rate, align, bits)
            elif cid == b"data":
                if fmt is None:
                    self._fail("data chunk before fmt chunk")
                self._data_start = self._f.tell()
                available = size_on_disk - self._data_start
                if rf64 and size == RIFF_LIMIT:
                    if data_size64 is None:
                        self._fail("RF64 without a ds64 chunk")
                    size = data_size64
                # A header not updated before a crash (size 0) reads what is there; a file shorter
                # than its header says is read to its end, and says so (truncated, frames_promised).
                data_size = size if 0 < size <= available else available
                self.truncated = size > available
                self._promised_bytes = size
                break
            else:
                self._f.seek(size + (size & 1), 1)
        tag, nch, rate, align, bits = fmt
        kinds = {(PCM, 16): "int16", (PCM, 24): "int24", (PCM, 32): "int32", (IEEE_FLOAT, 32): "float32"}
        if (tag, bits) not in kinds:
            self._fail(f"format tag {tag} with {bits} bits (expected 16/24/32-bit PCM or 32-bit float)")
        if nch < 1 or align != nch * bits // 8:
            self._fail(f"{nch} channels with block align {align}")
        self.sample_format = kinds[(tag, bits)]
        self.channels, self.samplerate_hz, self._width = nch, rate, bits // 8
        self.frames = data_size // align
        self.frames_promised = self._promised_bytes // align if self.truncated else self.frames
        self._next = 0

    def read(self, frames: int):
        """Up to ``frames`` frames: ``(block float32 (n, channels), clipped_count)``.

        Float files are read straight into the returned array (no copy on
        the way); integer files into one integer array, converted once.
        ``clipped_count`` counts integer codes at either end of the range
        (0 for float files: the engine counts those).
        """
        n = max(0, min(frames, self.frames - self._next))
        if self.sample_format == "float32" and self._mapped and self._data_start % 4 == 0:
            return self._view(n), 0
        if self.sample_format == "float32":
            x = np.empty((n, self.channels), "<f4")
            n = self._read_into(x)
            return x[:n].astype(np.float32, copy=False), 0
        if self.sample_format == "int24":
            b = np.empty((n * self.channels, 4), np.uint8)
            raw = np.empty((n, self.channels * 3), np.uint8)
            n = self._read_into(raw)
            # The three bytes as the top of a little-endian int32: an arithmetic shift extends the sign.
            b[:, 0] = 0
            b[:, 1:] = raw.reshape(-1, 3)
            v = (b[: n * self.channels].view("<i4").ravel() >> 8)
            full = float(1 << 23)
        else:
            v = np.empty((n, self.channels), "<i2" if self._width == 2 else "<i4")
            n = self._read_into(v)
            v = v[:n].ravel()
            full = float(1 << (8 * self._width - 1))
        clipped = int(np.count_nonzero(v >= full - 1)) + int(np.count_nonzero(v <= -full))
        x = v.astype(np.float32)
        x *= np.float32(1.0 / full)  # exact: a power of two
        return x.reshape(n, self.channels), clipped

    def _view(self, n: int) -> np.ndarray:
        """The next ``n`` frames as a read-only view of the file's pages (``mapped=True``): no copy."""
        start = self._data_start + self._next * self.channels * self._width
        end = start + n * self.channels * self._width
        if n and os.fstat(self._f.fileno()).st_size < end:
            # Touching a mapped page past a file's end is a bus error, not an exception: check first.
            raise WavError(f"{self.path}: the file shrank while being read (now "
                           f"{os.fstat(self._f.fileno()).st_size} bytes, frame {self._next} ends at byte {end})")
        if self._map is None and n:
            self._map = mmap.mmap(self._f.fileno(), 0, access=mmap.ACCESS_READ)
            if hasattr(self._map, "madvise") and hasattr(mmap, "MADV_SEQUENTIAL"):
                self._map.madvise(mmap.MADV_SEQUENTIAL)
        self._next += n
        if not n:
            return np.zeros((0, self.channels), np.float32)
        return np.frombuffer(self._map, np.float32, n * self.channels, start).reshape(n, self.channels)

    def _read_into(self, out: np.ndarray) -> int:
        """Fill ``out`` (frames, ...) from the file; returns the whole frames read (fewer at the end)."""
        got = self._f.readinto(memoryview(out).cast("B")) if out.size else 0
        n = (got or 0) // (self.channels * self._width)
        if n * self.channels * self._width != (got or 0):  # a partial frame at a cut-off end is not used
            self._f.seek(n * self.channels * self._width - (got or 0), 1)
        self._next += n
        return n

    def seek(self, frame: int) -> None:
        """Continue reading at ``frame`` (0 .. frames)."""
        frame = min(max(int(frame), 0), self.frames)
        self._f.seek(self._data_start + frame * self.channels * self._width)
        self._next = frame

    def close(self):
        if self._map is not None:
            try:
                self._map.close()
            except BufferError:  # blocks handed out still look at it: it closes when they are gone
                pass
            self._map = None
        self._f.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class WavWriter:
    """Write float32 (or 24-bit integer) WAV, header kept valid as it grows.

    Parameters
    ----------
    path : str or path-like
    samplerate_hz : int
    channels : int
    sample_format : {"float32", "int24"}
    rf64_at_bytes : int, optional
        RIFF size at which the header becomes RF64 (default: the 4 GiB limit;
        smaller only to test the switch on a small file).
    """

    def __init__(self, path, samplerate_hz: int, channels: int, sample_format: str = "float32",
                 rf64_at_bytes: int | None = None):
        if sample_format not in ("float32", "int24"):
            raise ValueError(f"sample_format={sample_format!r}: expected 'float32' or 'int24'")
        self.path, self.channels, self.sample_format = str(path), int(channels), sample_format
        self.samplerate_hz = int(round(samplerate_hz))
        self._width = 4 if sample_format == "float32" else 3
        self.frames = 0
        try:
            # Unbuffered: every write reaches the kernel whole or is cut back (see write), so a
            # killed process leaves nothing in a user-space buffer and a full disk no stray bytes.
            self._f = open(self.path, "wb", buffering=0)
        except OSError as exc:
            raise UsageError(f"{self.path}: cannot write: {exc.strerror}") from None
        tag = IEEE_FLOAT if sample_format == "float32" else PCM
        align = self.channels * self._width
        # fmt chunk of 18 bytes (cbSize = 0) for float, 16 for PCM; a fact chunk is not needed by readers.
        self._data_start = 12 + 8 + DS64_BYTES + 8 + 16 + 8
        self._rf64_at = RIFF_LIMIT if rf64_at_bytes is None else int(rf64_at_bytes)
        self._write_whole(b"RIFF" + struct.pack("<I", 0) + b"WAVE"
                          + b"JUNK" + struct.pack("<I", DS64_BYTES) + bytes(DS64_BYTES)
                          + b"fmt " + struct.pack("<IHHIIHH", 16, tag, self.channels, self.samplerate_hz,
                                                  self.samplerate_hz * align, align, 8 * self._width)
                          + b"data" + struct.pack("<I", 0), 0)
        self._update_header()

    @property
    def bytes_written(self) -> int:
        return self._data_start + self.frames * self.channels * self._width

    def write(self, block: np.ndarray) -> None:
        """Append frames, shape (n, channels), float in ±1."""
        block = np.asarray(block, dtype=np.float32).reshape(-1, self.channels)
        if self.sample_format == "float32":
            data = memoryview(np.ascontiguousarray(block, "<f4").reshape(-1).view(np.uint8))  # no copy
        else:
            v = np.clip(np.round(block.astype(np.float64) * (1 << 23)), -(1 << 23), (1 << 23) - 1).astype("<i4")
            data = v.view(np.uint8).reshape(-1, 4)[:, :3].tobytes()
        self._write_whole(data, self.bytes_written)
        self.frames += len(block)

    def _write_whole(self, data, good_size: int) -> None:
        """Append ``data`` entirely, or cut the file back to ``good_size`` bytes (the header and the
        whole frames before it, kept consistent) and re-raise: a full disk leaves a valid file."""
        view = memoryview(data)
        try:
            while len(view):
                n = self._f.write(view)
                if not n:
                    raise OSError(errno.ENOSPC, "no space left on device")
                view = view[n:]
        except OSError:
            try:
                os.ftruncate(self._f.fileno(), good_size)
                self._f.seek(good_size)
                if good_size >= self._data_start:
                    self._update_header()
            except OSError:
                pass  # nothing more can be done; the caller reports the first error
            raise

    def skip(self, frames: int) -> None:
        """Append ``frames`` frames of silence without writing them: the file grows sparse where the
        file system allows (a gap in a long recording costs no disk)."""
        if frames <= 0:
            return
        end = self.bytes_written + int(frames) * self.channels * self._width
        try:
            os.ftruncate(self._f.fileno(), end)  # new bytes read as zeros: silence in both formats
            self._f.seek(end)
        except OSError:
            self._write_whole(b"", self.bytes_written)
            raise
        self.frames += int(frames)

    def _update_header(self):
        # Overwrites bytes that exist already: needs no new space, so it works on a full disk too.
        fd = self._f.fileno()
        data_bytes = self.frames * self.channels * self._width
        riff = self._data_start - 8 + data_bytes
        if riff < self._rf64_at:
            os.pwrite(fd, b"RIFF" + struct.pack("<I", riff), 0)
            os.pwrite(fd, struct.pack("<I", data_bytes), self._data_start - 4)
            return
        # RF64 (EBU Tech 3306): the reserved JUNK chunk becomes ds64 with the 64-bit sizes; the
        # 32-bit size fields say 0xFFFFFFFF ("see ds64").
        os.pwrite(fd, b"ds64" + struct.pack("<IQQQI", DS64_BYTES, riff, data_bytes, self.frames, 0), 12)
        os.pwrite(fd, struct.pack("<I", RIFF_LIMIT), self._data_start - 4)
        os.pwrite(fd, b"RF64" + struct.pack("<I", RIFF_LIMIT), 0)

    def flush(self, sync: bool = False) -> None:
        """Make the header match the data written so far and push to the OS (and disk if ``sync``)."""
        self._update_header()
        if sync:
            os.fsync(self._f.fileno())

    def close(self, sync: bool = True) -> None:
        """Final header, then close; ``sync`` (default) waits until the disk has it (a recording's
        segment); a file that can be made again (an offline product) may skip the wait."""
        if not self._f.closed:
            try:
                self.flush(sync=sync)
            finally:
                self._f.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class WavPatcher:
    """Write frames into an existing float32 WAV in place (the file keeps its length and header).

    How parallel writers fill one output: the file is made first at its final
    length (a :class:`WavWriter` that :meth:`~WavWriter.skip`\\ s the whole
    length: sparse silence), then each writer puts its own frames at their
    place. Writing past the end is refused, so a wrong offset cannot grow
    the file or corrupt its header.

    Parameters
    ----------
    path : path
    channels : int
        Channels the caller writes (must be the file's).
    """

    def __init__(self, path, channels: int):
        with WavReader(path) as r:
            if r.sample_format != "float32" or r.channels != channels:
                raise WavError(f"{path}: {r.channels} channels of {r.sample_format}, expected {channels} of float32")
            self.frames, self._start, self.channels = r.frames, r._data_start, r.channels
        self.path = str(path)
        self._f = open(self.path, "r+b")

    def write(self, frame: int, block: np.ndarray) -> None:
        """Frames ``block`` (n, channels) from frame ``frame`` on."""
        block = np.ascontiguousarray(block, "<f4")
        if block.ndim != 2 or block.shape[1] != self.channels:
            raise ValueError(f"block of shape {block.shape}: expected (frames, {self.channels})")
        if frame < 0 or frame + len(block) > self.frames:
            raise WavError(f"{self.path}: frames {frame} to {frame + len(block)} are outside its {self.frames}")
        os.pwrite(self._f.fileno(), block.tobytes(), self._start + 4 * self.channels * frame)

    def close(self) -> None:
        self._f.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
