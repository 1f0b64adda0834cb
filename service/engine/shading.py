"""Shading (amplitude tapers) across the array.

Layout by array kind:

* ``line``: the taper is sampled once per sensor along the line, the same for
  every beam (index order along x). Dead sensors keep their place in the
  taper and are then left out.
* ``ring``, ``grid``, ``positions``: the taper is evaluated, for each beam, at
  every active sensor's coordinate along the horizontal axis perpendicular to
  that beam's look azimuth, scaled so the outermost active sensors sit at the
  taper's ends. For a ring this tapers the aperture as seen from the look
  direction; for a grid steered in azimuth it tapers across the grid.

Weights are always renormalised over the active sensors to sum to one, so a
plane wave from the look direction comes out at its own amplitude.

References
----------
F. J. Harris, "On the use of windows for harmonic analysis with the discrete
Fourier transform", Proc. IEEE 66(1), 51–83 (1978).
C. L. Dolph, "A current distribution for broadside arrays which optimizes the
relationship between beam width and side-lobe level", Proc. IRE 34(6),
335–348 (1946).
T. T. Taylor, "Design of line-source antennas for narrow beamwidth and low
side lobes", IRE Trans. Antennas Propag. 3(1), 16–28 (1955).
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy.signal import windows

SHADINGS = ("uniform", "hann", "hamming", "chebyshev", "taylor")

#: Samples used to evaluate a taper at arbitrary positions (non-line arrays).
_CONTINUOUS_SAMPLES = 2001


def taper(name: str, count: int, sidelobe_db: float = 30.0, nbar: int = 4) -> np.ndarray:
    """A taper of ``count`` points, peak one.

    Parameters
    ----------
    name : {"uniform", "hann", "hamming", "chebyshev", "taylor"}
    count : int
        Number of points.
    sidelobe_db : float
        Sidelobe level below the main lobe, positive dB (Chebyshev, Taylor).
    nbar : int
        Number of nearly constant-level sidelobes (Taylor).

    Notes
    -----
    The Hann taper for an array uses the interior points of a
    ``count + 2`` point Hann window, so that the end sensors are not wasted
    on zero weight (common practice).
    """
    if name == "uniform":
        return np.ones(count)
    if name == "hann":
        return windows.hann(count + 2, sym=True)[1:-1]
    if name == "hamming":
        return windows.hamming(count, sym=True)
    if name == "chebyshev":
        with warnings.catch_warnings():
            # scipy warns about spectral-analysis use below 45 dB; for an array taper it is fine.
            warnings.simplefilter("ignore", UserWarning)
            return windows.chebwin(count, at=sidelobe_db, sym=True)
    if name == "taylor":
        return windows.taylor(count, nbar=nbar, sll=sidelobe_db, norm=True, sym=True)
    raise ValueError(f"shading={name!r}: expected one of {', '.join(SHADINGS)}")


def shading_weights(kind: str, all_positions_m: np.ndarray, active: np.ndarray,
                    look_units: np.ndarray, name: str, sidelobe_db: float = 30.0,
                    nbar: int = 4) -> np.ndarray:
    """Normalised weights per beam and active sensor.

    Parameters
    ----------
    kind : str
        Array kind (see module docstring).
    all_positions_m : ndarray, shape (n_sensors, 3)
        Every sensor, dead ones included (a line taper keeps their place).
    active : ndarray of bool, shape (n_sensors,)
    look_units : ndarray, shape (n_beams, 3)
        Look directions as unit vectors.
    name, sidelobe_db, nbar
        See :func:`taper`.

    Returns
    -------
    ndarray, shape (n_beams, n_active)
        Each row sums to one.
    """
    n_beams = len(look_units)
    if name == "uniform":
        w = np.ones((n_beams, int(active.sum())))
    elif kind == "line":
        order = np.argsort(all_positions_m[:, 0], kind="stable")
        t = np.empty(len(order))
        t[order] = taper(name, len(order), sidelobe_db, nbar)
        w = np.broadcast_to(t[active], (n_beams, int(active.sum()))).copy()
    else:
        p = all_positions_m[active] - all_positions_m[active].mean(axis=0)
        # Horizontal axis perpendicular to each look azimuth.
        az = np.arctan2(look_units[:, 1], look_units[:, 0])
        across = np.column_stack([-np.sin(az), np.cos(az), np.zeros(n_beams)])
        q = across @ p.T  # (n_beams, n_active)
        half_width = np.max(np.abs(q), axis=1, keepdims=True)
        half_width[half_width == 0] = 1.0
        grid = np.linspace(-1.0, 1.0, _CONTINUOUS_SAMPLES)
        w = np.interp(q / half_width, grid, taper(name, _CONTINUOUS_SAMPLES, sidelobe_db, nbar))
    return w / w.sum(axis=1, keepdims=True)
