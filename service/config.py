"""The config file: TOML sections validated once, at load, into dataclasses.

Every mistake raises :class:`beamtap.errors.ConfigError` naming the file,
the key, the bad value and what is expected; the command line prints it on
one line and exits with status 2.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from beamtap.client.protocol import DEFAULT_CONTROL, DEFAULT_PUBLISH
from beamtap.client.web.settings import DEFAULT_LISTEN, WebSettings
from beamtap.errors import ConfigError, UsageError

from .tomlcheck import _REQUIRED, _Table

from .engine import cost
from .engine import directions as dirs
from .engine.adaptive import AdaptiveSettings
from .engine.beamformer import MAX_THREADS, METHODS, BeamSet
from .engine.detect import DetectSettings
from .engine.geometry import ArrayGeometry
from .engine.medium import air_sound_speed_mps, mackenzie_out_of_range, mackenzie_sound_speed_mps
from .engine.shading import SHADINGS

SOURCES = ("soundcard", "file", "simulated", "stream", "session")
SIGNALS = ("noise", "tone", "chirp")
RECORD_KINDS = ("raw", "audio", "power")
#: Messages queued per subscriber before it loses messages (the one definition).
DEFAULT_SEND_QUEUE = 64


# ---------------------------------------------------------------------------
# The sections.
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class MediumConfig:
    sound_speed_mps: float
    source: str  # where the value came from, for `check`
    warnings: tuple = ()


@dataclass(frozen=True)
class SceneSource:
    """One plane-wave source of a simulated scene."""

    azimuth_deg: float
    elevation_deg: float = 0.0
    signal: str = "noise"
    band_hz: tuple | None = None
    frequency_hz: float | None = None
    level_db: float = -20.0
    sweep_deg_per_s: float = 0.0
    period_s: float = 1.0  # chirp repetition
    sweep_to_deg: float | None = None  # bounce between azimuth_deg and this


@dataclass(frozen=True)
class InputConfig:
    samplerate_hz: float = 48000.0
    block_frames: int = 1024
    source: str = "simulated"
    device: str | int | None = None
    path: str | None = None
    realtime: bool = True
    loop: bool = False
    endpoint: str | None = None
    ring_s: float = 2.0
    scene: tuple = ()
    scene_noise_db: float = -60.0
    seed: int = 1


@dataclass(frozen=True)
class PublishConfig:
    endpoint: str = DEFAULT_PUBLISH
    raw: bool = False
    send_queue: int = DEFAULT_SEND_QUEUE


@dataclass(frozen=True)
class ControlConfig:
    endpoint: str = DEFAULT_CONTROL
    max_block_share: float = cost.DEFAULT_MAX_BLOCK_SHARE


@dataclass(frozen=True)
class RecordConfig:
    folder: str = field(default_factory=lambda: default_record_folder())
    kinds: tuple = ("raw",)
    segment_s: float = 60.0
    sample_format: str = "float32"
    on_start: bool = False
    min_free_mb: float = 200.0
    queue_s: float = 4.0


@dataclass(frozen=True)
class SecurityConfig:
    """``[security]``: CURVE keys for the stream and control socket (see :mod:`.security`)."""
    server_key: str | None = None  # the service's secret certificate file
    clients: str | None = None  # folder of operators' public certificates
    readers: str | None = None  # folder of readers' public certificates
    allow_insecure: bool = False


@dataclass(frozen=True)
class EngineConfig:
    """``[engine]``: how the engine runs (not what it computes)."""
    # Threads per block, the caller's included; None: 1 live (a predictable block time), every
    # core offline (see :func:`engine_threads`).
    threads: int | None = None


@dataclass(frozen=True)
class WebConfig:
    """``[web]``: the service serves the browser view itself (a child process running ``beamtap web``)."""
    enabled: bool = False
    settings: WebSettings = field(default_factory=WebSettings)


@dataclass(frozen=True)
class Config:
    """A validated beamtap config."""

    where: str
    text: str
    geometry: ArrayGeometry
    medium: MediumConfig
    input: InputConfig
    beams: BeamSet
    power_batch_blocks: int = 1
    publish: PublishConfig = field(default_factory=PublishConfig)
    control: ControlConfig = field(default_factory=ControlConfig)
    record: RecordConfig = field(default_factory=RecordConfig)
    security: SecurityConfig = field(default_factory=SecurityConfig)
    engine: EngineConfig = field(default_factory=EngineConfig)
    detect: DetectSettings = field(default_factory=DetectSettings)
    web: WebConfig = field(default_factory=WebConfig)

    def engine_threads(self, offline: bool, override: int | None = None) -> int:
        """Threads for the engine: ``override`` (``--threads``), else ``[engine] threads``, else 1
        live and every core this process may use offline (at most the engine's limit)."""
        if override is not None:
            return override
        if self.engine.threads is not None:
            return self.engine.threads
        return min(available_cores(), MAX_THREADS) if offline else 1

    @property
    def sound_speed_mps(self) -> float:
        return self.medium.sound_speed_mps

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.text.encode()).hexdigest()


def dumps(data: dict) -> str:
    """A TOML document from a map of plain values (what :func:`loads` reads back to the same map).

    Scalars and lists of scalars are written inline, maps as ``[tables]``, lists of maps as
    ``[[arrays of tables]]``; maps inside lists as inline tables.
    """
    out: list[str] = []

    def section(path: list, table: dict, array: bool = False) -> None:
        plain = {k: v for k, v in table.items() if not _is_table(v) and not _is_table_array(v)}
        if path:
            name = ".".join(_toml_key(p) for p in path)
            out.append(f"[[{name}]]" if array else f"[{name}]")
        out.extend(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in plain.items())
        for k, v in table.items():
            if _is_table(v):
                section(path + [k], v)
            elif _is_table_array(v):
                for item in v:
                    section(path + [k], item, array=True)
        if plain or path:
            out.append("")

    section([], data)
    return "\n".join(out).rstrip() + "\n"


def _is_table(v) -> bool:
    return isinstance(v, dict)


def _is_table_array(v) -> bool:
    return isinstance(v, list) and bool(v) and all(isinstance(e, dict) for e in v)


def _toml_key(k: str) -> str:
    return k if k and all(c.isalnum() or c in "_-" for c in k) and k.isascii() else _toml_value(str(k))


def _toml_value(v) -> str:
    if isinstance(v, str):
        return json.dumps(v)  # a JSON string is a valid TOML basic string
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_toml_key(k)} = {_toml_value(e)}" for k, e in v.items()) + " }"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(e) for e in v) + "]"
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ("nan" if v != v else "inf" if v > 0 else "-inf")
    return str(int(v))


def with_beams(text: str, beams: dict, where: str = "<config>") -> str:
    """Config ``text`` with its ``[beams]`` replaced by ``beams`` (a map of ``[beams]`` keys), as one
    TOML document; comments are not kept. Checked by loading it back."""
    data = tomllib.loads(text)
    data["beams"] = beams
    out = dumps(data)
    loads(out, where)
    return out


def load(path) -> Config:
    """Read and validate a config file.

    Raises
    ------
    ConfigError
        On an unreadable file, bad TOML, or any bad key or value.
    """
    where = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(where, "(file)", f"cannot be read: {exc.strerror or exc}") from None
    except UnicodeDecodeError as exc:
        raise ConfigError(where, "(file)", f"is not a UTF-8 text file (byte {exc.start}: {exc.reason}); a config "
                                           "is TOML text") from None
    return loads(text, where)


def loads(text: str, where: str = "<config>") -> Config:
    """Validate config text (see :func:`load`)."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(where, "(file)", f"is not valid TOML: {exc}") from None
    top = _Table(data, where, "")
    geometry = _array(top.table("array"))
    medium = _medium(top.table("medium"))
    inp = _input(top.table("input", {}), geometry)
    beams, batch = _beams(top.table("beams"), inp.samplerate_hz)
    publish = _publish(top.table("publish", {}))
    control = _control(top.table("control", {}))
    record = _record(top.table("record", {}))
    security = _security(top.table("security", {}))
    engine = _engine(top.table("engine", {}))
    detect = parse_detect(top.table("detect", {}), len(beams.bands_hz))
    web = _web(top.table("web"), security) if top.has("web") else WebConfig()
    top.done()
    return Config(where, text, geometry, medium, inp, beams, batch, publish, control, record, security, engine,
                  detect, web)


def parse_detect(t: _Table, n_bands: int, base: DetectSettings | None = None) -> DetectSettings:
    """``[detect]`` (or a control request's ``set``) over ``base``'s values; one-line errors name the key."""
    base = base or DetectSettings()
    enabled = t.boolean("enabled", base.enabled)
    pfa = t.number("pfa", base.pfa, low=1e-12, high=0.5)
    band = t.integer("band", base.band, low=0, high=max(n_bands - 1, 0))
    background = t.number("background_s", base.background_s, low=0.1, high=3600.0, unit="s")
    gate = t.number("gate_deg", base.gate_deg, low=0.01, high=90.0, unit="°")
    confirm = t.raw("confirm", list(base.confirm), "[M, N], whole numbers with 1 <= M <= N <= 50")
    if (not isinstance(confirm, (list, tuple)) or len(confirm) != 2
            or any(isinstance(v, bool) or not isinstance(v, int) for v in confirm)
            or not 1 <= confirm[0] <= confirm[1] <= 50):
        t.fail("confirm", confirm, "[M, N], whole numbers with 1 <= M <= N <= 50")
    coast = t.number("coast_s", base.coast_s, low=0.0, high=3600.0, unit="s")
    min_snr = t.number("min_snr_db", base.min_snr_db, low=0.0, high=60.0, unit="dB")
    t.done()
    return base.with_changes(enabled=enabled, pfa=pfa, band=band, background_s=background, gate_deg=gate,
                             confirm=tuple(confirm), coast_s=coast, min_snr_db=min_snr)


def _engine(t: _Table) -> EngineConfig:
    threads = t.integer("threads", None, low=1, high=MAX_THREADS)
    t.done()
    return EngineConfig(threads)


def available_cores() -> int:
    """Cores this process may run on (its CPU affinity where the platform reports it)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):  # pragma: no cover - platforms without affinity
        return max(1, os.cpu_count() or 1)


def _array(t: _Table) -> ArrayGeometry:
    shape = t.one_of(["line", "ring", "grid", "positions_m"])
    if shape == "positions_m":
        pos = t.pairs("positions_m", width=3, expected="a list of [x, y, z] positions in metres")
        if not pos or len(pos) > cost.MAX_SENSORS:
            t.fail("positions_m", f"{len(pos)} positions", f"1 to {cost.MAX_SENSORS} [x, y, z] positions")
        n = len(pos)
        make = lambda **w: ArrayGeometry(np.array(pos), kind="positions", **w)  # noqa: E731
    else:
        s = t.table(shape)
        if shape == "line":
            count, size = s.integer("count", low=1, high=cost.MAX_SENSORS), s.number("spacing_m", low=0,
                                                                                     low_open=True, unit="m")
            n, make = count, lambda **w: ArrayGeometry.line(count, size, **w)  # noqa: E731
        elif shape == "ring":
            count, size = s.integer("count", low=1, high=cost.MAX_SENSORS), s.number("radius_m", low=0,
                                                                                     low_open=True, unit="m")
            n, make = count, lambda **w: ArrayGeometry.ring(count, size, **w)  # noqa: E731
        else:
            rows, cols = s.integer("rows", low=1, high=cost.MAX_SENSORS), s.integer("columns", low=1,
                                                                                  high=cost.MAX_SENSORS)
            if rows * cols > cost.MAX_SENSORS:
                s.fail("columns", cols, f"rows x columns at most {cost.MAX_SENSORS} sensors (got {rows * cols})")
            size = s.number("spacing_m", low=0, low_open=True, unit="m")
            n, make = rows * cols, lambda **w: ArrayGeometry.grid(rows, cols, size, **w)  # noqa: E731
        s.done()
    wiring = {}
    channels = t.raw("channels", None)
    if channels is not None:
        if (not isinstance(channels, list) or len(channels) != n
                or any(isinstance(c, bool) or not isinstance(c, int) or c < 1 for c in channels)):
            t.fail("channels", channels, f"a list of {n} input channel numbers (1-based)")
        if len(set(channels)) != n:
            t.fail("channels", channels, "each input channel used by one sensor only")
        wiring["channels"] = channels
    dead = t.raw("dead", None)
    if dead is not None:
        if (not isinstance(dead, list) or any(isinstance(d, bool) or not isinstance(d, int)
                                              or not 1 <= d <= n for d in dead)):
            t.fail("dead", dead, f"a list of sensor numbers from 1 to {n}")
        if len(set(dead)) >= n:
            t.fail("dead", dead, "at least one sensor left alive")
        mask = np.zeros(n, bool)
        mask[np.array(dead, int) - 1] = True
        wiring["dead"] = mask
    for name, unit in (("gain_db", "dB"), ("trim_s", "s")):
        if t.has(name):
            v = t.numbers(name, expected=f"a list of {n} numbers ({unit}), one per sensor")
            if len(v) != n:
                t.fail(name, v, f"a list of {n} numbers ({unit}), one per sensor")
            if name == "trim_s" and any(abs(e) > 1.0 for e in v):
                t.fail(name, v, "trims within ±1 s")
            wiring[name] = v
    t.done()
    geometry = make(**wiring)
    _check_positions(t, shape, geometry)
    return geometry


#: Sensors closer than this are taken as one place (a typo or a copy-paste in positions_m).
COINCIDENT_M = 1e-3


def _check_positions(t: _Table, shape: str, geometry: ArrayGeometry) -> None:
    p = geometry.positions_m
    if len(p) < 2:
        return
    d = np.linalg.norm(p[:, None, :] - p[None, :, :], axis=-1) + np.eye(len(p)) * 1e9
    i, j = np.unravel_index(int(np.argmin(d)), d.shape)
    if d[i, j] < COINCIDENT_M:
        t.fail(shape, f"sensors {min(i, j) + 1} and {max(i, j) + 1} at the same place {p[i].tolist()}",
               f"sensors at least {COINCIDENT_M * 1e3:g} mm apart")



def _medium(t: _Table) -> MediumConfig:
    kind = t.one_of(["sound_speed_mps", "water", "air"])
    if kind == "sound_speed_mps":
        c = t.number("sound_speed_mps", low=100.0, high=10000.0, unit="m/s")
        t.done()
        return MediumConfig(c, "fixed in config")
    s = t.table(kind)
    if kind == "water":
        temp = s.number("temperature_c", low=-2.0, high=40.0, unit="°C")
        sal = s.number("salinity_psu", low=0.0, high=45.0, unit="PSU")
        depth = s.number("depth_m", low=0.0, high=11000.0, unit="m")
        s.done()
        t.done()
        warn = tuple(f"{where}: Mackenzie (1981) used outside its validity range: {w}"
                     for where, w in ((t.where, w) for w in mackenzie_out_of_range(temp, sal, depth)))
        return MediumConfig(mackenzie_sound_speed_mps(temp, sal, depth),
                            f"sea water, Mackenzie (1981): T={temp:g} °C, S={sal:g}, D={depth:g} m", warn)
    temp = s.number("temperature_c", low=-60.0, high=60.0, unit="°C")
    s.done()
    t.done()
    return MediumConfig(air_sound_speed_mps(temp), f"air at {temp:g} °C: 331.3·sqrt(1 + T/273.15)")


def _input(t: _Table, geometry: ArrayGeometry) -> InputConfig:
    fs = t.number("samplerate_hz", 48000.0, low=1000.0, high=768000.0, unit="Hz")
    block = t.integer("block_frames", 1024, low=16, high=65536)
    source = t.string("source", "simulated", SOURCES)
    device = t.raw("device", None)
    if device is not None and (isinstance(device, bool) or not isinstance(device, (str, int))):
        t.fail("device", device, "a device name (string) or index (whole number)")
    path = t.string("path", None)
    if source in ("file", "session") and path is None:
        t.fail("path", _REQUIRED, f"a file or folder path when source = {source!r}")
    endpoint = t.string("endpoint", None)
    if source == "stream" and endpoint is None:
        t.fail("endpoint", _REQUIRED, "a ZeroMQ endpoint such as 'tcp://host:5560' when source = 'stream'")
    realtime = t.boolean("realtime", True)
    loop = t.boolean("loop", False)
    ring_s = t.number("ring_s", 2.0, low=0.05, high=600.0, unit="s")
    if ring_s * fs < 2 * block:
        t.fail("ring_s", ring_s, f"at least two blocks ({2 * block / fs:g} s)")
    noise = t.number("scene_noise_db", -60.0, low=-200.0, high=0.0, unit="dB")
    seed = t.integer("seed", 1, low=0)
    scene = tuple(_scene_source(s, fs) for s in t.tables("scene"))
    t.done()
    return InputConfig(fs, block, source, device, path, realtime, loop, endpoint, ring_s, scene, noise, seed)


def _scene_source(s: _Table, fs: float) -> SceneSource:
    az = s.number("azimuth_deg", low=-360.0, high=360.0, unit="°")
    el = s.number("elevation_deg", 0.0, low=-90.0, high=90.0, unit="°")
    signal = s.string("signal", "noise", SIGNALS)
    level = s.number("level_db", -20.0, low=-200.0, high=20.0, unit="dB")
    sweep = s.number("sweep_deg_per_s", 0.0, low=-360.0, high=360.0, unit="°/s")
    band = freq = None
    if signal == "tone":
        freq = s.number("frequency_hz", low=0.0, high=fs / 2, low_open=True, unit="Hz")
    else:
        band = tuple(_band(s, "band_hz", fs))
    period = s.number("period_s", 1.0, low=0.01, high=3600.0, unit="s")
    sweep_to = s.number("sweep_to_deg", None, low=-360.0, high=360.0, unit="°")
    if sweep_to is not None and (sweep_to == az or sweep == 0):
        s.fail("sweep_to_deg", sweep_to, "an azimuth other than azimuth_deg, with sweep_deg_per_s set")
    s.done()
    return SceneSource(az, el, signal, band, freq, level, sweep, period, sweep_to)


def _band(t: _Table, name: str, fs: float, default=_REQUIRED):
    expected = f"[low, high] in Hz with 0 < low < high < {fs / 2:g}"
    v = t.numbers(name, default, length=2, expected=expected)
    if v is None:
        return None
    if not 0.0 < v[0] < v[1] < fs / 2:
        t.fail(name, v, expected)
    return v


def _beams(t: _Table, fs: float):
    kind = t.one_of(["fan", "directions_deg", "grid"])
    if kind == "fan":
        s = t.table("fan")
        lo = s.number("from_deg", low=-360.0, high=360.0, unit="°")
        hi = s.number("to_deg", low=-360.0, high=360.0, unit="°")
        step = s.number("step_deg", low=0.0, high=360.0, low_open=True, unit="°")
        el = s.number("elevation_deg", 0.0, low=-90.0, high=90.0, unit="°")
        if hi < lo:
            s.fail("to_deg", hi, f"a number >= from_deg ({lo:g})")
        s.done()
        _admit_count(t, kind, dirs.fan_count(lo, hi, step))  # counted from the ranges before any is built
        power = dirs.fan(lo, hi, step, el)
    elif kind == "grid":
        s = t.table("grid")
        a = [s.number(k, low=-360.0, high=360.0, unit="°") for k in ("az_from_deg", "az_to_deg")]
        a_step = s.number("az_step_deg", low=0.0, high=360.0, low_open=True, unit="°")
        e = [s.number(k, low=-90.0, high=90.0, unit="°") for k in ("el_from_deg", "el_to_deg")]
        e_step = s.number("el_step_deg", low=0.0, high=180.0, low_open=True, unit="°")
        if a[1] < a[0]:
            s.fail("az_to_deg", a[1], f"a number >= az_from_deg ({a[0]:g})")
        if e[1] < e[0]:
            s.fail("el_to_deg", e[1], f"a number >= el_from_deg ({e[0]:g})")
        s.done()
        _admit_count(t, kind, dirs.fan_count(*a, a_step) * dirs.fan_count(*e, e_step))
        power = dirs.grid(a[0], a[1], a_step, e[0], e[1], e_step)
    else:
        power = np.array(_directions(t, "directions_deg", allow_empty=False))
        _admit_count(t, kind, len(power))
    shading = t.string("shading", "uniform", SHADINGS)
    sidelobe = t.number("sidelobe_db", 30.0, low=10.0, high=120.0, unit="dB")
    nbar = t.integer("nbar", 4, low=1, high=20)
    raw_band = t.raw("band_hz", _REQUIRED, "[low, high] or a list of [low, high] bands in Hz")
    if isinstance(raw_band, list) and raw_band and all(isinstance(b, list) for b in raw_band):
        bands = [_band(_Table({"band_hz": b}, t.where, f"{t.key('band_hz')}[{i}]"), "band_hz", fs)
                 for i, b in enumerate(raw_band)]
    else:
        bands = [_band(t, "band_hz", fs)]
    transition = t.number("transition_hz", None, low=fs / 10000.0, high=fs / 4, unit="Hz")
    audio = _directions(t, "audio_deg", allow_empty=True, default=[])
    _admit_count(t, "audio_deg", 0, len(audio))
    batch = t.integer("power_batch_blocks", 1, low=1, high=16)
    method = t.string("method", "das", METHODS)
    adaptive = _adaptive(t.table("adaptive", {}), fs)
    t.done()
    return BeamSet(power, np.array(audio).reshape(-1, 2), shading, sidelobe, nbar, tuple(bands),
                   transition, method, adaptive), batch


def _adaptive(t: _Table, fs: float) -> AdaptiveSettings:
    """``[beams.adaptive]``: the MVDR settings (used with ``method = "mvdr"``)."""
    average = t.number("average_s", 1.0, low=0.01, high=3600.0, unit="s")
    loading = t.number("loading_db", 10.0, low=-60.0, high=100.0, unit="dB")
    update = t.number("update_s", 0.25, low=0.01, high=3600.0, unit="s")
    band = _band(t, "band_hz", fs) if t.has("band_hz") else None
    # at most the longest frame the engine takes, at least 16 samples a frame
    resolution = t.number("resolution_hz", None, low=fs / cost.MAX_FRAME_SAMPLES, high=fs / 16.0, unit="Hz")
    t.done()
    return AdaptiveSettings(average, loading, update, None if band is None else tuple(band), resolution)


def _admit_count(t: _Table, name: str, n_power: int, n_audio: int = 0) -> None:
    try:
        cost.check_counts(n_power, n_audio)
    except cost.AdmissionError as exc:
        t.fail(name, f"{n_power or n_audio} directions", str(exc))


def parse_beams(data: dict, where: str, key: str, samplerate_hz: float):
    """Validate a map of ``[beams]`` keys (from a file or a control request).

    Returns ``(BeamSet, power_batch_blocks)``; raises ConfigError naming ``where`` and ``key.…``.
    """
    return _beams(_Table(data, where, key), samplerate_hz)


def _directions(t: _Table, name: str, allow_empty: bool, default=_REQUIRED):
    v = t.pairs(name, default, expected="a list of [azimuth_deg, elevation_deg] pairs")
    if not v and not allow_empty:
        t.fail(name, v, "at least one [azimuth_deg, elevation_deg] pair")
    for az, el in v:
        if not -360.0 <= az <= 360.0 or not -90.0 <= el <= 90.0:
            t.fail(name, [az, el], "azimuth from -360 to 360° and elevation from -90 to 90°")
    return v


def _path(t: _Table, name: str, folder: bool):
    """A path key: relative to the config file; must exist (a folder or a file)."""
    v = t.string(name, None)
    if v is None:
        return None
    p = _resolve(t, v)
    if not (os.path.isdir(p) if folder else os.path.isfile(p)):
        t.fail(name, v, f"an existing {'folder' if folder else 'file'} ({p} is not one)")
    return p


def _resolve(t: _Table, path: str) -> str:
    """An absolute path: a relative one is relative to the config file, like any path a file names."""
    p = os.path.expanduser(path)
    if not os.path.isabs(p):
        p = os.path.join(os.path.dirname(os.path.abspath(t.where)) if os.path.isfile(t.where) else os.getcwd(), p)
    return os.path.abspath(p)


def _security(t: _Table) -> SecurityConfig:
    server_key = _path(t, "server_key", folder=False)
    clients = _path(t, "clients", folder=True)
    readers = _path(t, "readers", folder=True)
    insecure = t.boolean("allow_insecure", False)
    if server_key is None and (clients or readers):
        t.fail("server_key", _REQUIRED, "the service's secret key file when clients or readers are given")
    if server_key is not None and clients is None:
        t.fail("clients", _REQUIRED, "a folder of operators' public keys when server_key is set")
    t.done()
    return SecurityConfig(server_key, clients, readers, insecure)


def _web(t: _Table, security: SecurityConfig) -> WebConfig:
    """``[web]`` (present: the service serves the page unless ``enabled = false``)."""
    enabled = t.boolean("enabled", True)
    settings = WebSettings(listen=t.string("listen", DEFAULT_LISTEN), tls_cert=_path(t, "tls_cert", folder=False),
                           tls_key=_path(t, "tls_key", folder=False),
                           operator_token_file=_path(t, "operator_token_file", folder=False),
                           reader_token_file=_path(t, "reader_token_file", folder=False),
                           allow_insecure=security.allow_insecure, key=_path(t, "key", folder=False))
    t.done()
    if enabled:
        try:
            settings.check(f"{t.where}: [web]")
        except UsageError as exc:
            raise ConfigError(t.where, "(file)", str(exc).split(": ", 1)[1]) from None
        if security.server_key is not None and settings.key is None:
            t.fail("key", _REQUIRED, "the web server's own secret key file (NAME.key_secret, its public key in "
                                     "[security] clients) when the service is secured")
    return WebConfig(enabled, settings)


def _publish(t: _Table) -> PublishConfig:
    ep = t.string("endpoint", DEFAULT_PUBLISH)
    raw = t.boolean("raw", False)
    queue = t.integer("send_queue", DEFAULT_SEND_QUEUE, low=1, high=100000)
    t.done()
    return PublishConfig(ep, raw, queue)


def _control(t: _Table) -> ControlConfig:
    ep = t.string("endpoint", DEFAULT_CONTROL)
    share = t.number("max_block_share", cost.DEFAULT_MAX_BLOCK_SHARE, low=0.0, high=1.0, low_open=True)
    t.done()
    return ControlConfig(ep, share)


def default_record_folder() -> str:
    """``$XDG_DATA_HOME/beamtap/recordings`` (``~/.local/share/beamtap/recordings`` when unset): never a
    folder relative to wherever the service happened to be started."""
    base = os.environ.get("XDG_DATA_HOME") or os.path.join(os.path.expanduser("~"), ".local", "share")
    return os.path.abspath(os.path.join(base, "beamtap", "recordings"))


def _record(t: _Table) -> RecordConfig:
    folder = t.string("folder", None)
    folder = default_record_folder() if folder is None else _resolve(t, folder)
    kinds = t.raw("what", ["raw"], f"a list drawn from {', '.join(RECORD_KINDS)}")
    if not isinstance(kinds, list) or not kinds or any(k not in RECORD_KINDS for k in kinds):
        t.fail("what", kinds, f"a non-empty list drawn from {', '.join(RECORD_KINDS)}")
    seg = t.number("segment_s", 60.0, low=1.0, high=3600.0, unit="s")
    fmt = t.string("sample_format", "float32", ("float32", "int24"))
    on_start = t.boolean("on_start", False)
    floor = t.number("min_free_mb", 200.0, low=0.0, unit="MB")
    queue = t.number("queue_s", 4.0, low=0.1, high=600.0, unit="s")
    t.done()
    return RecordConfig(folder, tuple(kinds), seg, fmt, on_start, floor, queue)
