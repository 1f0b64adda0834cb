"""Child processes of the command line (the demo's service) and of the tests:
wait for a ready file, stop with SIGTERM then SIGKILL."""

from __future__ import annotations

import json
import signal
import subprocess
import time
from pathlib import Path


def wait_ready(proc: subprocess.Popen, ready_file, timeout_s: float) -> dict | None:
    """The JSON a ``beamtap serve --ready-file`` wrote, or None if the process ended first.

    Raises ``TimeoutError`` (after killing the process) when neither happens in ``timeout_s``.
    """
    ready = Path(ready_file)
    deadline = time.monotonic() + timeout_s
    while not ready.exists():
        if proc.poll() is not None:
            return None
        if time.monotonic() > deadline:
            proc.kill()
            raise TimeoutError(f"service not ready within {timeout_s:g} s")
        time.sleep(0.05)  # polling a file another process writes once
    return json.loads(ready.read_text())


def stop(proc: subprocess.Popen, timeout_s: float = 10.0) -> int:
    """SIGTERM, then SIGKILL if it has not exited within ``timeout_s``; returns the exit status."""
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=timeout_s)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
    return proc.returncode
