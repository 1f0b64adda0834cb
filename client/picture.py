"""``beamtap picture``: a bearing-against-time image of band power.

From a power table (the ``power.csv`` that ``beamtap process`` writes, a
recorder's ``power-*.csv`` segment, or a whole session folder; see
:mod:`beamtap.powertable`), or from a live capture of the stream. Bearing runs across, time runs down, colour is band power in dB re
full scale with a colour bar; the title names the array and the band.
Needs the plotting extra (``pip install 'beamtap[plot]'``).
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import numpy as np

from beamtap import powertable
from beamtap.errors import UsageError

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
    fs = _samplerate(path)
    times = (table.first_sample - table.first_sample[0]) / fs
    lo, hi = table.bands_hz[band]
    title = f"beamtap power, band {lo:g}-{hi:g} Hz"
    summary = (path if path.is_dir() else path.parent) / "summary.json"
    if summary.exists():
        s = json.loads(summary.read_text())["summary"]
        title = f"{s['array_kind']} array, {s['active_sensors']} sensors, band {lo:g}-{hi:g} Hz"
    return times, table.power_deg[:, 0], table.power_db[:, band, :], title


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
    with Subscriber(endpoint, topics=["power", "beams"], timeout_s=10.0) as sub:
        end = time.monotonic() + seconds
        while time.monotonic() < end or sub.beams is None:
            f = sub.recv()
            if f.topic == "power" and f.data is not None:
                rows.append(np.array(f.data[min(band, f.data.shape[0] - 1)]))
                times.append(f.time_utc)
            beams = sub.beams
    n = len(beams["power_deg"])
    keep = [i for i, r in enumerate(rows) if len(r) == n]
    data = np.array([rows[i] for i in keep])
    t = np.array([times[i] for i in keep])
    b = beams["bands_hz"][min(band, len(beams["bands_hz"]) - 1)]
    title = f"{beams.get('array_kind', '')} array (live {endpoint}), band {b[0]:g}-{b[1]:g} Hz"
    return t - t[0], np.array(beams["power_deg"])[:, 0], data, title


#: Picture formats by suffix, and the metadata key that carries the axes' layout in each.
_FORMATS = {".png": "Description", ".svg": "Description", ".pdf": "Subject"}


def render(times_s, bearings_deg, power_db, title: str, out, range_db: float = 30.0) -> dict:
    """Write the PNG; returns the plot area in pixels and the axes' data limits.

    The same dict is stored in the PNG's ``Description`` text so a program
    reading the image back can map pixels to bearing and time.
    """
    suffix = Path(str(out)).suffix.lower()
    if suffix not in _FORMATS:
        raise UsageError(f"--out {out}: pictures are written as {', '.join(_FORMATS)} (chosen by the suffix)")
    try:
        import matplotlib  # noqa: PLC0415

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt  # noqa: PLC0415
    except ImportError:
        raise UsageError("pictures need the plotting extra: pip install 'beamtap[plot]'") from None
    if len(power_db) == 0:
        raise UsageError("no power rows to draw")
    top = float(np.nanmax(power_db))
    fig, ax = plt.subplots(figsize=(9, 6), dpi=100)
    order = np.argsort(bearings_deg)
    b = np.asarray(bearings_deg)[order]
    img = ax.imshow(np.asarray(power_db)[:, order], aspect="auto", origin="upper", cmap="viridis",
                    vmin=top - range_db, vmax=top, interpolation="nearest",
                    extent=[b[0], b[-1], float(times_s[-1]), float(times_s[0])])
    ax.set_xlabel("bearing (deg)")
    ax.set_ylabel("time (s)")
    ax.set_title(title, fontsize=10)
    fig.colorbar(img, ax=ax, label="band power (dB re full scale)")
    fig.tight_layout()
    fig.canvas.draw()
    bbox = ax.get_window_extent()
    height = fig.canvas.get_width_height()[1]
    info = {"axes_px": [bbox.x0, height - bbox.y1, bbox.x1, height - bbox.y0],
            "bearing_deg": [float(b[0]), float(b[-1])], "time_s": [float(times_s[0]), float(times_s[-1])]}
    try:
        fig.savefig(out, metadata={_FORMATS[suffix]: json.dumps(info)})
    except OSError as exc:
        raise UsageError(f"--out {out}: cannot write: {exc.strerror}") from None
    finally:
        plt.close(fig)
    return info
