"""``beamtap simulate``: the config's scene as a multichannel float32 WAV."""

from __future__ import annotations

import shutil
from pathlib import Path

from beamtap.errors import UsageError
from beamtap.wavfile import WavWriter

from ..assembly import make_scene
from ..config import Config
from .progress import Progress


def simulate(config: Config, seconds: float, out_path) -> int:
    """Write the config's scene as a float32 multichannel WAV; returns frames written."""
    if not seconds > 0:
        raise UsageError(f"--seconds: got {seconds!r}, expected a positive number of seconds")
    fs = config.input.samplerate_hz
    total = int(round(seconds * fs))
    block = config.input.block_frames
    channels = config.geometry.n_input_channels
    size = 44 + total * channels * 4
    if size > 2**32 - 1:  # a RIFF WAV's sizes are 32-bit
        raise UsageError(f"--seconds {seconds:g}: {size / 2**30:.1f} GiB of {channels}-channel float32, more than "
                         f"a WAV file holds (4 GiB, {(2**32 - 45) / (channels * 4 * fs):.0f} s here)")
    folder = Path(out_path).resolve().parent
    if not folder.is_dir():
        raise UsageError(f"{out_path}: cannot write: the folder {folder} does not exist")
    free = shutil.disk_usage(folder).free
    if size > free:
        raise UsageError(f"{out_path}: the simulation needs {size / 2**20:.0f} MB, {folder} has "
                         f"{free / 2**20:.0f} MB free")
    scene = make_scene(config)
    bar = Progress(total, fs)
    try:
        with WavWriter(out_path, fs, channels) as w:
            done = 0
            while done < total:
                n = min(block, total - done)
                w.write(scene.render(n))
                done += n
                bar.update(done)
    except BaseException:
        Path(out_path).unlink(missing_ok=True)  # no partial file left behind (error or Ctrl-C)
        raise
    return total


