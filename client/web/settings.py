"""Where the browser view listens and who may use it: loopback by default, TLS and tokens off it.

The rules, shared by ``beamtap web`` and the service's ``[web]`` section:

- a loopback address (``127.0.0.0/8``, ``::1``, ``localhost``) needs nothing;
- any other address needs a token file (``operator_token_file``: may point
  the listening beam; ``reader_token_file``: view only) and TLS
  (``tls_cert``, ``tls_key``, PEM files); TLS may be left out only with
  ``allow_insecure`` (the service's ``[security] allow_insecure``), and then
  every token crosses the network in the clear (warned at start).

Tokens are read from files (never from the command line, where ``ps``
shows them), stripped of surrounding white space, and must be at least
:data:`MIN_TOKEN_CHARS` characters.
"""

from __future__ import annotations

import hmac
import ipaddress
import os
from dataclasses import dataclass

from beamtap.errors import UsageError

DEFAULT_LISTEN = "127.0.0.1:8080"
#: Shortest token accepted: 128 bits as hex (common practice for bearer tokens; e.g. ``openssl rand -hex 16``).
MIN_TOKEN_CHARS = 32
OPERATOR, READER = "operator", "reader"


def parse_listen(text, what: str = "--listen") -> tuple[str, int]:
    """``HOST:PORT`` (``[::1]:8080`` for IPv6) -> (host, port); port 0 takes any free port."""
    if not isinstance(text, str) or ":" not in text:
        raise UsageError(f"{what} {text!r}: expected HOST:PORT, e.g. 127.0.0.1:8080")
    host, _, port_text = text.rpartition(":")
    host = host.strip("[]")
    try:
        port = int(port_text)
    except ValueError:
        port = -1
    if not host or not 0 <= port <= 65535:
        raise UsageError(f"{what} {text!r}: expected HOST:PORT with a port from 0 to 65535, e.g. 127.0.0.1:8080")
    return host, port


def is_loopback_host(host: str) -> bool:
    """True for hosts no other machine reaches."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False  # a name, '0.0.0.0' style wildcards are addresses and not loopback


def read_token(path, what: str) -> str:
    """The token in ``path``; one line on any problem."""
    try:
        with open(path, encoding="utf-8") as f:
            token = f.read().strip()
    except OSError as exc:
        raise UsageError(f"{what} {path}: cannot be read: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise UsageError(f"{what} {path}: not a text file; a token is one line of text") from None
    if len(token) < MIN_TOKEN_CHARS or any(c.isspace() for c in token):
        raise UsageError(f"{what} {path}: expected one word of at least {MIN_TOKEN_CHARS} characters "
                         "(make one with 'openssl rand -hex 16')")
    return token


@dataclass(frozen=True)
class WebSettings:
    """The browser view's settings (``[web]`` keys, or ``beamtap web`` options).

    Attributes
    ----------
    listen : str
        ``HOST:PORT`` to serve on (``127.0.0.1:8080``).
    tls_cert, tls_key : str or None
        PEM certificate chain and private key: serve HTTPS and WSS.
    operator_token_file, reader_token_file : str or None
        Files holding the tokens a page must give: operators may point the
        listening beam, readers only view.
    allow_insecure : bool
        Serve off loopback without TLS (tokens are still required there).
    key : str or None
        The web server's own secret key file (``NAME.key_secret``) for a
        secured service (``[web] key``; ``beamtap web`` takes ``--key``).
    """

    listen: str = DEFAULT_LISTEN
    tls_cert: str | None = None
    tls_key: str | None = None
    operator_token_file: str | None = None
    reader_token_file: str | None = None
    allow_insecure: bool = False
    key: str | None = None

    @property
    def host_port(self) -> tuple[str, int]:
        return parse_listen(self.listen, "listen")

    @property
    def tls(self) -> bool:
        return self.tls_cert is not None

    def check(self, where: str = "web") -> list[str]:
        """Refuse what the rules above forbid (``UsageError`` naming ``where`` and the key); returns warnings."""
        host, _ = parse_listen(self.listen, f"{where}: listen")
        if (self.tls_cert is None) != (self.tls_key is None):
            raise UsageError(f"{where}: tls_cert and tls_key go together (got only "
                             f"{'tls_cert' if self.tls_cert else 'tls_key'})")
        for name in ("tls_cert", "tls_key"):
            path = getattr(self, name)
            if path is not None and not os.path.isfile(path):
                raise UsageError(f"{where}: {name} {path}: no such file")
        tokens = self.tokens(where)
        warnings = []
        if not is_loopback_host(host):
            if not tokens:
                raise UsageError(f"{where}: listen {self.listen!r} can be reached from other machines: give "
                                 "operator_token_file and/or reader_token_file (see README, 'In a browser')")
            if not self.tls:
                if not self.allow_insecure:
                    raise UsageError(f"{where}: listen {self.listen!r} can be reached from other machines: give "
                                     "tls_cert and tls_key, or set [security] allow_insecure = true "
                                     "(--allow-insecure) on a network you trust")
                warnings.append(f"web: serving {self.listen} without TLS (allow_insecure): tokens and data cross "
                                "the network in the clear")
        return warnings

    def tokens(self, where: str = "web") -> dict[str, str]:
        """``{token: role}`` from the token files (empty: no token needed)."""
        out = {}
        if self.reader_token_file is not None:
            out[read_token(self.reader_token_file, f"{where}: reader_token_file")] = READER
        if self.operator_token_file is not None:
            out[read_token(self.operator_token_file, f"{where}: operator_token_file")] = OPERATOR
        return out


def role_of(token, tokens: dict[str, str]) -> str | None:
    """The role a page's token grants, or None; compared in constant time (no early exit on a match)."""
    if not isinstance(token, str):
        return None
    found = None
    for known, role in tokens.items():
        if hmac.compare_digest(token.encode("utf-8", "replace"), known.encode("utf-8")):
            found = role if found is None or role == OPERATOR else found
    return found
