"""beamtap's one colour scale, for every view: terminal, pictures and the browser.

Nine colour stops designed here in CIE L*C*h: lightness rises evenly from
L* 10 to 96, so the order of levels reads from lightness alone (which the
common colour-vision deficiencies leave intact), while the hue turns from
indigo through violet, magenta, rose and salmon to cream for extra
separation. Level 0 is the darkest stop, level 1 the lightest.

References
----------
CIE 15:2004, Colorimetry, 3rd ed.: CIELAB and L*C*h (from memory).
"""

from __future__ import annotations

import numpy as np

#: The colour stops, darkest (lowest level) first: sRGB hex.
STOPS = ("#001c37", "#122c73", "#61348b", "#9f3b94", "#d24c92", "#f56e8e", "#ff9d97", "#ffc9b6", "#fff1e7")

_RGB = np.array([[int(h[i:i + 2], 16) for i in (1, 3, 5)] for h in STOPS], float) / 255.0


def rgb(level) -> np.ndarray:
    """sRGB in 0..1, shape (..., 3), of levels in 0..1 (clipped), interpolated between the stops."""
    x = np.clip(np.asarray(level, float), 0.0, 1.0) * (len(STOPS) - 1)
    i = np.minimum(x.astype(int), len(STOPS) - 2)
    t = (x - i)[..., None]
    return (1 - t) * _RGB[i] + t * _RGB[i + 1]


def _xterm_table() -> np.ndarray:
    """sRGB of the 256-colour terminal palette's 6x6x6 cube (16..231) and grey ramp (232..255)."""
    steps = np.array([0, 95, 135, 175, 215, 255]) / 255.0
    cube = np.array([[r, g, b] for r in steps for g in steps for b in steps])
    grey = np.array([[v, v, v] for v in (8 + 10 * np.arange(24)) / 255.0])
    return np.vstack([cube, grey])


def _lab(srgb: np.ndarray) -> np.ndarray:
    """CIELAB (D65) of sRGB colours in 0..1, shape (..., 3) (IEC 61966-2-1; CIE 15:2004)."""
    lin = np.where(srgb <= 0.04045, srgb / 12.92, ((srgb + 0.055) / 1.055) ** 2.4)
    m = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
    xyz = lin @ m.T / np.array([0.95047, 1.0, 1.08883])
    f = np.where(xyz > (6 / 29) ** 3, np.cbrt(xyz), xyz / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.stack([116 * f[..., 1] - 16, 500 * (f[..., 0] - f[..., 1]), 200 * (f[..., 1] - f[..., 2])], axis=-1)


_XTERM = _xterm_table()
_XTERM_LAB = _lab(_XTERM)


def _xterm_ramp(n: int = 24) -> np.ndarray:
    """``n`` terminal colours for evenly spaced levels: each the nearest (lightness weighted
    double) among the cells no darker than the one before, so the order of levels survives the
    terminal's coarse palette."""
    out, floor = [], -1.0
    weight = np.array([2.0, 1.0, 1.0])
    for lab in _lab(rgb(np.linspace(0.0, 1.0, n))):
        ok = _XTERM_LAB[:, 0] >= floor
        d = (((_XTERM_LAB - lab) * weight) ** 2).sum(axis=1)
        d[~ok] = np.inf
        i = int(np.argmin(d))
        out.append(16 + i)
        floor = _XTERM_LAB[i, 0]
    return np.array(out)


_RAMP = _xterm_ramp()


def xterm256(level) -> np.ndarray:
    """256-colour terminal index (16..255) of each level in 0..1."""
    x = np.clip(np.asarray(level, float), 0.0, 1.0)
    return _RAMP[np.round(x * (len(_RAMP) - 1)).astype(int)]


def hex_colour(level: float) -> str:
    """``#rrggbb`` of one level in 0..1."""
    r, g, b = (int(round(255 * v)) for v in rgb(level))
    return f"#{r:02x}{g:02x}{b:02x}"


def colormap(name: str = "beamtap"):
    """The scale as a matplotlib colormap (needs the plot extra)."""
    from matplotlib.colors import LinearSegmentedColormap  # noqa: PLC0415

    return LinearSegmentedColormap.from_list(name, [tuple(c) for c in _RGB], N=256)
