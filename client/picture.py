"""``beamtap picture``: a bearing-against-time image of band power.

From a power table (the ``power.csv`` that ``beamtap process`` writes, a
recorder's ``power-*.csv`` segment, or a whole session folder; see
:mod:`beamtap.powertable`), or from a live capture of the stream. Bearing runs across, time runs up (newest at the top, as in
``watch``) in UTC when the rows carry it, marks are labelled lines, colour is
band power in dB re full scale (beamtap's palette) with a colour bar; the
title names the array and the band.
Needs the plotting extra (``pip install 'beamtap[plot]'``).
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import numpy as np

from beamtap import palette, powertable
from beamtap.errors import UsageError

from .protocol import valid_track
from .subscriber import Subscriber


def from_csv(power_csv, band: int = 0):
    """(times_s, bearings_deg, power_db (rows, beams), title) from a power table: the ``power.csv`` of
    ``beamtap process``, a recorder segment, or a whole session or output folder
    (:mod:`beamtap.powertable`)."""
    path = Path(power_csv)
    table = powertable.read(path)
    if len(table.first_sample) == 0:
        raise UsageError(f"{path}: the power table has no rows")
    n_bands = table.power_db.shape[1]
    if not 0 <= band < n_bands:
        raise UsageError(f"--band {band}: {path} has {n_bands} band{'s' if n_bands > 1 else ''} "
                         f"(0{f' to {n_bands - 1}' if n_bands > 1 else ''})")
    utc = bool(np.all(np.isfinite(table.time_utc)))
    times = table.time_utc if utc else (table.first_sample - table.first_sample[0]) / _samplerate(path)
    lo, hi = table.bands_hz[band]
    title = f"beamtap power, band {lo:g}-{hi:g} Hz"
    folder = path if path.is_dir() else path.parent
    if (folder / "summary.json").exists():
        s = json.loads((folder / "summary.json").read_text())["summary"]
        title = f"{s['array_kind']} array, {s['active_sensors']} sensors, band {lo:g}-{hi:g} Hz"
    marks = []
    if utc and (folder / "manifest.jsonl").exists():
        from beamtap.session import read_manifest  # noqa: PLC0415

        marks = [(float(r["utc"]), str(r.get("text", ""))) for r in read_manifest(folder) if r.get("type") == "mark"]
    tracks = _tracks_from_csv(folder / "tracks.csv", utc, table.first_sample[0],
                              None if utc else _samplerate(path))
    return times, table.power_deg[:, 0], table.power_db[:, band, :], title, utc, marks, tracks


def _tracks_from_csv(path: Path, utc: bool, first_sample0: int, samplerate_hz: float | None) -> dict:
    """Confirmed track points from a ``tracks.csv`` beside the power table: id -> (times, bearings),
    times on the picture's axis (UTC, or seconds from the first power row). Empty when there is none."""
    import csv  # noqa: PLC0415

    out: dict = {}
    if not path.exists():
        return out
    try:
        with open(path, newline="", encoding="utf-8") as f:
            for row in csv.DictReader(f):
                if row.get("state") != "confirmed":
                    continue
                when = powertable.parse_utc(row["time_utc"]) if utc else (
                    (int(row["first_sample"]) - first_sample0) / samplerate_hz)
                if when is None:
                    continue
                times, bearings = out.setdefault(int(row["track"]), ([], []))
                times.append(float(when))
                bearings.append(float(row["bearing_deg"]))
    except (OSError, ValueError, KeyError) as exc:
        raise UsageError(f"{path}: not a readable track table ({exc})") from None
    return out


def _samplerate(path: Path) -> float:
    """The sample rate behind a power table: from ``summary.json`` (process output) or the session's
    manifest (recorder segments)."""
    folder = path if path.is_dir() else path.parent
    try:
        if (folder / "summary.json").exists():
            return float(json.loads((folder / "summary.json").read_text())["samplerate_hz"])
        if (folder / "manifest.jsonl").exists():
            from beamtap.session import read_manifest  # noqa: PLC0415

            return float(read_manifest(folder)[0]["samplerate_hz"])
    except (OSError, ValueError, KeyError, IndexError) as exc:
        raise UsageError(f"{folder}: cannot tell the sample rate ({exc})") from None
    raise UsageError(f"{path}: no summary.json or manifest.jsonl beside it to tell the sample rate")


def from_live(endpoint: str, seconds: float, band: int = 0):
    """Collect ``seconds`` of power messages (and the beam table) from a running service."""
    rows, times = [], []
    beams = None
    tracks: dict = {}
    with Subscriber(endpoint, topics=["power", "beams", "tracks"], timeout_s=10.0) as sub:
        end = time.monotonic() + seconds
        while time.monotonic() < end or sub.beams is None:
            f = sub.recv()
            if f.topic == "power" and f.data is not None:
                rows.append(np.array(f.data[min(band, f.data.shape[0] - 1)]))
                times.append(f.time_utc)
            elif f.topic == "tracks" and isinstance(f.data, dict) and f.header.get("band") == band:
                for t in f.data.get("tracks", []):
                    if valid_track(t) and t.get("state") == "confirmed":
                        tt, bb = tracks.setdefault(int(t["track"]), ([], []))
                        tt.append(f.time_utc)
                        bb.append(float(t["bearing_deg"]))
            beams = sub.beams
    n = len(beams["power_deg"])
    keep = [i for i, r in enumerate(rows) if len(r) == n]
    data = np.array([rows[i] for i in keep])
    t = np.array([times[i] for i in keep])
    b = beams["bands_hz"][min(band, len(beams["bands_hz"]) - 1)]
    title = f"{beams.get('array_kind', '')} array (live {endpoint}), band {b[0]:g}-{b[1]:g} Hz"
    return t, np.array(beams["power_deg"])[:, 0], data, title, True, [], tracks


#: Picture formats by suffix, and the metadata key that carries the axes' layout in each.
_FORMATS = {".png": "Description", ".svg": "Description", ".pdf": "Subject"}


def render(times, bearings_deg, power_db, title: str, out, range_db: float = 30.0, utc: bool = False,
           marks=(), tracks=None) -> dict:
    """Write the picture (PNG, SVG or PDF by the suffix); returns the plot area in pixels and the
    axes' data limits.

    Newest at the top, as in ``watch``; the time axis in UTC when ``utc``
    (``times`` are POSIX seconds), else in seconds from the first row.
    ``marks`` (UTC, text) are drawn as labelled lines; ``tracks`` (id ->
    (times, bearings) of a confirmed track) as thin lines labelled with
    their ids at their newest point. Colours are
    beamtap's palette (:mod:`beamtap.palette`). The returned dict is stored
    in the picture's metadata so a program reading it back can map pixels
    to bearing and time.
    """
    suffix = Path(str(out)).suffix.lower()
    if suffix not in _FORMATS:
        raise UsageError(f"--out {out}: pictures are written as {', '.join(_FORMATS)} (chosen by the suffix)")
    try:
        import matplotlib  # noqa: PLC0415

        matplotlib.use("Agg")
        import matplotlib.dates as mdates  # noqa: PLC0415
        import matplotlib.pyplot as plt  # noqa: PLC0415
    except ImportError:
        raise UsageError("pictures need the plotting extra: pip install 'beamtap[plot]'") from None
    if len(power_db) == 0:
        raise UsageError("no power rows to draw")
    if not (np.isfinite(range_db) and range_db > 0):
        raise UsageError(f"--range-db {range_db!r}: expected a positive number of dB")
    times = np.asarray(times, float)
    top = float(np.nanmax(power_db))
    fig, ax = plt.subplots(figsize=(9, 6), dpi=100)
    order = np.argsort(bearings_deg)
    b = np.asarray(bearings_deg)[order]
    t0, t1 = float(times[0]), float(times[-1])
    to_axis = (lambda t: mdates.date2num(np.datetime64(int(round(t * 1e6)), "us"))) if utc else (lambda t: t - t0)
    img = ax.imshow(np.asarray(power_db)[:, order], aspect="auto", origin="lower", cmap=palette.colormap(),
                    vmin=top - range_db, vmax=top, interpolation="nearest",
                    extent=[b[0], b[-1], to_axis(t0), to_axis(t1) if t1 > t0 else to_axis(t0) + 1e-6])
    if utc:
        if t1 - t0 < 60:  # short spans: tenths of a second, or neighbouring ticks would read alike
            from matplotlib.ticker import FuncFormatter  # noqa: PLC0415

            ax.yaxis.set_major_formatter(FuncFormatter(
                lambda v, pos: mdates.num2date(v).strftime("%H:%M:%S.%f")[:-5]))
        else:
            ax.yaxis.set_major_formatter(mdates.DateFormatter("%H:%M:%S"))
        ax.set_ylabel(f"time (UTC), {time.strftime('%Y-%m-%d', time.gmtime(t0))}; newest at top")
    else:
        ax.set_ylabel("time from the first row (s); newest at top")
    for when, text in marks:
        if t0 <= when <= t1:
            y = to_axis(when)
            ax.axhline(y, color="white", linewidth=1.0, linestyle="--")
            ax.text(b[0], y, f" {text}", color="white", fontsize=8, va="bottom", ha="left",
                    bbox={"facecolor": "black", "alpha": 0.5, "linewidth": 0})
    for tid, (tt, bb) in sorted((tracks or {}).items()):
        tt, bb = np.asarray(tt, float), np.asarray(bb, float)
        keep = (tt >= t0) & (tt <= t1)
        if not keep.any():
            continue
        ys = [to_axis(v) for v in tt[keep]]
        ax.plot(bb[keep], ys, color="white", linewidth=0.8, alpha=0.9)
        ax.text(bb[keep][-1], ys[-1], f" {tid}", color="white", fontsize=9, fontweight="bold", va="top",
                bbox={"facecolor": "black", "alpha": 0.5, "linewidth": 0, "pad": 1})
    ax.set_xlabel("bearing (deg)")
    ax.set_title(title, fontsize=10)
    fig.colorbar(img, ax=ax, label="band power (dB re full scale)")
    fig.tight_layout()
    fig.canvas.draw()
    bbox = ax.get_window_extent()
    height = fig.canvas.get_width_height()[1]
    info = {"axes_px": [bbox.x0, height - bbox.y1, bbox.x1, height - bbox.y0],
            "bearing_deg": [float(b[0]), float(b[-1])], "time": [t1, t0], "time_axis": "utc" if utc else "seconds",
            "newest": "top"}
    try:
        fig.savefig(out, metadata={_FORMATS[suffix]: json.dumps(info)})
    except OSError as exc:
        raise UsageError(f"--out {out}: cannot write: {exc.strerror}") from None
    finally:
        plt.close(fig)
    return info
