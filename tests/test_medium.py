"""Sound speed against published values."""

import pytest

from beamtap.service.engine.medium import (
    air_sound_speed_mps,
    mackenzie_out_of_range,
    mackenzie_sound_speed_mps,
)


def test_mackenzie_worked_value():
    # Mackenzie (1981), J. Acoust. Soc. Am. 70(3) 807-812: 1550.744 m/s at T=25 °C, S=35, D=1000 m.
    assert mackenzie_sound_speed_mps(25.0, 35.0, 1000.0) == pytest.approx(1550.744, abs=5e-4)


def test_mackenzie_check_value():
    # Mackenzie (1981): the check value printed with the equation, 1718.774 m/s at S=40, T=40 °C, D=10000 m.
    assert mackenzie_sound_speed_mps(40.0, 40.0, 10000.0) == pytest.approx(1718.774, abs=5e-4)


def test_mackenzie_validity_range_is_reported():
    # Stated validity in Mackenzie (1981): T 2-30 °C, S 25-40, D 0-8000 m.
    assert mackenzie_out_of_range(25.0, 35.0, 1000.0) == []
    out = mackenzie_out_of_range(40.0, 20.0, 9000.0)
    assert [o.split("=")[0] for o in out] == ["temperature_c", "salinity_psu", "depth_m"]


def test_air_at_20c():
    # Common practice: 331.3*sqrt(1 + T/273.15) gives about 343.2 m/s at 20 °C.
    assert air_sound_speed_mps(20.0) == pytest.approx(343.2, abs=0.05)
    assert air_sound_speed_mps(0.0) == pytest.approx(331.3, abs=1e-9)
