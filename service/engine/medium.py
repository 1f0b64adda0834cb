"""Speed of sound in the medium: sea water or air."""

from __future__ import annotations

import math

#: Stated validity range of Mackenzie (1981): (low, high) per variable.
MACKENZIE_RANGE = {
    "temperature_c": (2.0, 30.0),
    "salinity_psu": (25.0, 40.0),
    "depth_m": (0.0, 8000.0),
}


def mackenzie_sound_speed_mps(temperature_c: float, salinity_psu: float, depth_m: float) -> float:
    """Sound speed in sea water by Mackenzie's nine-term equation.

    Parameters
    ----------
    temperature_c : float
        Water temperature in degrees Celsius.
    salinity_psu : float
        Salinity in practical salinity units (parts per thousand).
    depth_m : float
        Depth in metres.

    Returns
    -------
    float
        Sound speed in metres per second.

    Notes
    -----
    Stated validity: T 2–30 °C, S 25–40, D 0–8000 m; see
    :func:`mackenzie_out_of_range` for the warning text.

    References
    ----------
    K. V. Mackenzie, "Nine-term equation for sound speed in the oceans",
    J. Acoust. Soc. Am. 70(3), 807–812 (1981).

    Examples
    --------
    >>> round(mackenzie_sound_speed_mps(25.0, 35.0, 1000.0), 3)
    1550.744
    """
    t, s, d = float(temperature_c), float(salinity_psu), float(depth_m)
    return (
        1448.96
        + 4.591 * t
        - 5.304e-2 * t**2
        + 2.374e-4 * t**3
        + 1.340 * (s - 35.0)
        + 1.630e-2 * d
        + 1.675e-7 * d**2
        - 1.025e-2 * t * (s - 35.0)
        - 7.139e-13 * t * d**3
    )


def mackenzie_out_of_range(temperature_c: float, salinity_psu: float, depth_m: float) -> list[str]:
    """Names and values outside Mackenzie's stated validity range (empty if none)."""
    values = {"temperature_c": temperature_c, "salinity_psu": salinity_psu, "depth_m": depth_m}
    out = []
    for name, (low, high) in MACKENZIE_RANGE.items():
        if not low <= values[name] <= high:
            out.append(f"{name}={values[name]:g} outside {low:g}..{high:g}")
    return out


def air_sound_speed_mps(temperature_c: float) -> float:
    """Sound speed in dry air, 331.3·sqrt(1 + T/273.15) m/s.

    Common practice (ideal-gas law for dry air, 331.3 m/s at 0 °C).

    Examples
    --------
    >>> round(air_sound_speed_mps(20.0), 1)
    343.2
    """
    t = float(temperature_c)
    if t <= -273.15:
        raise ValueError(f"temperature_c={t!r} is at or below absolute zero")
    return 331.3 * math.sqrt(1.0 + t / 273.15)
