"""What a subscriber needs: the wire format, a subscriber and a controller.

Imports only numpy, pyzmq and msgpack (sounddevice only for listening).
"""

from .protocol import PROTOCOL_VERSION, ProtocolError
from .subscriber import (DEFAULT_CONTROL, DEFAULT_PUBLISH, Controller, EndpointError, Frame, ServiceError,
                         Subscriber)

__all__ = ["DEFAULT_CONTROL", "DEFAULT_PUBLISH", "PROTOCOL_VERSION", "Controller", "EndpointError", "Frame",
           "ProtocolError", "ServiceError", "Subscriber"]
