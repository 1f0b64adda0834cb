"""MVDR (Capon) weights with diagonal loading, checked against the published results.

Sources, named beside each check: Capon 1969 and Van Trees 2002 ("Optimum Array Processing")
§6.2 for the distortionless constraint and the optimum SINR with one plane-wave interferer;
Cox, Zeskind and Owen 1987 for white-noise gain under loading; the Kantorovich inequality
(any matrix-analysis text, e.g. Horn and Johnson, "Matrix Analysis") for the loaded bound.
The covariance matrices are built here in closed form from plane waves and white noise.
"""

import math

import numpy as np
import pytest

from beamtap.service.engine.adaptive import (CrossSpectra, mvdr_weights, noise_power, output_power,
                                             white_noise_gain)

C = 343.0
F = 1715.0  # half a wavelength is 0.1 m here
N = 16
POS = (np.arange(N) - (N - 1) / 2) * (C / F / 2)  # a line along x, half a wavelength apart


def steer(az_deg, f=F):
    """Line-array steering vector for a plane wave from azimuth ``az_deg`` (from the axis)."""
    tau = POS * math.cos(math.radians(az_deg)) / C
    return np.exp(2j * np.pi * f * tau)


def sinr(w, v_s, sigma_s2, r_n):
    return sigma_s2 * abs(np.vdot(w, v_s)) ** 2 / np.vdot(w, r_n @ w).real


def test_one_interferer_sinr_is_the_closed_form_optimum_and_far_above_delay_and_sum():
    """16-sensor line at half a wavelength, look 90°, signal 0 dB per sensor, a plane-wave
    interferer at 63° (between delay-and-sum nulls) 40 dB above the per-sensor noise.
    Van Trees 2002 §6.2: the optimum SINR is sigma_s^2 v_s^H R_n^-1 v_s, for one interferer
    (sigma_s^2 / sigma_w^2) N (1 - N INR |rho|^2 / (1 + N INR)), rho = v_s^H v_i / N (the
    closed form from memory, checked here against the matrix expression). MVDR with no loading
    reaches it (to 1e-9 relative); with 10 dB of loading within 1 dB; delay-and-sum falls at
    least 20 dB short (the issue's limits)."""
    v_s, v_i = steer(90.0), steer(63.0)
    sigma_w2, sigma_s2, inr = 1.0, 1.0, 10.0 ** 4
    r_n = sigma_w2 * np.eye(N) + inr * sigma_w2 * np.outer(v_i, v_i.conj())
    r = r_n + sigma_s2 * np.outer(v_s, v_s.conj())
    rho = np.vdot(v_s, v_i) / N
    closed = (sigma_s2 / sigma_w2) * N * (1 - N * inr * abs(rho) ** 2 / (1 + N * inr))
    matrix = sigma_s2 * np.vdot(v_s, np.linalg.solve(r_n, v_s)).real
    assert matrix == pytest.approx(closed, rel=1e-9)
    for loading_db, tol_db in ((-math.inf, 1e-8), (10.0, 1.0)):
        w, fallback = mvdr_weights(r[None], v_s[None, None, :], loading_db)
        assert not fallback.any()
        got = sinr(w[0, 0], v_s, sigma_s2, r_n)
        assert abs(10 * math.log10(got / closed)) <= tol_db
    das = v_s / N
    assert 10 * math.log10(closed / sinr(das, v_s, sigma_s2, r_n)) >= 20.0


def test_distortionless_a_plane_wave_from_the_look_direction_passes_unchanged(rng):
    """Capon 1969: w^H v = 1, so a plane wave from the look direction comes out with gain one:
    amplitude within 0.1 dB and phase within 1° (the issue's limits), here to rounding."""
    bins = 9
    look = np.stack([steer(90.0, f) for f in np.linspace(1400.0, 2000.0, bins)])[:, None, :]
    a = rng.standard_normal((bins, N, 3 * N)) + 1j * rng.standard_normal((bins, N, 3 * N))
    r = a @ np.conj(np.transpose(a, (0, 2, 1))) / (3 * N)  # random positive definite, per bin
    w, _ = mvdr_weights(r, look, 10.0)
    src = rng.standard_normal(bins) + 1j * rng.standard_normal(bins)
    x = src[:, None] * look[:, 0, :]
    y = np.sum(np.conj(w[:, 0, :]) * x, axis=1)
    assert np.all(np.abs(20 * np.log10(np.abs(y / src))) < 1e-9)
    assert np.all(np.abs(np.degrees(np.angle(y / src))) < 1e-9)


def test_loading_keeps_white_noise_gain_above_the_loaded_bound_and_large_loading_is_delay_and_sum(rng):
    """Cox, Zeskind and Owen 1987: loading buys white-noise gain. With w proportional to
    (R + eps I)^-1 v, the Kantorovich inequality bounds it from below:
    WNG >= N 4 (l_max + eps)(l_min + eps) / (l_max + l_min + 2 eps)^2 (our derivation). It never
    falls below that bound, rises with loading, and at 100 dB the weights are delay-and-sum to 1e-4."""
    v = steer(75.0)[None, None, :]
    sources = np.stack([steer(a) for a in (40.0, 68.0, 81.0, 120.0)], axis=1)
    r = np.eye(N) + sources @ np.diag([1e3, 1e2, 30.0, 1e4]) @ sources.conj().T
    lam = np.linalg.eigvalsh(r)
    noise = noise_power(r[None])[0]
    last = 0.0
    for loading_db in (-20.0, 0.0, 10.0, 20.0, 40.0, 60.0):
        w, _ = mvdr_weights(r[None], v, loading_db)
        wng = white_noise_gain(w, v)[0, 0]
        eps = noise * 10 ** (loading_db / 10)
        bound = N * 4 * (lam[-1] + eps) * (lam[0] + eps) / (lam[-1] + lam[0] + 2 * eps) ** 2
        assert wng >= bound * (1 - 1e-9)
        assert wng >= last - 1e-9 and wng <= N + 1e-9
        last = wng
    w, _ = mvdr_weights(r[None], v, 100.0)
    das = v / N
    assert np.linalg.norm(w - das) / np.linalg.norm(das) <= 1e-4


def test_spatially_white_noise_gives_the_delay_and_sum_level():
    """White noise only (R = sigma^2 I): MVDR is delay-and-sum, and its output power the same
    (the issue: within 1 dB; here exactly, common practice)."""
    r = np.broadcast_to(0.3 * np.eye(N), (4, N, N))
    v = np.stack([np.stack([steer(a, f) for a in (20.0, 90.0)]) for f in (1500.0, 1600.0, 1700.0, 1800.0)])
    w, _ = mvdr_weights(r, v, 10.0)
    das = v / N
    np.testing.assert_allclose(output_power(w, r), output_power(das, r), rtol=1e-12)


def test_singular_or_broken_covariances_fall_back_to_delay_and_sum_and_are_counted():
    v = np.stack([steer(90.0)[None, :]] * 3)
    r = np.stack([np.eye(N), np.zeros((N, N)), np.full((N, N), np.nan)]).astype(complex)
    w, fallback = mvdr_weights(r, v, -math.inf)  # no loading: the zero matrix cannot be factored
    assert fallback.tolist() == [False, True, True]
    np.testing.assert_allclose(w[1:], v[1:] / N)
    with pytest.raises(ValueError, match="shape"):
        mvdr_weights(np.eye(3)[None], v, 0.0)


def test_averaged_cross_spectra_converge_to_the_true_matrix(rng):
    """Snapshots of a plane wave in white noise: the average over many blocks approaches
    sigma_w^2 I + sigma_s^2 v v^H. An entry's standard error is about (1 + 4) / sqrt(4000) = 0.08
    here; the largest of the 256 stays within about four of them (0.35)."""
    v = steer(60.0)
    est = CrossSpectra(1, N, average_s=1e6, block_s=1.0)  # so long a memory that it is a plain mean
    for _ in range(4000):
        s = (rng.standard_normal() + 1j * rng.standard_normal()) / math.sqrt(2) * math.sqrt(4.0)
        w = (rng.standard_normal(N) + 1j * rng.standard_normal(N)) / math.sqrt(2)
        est.update((s * v + w)[None, :])
    want = np.eye(N) + 4.0 * np.outer(v, v.conj())
    assert np.max(np.abs(est.r[0] - want)) < 0.35
    assert np.allclose(est.r[0], est.r[0].conj().T)
    with pytest.raises(ValueError):
        CrossSpectra(1, N, average_s=0.0, block_s=1.0)


@pytest.mark.parametrize("average_s", [3.0, 1e6])
def test_cross_spectra_read_a_slice_at_a_time_equal_the_block_by_block_average(rng, average_s):
    """The folded average, read whole or a few bins at a time at any moment (as the MVDR updates read
    it), equals the block-by-block recursion R <- (1 - w) R + w x x^H with w = max(1 - forget,
    1/count) (exponential forgetting started as a plain mean: common practice), to double rounding;
    and it keeps no more than its bound of blocks unfolded however long nobody reads it."""
    n_bins, m = 7, 5
    est = CrossSpectra(n_bins, m, average_s=average_s, block_s=1.0)
    want = np.zeros((n_bins, m, m), complex)
    for count in range(1, 201):
        x = rng.standard_normal((n_bins, m)) + 1j * rng.standard_normal((n_bins, m))
        est.update(x)
        w = max(1.0 - math.exp(-1.0 / average_s), 1.0 / count)
        want = (1 - w) * want + w * x[:, :, None] * np.conj(x[:, None, :])
        if count % 13 == 5:
            bins = rng.choice(n_bins, 3, replace=False)
            np.testing.assert_allclose(est.of(bins), want[bins], rtol=1e-12, atol=1e-12)
        assert len(est._pending) <= CrossSpectra._KEEP_BLOCKS + 1
    np.testing.assert_allclose(est.r, want, rtol=1e-12, atol=1e-12)
