"""Who may reach the service: loopback by default, ZeroMQ CURVE keys off the machine.

With ``[security] server_key`` set, the stream and the control socket are
CURVE servers (RFC 26, CurveZMQ; ZAP, RFC 27): a ZAP authenticator thread
(pyzmq's ``zmq.auth``) lets in the public keys found in the ``clients``
folder (operators: may change things) and the ``readers`` folder (may
subscribe and read, change nothing), and no one else. The folders are read
again on SIGHUP and on the ``reload_keys`` control request. An unknown key
gets nothing; it is counted, and logged once per key per minute.

Without ``server_key`` every endpoint must be loopback (``127.0.0.0/8``,
``::1``, ``ipc://``, ``inproc://``) unless ``allow_insecure = true``, which
is warned about at start and in every status.

Key files are ZeroMQ's certificate files, as ``beamtap keys`` (or pyzmq's
``zmq.auth.create_certificates``) writes them: ``NAME.key`` (public) and
``NAME.key_secret`` (secret, mode 0600).

References
----------
P. Hintjens, "26/CURVEZMQ" and "27/ZAP", ZeroMQ RFCs (rfc.zeromq.org), from memory.
"""

from __future__ import annotations

import ipaddress
import logging
import os
import threading
import time
from pathlib import Path

import zmq
import zmq.auth

from beamtap.errors import UsageError

log = logging.getLogger("beamtap.security")

OPERATOR, READER = "operator", "reader"
#: Requests that change the service (reader keys are refused them): command -> test of the request.
CHANGES = {"beams": lambda req: "set" in req, "detect": lambda req: "set" in req,
           "record": lambda req: req.get("action") in ("start", "stop"),
           "mark": lambda req: True, "reload_keys": lambda req: True}
#: Seconds between two log lines about the same refused key.
DENIAL_LOG_S = 60.0


def is_loopback(endpoint: str) -> bool:
    """True for endpoints other machines cannot reach: ipc, inproc, tcp on 127.0.0.0/8, ::1 or localhost."""
    if endpoint.startswith(("ipc://", "inproc://")):
        return True
    if not endpoint.startswith("tcp://"):
        return False
    host = endpoint[6:].rsplit(":", 1)[0].strip("[]")
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False  # '*', an interface name or a host name: reachable from elsewhere


def load_key(path, want_secret: bool, what: str) -> tuple[bytes, bytes | None]:
    """(public, secret) Z85 keys from a ZeroMQ certificate file; one line on any problem."""
    p = Path(path)
    try:
        public, secret = zmq.auth.load_certificate(p)
    except (OSError, ValueError) as exc:
        raise UsageError(f"{what} {p}: not a ZeroMQ certificate file ({exc}); make one with 'beamtap keys'") from None
    if want_secret and not secret:
        raise UsageError(f"{what} {p}: holds no secret key (use the NAME.key_secret file 'beamtap keys' wrote)")
    return public, secret


def make_keys(name: str, folder) -> tuple[Path, Path, str]:
    """``beamtap keys``: a new key pair ``folder/name.key`` and ``folder/name.key_secret`` (0600)."""
    if not name or any(c in name for c in "/\\") or name.startswith("."):
        raise UsageError(f"NAME {name!r}: expected a plain name such as 'pier-logger'")
    folder = Path(folder)
    public, secret = folder / f"{name}.key", folder / f"{name}.key_secret"
    for p in (public, secret):
        if p.exists():
            raise UsageError(f"--out {folder}: {p.name} exists; keys are never overwritten (choose another NAME)")
    try:
        folder.mkdir(parents=True, exist_ok=True)
        old = os.umask(0o077)  # the secret file is created private, never readable in between
        try:
            zmq.auth.create_certificates(folder, name)
        finally:
            os.umask(old)
        os.chmod(secret, 0o600)
        os.chmod(public, 0o644)
    except OSError as exc:
        raise UsageError(f"--out {folder}: cannot write keys: {exc.strerror or exc}") from None
    return public, secret, load_key(public, False, "key")[0].decode("ascii")


class Guard:
    """The service's side of security: the authenticator, the key registry, socket set-up, roles.

    Parameters
    ----------
    config : SecurityConfig
    context : zmq.Context
        The context whose sockets it guards (ZAP works per context).
    endpoints : dict
        ``{"publish": endpoint, "control": endpoint}``, checked for loopback.
    """

    def __init__(self, config, context, endpoints: dict):
        self.config = config
        self.enabled = config.server_key is not None
        for section, endpoint in endpoints.items():
            if not self.enabled and not config.allow_insecure and not is_loopback(endpoint):
                raise UsageError(
                    f"[{section}] endpoint = {endpoint!r} can be reached from other machines, and [security] has "
                    "no server_key: make keys with 'beamtap keys NAME --out DIR' and set [security] server_key and "
                    "clients (see README, 'Across the network'), or set [security] allow_insecure = true")
        self.insecure = not self.enabled and not all(is_loopback(e) for e in endpoints.values())
        if self.insecure:
            log.warning("security: allow_insecure = true and an endpoint off loopback: anyone who can reach "
                        "%s can read the stream and change the beams", ", ".join(endpoints.values()))
        self._keys: dict[str, tuple[str, str]] = {}  # z85 public key -> (name, role)
        self._lock = threading.Lock()
        self.denied = 0
        self._denied_logged: dict[str, float] = {}
        self._auth = None
        if self.enabled:
            self.public, self.secret = load_key(config.server_key, True, "[security] server_key =")
            self.reload()
            from zmq.auth.thread import ThreadAuthenticator  # noqa: PLC0415

            self._auth = ThreadAuthenticator(context)
            self._auth.start()
            self._auth.configure_curve_callback(domain="*", credentials_provider=self)

    # ---- keys ---------------------------------------------------------------
    def reload(self) -> dict:
        """Read the key folders again; returns the counts of operators and readers."""
        if not self.enabled:
            return {"operators": 0, "readers": 0}
        keys = {}
        for folder, role in ((self.config.clients, OPERATOR), (self.config.readers, READER)):
            if folder is None:
                continue
            for path in sorted(Path(folder).glob("*.key")):
                try:
                    public, _ = load_key(path, False, "key")
                except UsageError as exc:
                    log.warning("security: %s; skipped", exc)
                    continue
                if public.decode("ascii") in keys and role == READER:
                    continue  # a key in both folders keeps the operator role
                keys[public.decode("ascii")] = (path.stem, role)
        with self._lock:
            self._keys = keys
        counts = {"operators": sum(r == OPERATOR for _, r in keys.values()),
                  "readers": sum(r == READER for _, r in keys.values())}
        log.info("security: %d operator and %d reader keys loaded", counts["operators"], counts["readers"])
        return counts

    def callback(self, domain, key) -> bool:
        """ZAP: let a known key in (called on the authenticator's thread)."""
        z85 = key.decode("ascii") if isinstance(key, bytes) else str(key)
        with self._lock:
            known = z85 in self._keys
            if not known:
                self.denied += 1
                now = time.monotonic()
                if now - self._denied_logged.get(z85, -1e9) >= DENIAL_LOG_S:
                    self._denied_logged[z85] = now
                    log.warning("security: refused a connection with an unknown key %s (%d refused so far)",
                                z85, self.denied)
        return known

    def who(self, user_id: str | None) -> tuple[str, str]:
        """(name, role) of a request's sender (its ZAP User-Id, the z85 public key)."""
        if not self.enabled:
            return ("local", OPERATOR)
        with self._lock:
            return self._keys.get(user_id or "", ("unknown", READER))

    # ---- sockets -------------------------------------------------------------
    def apply(self, sock) -> None:
        """Make ``sock`` a CURVE server (before it binds) when security is on."""
        if self.enabled:
            sock.curve_secretkey = self.secret
            sock.curve_publickey = self.public
            sock.curve_server = True

    def status(self) -> dict:
        with self._lock:
            n_op = sum(r == OPERATOR for _, r in self._keys.values())
            n_rd = len(self._keys) - n_op
        out = {"curve": self.enabled, "operators": n_op, "readers": n_rd, "denied": self.denied}
        if self.insecure:
            out["warning"] = "allow_insecure: an endpoint is off loopback without keys"
        return out

    def stop(self) -> None:
        if self._auth is not None:
            self._auth.stop()
            self._auth = None


def is_change(req: dict) -> bool:
    """True for a control request that changes the service."""
    test = CHANGES.get(req.get("cmd"))
    return bool(test and test(req))
