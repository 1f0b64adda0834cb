"""``beamtap pattern``: the theoretical array response against azimuth for one look direction;
with interferers described, the MVDR (adaptive) response for that scene beside delay-and-sum's."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from beamtap.errors import UsageError

from ..assembly import beam_weights
from ..config import Config
from ..engine import diagnostics
from ..engine.adaptive import mvdr_weights
from ..engine.directions import fan, unit_vectors


def pattern(config: Config, frequency_hz: float, look_deg, out_path, step_deg: float = 0.1,
            interferers=()) -> np.ndarray:
    """Theoretical response against azimuth at the look elevation; CSV (and PNG if asked).

    ``interferers``: ``(azimuth_deg, level_db)`` plane waves at the look
    elevation, their power that many dB above each sensor's own (white)
    noise. With any, the MVDR beam for that scene (the loading of
    ``[beams.adaptive]``) is computed from its exact cross-spectral matrix
    ``I + sum(p_i a_i a_i^H)`` and its response is given beside the
    delay-and-sum one (Van Trees 2002, §6.2).

    Returns
    -------
    ndarray, shape (n, 3) or (n, 4): azimuth_deg, elevation_deg, response_db
    (delay-and-sum) and, with interferers, mvdr_response_db.
    """
    if not frequency_hz > 0:
        raise UsageError(f"--freq: got {frequency_hz!r}, expected a positive frequency in Hz")
    geo = config.geometry
    directions = fan(-180.0, 180.0, step_deg, look_deg[1])
    units = unit_vectors(directions[:, 0], directions[:, 1])
    look = unit_vectors(look_deg[0], look_deg[1])
    level = diagnostics.response_db(geo.centred_positions_m, beam_weights(config, look_deg), look, units,
                                    frequency_hz, config.sound_speed_mps)
    columns = [directions, level]
    names = ["azimuth_deg", "elevation_deg", "response_db"]
    if interferers:
        columns.append(_mvdr_response_db(config, frequency_hz, look, units, look_deg[1], interferers))
        names.append("mvdr_response_db")
    table = np.column_stack(columns)
    out = Path(out_path)
    if out.suffix.lower() == ".png":
        _pattern_png(table, config, frequency_hz, look_deg, out, interferers)
    else:
        with open(out, "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(names)
            for row in table:
                w.writerow([f"{row[0]:.2f}", f"{row[1]:g}"] + [f"{r:.3f}" for r in row[2:]])
    return table


def _mvdr_response_db(config: Config, frequency_hz, look_unit, units, elevation_deg, interferers) -> np.ndarray:
    """The MVDR beam's response for the described scene: weights from its exact matrix, loaded as
    ``[beams.adaptive] loading_db`` says, the response ``|w^H a(u)|`` in dB."""
    pos = config.geometry.centred_positions_m
    k = 2.0 * np.pi * frequency_hz / config.sound_speed_mps

    def manifold(u):
        return np.exp(1j * k * (np.atleast_2d(u) @ pos.T))  # (directions, sensors)

    r = np.eye(len(pos), dtype=complex)
    for az, level_db in interferers:
        a = manifold(unit_vectors(az, elevation_deg))[0]
        r += 10.0 ** (level_db / 10.0) * np.outer(a, a.conj())
    w, _ = mvdr_weights(r[None], manifold(look_unit)[None], config.beams.adaptive.loading_db)
    response = manifold(units) @ np.conj(w[0, 0])
    return 20.0 * np.log10(np.maximum(np.abs(response), 1e-15))


def _pattern_png(table, config, frequency_hz, look_deg, out, interferers=()):
    try:
        import matplotlib  # noqa: PLC0415 - optional extra
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt  # noqa: PLC0415
    except ImportError:
        raise UsageError("a PNG pattern needs the plotting extra: pip install 'beamtap[plot]' "
                         "(or give --out a .csv name)") from None
    fig, ax = plt.subplots(figsize=(8, 4))
    ax.plot(table[:, 0], np.maximum(table[:, 2], -80), label="delay-and-sum")
    if table.shape[1] > 3:
        ax.plot(table[:, 0], np.maximum(table[:, 3], -80), label=f"MVDR, loading {config.beams.adaptive.loading_db:g} dB")
        for az, level_db in interferers:
            ax.axvline(az, color="grey", linestyle="--", linewidth=0.8)
            ax.text(az, 1.0, f" {level_db:g} dB", fontsize=8, color="grey")
        ax.legend(loc="lower right", fontsize=8)
    ax.set_xlabel("azimuth (deg)")
    ax.set_ylabel("response (dB)")
    ax.set_ylim(-80, 3)
    ax.grid(True, alpha=0.3)
    ax.set_title(f"{config.geometry.kind} array, {config.geometry.active.sum()} sensors, "
                 f"{frequency_hz:g} Hz, look {look_deg[0]:g}°/{look_deg[1]:g}°, {config.beams.shading}")
    fig.tight_layout()
    fig.savefig(out, dpi=100)
    plt.close(fig)
