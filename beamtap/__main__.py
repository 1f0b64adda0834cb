"""``python -m beamtap`` is the same as the ``beamtap`` command."""

import sys

from beamtap.cli import main

if __name__ == "__main__":  # guarded: the scene's child process re-imports the main module
    sys.exit(main())
