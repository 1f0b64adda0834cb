"""``beamtap pattern``: the theoretical array response against azimuth for one look direction."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from beamtap.errors import UsageError

from ..assembly import beam_weights
from ..config import Config
from ..engine import diagnostics
from ..engine.directions import fan, unit_vectors


def pattern(config: Config, frequency_hz: float, look_deg, out_path, step_deg: float = 0.1) -> np.ndarray:
    """Theoretical response against azimuth at the look elevation; CSV (and PNG if asked).

    Returns
    -------
    ndarray, shape (n, 3): azimuth_deg, elevation_deg, response_db.
    """
    if not frequency_hz > 0:
        raise UsageError(f"--freq: got {frequency_hz!r}, expected a positive frequency in Hz")
    geo = config.geometry
    directions = fan(-180.0, 180.0, step_deg, look_deg[1])
    units = unit_vectors(directions[:, 0], directions[:, 1])
    look = unit_vectors(look_deg[0], look_deg[1])
    level = diagnostics.response_db(geo.centred_positions_m, beam_weights(config, look_deg), look, units,
                                    frequency_hz, config.sound_speed_mps)
    table = np.column_stack([directions, level])
    out = Path(out_path)
    if out.suffix.lower() == ".png":
        _pattern_png(table, config, frequency_hz, look_deg, out)
    else:
        with open(out, "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(["azimuth_deg", "elevation_deg", "response_db"])
            for az, el, r in table:
                w.writerow([f"{az:.2f}", f"{el:g}", f"{r:.3f}"])
    return table


def _pattern_png(table, config, frequency_hz, look_deg, out):
    try:
        import matplotlib  # noqa: PLC0415 - optional extra
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt  # noqa: PLC0415
    except ImportError:
        raise UsageError("a PNG pattern needs the plotting extra: pip install 'beamtap[plot]' "
                         "(or give --out a .csv name)") from None
    fig, ax = plt.subplots(figsize=(8, 4))
    ax.plot(table[:, 0], np.maximum(table[:, 2], -80))
    ax.set_xlabel("azimuth (deg)")
    ax.set_ylabel("response (dB)")
    ax.set_ylim(-80, 3)
    ax.grid(True, alpha=0.3)
    ax.set_title(f"{config.geometry.kind} array, {config.geometry.active.sum()} sensors, "
                 f"{frequency_hz:g} Hz, look {look_deg[0]:g}°/{look_deg[1]:g}°, {config.beams.shading}")
    fig.tight_layout()
    fig.savefig(out, dpi=100)
    plt.close(fig)
