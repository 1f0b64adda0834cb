"""The one power CSV format: written by ``process`` and the recorder, read by ``picture``.

A power table is a CSV file with a header row::

    first_sample,time_utc,b0_0,b0_1,...,b0_180,b1_0,...

one row per power block. ``first_sample`` is the stream index of the first
input sample of the span the row describes (the bulk delay and the band
filter delays already removed; every band of a row describes that same
span, see :class:`beamtap.service.engine.beamformer.BlockResult`);
``time_utc`` its ISO 8601 UTC time with microseconds, or empty when the
input's start time is unknown; ``b{band}_{beam}`` the band power in dB re
full scale of beam ``beam`` in band ``band``. Beside it, two small sidecar
files say what the columns are: ``beams.csv`` (``beam,azimuth_deg,
elevation_deg``) and ``bands.csv`` (``band,low_hz,high_hz,
filter_delay_samples``). In a session folder, segment ``power-000007.csv``
has ``beams-000007.csv`` and ``bands-000007.csv`` (the beam table can
change between segments). Plain CSV, no comment lines: any CSV reader
takes it.

Needs only numpy and the standard library (the compiled kernels, when
installed, format the rows faster).
"""

from __future__ import annotations

import csv
import datetime as dt
import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from beamtap.errors import UsageError
from beamtap.outputs import remove_files

try:  # the compiled text formatter; Python's % formatting without it (the same text)
    from beamtap.service.engine import _kernels
except ImportError:  # pragma: no cover - installs without a C compiler
    _kernels = None

_COLUMN = re.compile(r"^b(\d+)_(\d+)$")


def iso_utc(utc: float | None) -> str:
    """ISO 8601 UTC with microseconds, or "" for an unknown time."""
    if utc is None or not math.isfinite(utc):
        return ""
    return dt.datetime.fromtimestamp(utc, dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def parse_utc(text: str) -> float | None:
    if not text:
        return None
    return dt.datetime.strptime(text, "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=dt.timezone.utc).timestamp()


def header(n_bands: int, n_beams: int) -> str:
    return ",".join(["first_sample", "time_utc"] + [f"b{b}_{i}" for b in range(n_bands) for i in range(n_beams)])


def values_text(power) -> list:
    """Each row of ``power`` (K, M) float32 as comma-separated ``"%.3f"`` text, one str per row.

    The compiled formatter (``_kernels.fixed3``) gives the same characters
    as Python's ``%`` at about a tenth of its cost; without the kernels,
    Python formats them.
    """
    power = np.ascontiguousarray(power, np.float32)
    if _kernels is not None:
        return _kernels.fixed3(power, power.shape[0], power.shape[1])
    # One format string per row: four to five times faster than formatting value by value
    # (numpy.char.mod), measured 2026-12-05 on 181 beams.
    fmt = ",".join(["%.3f"] * power.shape[1])
    return [fmt % tuple(v) for v in power.tolist()]


def rows_text(first_samples, times_utc, power_db) -> str:
    """CSV text of rows: ``first_samples`` (K,), ``times_utc`` (K,) POSIX seconds or None each,
    ``power_db`` (K, bands, beams)."""
    power = np.asarray(power_db, np.float32).reshape(len(first_samples), -1)
    return "".join(f"{int(n)},{iso_utc(t)},{v}\n" for n, t, v in zip(first_samples, times_utc, values_text(power)))


def sidecar_names(power_csv: Path) -> tuple[Path, Path]:
    """The ``beams`` and ``bands`` files that describe ``power_csv``'s columns."""
    m = re.match(r"^power-(\d+)\.csv$", power_csv.name)
    if m:
        return power_csv.with_name(f"beams-{m.group(1)}.csv"), power_csv.with_name(f"bands-{m.group(1)}.csv")
    return power_csv.with_name("beams.csv"), power_csv.with_name("bands.csv")


def sidecars_text(power_deg, bands_hz, band_delays) -> tuple[str, str]:
    beams = "beam,azimuth_deg,elevation_deg\n" + "".join(
        f"{i},{az:g},{el:g}\n" for i, (az, el) in enumerate(np.asarray(power_deg).reshape(-1, 2)))
    bands = "band,low_hz,high_hz,filter_delay_samples\n" + "".join(
        f"{i},{lo:g},{hi:g},{int(d)}\n" for i, ((lo, hi), d) in enumerate(zip(bands_hz, band_delays)))
    return beams, bands


def write_sidecars(power_csv: Path, power_deg, bands_hz, band_delays) -> None:
    beams_path, bands_path = sidecar_names(Path(power_csv))
    beams, bands = sidecars_text(power_deg, bands_hz, band_delays)
    remove_files(beams_path.parent, [beams_path.name, bands_path.name])  # new files, not truncated ones
    beams_path.write_text(beams)
    bands_path.write_text(bands)


@dataclass
class PowerTable:
    """A power table read back.

    Attributes
    ----------
    first_sample : ndarray of int64, shape (rows,)
    time_utc : ndarray of float64, shape (rows,)
        POSIX seconds; NaN where unknown.
    power_db : ndarray of float32, shape (rows, bands, beams)
    power_deg : ndarray, shape (beams, 2)
        (azimuth_deg, elevation_deg) of each beam.
    bands_hz : list of (low, high)
    """

    first_sample: np.ndarray
    time_utc: np.ndarray
    power_db: np.ndarray
    power_deg: np.ndarray
    bands_hz: list


def read(path) -> PowerTable:
    """Read a power CSV with its sidecars; a session folder or a process output folder reads all of
    its power rows (segments in stream order; segments under another beam table are skipped unless
    their beams match the first)."""
    path = Path(path)
    if path.is_dir():
        if (path / "power.csv").exists():
            return read(path / "power.csv")
        files = sorted(path.glob("power-*.csv"))
        if not files:
            raise UsageError(f"{path}: no power.csv and no power segments (power-*.csv) in this folder")
        tables = [read(f) for f in files]
        tables = [t for t in tables if t.power_db.shape[1:] == tables[0].power_db.shape[1:]
                  and np.array_equal(t.power_deg, tables[0].power_deg)]
        order = np.argsort([t.first_sample[0] if len(t.first_sample) else 0 for t in tables], kind="stable")
        tables = [tables[i] for i in order]
        return PowerTable(np.concatenate([t.first_sample for t in tables]), np.concatenate([t.time_utc for t in tables]),
                          np.concatenate([t.power_db for t in tables]), tables[0].power_deg, tables[0].bands_hz)
    beams_path, bands_path = sidecar_names(path)
    try:
        with open(path, newline="", encoding="utf-8") as f:
            rows = list(csv.reader(f))
        beams = list(csv.reader(open(beams_path, newline="", encoding="utf-8")))[1:]
        bands = list(csv.reader(open(bands_path, newline="", encoding="utf-8")))[1:]
    except FileNotFoundError as exc:
        raise UsageError(f"{path}: cannot read {exc.filename} (a power table needs its beams and bands "
                         "files beside it)") from None
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise UsageError(f"{path}: not a readable CSV file ({exc})") from None
    if not rows or rows[0][:2] != ["first_sample", "time_utc"]:
        raise UsageError(f"{path}: not a beamtap power table (expected columns first_sample, time_utc, b0_0, ...)")
    cols = [_COLUMN.match(c) for c in rows[0][2:]]
    if not cols or any(c is None for c in cols):
        raise UsageError(f"{path}: power columns must be named b<band>_<beam>, e.g. b0_17")
    n_bands = max(int(c.group(1)) for c in cols) + 1
    n_beams = max(int(c.group(2)) for c in cols) + 1
    if n_bands * n_beams != len(cols) or len(beams) != n_beams or len(bands) != n_bands:
        raise UsageError(f"{path}: {len(cols)} power columns do not match {len(beams)} beams x {len(bands)} bands "
                         "in its sidecar files")
    body = [r for r in rows[1:] if r]
    try:
        first = np.array([int(r[0]) for r in body], np.int64)
        utc = np.array([parse_utc(r[1]) if r[1] else np.nan for r in body], np.float64)
        power = np.array([[float(v) for v in r[2:]] for r in body], np.float32).reshape(-1, n_bands, n_beams)
        power_deg = np.array([[float(b[1]), float(b[2])] for b in beams])
        bands_hz = [(float(b[1]), float(b[2])) for b in bands]
    except (ValueError, IndexError) as exc:
        raise UsageError(f"{path}: a row that is not numbers ({exc})") from None
    return PowerTable(first, utc, power, power_deg, bands_hz)
