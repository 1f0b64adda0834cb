"""The beamformer engine through its public interface, against published values."""

import numpy as np
import pytest
from scipy.signal import lfilter

from beamtap.service.engine import ArrayGeometry, Beamformer
from beamtap.service.engine.bandpower import design_band_filter
from beamtap.service.engine.beamformer import COMPILED_AVAILABLE, BeamSet
from beamtap.service.engine.directions import fan, grid
from beamtap.service.engine.transform import ColumnFFT

from conftest import broadband_plane_wave, tone_plane_wave

FS, C = 48000.0, 1500.0


def fan_power_db(geo, x, directions, shading="uniform", band=(1000.0, 2000.0), sidelobe_db=30.0, block=1024):
    """Mean band power over the signal for each beam (dB), from the engine."""
    bf = Beamformer(geo, C, FS, block, BeamSet(directions, shading=shading, sidelobe_db=sidelobe_db,
                                               bands_hz=[band]))
    r = bf.process(x)
    settle = int(np.ceil((2 * bf.bulk_delay_samples + len(bf.band_filters[0].filter.taps)) / block)) + 1
    p = 10 ** (r.power_db[settle:, 0, :] / 10)
    return 10 * np.log10(p.mean(axis=0))


def u_space_directions(step=0.0005):
    """Directions equally spaced in u = cos(angle from axis), for a line along x."""
    u = np.arange(-1.0, 1.0 + step / 2, step)
    return np.column_stack([np.degrees(np.arccos(np.clip(u, -1, 1))), np.zeros_like(u)]), u


def sidelobes_db(level_db, u, u0=0.0):
    """Main-lobe-relative level and the sidelobe region beyond the first null on either side."""
    rel = level_db - level_db.max()
    c = int(np.argmin(np.abs(u - u0)))
    right = c
    while right + 1 < len(u) and rel[right + 1] < rel[right]:
        right += 1
    left = c
    while left > 0 and rel[left - 1] < rel[left]:
        left -= 1
    return rel, left, right


@pytest.fixture(scope="module")
def broadside_tone():
    # 16 sensors at half a wavelength: d = λ/2 at 1500 Hz for c = 1500 m/s.
    geo = ArrayGeometry.line(16, 0.5)
    x = tone_plane_wave(geo.centred_positions_m, C, FS, 90.0, 1500.0, 24 * 1024)
    return geo, x


def test_uniform_first_sidelobe_and_null(broadside_tone):
    """Van Trees (2002) §2.4: uniform line, first sidelobe -13.26 dB (large-N limit;
    within 0.3 dB for N = 16) and first null at u - u0 = λ/(N d) = 0.125."""
    geo, x = broadside_tone
    dirs, u = u_space_directions()
    level = fan_power_db(geo, x, dirs)
    rel, left, right = sidelobes_db(level, u)
    assert u[right] == pytest.approx(0.125, abs=0.001)
    assert u[left] == pytest.approx(-0.125, abs=0.001)
    first_sidelobe = rel[right:right + 400].max()
    assert first_sidelobe == pytest.approx(-13.26, abs=0.3)


def test_hann_highest_sidelobe(broadside_tone):
    """Harris (1978), Proc. IEEE 66(1), Table 1: Hann highest sidelobe -31.5 dB (±1 dB)."""
    geo, x = broadside_tone
    dirs, u = u_space_directions()
    rel, left, right = sidelobes_db(fan_power_db(geo, x, dirs, "hann"), u)
    highest = max(rel[right:].max(), rel[:left + 1].max())
    assert highest == pytest.approx(-31.5, abs=1.0)


def test_chebyshev_sidelobes_at_design_level(broadside_tone):
    """Dolph (1946): a Chebyshev taper for 30 dB keeps every sidelobe at or below -30 dB (+0.5 dB)."""
    geo, x = broadside_tone
    dirs, u = u_space_directions()
    rel, left, right = sidelobes_db(fan_power_db(geo, x, dirs, "chebyshev", sidelobe_db=30.0), u)
    assert max(rel[right:].max(), rel[:left + 1].max()) <= -30.0 + 0.5
    # and the design is equiripple: the highest sidelobe is at the design level, not far below it
    assert max(rel[right:].max(), rel[:left + 1].max()) >= -30.0 - 0.5


def test_taylor_sidelobes_near_design_level(broadside_tone):
    """Taylor (1955): n̄ = 4, 30 dB design keeps the highest sidelobe near -30 dB
    (±1 dB, the discrete 16-element sampling of the line-source taper; common practice)."""
    geo, x = broadside_tone
    dirs, u = u_space_directions()
    rel, left, right = sidelobes_db(fan_power_db(geo, x, dirs, "taylor", sidelobe_db=30.0), u)
    assert max(rel[right:].max(), rel[:left + 1].max()) == pytest.approx(-30.0, abs=1.0)


@pytest.mark.parametrize("shading", ["uniform", "hamming"])
def test_array_gain_against_independent_noise(rng, shading):
    """Van Trees (2002) §2.6: white-noise array gain 10·log10((Σw)²/Σw²); 12.04 dB for
    16 uniform sensors. Within 0.3 dB."""
    geo = ArrayGeometry.line(16, 0.5)
    n = 10 * int(FS)
    x = (0.05 * rng.standard_normal((n, 16))).astype(np.float32)
    bf = Beamformer(geo, C, FS, 4096, BeamSet([[90.0, 0.0], [60.0, 0.0]], shading=shading,
                                              bands_hz=[(500.0, 5000.0)]))
    r = bf.process(x)
    beam_power = np.mean(10 ** (r.power_db[4:, 0, :] / 10), axis=0)
    g = bf.band_filters[0].filter.taps
    sensor_power = np.mean([np.mean(lfilter(g, 1, x[:, m].astype(np.float64))[len(g):] ** 2) for m in range(16)])
    from beamtap.service.engine.shading import taper
    w = taper(shading, 16)
    expected = 10 * np.log10(w.sum() ** 2 / np.sum(w ** 2))
    if shading == "uniform":
        assert expected == pytest.approx(12.04, abs=0.005)
    for b in range(2):
        assert 10 * np.log10(sensor_power / beam_power[b]) == pytest.approx(expected, abs=0.3)


def test_band_power_matches_its_definition(rng):
    """Band power = mean over each block of (g * y)², g the band FIR and y the beam audio:
    checked against scipy.signal.lfilter on the engine's own audio beam."""
    geo = ArrayGeometry.line(12, 0.4)
    x, _ = broadband_plane_wave(geo.centred_positions_m, C, FS, 71.0, 0.1 * rng.standard_normal(1 << 16))
    bands = [(400.0, 1200.0), (2000.0, 6000.0)]
    bf = Beamformer(geo, C, FS, 1024, BeamSet([[71.0, 0.0]], [[71.0, 0.0]], bands_hz=bands))
    r = bf.process(x)
    y = r.audio[:, 0].astype(np.float64)
    delays = [(len(design_band_filter(b, FS).taps) - 1) // 2 for b in bands]
    for i, band in enumerate(bands):
        g = design_band_filter(band, FS).taps
        # A band with a shorter filter is held back to the longest filter's delay, so both bands of a
        # row describe the same input span; before the stream the beam output is zero.
        hold = max(delays) - delays[i]
        z = np.concatenate([np.zeros(hold), lfilter(g, 1, y)])
        blocks = (r.power_first_sample + bf.power_delay_samples) // 1024  # the power block of each row
        want = np.array([np.mean(z[k * 1024:(k + 1) * 1024] ** 2) for k in blocks])
        assert np.allclose(r.power_db[:, i, 0], 10 * np.log10(want), atol=0.01)
    # stamped with the input span: block start less D and the longest band delay; none before the input
    delay = bf.bulk_delay_samples + max(delays)
    assert bf.power_delay_samples == delay
    first_block = -(-delay // 1024)
    assert np.array_equal(r.power_first_sample, 1024 * np.arange(first_block, first_block + len(r.power_db)) - delay)
    assert r.power_first_sample[0] >= 0 and len(r.power_db) == len(x) // 1024 - first_block


def test_full_scale_sine_reads_minus_3_db():
    """dB re full scale: a sine of amplitude 1 has mean square 1/2, -3.01 dB (common practice)."""
    geo = ArrayGeometry.line(4, 0.1)
    x = tone_plane_wave(geo.centred_positions_m, C, FS, 90.0, 1000.0, 32 * 1024, amplitude=1.0)
    x *= 0.999  # stay below the clip count threshold; -0.0087 dB
    bf = Beamformer(geo, C, FS, 1024, BeamSet([[90.0, 0.0]], bands_hz=[(500.0, 1500.0)]))
    r = bf.process(x)
    assert np.mean(r.power_db[8:, 0, 0]) == pytest.approx(-3.0103 + 20 * np.log10(0.999), abs=0.02)


@pytest.mark.parametrize("geo", [
    ArrayGeometry.line(8, 0.5, dead=np.array([0, 0, 1, 0, 0, 0, 0, 0], bool)),
    # large symmetric array (mirror-pair rows), wired in reverse channel order
    ArrayGeometry.line(64, 0.25, channels=np.arange(64, 0, -1)),
], ids=["line8-dead", "line64-pairs-rewired"])
def test_block_invariance(rng, geo):
    every_sensor = np.zeros((geo.n_input_channels, 3))  # dead sensors still deliver a channel
    every_sensor[geo.channels - 1] = geo.positions_m - geo.phase_centre_m
    x, _ = broadband_plane_wave(every_sensor, C, FS, 50.0, 0.2 * rng.standard_normal(12000))
    beams = BeamSet(fan(0, 180, 5), [[50.0, 0.0], [120.0, 0.0]], shading="hann", bands_hz=[(300, 3000)])
    whole = Beamformer(geo, C, FS, 1024, beams).process(x)
    for size in (1, 97, 1024, 4096):
        bf = Beamformer(geo, C, FS, 1024, beams)
        parts = [bf.process(x[i:i + size]) for i in range(0, len(x), size)]
        audio = np.concatenate([p.audio for p in parts])
        power = np.concatenate([p.power_db for p in parts])
        assert audio.shape == whole.audio.shape
        assert np.max(np.abs(audio - whole.audio)) < 1e-6
        assert np.array_equal(power, whole.power_db)  # the same frames are transformed: bit-identical


def test_power_batching_changes_latency_not_values(rng):
    geo = ArrayGeometry.line(8, 0.5)
    x = (0.1 * rng.standard_normal((20 * 1024, 8))).astype(np.float32)
    beams = BeamSet(fan(0, 180, 10), bands_hz=[(300, 3000)])
    one = Beamformer(geo, C, FS, 1024, beams).process(x)
    bf = Beamformer(geo, C, FS, 1024, beams, power_batch_blocks=3)
    parts = [bf.process(x[i:i + 1024]) for i in range(0, len(x), 1024)] + [bf.flush()]
    # the first block's input span would start before the input: no row; then three at a time
    assert [len(p.power_db) for p in parts[:7]] == [0, 0, 0, 3, 0, 0, 3]
    batched = np.concatenate([p.power_db for p in parts])
    assert np.allclose(batched, one.power_db, atol=1e-4)


def test_bulk_delay_is_exact_for_an_impulse():
    """An impulse plane wave from broadside (all sensors at once) comes out at exactly D samples."""
    geo = ArrayGeometry.line(16, 0.5)
    x = np.zeros((4096, 16), np.float32)
    x[1000] = 1.0
    bf = Beamformer(geo, C, FS, 1024, BeamSet([[90.0, 0.0]], [[90.0, 0.0]], bands_hz=[(500, 1400)]))
    y = bf.process(x).audio[:, 0]
    d = bf.bulk_delay_samples
    assert int(np.argmax(y)) == 1000 + d
    assert y[1000 + d] == pytest.approx(1.0, abs=1e-5)
    y[1000 + d] = 0
    assert np.max(np.abs(y)) < 1e-5


def test_bulk_delay_sized_from_aperture():
    """D = ceil(max|p|/c·fs) + taps/2 (DEVELOPERS.md, delays and causality)."""
    geo = ArrayGeometry.line(64, 0.5)
    bf = Beamformer(geo, C, FS, 1024, BeamSet([[90.0, 0.0]], bands_hz=[(500, 1400)]))
    # max |p| = 15.75 m: 15.75 / 1500 * 48000 = 504 samples exactly; kernel 32 taps
    assert bf.bulk_delay_samples == 504 + 16


def test_unity_look_gain_with_dead_sensors_and_calibration():
    dead = np.zeros(16, bool)
    dead[[2, 7, 11]] = True
    gain_db = np.linspace(-3, 3, 16)
    geo = ArrayGeometry.line(16, 0.5, dead=dead, gain_db=gain_db)
    look = 67.3
    clean = tone_plane_wave(geo.centred_positions_m, C, FS, look, 900.0, 16384, amplitude=0.3)
    # what the sensors deliver: each is off by the inverse of its calibration gain
    raw = np.zeros((16384, 16), np.float32)
    raw[:, ~dead] = clean * 10 ** (-gain_db[~dead] / 20)
    raw[:, dead] = 0.9  # a dead sensor's junk must not matter
    for shading in ("uniform", "hann", "chebyshev"):
        bf = Beamformer(geo, C, FS, 1024, BeamSet([[look, 0.0]], [[look, 0.0]], shading=shading,
                                                  bands_hz=[(500, 1400)]))
        y = bf.process(raw).audio[4000:, 0]
        assert np.max(np.abs(y)) == pytest.approx(0.3, rel=1e-3)


@pytest.mark.parametrize("sensors", [4, 19])  # 19: the compiled scan's vector lanes and a tail
@pytest.mark.parametrize("compiled", [True, False])
def test_nan_and_inf_are_zeroed_counted_and_do_not_poison(rng, sensors, compiled):
    if compiled and not COMPILED_AVAILABLE:
        pytest.skip("the compiled kernels are not installed")
    geo = ArrayGeometry.line(sensors, 0.5)
    x = (0.1 * rng.standard_normal((8192, sensors + 1))).astype(np.float32)  # one channel no sensor uses
    bad = x.copy()
    bad[100, 1] = np.nan
    bad[200, 2] = np.inf
    bad[300, 3] = -np.inf
    bad[400, 0] = 1.5
    bad[500, sensors] = np.nan  # in the unused channel: still counted, never read
    bad[600, sensors - 1] = -1.0  # full scale counts as clipped
    beams = BeamSet(fan(0, 180, 30), [[90.0, 0.0]], bands_hz=[(300, 3000)])
    bf = Beamformer(geo, C, FS, 1024, beams, compiled=compiled)
    r = bf.process(bad)
    assert (r.nan_count, r.clip_count) == (4, 2)
    assert np.all(np.isfinite(r.audio)) and np.all(np.isfinite(r.power_db))
    assert np.isnan(bad[100, 1])  # the caller's array is left alone
    # later blocks equal those of a clean run with the same zeros
    fixed = x.copy()
    fixed[100, 1] = fixed[200, 2] = fixed[300, 3] = 0.0
    fixed[400, 0], fixed[600, sensors - 1] = 1.5, -1.0
    ref = Beamformer(geo, C, FS, 1024, beams, compiled=compiled).process(fixed)
    assert np.allclose(r.audio, ref.audio, atol=1e-7)
    clean = Beamformer(geo, C, FS, 1024, beams, compiled=compiled).process(x)
    assert (clean.nan_count, clean.clip_count) == (0, 0)


def test_retarget_between_blocks_with_bounded_crossfade(rng):
    geo = ArrayGeometry.line(16, 0.5)
    x, _ = broadband_plane_wave(geo.centred_positions_m, C, FS, 40.0, 0.1 * rng.standard_normal(1 << 15))
    a = BeamSet(fan(0, 180, 2), [[40.0, 0.0]], bands_hz=[(300, 3000)])
    b = BeamSet(fan(0, 180, 1), [[120.0, 0.0]], bands_hz=[(300, 3000)])
    bf = Beamformer(geo, C, FS, 1024, a)
    first = bf.process(x[:8192])
    bf.retarget(b)
    second = bf.process(x[8192:])
    ref_a = Beamformer(geo, C, FS, 1024, a).process(x)
    ref_b = Beamformer(geo, C, FS, 1024, b).process(x)
    fade = bf.crossfade_frames
    assert fade == 480  # 10 ms at 48 kHz
    assert np.allclose(first.audio, ref_a.audio[:8192], atol=1e-6)
    assert np.allclose(second.audio[fade:], ref_b.audio[8192 + fade:], atol=1e-6)
    ramp = ((np.arange(fade) + 0.5) / fade)[:, None]
    mix = ramp * ref_b.audio[8192:8192 + fade] + (1 - ramp) * ref_a.audio[8192:8192 + fade]
    assert np.allclose(second.audio[:fade], mix, atol=1e-6)
    assert second.power_db.shape[2] == 181
    assert np.allclose(second.power_db, ref_b.power_db[-len(second.power_db):], atol=1e-3)
    assert np.array_equal(second.power_first_sample, ref_b.power_first_sample[-len(second.power_db):])


def bearing_of_peak(geo, x, directions, band):
    level = fan_power_db(geo, x, directions, band=band)
    return directions[int(np.argmax(level))]


@pytest.mark.parametrize("az", [37.0, 118.0])
def test_broadband_bearing_line(rng, az):
    geo = ArrayGeometry.line(16, 0.5)
    x, _ = broadband_plane_wave(geo.centred_positions_m, C, FS, az, 0.1 * rng.standard_normal(1 << 15))
    assert bearing_of_peak(geo, x, fan(0, 180, 1), (300, 1400))[0] == pytest.approx(az, abs=1.0)


def test_broadband_bearing_ring(rng):
    # 12-microphone ring in air: radius 0.2 m, 343 m/s.
    geo = ArrayGeometry.ring(12, 0.2)
    c = 343.0
    x, _ = broadband_plane_wave(geo.centred_positions_m, c, FS, 247.0, 0.1 * rng.standard_normal(1 << 15))
    bf = Beamformer(geo, c, FS, 1024, BeamSet(fan(0, 359, 1), bands_hz=[(500, 3000)]))
    r = bf.process(x)
    assert fan(0, 359, 1)[np.argmax(r.power_db[6:, 0].mean(axis=0)), 0] == pytest.approx(247.0, abs=2.0)


def test_broadband_bearing_grid_in_azimuth_and_elevation(rng):
    geo = ArrayGeometry.grid(6, 6, 0.3)
    directions = grid(0, 358, 2, 10, 90, 2)
    x, _ = broadband_plane_wave(geo.centred_positions_m, C, FS, 136.0, 0.1 * rng.standard_normal(1 << 15),
                                el_deg=38.0)
    bf = Beamformer(geo, C, FS, 1024, BeamSet(directions, bands_hz=[(500, 2400)]))
    r = bf.process(x)
    az, el = directions[np.argmax(r.power_db[6:, 0].mean(axis=0))]
    assert (az, el) == (pytest.approx(136.0, abs=2.0), pytest.approx(38.0, abs=2.0))


@pytest.mark.parametrize("make", [lambda: ArrayGeometry.line(64, 0.5), lambda: ArrayGeometry.line(65, 0.5),
                                  lambda: ArrayGeometry.ring(64, 4.0)], ids=["line64", "line65-centre", "ring64"])
def test_mirror_pair_path_equals_general_path(rng, make):
    """The real two-product form on mirror-pair rows (large symmetric arrays) gives the general
    complex product's power and audio (a consistency check of two forms of the same sum)."""
    sym = make()
    nudged = sym.positions_m.copy()
    nudged[3, 2] += 1e-7  # breaks the mirror symmetry by 0.1 µm (7e-11 s): the general path
    general = ArrayGeometry(nudged, kind=sym.kind, spacing_m=sym.spacing_m)
    x, _ = broadband_plane_wave(sym.centred_positions_m, C, FS, 57.0, 0.1 * rng.standard_normal(1 << 13))
    beams = BeamSet(fan(0, 180, 2), [[57.0, 0.0], [120.0, 0.0], [10.0, 0.0]], shading="taylor",
                    bands_hz=[(300, 1400), (1400, 3000)])
    a = Beamformer(sym, C, FS, 1024, beams)
    b = Beamformer(general, C, FS, 1024, beams)
    for product in ("power", "audio"):
        assert getattr(a._steer[0], product).real_form and not getattr(b._steer[0], product).real_form
    ra, rb = a.process(x), b.process(x)
    assert np.max(np.abs(ra.power_db - rb.power_db)) < 1e-3
    # float32 products of different shapes: agreement to a few float32 roundings of the signal scale
    assert np.max(np.abs(ra.audio - rb.audio)) < 1e-5 * np.max(np.abs(rb.audio))


@pytest.mark.skipif(not COMPILED_AVAILABLE, reason="the compiled kernels are not installed")
@pytest.mark.parametrize("geo", [
    ArrayGeometry.line(16, 0.5),
    ArrayGeometry.line(8, 0.5, dead=np.array([0, 0, 1, 0, 0, 0, 0, 0], bool), gain_db=np.linspace(-2, 2, 8),
                       channels=np.array([2, 1, 3, 4, 5, 6, 8, 7])),
    ArrayGeometry.line(64, 0.5, channels=np.arange(64, 0, -1)),
    ArrayGeometry.line(65, 0.5),
    ArrayGeometry.ring(64, 4.0),
    ArrayGeometry.grid(5, 7, 0.3, dead=np.eye(5, 7, dtype=bool).ravel()),
], ids=["line16", "line8-dead-gains-rewired", "line64-pairs-rewired", "line65-centre", "ring64", "grid35-dead"])
def test_compiled_kernels_equal_numpy(rng, geo):
    """The compiled loops (service/engine/_kernels.c) and numpy form the same sums: power and
    audio agree to float32 rounding (a consistency check of two implementations of one sum),
    whatever the block size, power batch or input memory layout."""
    every_sensor = np.zeros((geo.n_input_channels, 3))
    every_sensor[geo.channels - 1] = geo.positions_m - geo.phase_centre_m
    x, _ = broadband_plane_wave(every_sensor, C, FS, 57.0, 0.1 * rng.standard_normal(9000))
    wide = np.asfortranarray(np.column_stack([x, x[:, :1]]))  # an extra channel, column-major
    few = [[57.0, 0.0], [120.0, 0.0], [10.0, 20.0]]  # 4-wide beam groups in the compiled loop
    many = few + [[a, 0.0] for a in range(20, 180, 17)]  # 8-wide groups
    for batch, size, audio_deg in ((1, 1024, many), (4, 97, few), (3, 4096, many)):
        beams = BeamSet(fan(0, 180, 2), audio_deg, shading="taylor", bands_hz=[(300, 1400), (1400, 3000)])
        a = Beamformer(geo, C, FS, 1024, beams, power_batch_blocks=batch, compiled=True)
        b = Beamformer(geo, C, FS, 1024, beams, power_batch_blocks=batch, compiled=False)
        parts_a = [a.process(wide[i:i + size]) for i in range(0, len(x), size)] + [a.flush()]
        parts_b = [b.process(x[i:i + size]) for i in range(0, len(x), size)] + [b.flush()]
        power_a = np.concatenate([p.power_db for p in parts_a])
        power_b = np.concatenate([p.power_db for p in parts_b])
        audio_a = np.concatenate([p.audio for p in parts_a])
        audio_b = np.concatenate([p.audio for p in parts_b])
        first_row = -(-a.power_delay_samples // 1024)  # blocks whose span starts before the input give none
        assert power_a.shape == power_b.shape and len(power_a) == len(x) // 1024 - first_row
        assert np.max(np.abs(power_a - power_b)) < 1e-3
        assert np.max(np.abs(audio_a - audio_b)) < 1e-5 * np.max(np.abs(audio_b))
        assert a._steer[0].audio.lanes == (4 if audio_deg is few else 8)
    if a.mirror_pair_rows:  # a fan over 0-180° on a symmetric array: mirror images come out of one pass
        assert len(a._steer[0].power.main_out) < len(beams.power_deg)


@pytest.mark.skipif(not COMPILED_AVAILABLE, reason="the compiled kernels are not installed")
def test_compiled_history_rows_equal_numpy(rng):
    """The compiled history write takes eight rows at once where their channels run up or down by
    one; every mix of such groups, other groups and a short tail gives numpy's
    ca * x[:, ia] + cb * x[:, ib] to float32 rounding (the C loop may fuse a product and the sum)."""
    from beamtap.service.engine import _kernels

    channels, frames = 40, 13
    x = rng.standard_normal((frames, channels)).astype(np.float32)
    ia = np.concatenate([np.arange(8), np.arange(39, 31, -1), rng.integers(0, channels, 8), [5, 2, 7]])
    ib = np.concatenate([np.arange(39, 31, -1), np.arange(8, 16), np.arange(16, 24), [1, 1, 0]])
    ia, ib = ia.astype(np.int32), ib.astype(np.int32)
    ca, cb = rng.standard_normal((2, len(ia))).astype(np.float32)
    out = np.zeros((frames + 3, len(ia)), np.float32)
    _kernels.rows(x, frames, channels, ia, ib, ca, cb, len(ia), out, len(out), 2)
    want = ca * x[:, ia] + cb * x[:, ib]
    np.testing.assert_allclose(out[2:2 + frames], want, rtol=1e-6, atol=1e-6)
    assert not out[:2].any() and not out[-1].any()


def test_compiled_kernels_refuse_bad_buffers():
    """The compiled loops check sizes before touching memory: a short buffer is a ValueError."""
    if not COMPILED_AVAILABLE:
        pytest.skip("the compiled kernels are not installed")
    from beamtap.service.engine import _kernels

    h = np.zeros((1, 4, 2, 8), np.float32)
    v = np.zeros((1, 2, 4), np.complex64)
    y = np.zeros((1, 8, 4), np.complex64)
    main, mirror = np.arange(8, dtype=np.int32), np.full(8, -1, np.int32)
    _kernels.steer(h, None, v, 1, 4, 0, 4, 2, 2, 8, main, mirror, 8, y, 8)  # the right sizes pass
    with pytest.raises(ValueError, match="y: buffer"):
        _kernels.steer(h, None, v, 1, 4, 0, 4, 2, 2, 8, main, mirror, 8, y[:, :4], 8)
    with pytest.raises(ValueError, match="bin or row range"):
        _kernels.steer(h, None, v, 1, 4, 1, 4, 2, 2, 8, main, mirror, 8, y, 8)
    with pytest.raises(ValueError, match="output beam index"):
        _kernels.steer(h, None, v, 1, 4, 0, 4, 2, 2, 8, main, mirror + 9, 8, y, 8)
    with pytest.raises(ValueError, match="lanes must be 4 or 8"):
        _kernels.steer(h, None, v, 1, 4, 0, 4, 2, 2, 8, main, mirror, 8, y, 5)
    with pytest.raises(ValueError, match="h_re: buffer"):  # 8 beams in 4-wide groups need two groups
        _kernels.steer(np.zeros((1, 4, 2, 4), np.float32), None, v, 1, 4, 0, 4, 2, 2, 8, main, mirror, 8, y, 4)
    x = np.zeros((10, 3), np.float32)
    idx, ones = np.array([0, 3], np.int32), np.ones(2, np.float32)
    with pytest.raises(ValueError, match="channel index"):
        _kernels.rows(x, 10, 3, idx, idx, ones, ones, 2, np.zeros((2, 20), np.float32), 20, 0)
    with pytest.raises(ValueError, match="frames outside"):
        _kernels.rows(x, 10, 3, idx[:1], idx[:1], ones, ones, 1, np.zeros((20, 1), np.float32), 20, 15)
    with pytest.raises(ValueError, match="out: buffer"):
        _kernels.rows(x, 10, 3, idx[:1], idx[:1], ones, ones, 1, np.zeros((19, 1), np.float32), 20, 0)
    fft = ColumnFFT(40, compiled=True)
    frame, out = np.zeros((40, 3), np.float32), np.zeros((21, 3), np.complex64)
    fft_args = (fft._radices, fft._twiddles, fft._scratch)
    _kernels.rfft(frame, 3, 3, 40, *fft_args, out)  # the right sizes pass
    with pytest.raises(ValueError, match="x: buffer"):
        _kernels.rfft(frame[:39], 3, 3, 40, *fft_args, out)
    with pytest.raises(ValueError, match="out: buffer"):
        _kernels.rfft(frame, 3, 3, 40, *fft_args, out[:20])
    with pytest.raises(ValueError, match="radices"):
        _kernels.rfft(frame, 3, 3, 42, *fft_args, out)  # 21 = 3 * 7 is not the radices' product
    with pytest.raises(ValueError, match="columns"):
        _kernels.rfft(frame, 3, 4, 40, *fft_args, out)
    with pytest.raises(ValueError, match="scratch: buffer"):
        _kernels.rfft(frame, 3, 3, 40, fft._radices, fft._twiddles, fft._scratch[:10], out)


# Radices by case: 8 8 4 5 | 4 3 3 5 5 | 8 3 3 3 5 with a partial column group | 8 8 8 4 partial |
# 8 2 | 3 5 | none.
@pytest.mark.parametrize("n, columns", [(2560, 64), (1800, 16), (2160, 35), (4096, 7), (32, 16), (30, 9), (2, 1)])
def test_column_fft_equals_numpy(rng, n, columns):
    """The engine's real FFT down columns (compiled when installed, else pocketfft) against
    numpy.fft.rfft in float64 (a general-purpose reference library). A float32 FFT's error
    grows like eps * log2(n) (Van Loan 1992, roundoff of the FFT; from memory); 2e-6 of the spectrum's peak is about
    twenty times the float32 epsilon, a margin that still catches any wrong twiddle or index."""
    frame = rng.standard_normal((n, columns)).astype(np.float32)
    fft = ColumnFFT(n, compiled=COMPILED_AVAILABLE)
    assert fft.compiled == COMPILED_AVAILABLE
    want = np.fft.rfft(frame.astype(np.float64), axis=0)
    got = fft(frame)
    assert got.shape == want.shape and got.dtype == np.complex64
    assert np.max(np.abs(got - want)) < 2e-6 * np.max(np.abs(want))


def test_line_aliasing_warning_follows_the_spacing_rule():
    """Van Trees (2002) §2.4: no grating lobe in visible space while d < λ/(1 + |cos θ0|),
    θ0 from the axis. At 2 kHz (λ = 0.75 m) with d = 0.5 m: broadside (limit 0.75 m) is clear,
    endfire (limit 0.375 m) aliases."""
    from beamtap.service.engine.diagnostics import aliasing_warnings

    geo = ArrayGeometry.line(16, 0.5)
    pos = geo.centred_positions_m
    w = np.full(16, 1 / 16)
    assert aliasing_warnings("line", pos, 0.5, np.array([[90.0, 0.0]]), w, 2000.0, C) == []
    warn = aliasing_warnings("line", pos, 0.5, np.array([[90.0, 0.0], [0.0, 0.0]]), w, 2000.0, C)
    assert len(warn) == 1 and "1 of 2 beams" in warn[0] and "azimuth 0°" in warn[0]
    # the threshold itself: endfire aliases above c / (2 d) = 1500 Hz, not below
    assert aliasing_warnings("line", pos, 0.5, np.array([[0.0, 0.0]]), w, 1490.0, C) == []
    assert aliasing_warnings("line", pos, 0.5, np.array([[0.0, 0.0]]), w, 1510.0, C) != []


def test_beamwidth_of_a_uniform_line():
    """Half-power beamwidth of a uniform line at broadside ≈ 0.886 λ/(N d) in u (large-N
    limit; value from memory of Van Trees (2002) §2.4). For N = 16 at d = λ/2: 6.35°; the
    finite array comes out within 0.06° of it."""
    from beamtap.service.engine.diagnostics import beamwidth_deg

    geo = ArrayGeometry.line(16, 0.5)
    bw = beamwidth_deg(geo.centred_positions_m, np.full(16, 1 / 16), (90.0, 0.0), 1500.0, C)
    assert bw == pytest.approx(2 * np.degrees(np.arcsin(0.886 / 16)), abs=0.06)


def test_without_the_compiled_kernels_every_command_says_so(tmp_path):
    """An install without a C compiler: the engine runs on numpy, and check says why and what it costs.
    (The kernels are hidden from a child process by a meta-path hook that refuses their import.)"""
    import subprocess
    import sys

    cfg = tmp_path / "c.toml"
    cfg.write_text("[array]\nline = { count = 8, spacing_m = 0.5 }\n[medium]\nsound_speed_mps = 1500.0\n"
                   "[beams]\nfan = { from_deg = 0, to_deg = 180, step_deg = 2 }\nband_hz = [300.0, 1400.0]\n")
    hide = ("import sys, importlib.abc\n"
            "class Hide(importlib.abc.MetaPathFinder):\n"
            "    def find_spec(self, name, path, target=None):\n"
            "        if name.endswith('engine._kernels'):\n"
            "            raise ImportError('no compiler at install time')\n"
            "sys.meta_path.insert(0, Hide())\n"
            "from beamtap.cli import main\n"
            f"sys.exit(main(['check', {str(cfg)!r}]))\n")
    r = subprocess.run([sys.executable, "-c", hide], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert "the compiled kernels are not installed (no compiler at install time)" in r.stdout
    assert "more slowly" in r.stdout and "RTF" in r.stdout


@pytest.mark.parametrize("compiled", [False, True] if COMPILED_AVAILABLE else [False])
def test_input_far_beyond_full_scale_gives_finite_power(compiled):
    """Samples of ±1e30 (float32 holds them; their power does not): every sample is counted as
    clipped, they are held at a million times full scale, and the outputs stay finite, loud and
    equal to those of that held input (common practice: saturate, never emit non-finite numbers)."""
    beams = BeamSet(fan(60, 120, 5.0), [[90, 0]], bands_hz=[(1400.0, 2000.0)])
    bf = Beamformer(ArrayGeometry.line(16, 0.1), 343.0, 16000.0, 512, beams, compiled=compiled)
    held = Beamformer(ArrayGeometry.line(16, 0.1), 343.0, 16000.0, 512, beams, compiled=compiled)
    x = np.where(np.random.default_rng(1).standard_normal((2048, 16)) > 0, 1e30, -1e30).astype(np.float32)
    out = bf.process(x)
    ref = held.process(np.clip(x, -1e6, 1e6))
    assert out.clip_count == 2048 * 16
    assert np.all(np.isfinite(out.power_db)) and np.all(np.isfinite(out.audio))
    assert out.power_db.max() > 80.0  # about 1e6 squared, in the band, over 16 independent sensors
    np.testing.assert_array_equal(out.power_db, ref.power_db)
