"""The beamforming engine: pure functions and small classes over numpy arrays.

No sockets, no sound card, no files: arrays in, arrays out. The live service
and the offline commands use exactly this code.

>>> from beamtap.service.engine import ArrayGeometry, Beamformer, BeamSet, fan
>>> bf = Beamformer(ArrayGeometry.line(8, 0.5), 1500.0, 48000.0, 1024, BeamSet(fan(0, 180, 5)))
"""

from .beamformer import COMPILED_AVAILABLE, Beamformer, BeamSet, BlockResult, EngineState
from .cost import AdmissionError, BlockCost, CostModel
from .directions import fan, grid, unit_vectors
from .geometry import ArrayGeometry
from .medium import air_sound_speed_mps, mackenzie_sound_speed_mps
from .shading import SHADINGS

__all__ = [
    "COMPILED_AVAILABLE",
    "SHADINGS",
    "AdmissionError",
    "ArrayGeometry",
    "BeamSet",
    "Beamformer",
    "BlockCost",
    "BlockResult",
    "CostModel",
    "EngineState",
    "air_sound_speed_mps",
    "fan",
    "grid",
    "mackenzie_sound_speed_mps",
    "unit_vectors",
]
