"""Retargeting the engine: every kind of change, at every block position of the history cycle.

The reference is the definition of the crossfade (a linear ramp from the old
beam's output to the new one's over ``crossfade_frames``) applied to fresh
engines that ran the whole signal with the old and with the new beams: the
output is exact linear convolution whatever the block position
(Oppenheim & Schafer 2010, §8.7.3, overlap-save), so after the retarget the
audio must equal that mix, and the power must equal the fresh engine's as
soon as the new band filter's history has refilled.
"""

import numpy as np
import pytest

from beamtap.service.engine import ArrayGeometry, Beamformer
from beamtap.service.engine.beamformer import COMPILED_AVAILABLE, BeamSet
from beamtap.service.engine.directions import fan

from conftest import broadband_plane_wave

FS, C, BLOCK = 48000.0, 1500.0, 1024
BASE = dict(power_deg=fan(0, 180, 3), audio_deg=[[40.0, 0.0], [100.0, 0.0]], bands_hz=[(300.0, 3000.0)])
KINDS = {
    "narrow band (longer frame)": dict(bands_hz=[(100.0, 200.0)]),
    "transition width": dict(transition_hz=50.0),
    "two bands": dict(bands_hz=[(300.0, 1000.0), (1000.0, 3000.0)]),
    "shading": dict(shading="hann"),
    "power beam count": dict(power_deg=fan(0, 180, 1)),
    "more audio beams": dict(audio_deg=[[40.0, 0.0], [100.0, 0.0], [140.0, 0.0]]),
    "fewer audio beams": dict(audio_deg=[[40.0, 0.0]]),
    "no audio beams": dict(audio_deg=np.zeros((0, 2))),
    "audio direction": dict(audio_deg=[[61.3, 0.0], [100.0, 0.0]]),
}
PATHS = [False] + ([True] if COMPILED_AVAILABLE else [])
BLOCKS = 30
POSITIONS = range(1, 15)  # more than one cycle of the history buffer (about 10 blocks here)


@pytest.fixture(scope="module")
def signal():
    geo = ArrayGeometry.line(16, 0.5)
    rng = np.random.default_rng(20261205)
    x, _ = broadband_plane_wave(geo.centred_positions_m, C, FS, 61.3, 0.1 * rng.standard_normal(BLOCKS * BLOCK))
    return geo, x


def _band_delay(beams):
    from beamtap.service.engine.bandpower import design_band_filter

    return max((len(design_band_filter(b, FS, beams.transition_hz).taps) - 1) // 2 for b in beams.bands_hz)


def _run(geo, beams, x, compiled, batch=1):
    return Beamformer(geo, C, FS, BLOCK, beams, power_batch_blocks=batch, compiled=compiled).process(x)


@pytest.mark.parametrize("compiled", PATHS)
@pytest.mark.parametrize("kind", list(KINDS))
def test_every_retarget_at_every_block_position_equals_fresh_engines(signal, kind, compiled):
    geo, x = signal
    old_set, new_set = BeamSet(**BASE), BeamSet(**dict(BASE, **KINDS[kind]))
    ref_old, ref_new = _run(geo, old_set, x, compiled), _run(geo, new_set, x, compiled)
    n_old, n_new = len(old_set.audio_deg), len(new_set.audio_deg)
    kept = min(n_old, n_new)
    for k in POSITIONS:
        bf = Beamformer(geo, C, FS, BLOCK, old_set, compiled=compiled)
        cut = k * BLOCK
        first = bf.process(x[:cut])
        released = bf.retarget(new_set)
        second = bf.process(x[cut:])
        where = f"{kind}, retarget after block {k}"
        assert np.array_equal(first.audio, ref_old.audio[:cut]), where
        assert np.allclose(first.power_db, ref_old.power_db[:len(first.power_db)], atol=1e-3), where
        assert released.power_db.shape[0] == 0, where  # nothing was pending with batch 1
        # Audio: the ramp from each kept beam's old output to its new output; new beams rise from
        # silence; removed beams end at the retarget.
        fade = bf.crossfade_frames
        ramp = np.clip((np.arange(len(x) - cut) + 0.5) / fade, 0.0, 1.0)[:, None]
        expect = ramp * ref_new.audio[cut:]
        expect[:, :kept] += (1.0 - ramp) * ref_old.audio[cut:, :kept]
        assert second.audio.shape == (len(x) - cut, n_new), where
        assert np.all(np.isfinite(second.audio)), where
        assert np.allclose(second.audio, expect, atol=2e-6), where
        # Power: a row for every block whose input span lies after the start, finite; equal to the
        # fresh engine (matched by the span each row describes) once the frame has refilled.
        delay = bf.power_delay_samples
        expect_rows = sum(1 for j in range(k, BLOCKS) if j * BLOCK - delay >= 0)
        assert second.power_db.shape == (expect_rows, len(new_set.bands_hz), len(new_set.power_deg)), where
        assert np.all(np.isfinite(second.power_db)), where
        settled = second.power_first_sample >= cut - delay + bf.fft_size + BLOCK
        ref_rows = {int(n): row for n, row in zip(ref_new.power_first_sample, ref_new.power_db)}
        for n, row in zip(second.power_first_sample[settled], second.power_db[settled]):
            assert np.allclose(row, ref_rows[int(n)], atol=1e-3), where


@pytest.mark.parametrize("compiled", PATHS)
def test_retarget_releases_pending_power_blocks_with_the_old_beams(signal, compiled):
    geo, x = signal
    old_set, new_set = BeamSet(**BASE), BeamSet(**dict(BASE, **KINDS["narrow band (longer frame)"]))
    ref_old = _run(geo, old_set, x, compiled)
    for k in (1, 2, 4, 5, 7, 11):
        bf = Beamformer(geo, C, FS, BLOCK, old_set, power_batch_blocks=3, compiled=compiled)
        first = bf.process(x[:k * BLOCK])
        released = bf.retarget(new_set)
        rows = np.concatenate([first.power_db, released.power_db])
        delay = bf.bulk_delay_samples + _band_delay(old_set)
        firsts = [j * BLOCK - delay for j in range(k) if j * BLOCK - delay >= 0]
        assert rows.shape[0] == len(firsts)  # every block formed, none lost or repeated
        assert np.allclose(rows, ref_old.power_db[:len(firsts)], atol=1e-3)
        assert np.array_equal(np.concatenate([first.power_first_sample, released.power_first_sample]), firsts)
        second = bf.process(x[k * BLOCK:])
        assert np.all(np.isfinite(second.power_db)) and np.all(np.isfinite(second.audio))


@pytest.mark.parametrize("compiled", PATHS)
@pytest.mark.parametrize("batch", [1, 3])
def test_a_stream_split_in_two_runs_equals_one_run(signal, compiled, batch):
    """The state handed from one engine to a fresh one (as scipy.signal.lfilter hands zi/zf) gives
    the one-run output exactly: overlap-save over the same history (Oppenheim & Schafer 2010, §8.7.3)."""
    geo, x = signal
    beams = BeamSet(**BASE)
    one = Beamformer(geo, C, FS, BLOCK, beams, power_batch_blocks=batch, compiled=compiled)
    whole = [one.process(x), one.flush()]
    for cut in (BLOCK * 7, BLOCK * 11 + 333):
        first = Beamformer(geo, C, FS, BLOCK, beams, power_batch_blocks=batch, compiled=compiled)
        parts = [first.process(x[:cut])]
        state = first.state()
        second = Beamformer(geo, C, FS, BLOCK, beams, power_batch_blocks=batch, compiled=compiled)
        second.resume(state)
        parts += [second.process(x[cut:]), second.flush()]
        # to float32 rounding (a chunk split inside a block changes the order of a few sums)
        for field, tol in (("audio", 1e-6), ("power_db", 1e-4), ("power_first_sample", 0)):
            a = np.concatenate([getattr(p, field) for p in whole])
            b = np.concatenate([getattr(p, field) for p in parts])
            assert a.shape == b.shape and np.allclose(a, b, atol=tol, rtol=0), (field, cut)
    other = Beamformer(geo, C, FS, BLOCK, BeamSet(**dict(BASE, bands_hz=[(100.0, 200.0)])), compiled=compiled)
    with pytest.raises(ValueError, match="resume needs the same array, beams and block"):
        other.resume(state)
