"""beamtap: a block-streaming, real-time delay-and-sum beamformer.

The importable parts are :mod:`beamtap.service` (the engine as a pure
library, plus the sources, publisher, control socket and recorder around it)
and :mod:`beamtap.client` (wire format, subscriber, controller and the
everyday command-line tools).
"""

from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("beamtap")
except PackageNotFoundError:  # running from a source tree without install
    __version__ = "0.0.0+unknown"

__all__ = ["__version__"]
