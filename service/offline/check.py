"""``beamtap check``: what a config builds, what it would cost live, and what would stop it."""

from __future__ import annotations

import numpy as np

from beamtap.errors import UsageError

from ..assembly import cost_model, make_beamformer, summary
from ..config import Config
from ..engine import cost
from ..engine.beamformer import KERNELS_MISSING


def check_problems(config: Config, notes: list | None = None) -> list:
    """What would stop this config from running, beyond the config itself: the input (file,
    session, sound card) and the endpoints (can they be bound now). An endpoint already in use is
    only a note (appended to ``notes``): it may be this config's own service, running."""
    problems = []
    from ..sources import make_source  # noqa: PLC0415

    try:
        make_source(config)  # opens a file or session, looks up a sound card; starts nothing
    except UsageError as exc:
        problems.append(f"input: {exc}")
    import zmq  # noqa: PLC0415

    ctx = zmq.Context.instance()
    for name, endpoint in (("publish", config.publish.endpoint), ("control", config.control.endpoint)):
        with ctx.socket(zmq.PUB) as sock:
            sock.setsockopt(zmq.LINGER, 0)
            try:
                sock.bind(endpoint)
            except zmq.ZMQError as exc:
                if exc.errno == zmq.EADDRINUSE and notes is not None:
                    notes.append(f"[{name}] endpoint = {endpoint!r} is in use now (is the service already running?)")
                else:
                    problems.append(f"[{name}] endpoint = {endpoint!r}: cannot bind now ({exc.strerror})")
    return problems


def shape_warnings(config: Config) -> list:
    """Warnings about the array's shape: sensors in a line that the config did not declare as one
    (so the display would not say that a line cannot tell a bearing from its mirror image)."""
    geo = config.geometry
    p = geo.centred_positions_m
    if geo.kind != "line" and len(p) >= 2:
        s = np.linalg.svd(p, compute_uv=False)
        if s[1] < 1e-6 * max(s[0], 1e-12):
            return ["the sensors lie on one line: declare [array] line if they are evenly spaced; a line "
                    "cannot tell a direction from its mirror image about its axis"]
    return []


def check_text(config: Config) -> str:
    engine = make_beamformer(config)
    s = summary(config, engine)
    model = cost_model(config, engine)
    try:
        s["cost"] = model.admit(config.beams).describe() + f"; accepted live (limit {model.max_block_share:g})"
    except cost.AdmissionError as exc:
        s["cost"] = f"the live service would refuse these beams: {exc}"
    line = config.geometry.kind == "line"
    lines = [
        f"config        {config.where}",
        f"array         {s['array_kind']}, {s['active_sensors']} of {s['sensors']} sensors active, "
        f"{s['input_channels']} input channels, aperture {s['aperture_m']:.3f} m",
        f"sound speed   {s['sound_speed_mps']:.2f} m/s ({s['sound_speed_from']})",
        f"sampling      {s['samplerate_hz']:g} Hz, blocks of {s['block_frames']} frames "
        f"({1e3 * s['block_frames'] / s['samplerate_hz']:.2f} ms)",
        f"steering      max delay {s['max_steering_delay_ms']:.3f} ms; bulk delay D = "
        f"{s['bulk_delay_samples']} samples ({s['bulk_delay_ms']:.3f} ms)",
        f"latency       block + D = {s['latency_budget_ms']:.2f} ms"
        + (f" (power stream +{s['power_extra_latency_ms']:.1f} ms for batching)"
           if s['power_extra_latency_ms'] else ""),
        f"beams         {s['power_beams']} power, {s['audio_beams']} audio, shading {s['shading']}",
        "bands         " + ", ".join(f"{a:g}-{b:g} Hz (effective {bw:.0f} Hz)"
                                     for (a, b), bw in zip(s['bands_hz'], s['band_effective_bandwidth_hz'])),
        f"beamwidth     {s['beamwidth_deg']:.2f}° (-3 dB, azimuth) at {s['beamwidth_at_hz']:g} Hz, "
        f"look {s['beamwidth_look_deg'][0]:g}°/{s['beamwidth_look_deg'][1]:g}°",
        f"engine        FFT frames of {s['fft_size']}, steering data {s['steering_mb']:.1f} MB",
        f"live cost     {s['cost']}",
    ]
    if line:
        lines.append("note          a line array cannot tell a bearing from its mirror image about its axis")
    if KERNELS_MISSING:
        lines.append(f"warning       {KERNELS_MISSING}")
    lines += [f"warning       {w}" for w in s["warnings"] + shape_warnings(config)]
    return "\n".join(lines)
