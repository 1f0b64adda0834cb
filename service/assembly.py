"""How a config becomes an engine: the beamformer, the simulated scene, the array summary and the
admission check's cost model. Both the live service and the offline commands build from here."""

from __future__ import annotations

import numpy as np

from beamtap.errors import UsageError

from .config import Config
from .engine import cost, diagnostics
from .engine.beamformer import Beamformer
from .engine.detect import DetectionStage
from .engine.mvdr import engine_for
from .engine.directions import unit_vectors
from .engine.scene import Scene
from .engine.shading import shading_weights


def make_beamformer(config: Config, beams=None, threads: int = 1, live: bool = False) -> Beamformer:
    """The engine as a config describes it (a set-up it cannot build is a usage error); ``threads``
    as :meth:`Config.engine_threads` chooses them. ``live``: helpers stay awake from one block to
    the next (they spin for two block periods), so that a block never waits for one to wake."""
    inp = config.input
    spin_s = min(2.0 * inp.block_frames / inp.samplerate_hz, 1.0) if live else 0.0003
    beams = beams or config.beams

    def make(pair_rows: bool) -> Beamformer:
        return Beamformer(config.geometry, config.sound_speed_mps, inp.samplerate_hz, inp.block_frames, beams,
                          config.power_batch_blocks, threads=threads, spin_s=spin_s, pair_rows=pair_rows)

    try:
        return engine_for(make, beams)  # delay-and-sum, or MVDR over it ([beams] method)
    except ValueError as exc:
        raise UsageError(f"{config.where}: [beams] {exc}") from None


def make_detection(config: Config, beams, band_filters, settings=None) -> DetectionStage:
    """The detection and tracking stage for ``beams`` and their band filters (an engine's
    ``band_filters``, or a prepared steering's ``bands``), ``settings`` over the config's. Built off
    the processing thread: it scans a beamwidth."""
    settings = settings or config.detect
    band = beams.bands_hz[min(settings.band, len(beams.bands_hz) - 1)]
    mid = beams.power_deg[len(beams.power_deg) // 2]
    width = diagnostics.beamwidth_deg(config.geometry.centred_positions_m, beam_weights(config, mid), mid,
                                      0.5 * (band[0] + band[1]), config.sound_speed_mps)
    lobe = width if np.isfinite(width) else 10.0
    # Adaptive beams' power does not follow the gamma law: their threshold is measured (detect.py).
    law = "measured" if beams.method == "mvdr" else "gamma"
    return DetectionStage(beams.power_deg, [ev.filter.taps for ev in band_filters], config.input.block_frames,
                          config.input.samplerate_hz, settings, lobe_deg=lobe, law=law)


def cost_model(config: Config, engine: Beamformer) -> cost.CostModel:
    """The admission check's time formula for this array, calibrated once on ``engine`` (which is
    reset to sample 0 afterwards)."""
    inp = config.input
    base = cost.model_for(config.geometry, config.sound_speed_mps, inp.samplerate_hz, inp.block_frames,
                          config.control.max_block_share)
    return cost.calibrate(base, engine, engine.beams)


def make_scene(config: Config) -> Scene:
    """The config's simulated scene."""
    inp = config.input
    return Scene(config.geometry, config.sound_speed_mps, inp.samplerate_hz, inp.scene,
                 inp.scene_noise_db, inp.seed)


def beam_weights(config: Config, look_deg) -> np.ndarray:
    """Shading weights of one look direction over the active sensors."""
    geo, beams = config.geometry, config.beams
    u = unit_vectors(look_deg[0], look_deg[1])[None, :]
    return shading_weights(geo.kind, geo.positions_m, geo.active, u, beams.shading,
                           beams.sidelobe_db, beams.nbar)[0]


def summary(config: Config, bf: Beamformer | None = None) -> dict:
    """Array summary as a dict (what ``check`` prints)."""
    geo, inp, beams = config.geometry, config.input, config.beams
    bf = bf or make_beamformer(config)
    fs = inp.samplerate_hz
    d = bf.bulk_delay_samples
    centre_hz = float(np.mean([np.mean(b) for b in beams.bands_hz]))
    top_hz = max(b[1] for b in beams.bands_hz)
    mid = beams.power_deg[len(beams.power_deg) // 2]
    pos = geo.centred_positions_m
    weights_all = shading_weights(geo.kind, geo.positions_m, geo.active,
                                  unit_vectors(beams.power_deg[:, 0], beams.power_deg[:, 1]),
                                  beams.shading, beams.sidelobe_db, beams.nbar)
    warnings = list(config.medium.warnings) + diagnostics.aliasing_warnings(
        geo.kind, pos, geo.spacing_m, beams.power_deg, weights_all, top_hz, config.sound_speed_mps)
    return {
        "sensors": int(geo.n_sensors),
        "active_sensors": int(geo.active.sum()),
        "array_kind": geo.kind,
        "input_channels": int(geo.n_input_channels),
        "aperture_m": geo.aperture_m,
        "sound_speed_mps": config.sound_speed_mps,
        "sound_speed_from": config.medium.source,
        "samplerate_hz": fs,
        "block_frames": inp.block_frames,
        "max_steering_delay_ms": 1e3 * geo.max_steering_delay_s(config.sound_speed_mps),
        "bulk_delay_samples": d,
        "bulk_delay_ms": 1e3 * d / fs,
        "latency_budget_ms": 1e3 * (inp.block_frames + d) / fs,
        "power_extra_latency_ms": 1e3 * (config.power_batch_blocks - 1) * inp.block_frames / fs,
        "power_beams": int(len(beams.power_deg)),
        "audio_beams": int(len(beams.audio_deg)),
        "shading": beams.shading,
        "bands_hz": [list(b) for b in beams.bands_hz],
        "band_effective_bandwidth_hz": [ev_bw for ev_bw in _effective_bandwidths(bf)],
        "beamwidth_at_hz": centre_hz,
        "beamwidth_look_deg": [float(mid[0]), float(mid[1])],
        "beamwidth_deg": diagnostics.beamwidth_deg(pos, beam_weights(config, mid), mid, centre_hz,
                                                   config.sound_speed_mps),
        "fft_size": bf.fft_size,
        "steering_mb": bf.steering_bytes / 2**20,
        "warnings": warnings,
    }


def _effective_bandwidths(bf: Beamformer):
    return [float(bf.samplerate_hz / 2.0 * np.sum(ev.filter.taps**2)) for ev in bf.band_filters]
