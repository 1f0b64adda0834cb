"""The offline commands, one module each: ``check``, ``simulate``, ``process``, ``pattern``.

They build the engine the way the live service does (:mod:`beamtap.service.assembly`).
"""

from .check import check_problems, check_text, shape_warnings
from .pattern import pattern
from .process import PROCESS_OUTPUTS, config_differences, process, session_config
from .simulate import simulate

__all__ = ["PROCESS_OUTPUTS", "check_problems", "check_text", "config_differences", "pattern", "process",
           "session_config", "shape_warnings", "simulate"]
