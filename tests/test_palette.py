"""The colour scale: lightness rises with level, also as seen with colour-vision deficiencies."""

import numpy as np

from beamtap import palette


def _linear(srgb):
    # IEC 61966-2-1 (sRGB) transfer function
    return np.where(srgb <= 0.04045, srgb / 12.92, ((srgb + 0.055) / 1.055) ** 2.4)


def _lab(lin):
    # CIE 15:2004 XYZ (D65) and CIELAB
    m = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
    xyz = lin @ m.T / np.array([0.95047, 1.0, 1.08883])
    f = np.where(xyz > (6 / 29) ** 3, np.cbrt(xyz), xyz / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.stack([116 * f[:, 1] - 16, 500 * (f[:, 0] - f[:, 1]), 200 * (f[:, 1] - f[:, 2])], axis=1)


# Machado, Oliveira & Fernandes (2009), simulation matrices at severity 1.0 (values from memory),
# applied to linear sRGB.
CVD = {
    "protanopia": [[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216], [-0.003882, -0.048116, 1.051998]],
    "deuteranopia": [[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413],
                     [-0.011820, 0.042940, 0.968881]],
    "tritanopia": [[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602], [0.004733, 0.691367, 0.303900]],
}


def test_lightness_rises_monotonically_with_level():
    lab = _lab(_linear(palette.rgb(np.linspace(0, 1, 101))))
    assert np.all(np.diff(lab[:, 0]) > 0)
    assert lab[0, 0] < 15 and lab[-1, 0] > 90  # nearly the whole lightness range


def test_order_survives_colour_vision_deficiencies():
    lin = _linear(palette.rgb(np.linspace(0, 1, 9)))
    for name, m in CVD.items():
        seen = _lab(np.clip(lin @ np.array(m).T, 0, 1))
        assert np.all(np.diff(seen[:, 0]) > 3.0), name  # neighbouring stops stay apart in lightness


def test_terminal_colours_keep_the_order():
    idx = palette.xterm256(np.linspace(0, 1, 25))
    table = palette._XTERM[idx - 16]
    lab = _lab(_linear(table))
    assert np.all(np.diff(lab[:, 0]) >= -1.0)  # the nearest 256-colour cells keep the rise (within rounding)
    assert np.all((idx >= 16) & (idx <= 255))
