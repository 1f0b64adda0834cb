"""The beamtap service: the engine as a pure library, and around it the
sources, ring buffer, publisher, control socket and recorder."""
