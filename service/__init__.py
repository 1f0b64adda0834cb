"""The beamtap service: the engine as a pure library (:mod:`.engine`), and around it, one module
each: the sources (:mod:`.sources`), the ring buffer, the processing pipeline, the publisher, the
control socket, the recorder, security, and the offline commands (:mod:`.offline`), all built from
a config by :mod:`.assembly`."""

__all__ = ["assembly", "config", "engine", "offline", "sources"]
