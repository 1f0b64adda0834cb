"""``python -m beamtap`` is the same as the ``beamtap`` command."""

import sys

from beamtap.cli import main

sys.exit(main())
