"""Config loading: the example configs load, and mistakes get one located line."""

from pathlib import Path

import pytest

from beamtap.errors import ConfigError
from beamtap.service import config as cfg

ROOT = Path(__file__).resolve().parents[1]

GOOD = """
[array]
line = { count = 8, spacing_m = 0.5 }
[medium]
sound_speed_mps = 1500.0
[input]
samplerate_hz = 48000
block_frames = 1024
[beams]
fan = { from_deg = 0.0, to_deg = 180.0, step_deg = 2.0 }
band_hz = [300.0, 1400.0]
"""


def test_example_configs_load_and_validate():
    pier = cfg.load(ROOT / "deploy/configs/pier-line-16.toml")
    lab = cfg.load(ROOT / "deploy/configs/lab-ring-12.toml")
    assert pier.geometry.kind == "line" and pier.geometry.n_sensors == 16
    assert pier.geometry.active.sum() == 15
    # Mackenzie (1981) at T=11.5 °C, S=33.8, D=6 m: about 1493.7 m/s (value from the nine-term equation)
    assert pier.sound_speed_mps == pytest.approx(1493.73, abs=0.01)
    assert pier.medium.warnings == ()
    assert lab.geometry.kind == "ring" and lab.geometry.n_sensors == 12
    assert lab.sound_speed_mps == pytest.approx(343.21, abs=0.01)  # air at 20 °C, common practice


def test_builtin_demo_loads():
    from beamtap.cli import load_config

    demo = load_config(None)
    assert demo.input.source == "simulated" and len(demo.input.scene) == 2


def test_good_config_defaults():
    c = cfg.loads(GOOD, "good.toml")
    assert len(c.beams.power_deg) == 91
    assert c.input.source == "simulated"
    assert c.publish.endpoint.startswith("tcp://127.0.0.1:")


def _with(old: str, new: str) -> str:
    assert old in GOOD
    return GOOD.replace(old, new)


MISTAKES = [
    # (what is changed, replacement, key the message must name, a word it must contain)
    ("line = { count = 8, spacing_m = 0.5 }", "line = { count = 8, spacing_m = -0.5 }", "array.line.spacing_m", "> 0"),
    ("line = { count = 8, spacing_m = 0.5 }", "line = { count = 0, spacing_m = 0.5 }", "array.line.count", "from 1 to 1024"),
    ("line = { count = 8, spacing_m = 0.5 }", "line = { count = 8.5, spacing_m = 0.5 }", "array.line.count", "whole"),
    ("line = { count = 8, spacing_m = 0.5 }", "line = { count = 8, spacing = 0.5 }", "array.line", "spacing"),
    ("line = { count = 8, spacing_m = 0.5 }", "line = { count = 8, spacing_m = 0.5 }\nring = { count = 4, radius_m = 1.0 }", "array", "exactly one"),
    ("line = { count = 8, spacing_m = 0.5 }", "line = { count = 8, spacing_m = 0.5 }\nchannels = [1, 2, 3]", "array.channels", "8 input channel"),
    ("line = { count = 8, spacing_m = 0.5 }", "line = { count = 8, spacing_m = 0.5 }\nchannels = [1, 1, 2, 3, 4, 5, 6, 7]", "array.channels", "one sensor"),
    ("line = { count = 8, spacing_m = 0.5 }", "line = { count = 8, spacing_m = 0.5 }\ndead = [9]", "array.dead", "1 to 8"),
    ("line = { count = 8, spacing_m = 0.5 }", "line = { count = 8, spacing_m = 0.5 }\ndead = [1,2,3,4,5,6,7,8]", "array.dead", "alive"),
    ("line = { count = 8, spacing_m = 0.5 }", "line = { count = 8, spacing_m = 0.5 }\ngain_db = [0, 1]", "array.gain_db", "8 numbers"),
    ("line = { count = 8, spacing_m = 0.5 }", "positions_m = [[0, 0], [1, 0]]", "array.positions_m", "[x, y, z]"),
    ("sound_speed_mps = 1500.0", "sound_speed_mps = \"fast\"", "medium.sound_speed_mps", "number"),
    ("sound_speed_mps = 1500.0", "sound_speed_mps = 5.0", "medium.sound_speed_mps", "100"),
    ("sound_speed_mps = 1500.0", "water = { temperature_c = 12.0, salinity_psu = 35.0 }", "medium.water.depth_m", "missing"),
    ("sound_speed_mps = 1500.0", "air = { temperature_c = 500.0 }", "medium.air.temperature_c", "60"),
    ("samplerate_hz = 48000", "samplerate_hz = -1", "input.samplerate_hz", "1000"),
    ("block_frames = 1024", "block_frames = 3", "input.block_frames", "16"),
    ("block_frames = 1024", "block_frames = 1024\nsource = \"microphone\"", "input.source", "soundcard"),
    ("block_frames = 1024", "block_frames = 1024\nsource = \"file\"", "input.path", "missing"),
    ("block_frames = 1024", "block_frames = 1024\nsource = \"stream\"", "input.endpoint", "missing"),
    ("block_frames = 1024", "block_frames = 1024\n[[input.scene]]\nazimuth_deg = 30\nsignal = \"whistle\"", "input.scene[0].signal", "noise"),
    ("block_frames = 1024", "block_frames = 1024\n[[input.scene]]\nazimuth_deg = 30\nsignal = \"tone\"", "input.scene[0].frequency_hz", "missing"),
    ("fan = { from_deg = 0.0, to_deg = 180.0, step_deg = 2.0 }", "fan = { from_deg = 0.0, to_deg = 180.0, step_deg = 0.0 }", "beams.fan.step_deg", "> 0"),
    ("fan = { from_deg = 0.0, to_deg = 180.0, step_deg = 2.0 }", "fan = { from_deg = 90.0, to_deg = 10.0, step_deg = 2.0 }", "beams.fan.to_deg", "from_deg"),
    ("band_hz = [300.0, 1400.0]", "band_hz = [1400.0, 300.0]", "beams.band_hz", "low < high"),
    ("band_hz = [300.0, 1400.0]", "band_hz = [300.0, 30000.0]", "beams.band_hz", "24000"),
    ("band_hz = [300.0, 1400.0]", "band_hz = [[300.0, 1400.0], [5.0]]", "beams.band_hz[1]", "[low, high]"),
    ("band_hz = [300.0, 1400.0]", "band_hz = [300.0, 1400.0]\nshading = \"kaiser\"", "beams.shading", "chebyshev"),
    ("band_hz = [300.0, 1400.0]", "band_hz = [300.0, 1400.0]\naudio_deg = [[90.0]]", "beams.audio_deg", "azimuth_deg, elevation_deg"),
    ("band_hz = [300.0, 1400.0]", "band_hz = [300.0, 1400.0]\naudio_deg = [[90.0, 120.0]]", "beams.audio_deg", "elevation"),
    ("band_hz = [300.0, 1400.0]", "band_hz = [300.0, 1400.0]\nsidelobe_db = true", "beams.sidelobe_db", "number"),
    ("[beams]", "[beam]", "beams", "missing"),
    ("band_hz = [300.0, 1400.0]", "band_hz = [300.0, 1400.0]\n[record]\nwhat = [\"video\"]", "record.what", "raw"),
    ("band_hz = [300.0, 1400.0]", "band_hz = [300.0, 1400.0]\n[publish]\nendpoint = 5560", "publish.endpoint", "string"),
]


@pytest.mark.parametrize("old,new,key,word", MISTAKES, ids=[m[2] + ":" + m[3] for m in MISTAKES])
def test_each_mistake_names_file_key_and_expectation(old, new, key, word):
    with pytest.raises(ConfigError) as info:
        cfg.loads(_with(old, new), "site.toml")
    msg = str(info.value)
    assert msg.startswith("site.toml: ")
    assert f"[{key}]" in msg or (key in msg), msg
    assert word in msg, msg
    assert "\n" not in msg


def test_unknown_top_level_section():
    with pytest.raises(ConfigError, match=r"\[arrays\] unknown key"):
        cfg.loads(GOOD + "\n[arrays]\nx = 1\n", "site.toml")


def test_bad_toml_and_missing_file(tmp_path):
    with pytest.raises(ConfigError, match="not valid TOML"):
        cfg.loads("[array\n", "broken.toml")
    with pytest.raises(ConfigError, match="cannot be read"):
        cfg.load(tmp_path / "nope.toml")


def test_mackenzie_range_warning_in_check():
    c = cfg.loads(_with("sound_speed_mps = 1500.0",
                        "water = { temperature_c = 35.0, salinity_psu = 35.0, depth_m = 10.0 }"), "warm.toml")
    assert len(c.medium.warnings) == 1 and "temperature_c=35" in c.medium.warnings[0]


def test_too_much_steering_data_is_a_usage_error():
    from beamtap.errors import UsageError
    from beamtap.service.assembly import make_beamformer

    huge = _with("line = { count = 8, spacing_m = 0.5 }", "line = { count = 64, spacing_m = 0.5 }").replace(
        "fan = { from_deg = 0.0, to_deg = 180.0, step_deg = 2.0 }",
        "grid = { az_from_deg = 0.0, az_to_deg = 359.0, az_step_deg = 1.0, el_from_deg = -90.0, "
        "el_to_deg = 90.0, el_step_deg = 4.0 }").replace("band_hz = [300.0, 1400.0]", "band_hz = [300.0, 3000.0]")
    with pytest.raises(UsageError, match=r"huge.toml: \[beams\] 16560 power beams .* more than 512 MB"):
        make_beamformer(cfg.loads(huge, "huge.toml"))
