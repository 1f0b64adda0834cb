"""Directions in the array frame: azimuth/elevation in degrees to unit vectors.

Convention (../DEVELOPERS.md, "Frames and angles"): azimuth in the x–y plane
from +x toward +y, elevation from the x–y plane toward +z; a direction is
where the sound comes FROM.
"""

from __future__ import annotations

import numpy as np


def unit_vectors(azimuth_deg, elevation_deg) -> np.ndarray:
    """Unit vectors toward the given directions.

    Parameters
    ----------
    azimuth_deg, elevation_deg : array_like, broadcastable, degrees

    Returns
    -------
    ndarray, shape (..., 3)
        ``(cos el cos az, cos el sin az, sin el)``.
    """
    az = np.radians(np.asarray(azimuth_deg, dtype=np.float64))
    el = np.radians(np.asarray(elevation_deg, dtype=np.float64))
    az, el = np.broadcast_arrays(az, el)
    return np.stack([np.cos(el) * np.cos(az), np.cos(el) * np.sin(az), np.sin(el)], axis=-1)


def fan_count(from_deg: float, to_deg: float, step_deg: float) -> int:
    """How many directions :func:`fan` gives, without building them (both ends included)."""
    return int(np.floor((to_deg - from_deg) / step_deg + 1e-9)) + 1


def fan(from_deg: float, to_deg: float, step_deg: float, elevation_deg: float = 0.0) -> np.ndarray:
    """Azimuth fan at one elevation, both ends included.

    Returns
    -------
    ndarray, shape (n, 2)
        Rows of (azimuth_deg, elevation_deg).
    """
    n = fan_count(from_deg, to_deg, step_deg)
    az = from_deg + step_deg * np.arange(n)
    return np.column_stack([az, np.full(n, float(elevation_deg))])


def grid(az_from_deg, az_to_deg, az_step_deg, el_from_deg, el_to_deg, el_step_deg) -> np.ndarray:
    """Azimuth × elevation grid, azimuth varying fastest.

    Returns
    -------
    ndarray, shape (n_el * n_az, 2)
        Rows of (azimuth_deg, elevation_deg).
    """
    az = fan(az_from_deg, az_to_deg, az_step_deg)[:, 0]
    el = fan(el_from_deg, el_to_deg, el_step_deg)[:, 0]
    ee, aa = np.meshgrid(el, az, indexing="ij")
    return np.column_stack([aa.ravel(), ee.ravel()])
