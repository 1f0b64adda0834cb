"""The service's own browser view: ``beamtap web`` as a child process beside the DSP.

A process of its own, not a thread: the web server's work (JSON, WebSocket
frames, TLS) never takes the interpreter lock from the processing thread.
It subscribes to the service like any client, with its own key when the
service is secured (``[web] key``), stops when the service stops (and on its
own if the service dies), and is started again if it fails.
"""

from __future__ import annotations

import logging
import os
import subprocess
import sys
import tempfile
import time

from beamtap.errors import UsageError
from beamtap.processes import stop, wait_ready

log = logging.getLogger("beamtap.webview")

#: Seconds between two restarts of a failed web server.
RESTART_S = 10.0


class WebView:
    """Start, watch and stop the child.

    Parameters
    ----------
    config : Config
        The service's config (its ``[web]`` and ``[security]``).
    publish, control : str
        The bound stream and control endpoints.
    """

    def __init__(self, config, publish: str, control: str):
        self.web, self.security = config.web.settings, config.security
        self.publish, self.control = publish, control
        self.proc: subprocess.Popen | None = None
        self.url: str | None = None
        self.restarts = 0
        self._last_start = 0.0
        self._folder = tempfile.mkdtemp(prefix="beamtap-web-")

    def _args(self, ready: str) -> list[str]:
        w = self.web
        args = [sys.executable, "-m", "beamtap", "web", "--endpoint", self.publish, "--control", self.control,
                "--listen", w.listen, "--ready-file", ready, "--parent-pid", str(os.getpid())]
        for option, value in (("--tls-cert", w.tls_cert), ("--tls-key", w.tls_key),
                              ("--operator-token-file", w.operator_token_file),
                              ("--reader-token-file", w.reader_token_file)):
            if value is not None:
                args += [option, value]
        if w.allow_insecure:
            args.append("--allow-insecure")
        if self.security.server_key is not None:
            # The service's secret file also holds its public key, which is all a client reads from it.
            args += ["--key", w.key, "--server-key", self.security.server_key]
        return args

    def start(self, timeout_s: float = 30.0) -> str:
        """Start the child and wait until it serves; returns the page's address."""
        ready = os.path.join(self._folder, f"ready-{time.monotonic_ns()}.json")
        self._last_start = time.monotonic()
        self.proc = subprocess.Popen(self._args(ready), stdin=subprocess.DEVNULL)
        try:
            info = wait_ready(self.proc, ready, timeout_s)
        except TimeoutError:
            raise UsageError(f"[web] the browser view did not start within {timeout_s:g} s") from None
        if info is None:
            raise UsageError(f"[web] the browser view could not start (exit status {self.proc.returncode}; "
                             "its reason is in the log above)")
        self.url = info["url"]
        return self.url

    def check(self) -> None:
        """Called about once a second: start the child again if it died (at most every :data:`RESTART_S`)."""
        if self.proc is None or self.proc.poll() is None:
            return
        if time.monotonic() - self._last_start < RESTART_S:
            return
        log.error("web: the browser view exited with status %s; starting it again", self.proc.returncode)
        self.restarts += 1
        try:
            self.start()
        except UsageError as exc:
            log.error("%s", exc)

    def status(self) -> dict:
        return {"url": self.url, "running": self.proc is not None and self.proc.poll() is None,
                "restarts": self.restarts}

    def stop(self) -> None:
        if self.proc is not None:
            stop(self.proc)
            self.proc = None
        try:
            for name in os.listdir(self._folder):
                os.unlink(os.path.join(self._folder, name))
            os.rmdir(self._folder)
        except OSError:
            pass
