"""The beamforming engine: pure functions and small classes over numpy arrays.

No sockets, no sound card, no files: arrays in, arrays out. The live service
and the offline commands use exactly this code.
"""

from .beamformer import Beamformer, BlockResult
from .geometry import ArrayGeometry
from .medium import air_sound_speed_mps, mackenzie_sound_speed_mps

__all__ = [
    "ArrayGeometry",
    "Beamformer",
    "BlockResult",
    "air_sound_speed_mps",
    "mackenzie_sound_speed_mps",
]
