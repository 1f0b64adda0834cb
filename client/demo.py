"""``beamtap demo``: the service on its built-in scene and the live view, in one command."""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile

from beamtap.errors import UsageError
from beamtap.processes import stop, wait_ready

from . import watch
from .subscriber import DEFAULT_CONTROL, DEFAULT_PUBLISH


def _start_service(publish: str, control: str, folder: str):
    ready = os.path.join(folder, "ready.json")
    log = open(os.path.join(folder, "service.log"), "w")
    proc = subprocess.Popen([sys.executable, "-m", "beamtap", "serve", "--publish", publish, "--control", control,
                             "--ready-file", ready, "--log-level", "WARNING"], stdout=log, stderr=subprocess.STDOUT)
    try:
        return proc, wait_ready(proc, ready, 60.0)
    except TimeoutError:
        raise UsageError("demo: the service did not start within 60 s") from None


def run(rate_hz: float, force_ascii: bool, seconds: float | None) -> int:
    with tempfile.TemporaryDirectory(prefix="beamtap-demo-") as folder:
        proc, endpoints = _start_service(DEFAULT_PUBLISH, DEFAULT_CONTROL, folder)
        if endpoints is None:  # default ports busy (another service?): use free ones
            proc, endpoints = _start_service("tcp://127.0.0.1:*", "tcp://127.0.0.1:*", folder)
            if endpoints is None:
                raise UsageError("demo: the service would not start: "
                                 + open(os.path.join(folder, "service.log")).read().strip().splitlines()[-1])
        sys.stderr.write(f"demo: service publishing on {endpoints['publish']}, control on {endpoints['control']}; "
                         f"try 'beamtap listen --endpoint {endpoints['publish']} --beam 1' or 'beamtap ctl "
                         f"--control {endpoints['control']} status' in another terminal (start listening with the "
                         "volume low)\n")
        try:
            return watch.run(endpoints["publish"], rate_hz, 0, 30.0, force_ascii, seconds)
        finally:
            stop(proc, 5.0)
