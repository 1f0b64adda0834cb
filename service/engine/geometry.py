"""Array geometry: sensor positions, channel map, dead sensors, calibration."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True)
class ArrayGeometry:
    """Sensors of an array and how they are wired and calibrated.

    Parameters
    ----------
    positions_m : ndarray, shape (n_sensors, 3)
        Sensor positions in metres in the array frame (x, y, z).
    kind : str
        ``"line"``, ``"ring"``, ``"grid"`` or ``"positions"``; decides how
        shading is laid out (see :mod:`beamtap.service.engine.shading`).
    channels : ndarray of int, shape (n_sensors,)
        1-based input channel feeding each sensor.
    dead : ndarray of bool, shape (n_sensors,)
        Sensors left out of every beam.
    gain_db : ndarray, shape (n_sensors,)
        Calibration gain applied to each sensor's channel, dB (positive
        boosts a quiet sensor).
    trim_s : ndarray, shape (n_sensors,)
        Extra delay in each sensor's signal path, seconds; the engine
        advances that channel by it on top of the steering delay.
    grid_shape : tuple of int or None
        (rows, columns) for ``kind == "grid"``.
    spacing_m : float or None
        Sensor spacing of a line or grid.
    """

    positions_m: np.ndarray
    kind: str = "positions"
    channels: np.ndarray = field(default=None)
    dead: np.ndarray = field(default=None)
    gain_db: np.ndarray = field(default=None)
    trim_s: np.ndarray = field(default=None)
    grid_shape: tuple | None = None
    spacing_m: float | None = None

    def __post_init__(self):
        pos = np.asarray(self.positions_m, dtype=np.float64).reshape(-1, 3)
        n = len(pos)
        defaults = {
            "channels": np.arange(1, n + 1),
            "dead": np.zeros(n, bool),
            "gain_db": np.zeros(n),
            "trim_s": np.zeros(n),
        }
        object.__setattr__(self, "positions_m", pos)
        for name, default in defaults.items():
            value = getattr(self, name)
            value = default if value is None else np.asarray(value, dtype=default.dtype)
            if value.shape != (n,):
                raise ValueError(f"{name} has shape {value.shape}, expected ({n},)")
            object.__setattr__(self, name, value)
        if self.active.sum() == 0:
            raise ValueError("every sensor is dead: at least one must be active")

    # ---- constructors -------------------------------------------------
    @classmethod
    def line(cls, count: int, spacing_m: float, **wiring) -> "ArrayGeometry":
        """Equally spaced line along x, centred on the origin."""
        x = (np.arange(count) - (count - 1) / 2.0) * spacing_m
        return cls(np.column_stack([x, np.zeros(count), np.zeros(count)]), kind="line",
                   spacing_m=float(spacing_m), **wiring)

    @classmethod
    def ring(cls, count: int, radius_m: float, **wiring) -> "ArrayGeometry":
        """Equally spaced ring in the x–y plane, first sensor on +x."""
        phi = 2.0 * np.pi * np.arange(count) / count
        return cls(np.column_stack([radius_m * np.cos(phi), radius_m * np.sin(phi), np.zeros(count)]),
                   kind="ring", **wiring)

    @classmethod
    def grid(cls, rows: int, columns: int, spacing_m: float, **wiring) -> "ArrayGeometry":
        """Rectangular grid in the x–y plane, centred; columns along x, row-major order."""
        x = (np.arange(columns) - (columns - 1) / 2.0) * spacing_m
        y = (np.arange(rows) - (rows - 1) / 2.0) * spacing_m
        yy, xx = np.meshgrid(y, x, indexing="ij")
        pos = np.column_stack([xx.ravel(), yy.ravel(), np.zeros(rows * columns)])
        return cls(pos, kind="grid", grid_shape=(rows, columns), spacing_m=float(spacing_m), **wiring)

    # ---- derived ------------------------------------------------------
    @property
    def n_sensors(self) -> int:
        return len(self.positions_m)

    @property
    def active(self) -> np.ndarray:
        """Boolean mask of sensors that take part in beams."""
        return ~self.dead

    @property
    def n_input_channels(self) -> int:
        """Input channels the source must deliver (highest channel in the map)."""
        return int(self.channels.max())

    @property
    def phase_centre_m(self) -> np.ndarray:
        """Centroid of the active sensors (the origin beams refer to)."""
        return self.positions_m[self.active].mean(axis=0)

    @property
    def centred_positions_m(self) -> np.ndarray:
        """Active sensor positions relative to the phase centre, shape (n_active, 3)."""
        return self.positions_m[self.active] - self.phase_centre_m

    @property
    def active_channel_index(self) -> np.ndarray:
        """0-based input column of each active sensor."""
        return self.channels[self.active] - 1

    @property
    def active_gain(self) -> np.ndarray:
        """Linear calibration gain of each active sensor."""
        return 10.0 ** (self.gain_db[self.active] / 20.0)

    @property
    def active_trim_s(self) -> np.ndarray:
        return self.trim_s[self.active]

    @property
    def aperture_m(self) -> float:
        """Largest distance between two active sensors."""
        p = self.centred_positions_m
        if len(p) < 2:
            return 0.0
        return float(np.max(np.linalg.norm(p[:, None, :] - p[None, :, :], axis=-1)))

    def max_steering_delay_s(self, sound_speed_mps: float) -> float:
        """Worst-case |steering delay| over every direction and sensor, seconds.

        ``max |p·u|/c`` over all unit vectors u is ``|p|/c``; trims add in
        either sign.
        """
        radius = np.linalg.norm(self.centred_positions_m, axis=1)
        return float(np.max(radius / sound_speed_mps + np.abs(self.active_trim_s)))
