"""Sources: where frames come from, behind one small interface.

Every source fills a :class:`~beamtap.service.ringbuffer.RingBuffer` with
float32 frames shaped (frames, input channels) and keeps a
:class:`~beamtap.service.clock.SampleClock` of their capture times.

``soundcard``  a PortAudio input stream (sounddevice); its callback only
               copies into the ring and notes status flags.
``file``       a multichannel WAV, paced in real time or as fast as the
               engine takes it, optionally looped.
``simulated``  the config's scene, generated block by block in real time.
``stream``     the ``raw`` topic of another beamtap service.
``session``    a recorded session folder (see :mod:`.session`).
"""

from __future__ import annotations

from beamtap.errors import UsageError

from .base import Source
from .file import FileSource
from .session import SessionSource
from .simulated import SimulatedSource
from .soundcard import SoundcardSource
from .stream import MAX_STREAM_FRAMES, StreamSource

__all__ = ["MAX_STREAM_FRAMES", "FileSource", "SessionSource", "SimulatedSource", "SoundcardSource", "Source",
           "StreamSource", "make_source"]


def make_source(config):
    """The source a config asks for."""
    inp, geo = config.input, config.geometry
    ring = max(int(inp.ring_s * inp.samplerate_hz), 2 * inp.block_frames)
    ch = geo.n_input_channels
    if inp.source == "simulated":
        return SimulatedSource(config.text, config.where, ch, inp.samplerate_hz, inp.block_frames, ring,
                               inp.realtime)
    if inp.source == "file":
        return FileSource(inp.path, ch, inp.samplerate_hz, inp.block_frames, ring, inp.realtime, inp.loop)
    if inp.source == "soundcard":
        return SoundcardSource(inp.device, ch, inp.samplerate_hz, inp.block_frames, ring)
    if inp.source == "stream":
        return StreamSource(inp.endpoint, ch, inp.samplerate_hz, ring)
    if inp.source == "session":
        return SessionSource(inp.path, ch, inp.samplerate_hz, inp.block_frames, ring, inp.realtime)
    raise UsageError(f"[input] source = {inp.source!r} is not supported")
