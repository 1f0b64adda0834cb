"""MVDR beams in the streaming engine, against delay-and-sum and the published optimum.

Sources: Van Trees 2002 §6.2 (optimum SINR with one plane-wave interferer) and Capon 1969
(distortionless look direction). Signals are made here: band-limited noise plane waves by exact
FFT phase shifts and white sensor noise.
"""

import math

import numpy as np
import pytest

from beamtap.service.engine import ArrayGeometry, Beamformer
from beamtap.service.engine.beamformer import BeamSet
from beamtap.service.engine.directions import fan, unit_vectors
from beamtap.service.engine.mvdr import AdaptiveBeamformer, AdaptiveSettings

C, FS, F0 = 343.0, 16000.0, 1715.0
N = 16
GEO = ArrayGeometry.line(N, C / F0 / 2)  # half a wavelength at 1715 Hz


def plane_wave(az, spectrum, f):
    """Sensor signals of a source with the given spectrum (rfft bins ``f``), arriving from ``az``."""
    leads = GEO.centred_positions_m @ unit_vectors(az, 0.0) / C
    n = 2 * (len(f) - 1)
    return np.stack([np.fft.irfft(spectrum * np.exp(2j * np.pi * f * a), n) for a in leads], axis=1)


def band_noise(rng, n, lo, hi):
    f = np.fft.rfftfreq(n, 1 / FS)
    spec = np.fft.rfft(rng.standard_normal(n))
    spec[(f < lo) | (f > hi)] = 0.0
    return spec / math.sqrt(np.mean(np.fft.irfft(spec, n) ** 2)), f  # unit power in time


def run(engine, x, block=1024):
    audio, power = [], []
    for i in range(0, len(x), block):
        out = engine.process(x[i:i + block].astype(np.float32))
        audio.append(out.audio)
        power.append(out.power_db)
    return np.concatenate(audio), np.concatenate(power)


def engines(audio_deg, bands, settings):
    beams = BeamSet(fan(0.0, 180.0, 2.0), audio_deg, bands_hz=bands)
    das = Beamformer(GEO, C, FS, 1024, beams, pair_rows=False)
    mvdr = AdaptiveBeamformer(Beamformer(GEO, C, FS, 1024, beams, pair_rows=False), settings)
    return das, mvdr


def in_band(x, lo, hi):
    f = np.fft.rfftfreq(len(x), 1 / FS)
    spec = np.fft.rfft(x)
    spec[(f < lo) | (f > hi)] = 0.0
    return np.fft.irfft(spec, len(x))


def test_one_interferer_audio_sinr_near_the_optimum_and_far_above_delay_and_sum():
    """The issue's case: 16-sensor line at half a wavelength at 1715 Hz, signal at 90° and a
    plane-wave interferer at 63° (between delay-and-sum nulls), both noise in a 5 % band, the
    signal 0 dB and the interferer 40 dB above the per-sensor white noise in that band, adaptive
    band ±12 %, loading 10 dB. The output SINR of the MVDR audio beam, measured against the known
    signal in its band, within 1 dB of Van Trees' (2002, §6.2) closed-form optimum for one
    interferer (12.01 dB here; measured 11.15 dB with a 20 s average, 2026-12-05: a fixed seed, so
    the same figure every run), and at least 20 dB above delay-and-sum (measured 29.6 dB); the
    look direction's gain one within 0.1 dB."""
    rng = np.random.default_rng(7)
    n = 40 * 16384
    lo, hi = F0 * 0.975, F0 * 1.025
    s_spec, f = band_noise(rng, n, lo, hi)
    i_spec, _ = band_noise(rng, n, lo, hi)
    noise = math.sqrt((FS / 2) / (hi - lo))  # white, with the signal's power in the signal's band
    x = plane_wave(90.0, s_spec, f) + 100.0 * plane_wave(63.0, i_spec, f) + noise * rng.standard_normal((n, N))
    das, mvdr = engines([[90.0, 0.0]], [(F0 * 0.9, F0 * 1.1)],
                        AdaptiveSettings(average_s=20.0, loading_db=10.0, update_s=0.25, band_hz=(F0 * 0.88, F0 * 1.12)))
    src = np.fft.irfft(s_spec, n)
    results = {}
    for name, eng, d in (("das", das, das.bulk_delay_samples), ("mvdr", mvdr, mvdr.engine.bulk_delay_samples)):
        y, _ = run(eng, x)
        keep = slice(n // 2, n - 2048)  # after the averages settle
        yy = in_band(y[:, 0], lo, hi)[keep]
        ss = np.roll(src, d)[keep]  # the output is the input delayed by D
        gain = np.dot(yy, ss) / np.dot(ss, ss)
        resid = yy - gain * ss
        results[name] = (10 * math.log10(gain ** 2 * np.mean(ss ** 2) / np.mean(resid ** 2)), gain)
    pos = GEO.centred_positions_m[:, 0]
    rho = np.vdot(np.ones(N), np.exp(2j * np.pi * F0 * pos * math.cos(math.radians(63.0)) / C)) / N
    inr = 1e4
    optimum = 10 * math.log10(N * (1 - N * inr * abs(rho) ** 2 / (1 + N * inr)))
    assert abs(optimum - 12.008) < 0.01
    assert abs(results["mvdr"][0] - optimum) <= 1.0, (results, optimum)
    assert results["mvdr"][0] - results["das"][0] >= 20.0, results
    assert abs(20 * math.log10(abs(results["mvdr"][1]))) < 0.1  # the look direction's gain stays one
    # A young average has fewer snapshots than sensors (singular): its bins fall back to
    # delay-and-sum and are counted; here only in the first updates (half a second).
    per_update = len(mvdr.bins) + len(mvdr._p_sel)
    assert mvdr.updates > 100 and 0 < mvdr.fallback_bins <= 3 * per_update


def test_white_noise_gives_the_delay_and_sum_power_and_the_look_direction_passes_unchanged():
    """Spatially white noise: MVDR power equals delay-and-sum's within 1 dB in every beam (the
    issue; common practice: the MVDR weights of R = sigma^2 I are delay-and-sum). A broadband
    source from the look direction, 20 dB over the noise, comes out of the MVDR audio beam as out
    of the delay-and-sum one (the source delayed by D): amplitude within 0.1 dB and phase within
    1° in its band (Capon 1969: distortionless; the issue's limits). A single strong tone is not
    used here: the frame's leakage puts it into neighbouring bins with the tone's own spatial
    signature, which those bins' weights do not protect (measured: 0.4 dB lost at 30 dB SNR)."""
    rng = np.random.default_rng(3)
    n = 8 * 16384
    white = 0.1 * rng.standard_normal((n, N))
    das_w, mvdr_w = engines([[70.0, 0.0]], [(1400.0, 2000.0)], AdaptiveSettings(average_s=0.5, update_s=0.25))
    _, pa = run(das_w, white)
    _, pb = run(mvdr_w, white)
    level = np.median(pb[len(pb) // 2:], axis=0) - np.median(pa[len(pa) // 2:], axis=0)
    assert np.max(np.abs(level)) < 1.0, level
    s_spec, f = band_noise(rng, n, 1450.0, 1950.0)
    x = 0.3 * plane_wave(70.0, s_spec, f) + 0.03 * rng.standard_normal((n, N))
    das, mvdr = engines([[70.0, 0.0]], [(1400.0, 2000.0)], AdaptiveSettings(average_s=2.0, update_s=0.25))
    ya, _ = run(das, x)
    yb, _ = run(mvdr, x)
    keep = slice(n // 2, n - 2048)
    fa, fb = np.fft.rfft(ya[keep, 0]), np.fft.rfft(yb[keep, 0])
    ff = np.fft.rfftfreq(len(ya[keep, 0]), 1 / FS)
    band = (ff > 1500.0) & (ff < 1900.0)
    g = np.sum(fb[band] * np.conj(fa[band])) / np.sum(np.abs(fa[band]) ** 2)
    assert abs(20 * math.log10(abs(g))) < 0.1, g
    assert abs(math.degrees(np.angle(g))) < 1.0, g


def test_two_sources_at_half_the_rayleigh_resolution_are_two_peaks_for_mvdr_one_for_delay_and_sum():
    """Two uncorrelated equal-power sources in a band 10 % wide, half the delay-and-sum Rayleigh
    resolution apart (lambda / (N d) in sine space at the band centre, Van Trees 2002 §2.4 and
    ch. 7 on resolution), 20 dB SNR per sensor: MVDR power shows two peaks within ±1° of the
    true bearings, delay-and-sum one (the issue's check)."""
    from scipy.signal import find_peaks

    rng = np.random.default_rng(11)
    n = 12 * 16384
    lo, hi = F0 * 0.95, F0 * 1.05
    half = 0.5 * 2.0 / N  # half of lambda / (N d) with d = lambda / 2
    az1, az2 = math.degrees(math.acos(-half / 2)), math.degrees(math.acos(half / 2))
    s1, f = band_noise(rng, n, lo, hi)
    s2, _ = band_noise(rng, n, lo, hi)
    noise = 0.1 * math.sqrt((FS / 2) / (hi - lo))  # 20 dB below each source in the band
    x = plane_wave(az1, s1, f) + plane_wave(az2, s2, f) + noise * rng.standard_normal((n, N))
    beams = BeamSet(fan(80.0, 100.0, 0.25), [], bands_hz=[(lo, hi)])
    das = Beamformer(GEO, C, FS, 1024, beams, pair_rows=False)
    mvdr = AdaptiveBeamformer(Beamformer(GEO, C, FS, 1024, beams, pair_rows=False),
                              AdaptiveSettings(average_s=4.0, loading_db=10.0, update_s=0.25))
    az = beams.power_deg[:, 0]
    peaks = {}
    for name, eng in (("das", das), ("mvdr", mvdr)):
        _, p = run(eng, x)
        db = 10 * np.log10(np.mean(10 ** (p[len(p) // 2:, 0, :] / 10), axis=0))
        peaks[name] = az[find_peaks(db, prominence=0.5)[0]]
    assert len(peaks["das"]) == 1, peaks
    assert len(peaks["mvdr"]) == 2, peaks
    assert abs(min(peaks["mvdr"]) - min(az1, az2)) <= 1.0 and abs(max(peaks["mvdr"]) - max(az1, az2)) <= 1.0


def _mixed(rng, n):
    """Two broadband sources (80° and 100°, 10 dB apart) in white noise: a scene MVDR changes."""
    s1, f = band_noise(rng, n, 1400.0, 2000.0)
    s2, _ = band_noise(rng, n, 1400.0, 2000.0)
    return plane_wave(80.0, s1, f) + 0.3 * plane_wave(100.0, s2, f) + 0.05 * rng.standard_normal((n, N))


def test_block_sizes_agree_once_the_averages_settle():
    """The same input with blocks of 512, 1024 and 2048 at one adaptive resolution (``resolution_hz``
    4 Hz: frames of 4000 samples whatever the block): MVDR power agrees within 0.5 dB on every beam
    (the issue's tolerance; measured 2026-12-05: at most 0.26 dB, on the flank two beams from the
    10 dB stronger source).

    Why the resolution is fixed: MVDR's nulls next to the look direction are as deep as a bin's
    spatial signature is narrow, and a bin of a frame of N samples gathers fs / N Hz of spectrum
    (the narrowband condition, bandwidth x aperture transit time << 1: Van Trees 2002 §2.2 and
    §5.2, from memory). With each block's own frame (900, 1440, 2430 samples here) the flank beams
    differ by up to 2.2 dB once settled (16 s average), the shorter frames leaking more of the
    source; with one frame length, by 0.12 dB. The adaptive band covers the power band filter's
    skirts (1200-2200 Hz around the 1400-2000 Hz band), as in the SINR test, so that no bin the
    power reads keeps delay-and-sum weights. The average (16 s) has settled over the second half of
    49 s of input; with an 8 s average the blocks' different snapshot counts still showed (0.53 dB:
    the smaller blocks' averages hold more snapshots and null deeper, Reed, Mallett and Brennan
    1974)."""
    rng = np.random.default_rng(5)
    n = 48 * 16384
    x = _mixed(rng, n)
    settings = AdaptiveSettings(average_s=16.0, update_s=0.25, band_hz=(1200.0, 2200.0), resolution_hz=4.0)
    beams = BeamSet(fan(60.0, 120.0, 2.0), [], bands_hz=[(1400.0, 2000.0)], method="mvdr", adaptive=settings)
    levels = []
    for block in (512, 1024, 2048):
        eng = AdaptiveBeamformer(Beamformer(GEO, C, FS, block, beams, pair_rows=False), settings)
        assert eng.fft_size == 4000 and eng.status()["bin_hz"] == 4.0
        _, p = run(eng, x, block)
        levels.append(10 * np.log10(np.mean(10 ** (p[len(p) // 2:, 0, :] / 10), axis=0)))
    spread = np.ptp(np.array(levels), axis=0)
    az = fan(60.0, 120.0, 2.0)[:, 0]
    assert np.all(spread < 0.5), {float(a): round(float(s), 2) for a, s in zip(az, spread)}


def test_retarget_at_any_block_position_keeps_going():
    """A new beam set at a block boundary or inside a call, with MVDR on: the stream goes on, the
    new beams' power settles to what a fresh MVDR engine on them gives (within 0.5 dB)."""
    from beamtap.service.engine.mvdr import engine_for

    rng = np.random.default_rng(8)
    n = 6 * 16384
    x = _mixed(rng, n).astype(np.float32)
    first = BeamSet(fan(60.0, 120.0, 2.0), [[80.0, 0.0]], bands_hz=[(1400.0, 2000.0)], method="mvdr")
    second = BeamSet(fan(70.0, 110.0, 1.0), [[100.0, 0.0], [85.0, 0.0]], bands_hz=[(1450.0, 1950.0)],
                     method="mvdr")
    fresh = AdaptiveBeamformer(Beamformer(GEO, C, FS, 1024, second, pair_rows=False), second.adaptive)
    _, want = run(fresh, x)
    want_db = 10 * np.log10(np.mean(10 ** (want[len(want) // 2:, 0, :] / 10), axis=0))
    for at in (4096, 4096 + 300):
        eng = engine_for(lambda pair_rows: Beamformer(GEO, C, FS, 1024, first, pair_rows=pair_rows), first)
        eng.process(x[:at])
        eng.apply(eng.prepare(second))
        eng = engine_for(None, second, current=eng)
        assert eng.method == "mvdr" and eng.beams.power_deg.shape == (41, 2)
        audio, power = [], []
        for i in range(at, n, 1024):
            out = eng.process(x[i:i + 1024])
            audio.append(out.audio)
            power.append(out.power_db)
        power = np.concatenate(power)
        assert np.all(np.isfinite(np.concatenate(audio))) and np.concatenate(audio).shape[1] == 2
        got_db = 10 * np.log10(np.mean(10 ** (power[len(power) // 2:, 0, :] / 10), axis=0))
        assert np.max(np.abs(got_db - want_db)) < 0.5
        # and back to delay-and-sum: the same engine, unwrapped
        das = BeamSet(second.power_deg, second.audio_deg, bands_hz=second.bands_hz)
        eng.apply(eng.prepare(das))
        plain = engine_for(None, das, current=eng)
        assert isinstance(plain, Beamformer) and plain.on_spectra is None
        assert np.all(np.isfinite(plain.process(x[:2048]).audio))


def test_method_and_adaptive_keys_are_checked(tmp_path):
    import subprocess
    import sys

    base = ("[array]\nline = { count = 8, spacing_m = 0.1 }\n[medium]\nsound_speed_mps = 343.0\n[input]\n"
            "samplerate_hz = 16000\n[beams]\nfan = { from_deg = 0.0, to_deg = 180.0, step_deg = 5.0 }\n"
            "band_hz = [1000.0, 2000.0]\n")
    for extra, word in (('method = "capon"', "method"), ('method = "mvdr"\nadaptive = { loading_db = "x" }',
                                                          "loading_db"),
                        ("adaptive = { band_hz = [2000.0, 100.0] }", "band_hz"), ("adaptive = { speed = 1 }", "speed"),
                        ("adaptive = { update_s = 0.0 }", "update_s"), ("adaptive = { average_s = nan }", "average_s"),
                        ("adaptive = { resolution_hz = 0.0 }", "resolution_hz"),
                        ('adaptive = { resolution_hz = "fine" }', "resolution_hz")):
        cfg = tmp_path / "c.toml"
        cfg.write_text(base + extra + "\n")
        r = subprocess.run([sys.executable, "-m", "beamtap", "check", str(cfg)], capture_output=True, text=True,
                           timeout=120)
        assert r.returncode == 2 and word in r.stderr and len(r.stderr.strip().splitlines()) == 1, (extra, r.stderr)


def test_the_service_switches_method_live_and_reports_it(tmp_path):
    """`ctl beams` switches a running service to MVDR and back: the beam table says which, the
    status reports the loading, update time, updates and fallbacks; a service whose history holds
    mirror-pair rows switches too (a sensor-row engine takes the stream over), without a gap."""
    import time

    from beamtap.client import Controller, Subscriber

    from conftest import line_config, running_service

    cfg = line_config(input_extra="scene_noise_db = -40.0",
                      scene=[{"azimuth_deg": 70.0, "signal": "noise", "band_hz": [200.0, 2000.0], "level_db": -24.0}])
    with running_service(tmp_path, cfg) as svc, Controller(svc.control, timeout_s=20) as ctl:
        reply = ctl.beams(set={"method": "mvdr", "adaptive": {"update_s": 0.1, "loading_db": 12.0,
                                                              "resolution_hz": 5.0}})
        assert reply["beams"]["method"] == "mvdr"
        deadline = time.monotonic() + 20
        adaptive = None
        while time.monotonic() < deadline:
            adaptive = ctl.status().get("adaptive")
            if adaptive and adaptive["weight_updates"] >= 3:
                break
            time.sleep(0.1)
        assert adaptive["loading_db"] == 12.0 and adaptive["update_s"] == 0.1 and adaptive["weight_updates"] >= 3
        assert adaptive["resolution_hz"] == 5.0 and 4.0 < adaptive["bin_hz"] <= 5.0  # frames of fs / 5 Hz or more
        assert "fallback_bins" in adaptive
        with Subscriber(svc.publish, topics=["beams"], timeout_s=10) as sub:
            table = sub.recv().header
        assert table["method"] == "mvdr" and table["adaptive"]["loading_db"] == 12.0
        ctl.beams(set={"method": "das"})
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline and ctl.status().get("adaptive") is not None:
            time.sleep(0.1)
        assert ctl.status()["adaptive"] is None
    big = line_config(count=64, spacing_m=0.5, input_extra="scene_noise_db = -40.0")
    with running_service(tmp_path, big) as svc, Controller(svc.control, timeout_s=30) as ctl:
        # A symmetric 64-sensor line runs on mirror-pair rows; MVDR gets an engine with sensor rows
        # that takes the stream over, with no gap.
        with Subscriber(svc.publish, topics=["audio", "power"], timeout_s=10) as sub:
            ctl.beams(set={"method": "mvdr"})
            deadline = time.monotonic() + 20
            while time.monotonic() < deadline and not (ctl.status().get("adaptive") or {}).get("weight_updates"):
                time.sleep(0.1)
            frames = [sub.recv() for _ in range(40)]
        assert ctl.status()["adaptive"]["weight_updates"] >= 1
        assert not any(f.gap for f in frames) and ctl.status()["gaps"] == 0
        assert all(np.all(np.isfinite(f.data)) for f in frames)
        assert ctl.status()["state"] == "running" and ctl.status()["engine_rows"] == "sensors"
        # and back: delay-and-sum on mirror-pair rows again (the faster layout), still without a gap
        with Subscriber(svc.publish, topics=["audio", "power"], timeout_s=10) as sub:
            ctl.beams(set={"method": "das"})
            frames = [sub.recv() for _ in range(40)]
        status = ctl.status()
        assert status["engine_rows"] == "mirror pairs" and status["adaptive"] is None
        assert not any(f.gap for f in frames) and status["gaps"] == 0 and status["state"] == "running"
        assert all(np.all(np.isfinite(f.data)) for f in frames)


def test_pattern_draws_the_adaptive_response_for_a_described_scene(tmp_path):
    """`beamtap pattern --interferer AZ,DB`: the MVDR response for that scene beside delay-and-sum's.
    Its look direction has gain one exactly (Capon 1969) and its interferer a null far below
    delay-and-sum's response there (Van Trees 2002 §6.2: the optimum weights null a strong
    interferer); a malformed --interferer is a one-line usage error."""
    import csv
    import subprocess
    import sys

    out = tmp_path / "p.csv"
    r = subprocess.run([sys.executable, "-m", "beamtap", "pattern", "--freq", "1500", "--look", "90",
                        "--interferer", "63,40", "--interferer", "120,30", "--out", str(out)],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    with open(out, newline="") as f:
        rows = list(csv.DictReader(f))
    assert list(rows[0]) == ["azimuth_deg", "elevation_deg", "response_db", "mvdr_response_db"]
    at = {float(row["azimuth_deg"]): row for row in rows}
    assert abs(float(at[90.0]["mvdr_response_db"])) < 1e-6
    assert float(at[63.0]["mvdr_response_db"]) < float(at[63.0]["response_db"]) - 20.0
    assert float(at[120.0]["mvdr_response_db"]) < float(at[120.0]["response_db"]) - 10.0
    for bad in ("63", "x,1", "63,1e9", "nan,3"):
        r = subprocess.run([sys.executable, "-m", "beamtap", "pattern", "--freq", "1500", "--interferer", bad,
                            "--out", str(tmp_path / "q.csv")], capture_output=True, text=True, timeout=120)
        assert r.returncode == 2 and "--interferer" in r.stderr and "Traceback" not in r.stderr


def test_hostile_input_and_requests_do_not_break_adaptive_beams(tmp_path):
    """NaN, infinities, silence and full-scale junk through MVDR beams: outputs stay finite, the
    engine goes on; wrong types and values for the method and its settings in a control request
    get one-line error replies and leave the service as it was."""
    rng = np.random.default_rng(4)
    beams = BeamSet(fan(60.0, 120.0, 5.0), [[90.0, 0.0]], bands_hz=[(1400.0, 2000.0)])
    eng = AdaptiveBeamformer(Beamformer(GEO, C, FS, 512, beams, pair_rows=False),
                             AdaptiveSettings(average_s=0.2, update_s=0.05))
    x = (0.1 * rng.standard_normal((512 * 40, N))).astype(np.float32)
    x[512 * 3:512 * 4] = np.nan
    x[512 * 6, :] = np.inf
    x[512 * 10:512 * 20] = 0.0  # silence: singular cross-spectra
    x[512 * 25:512 * 26] = 1e30
    audio, power = run(eng, x, 512)
    assert np.all(np.isfinite(audio)) and np.all(np.isfinite(power))
    assert eng.updates > 10

    from beamtap.client import Controller, ServiceError

    from conftest import line_config, running_service

    with running_service(tmp_path, line_config(input_extra="scene_noise_db = -40.0")) as svc, \
            Controller(svc.control, timeout_s=20) as ctl:
        for bad, word in (({"method": 3}, "method"), ({"method": "music"}, "method"),
                          ({"adaptive": {"loading_db": None}}, "loading_db"),
                          ({"adaptive": {"average_s": -1}}, "average_s"), ({"adaptive": [1, 2]}, "adaptive"),
                          ({"adaptive": {"band_hz": [1e9, 2e9]}}, "band_hz"),
                          ({"adaptive": {"update_s": float("inf")}}, "update_s"),
                          ({"adaptive": {"resolution_hz": float("nan")}}, "resolution_hz"),
                          ({"adaptive": {"resolution_hz": 1e-9}}, "resolution_hz")):
            try:
                ctl.beams(set=bad)
                raise AssertionError(f"accepted {bad}")
            except ServiceError as exc:
                assert word in str(exc) and "\n" not in str(exc)
        assert ctl.beams()["beams"]["method"] == "das" and ctl.status()["state"] == "running"


@pytest.mark.parametrize("to_pairs", [False, True])
def test_an_engine_of_the_other_row_layout_takes_over_a_stream(to_pairs):
    """The mirror-pair rows' history turned back into sensor rows (x_a = (s + d) / 2, x_b = (s - d) / 2)
    and handed to a sensor-row engine, or sensor rows turned into pairs (s = x_a + x_b, d = x_a - x_b)
    for a pair engine: its delay-and-sum output continues the first engine's own, to float32
    rounding (the two layouts form the same sums)."""
    geo = ArrayGeometry.line(64, 0.5)
    beams = BeamSet(fan(0.0, 180.0, 3.0), [[70.0, 0.0]], bands_hz=[(300.0, 1400.0)])
    rng = np.random.default_rng(9)
    x = (0.1 * rng.standard_normal((1024 * 12, 64))).astype(np.float32)
    first = Beamformer(geo, 1500.0, 48000.0, 1024, beams, pair_rows=not to_pairs)
    then = Beamformer(geo, 1500.0, 48000.0, 1024, beams, pair_rows=to_pairs)
    assert (first.mirror_pair_rows, then.mirror_pair_rows) == (not to_pairs, to_pairs)
    ref = Beamformer(geo, 1500.0, 48000.0, 1024, beams)
    first.process(x[:1024 * 6])
    first.flush()
    then.take_over(first)
    ref.process(x[:1024 * 6])
    ref.flush()
    a, b = then.process(x[1024 * 6:]), ref.process(x[1024 * 6:])
    np.testing.assert_allclose(a.audio, b.audio, atol=2e-6)
    np.testing.assert_allclose(a.power_db, b.power_db, atol=1e-3)


def _local_peaks(row_db, az_deg, lo_deg, hi_deg, within_db):
    """Indices of the local maxima across the fan in [lo_deg, hi_deg] within ``within_db`` of the row's top."""
    i = np.where((row_db[1:-1] > row_db[:-2]) & (row_db[1:-1] >= row_db[2:]))[0] + 1
    return [j for j in i if row_db[j] > row_db.max() - within_db and lo_deg <= az_deg[j] <= hi_deg]


def test_the_demo_mvdr_variant_separates_the_pinger_from_the_passing_boat():
    """The demo config's commented MVDR lines, uncommented as a user would, against the demo as it is,
    on the demo's own (invented) scene: a boat sweeping 30° -> 150° at 4°/s past a pinger at 118°.

    While the boat is 6-12° from the pinger (inside delay-and-sum's Hann-shaded main lobe, about
    16° wide here), delay-and-sum shows one lobe in every row; the MVDR beams keep the pinger as
    a peak of its own, with a dip towards the boat. Measured 2026-12-05 on 140 rows: delay-and-sum
    one peak in all; MVDR a pinger peak within 2° in 136, a median dip of 12.3 dB. The rule that
    sources closer than a beamwidth merge for delay-and-sum and not for MVDR is common practice
    (Van Trees 2002, §6.2, from memory); the thresholds here are this demo's claim in the README.
    Detection (on, with its defaults) finds the boat and the pinger on the MVDR beams as it does
    on delay-and-sum's.
    """
    from importlib.resources import files

    from beamtap.service import config as cfg
    from beamtap.service.assembly import make_beamformer, make_detection, make_scene

    text = files("beamtap.service").joinpath("demo.toml").read_text()
    commented = ['# method = "mvdr"', "# adaptive = {"]
    assert all(line in text for line in commented), "the demo config lost its commented MVDR variant"
    variant = text
    for line in commented:
        variant = variant.replace(line, line[2:])
    detect_on = "\n[detect]\nenabled = true\n"
    das_config, mvdr_config = cfg.loads(text + detect_on, "demo"), cfg.loads(variant + detect_on, "demo, MVDR")
    assert (das_config.beams.method, mvdr_config.beams.method) == ("das", "mvdr")

    fs, block = das_config.input.samplerate_hz, das_config.input.block_frames
    scene = make_scene(das_config)
    x = np.concatenate([scene.render(block) for _ in range(int(27.0 * fs / block))])
    az = das_config.beams.power_deg[:, 0]
    boat = das_config.input.scene[0]
    pinger_deg = das_config.input.scene[1].azimuth_deg
    results, found = {}, {}
    for name, config in (("das", das_config), ("mvdr", mvdr_config)):
        bf = make_beamformer(config)
        stage = make_detection(config, config.beams, bf.band_filters)
        rows, firsts, dets = [], [], []
        for i in range(0, len(x), block):
            out = bf.process(x[i:i + block])
            rows.append(out.power_db[:, 0])
            firsts.append(out.power_first_sample)
            dets += [d for _, _, d, _, _ in stage.rows(out.power_db, out.power_first_sample,
                                                        [None] * len(out.power_db))]
        bf.close()
        t = (np.concatenate(firsts) + block / 2) / fs
        boat_deg = boat.azimuth_deg + boat.sweep_deg_per_s * t
        apart = np.abs(boat_deg - pinger_deg)
        close = (apart >= 6.0) & (apart <= 12.0) & (t > 5.0)
        results[name] = np.concatenate(rows)[close]
        # detections: the boat while it is well clear of the pinger, the pinger throughout
        far = np.where((apart > 20.0) & (t > 5.0))[0]
        found[name] = (np.mean([any(abs(d["bearing_deg"] - boat_deg[k]) < 4.0 for d in dets[k]) for k in far]),
                       np.mean([any(abs(d["bearing_deg"] - pinger_deg) < 2.0 for d in dets[k])
                                for k in np.where(t > 5.0)[0]]))
    assert len(results["das"]) > 100  # about 3 s of rows on each side of the crossing
    # Detection finds the sources on MVDR beams (measured 2026-12-05, share of rows with the boat
    # while it is over 20° from the pinger / with the pinger: delay-and-sum 0.80 / 0.67, MVDR with
    # its measured threshold 1.0 / 0.98; with the tail-quantile threshold it replaced, the boat
    # was never detected on MVDR beams).
    assert found["mvdr"][0] >= 0.9 and found["mvdr"][1] >= 0.9, found
    assert found["das"][0] >= 0.7, found

    # delay-and-sum: one lobe for both sources in every row
    das_peaks = [len(_local_peaks(r, az, 90.0, 150.0, 10.0)) for r in results["das"]]
    assert all(n == 1 for n in das_peaks), np.bincount(das_peaks)
    # MVDR: the pinger apart, with a visible dip between it and the boat
    separate, dips = 0, []
    for row in results["mvdr"]:
        peaks = _local_peaks(row, az, 90.0, 150.0, 10.0)
        at_pinger = [j for j in peaks if abs(az[j] - pinger_deg) <= 2.0]
        others = [j for j in peaks if j not in at_pinger]
        if at_pinger and others:
            separate += 1
            lo, hi = sorted([at_pinger[0], others[0]])
            dips.append(row[at_pinger[0]] - row[lo:hi + 1].min())
    assert separate >= 0.9 * len(results["mvdr"]), (separate, len(results["mvdr"]))
    assert np.median(dips) >= 5.0, np.median(dips)


def test_mvdr_weight_updates_are_priced_and_admission_counts_them():
    """The cost model adds an MVDR beam set's weight updates (averaged over an update period) to the
    delay-and-sum work it is formed over; more frequent updates cost more; a beam set that
    delay-and-sum can form in real time is refused as MVDR when its updates would not keep up,
    with a one-line reason that names update_s. (The formula's constants were timed piece by piece
    on 2026-12-05; against bench/mvdr_bench.py it gives 2.35 ms and 67 ms an update for the
    16- and 64-sensor cases, measured 2.3 and 54 ms: DEVELOPERS.md.)"""
    from dataclasses import replace

    from beamtap.service.engine import cost

    model = cost.model_for(ArrayGeometry.line(16, 0.5), 1500.0, 48000.0, 1024)
    das = BeamSet(fan(0.0, 180.0, 0.05), bands_hz=[(300.0, 1400.0)])  # 3601 power beams
    every = {u: replace(das, method="mvdr", adaptive=AdaptiveSettings(update_s=u)) for u in (0.02, 0.1, 1.0)}
    base = model.price(das).work_ns
    assert model.price(every[0.1], adaptive=False).work_ns == base  # what calibration measures against
    extra = {u: model.price(b).work_ns - base for u, b in every.items()}
    assert 0 < extra[1.0] < extra[0.1] < extra[0.02]
    assert model.admit(das).share < model.max_block_share
    model.admit(every[1.0])  # updated once a second: the same beams keep up
    with pytest.raises(cost.AdmissionError, match="above max_block_share.*update_s"):
        model.admit(every[0.02])
