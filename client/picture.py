"""``beamtap picture``: a bearing-against-time image of band power.

From the ``power.csv`` that ``beamtap process`` writes (with its
``beams.csv`` and ``summary.json`` beside it), or from a live capture of the
stream. Bearing runs across, time runs down, colour is band power in dB re
full scale with a colour bar; the title names the array and the band.
Needs the plotting extra (``pip install 'beamtap[plot]'``).
"""

from __future__ import annotations

import csv
import json
import time
from pathlib import Path

import numpy as np

from beamtap.errors import UsageError

from .subscriber import Subscriber


def from_csv(power_csv, band: int = 0):
    """(times_s, bearings_deg, power_db (rows, beams), title) from process output."""
    path = Path(power_csv)
    try:
        with open(path, newline="") as f:
            rows = list(csv.reader(f))
    except OSError as exc:
        raise UsageError(f"{path}: cannot read: {exc.strerror}") from None
    if len(rows) < 2 or rows[0][0] != "time_s":
        raise UsageError(f"{path}: not a beamtap power.csv (expected a 'time_s' column and at least one row)")
    header = rows[0][1:]
    try:
        data = np.array([[float(v) for v in r] for r in rows[1:]])
    except ValueError as exc:
        raise UsageError(f"{path}: bad number in power.csv: {exc}") from None
    columns = [i for i, name in enumerate(header) if ("@band" not in name and band == 0) or
               name.endswith(f"@band{band}")]
    if not columns:
        raise UsageError(f"--band {band}: power.csv has no such band")
    beams_csv = path.with_name("beams.csv")
    bearings = np.arange(len(columns), dtype=float)
    if beams_csv.exists():
        with open(beams_csv, newline="") as f:
            table = list(csv.DictReader(f))
        bearings = np.array([float(table[int(header[i].split("@")[0])]["azimuth_deg"]) for i in columns])
    title = "beamtap power"
    summary = path.with_name("summary.json")
    if summary.exists():
        s = json.loads(summary.read_text())["summary"]
        b = s["bands_hz"][band]
        title = (f"{s['array_kind']} array, {s['active_sensors']} sensors, band {b[0]:g}-{b[1]:g} Hz")
    return data[:, 0], bearings, data[:, 1:][:, columns], title


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
