"""Subscribe to a beamtap service from Python, and control it.

Three lines get beam power::

    from beamtap.client import Subscriber
    with Subscriber("tcp://127.0.0.1:5560", topics=["power"]) as sub:
        for frame in sub:
            print(frame.first_sample, frame.data.argmax())

Needs only numpy, pyzmq and msgpack.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
import zmq

from . import protocol

DEFAULT_PUBLISH, DEFAULT_CONTROL = protocol.DEFAULT_PUBLISH, protocol.DEFAULT_CONTROL


def control_for(endpoint: str) -> str:
    """The control endpoint of the service publishing on ``endpoint``: the same host with the default
    control port (``tcp://boat.local:5560`` -> ``tcp://boat.local:5561``). Other transports cannot
    be guessed: pass the control endpoint explicitly."""
    default_port = DEFAULT_CONTROL.rsplit(":", 1)[1]
    if endpoint.startswith("tcp://") and ":" in endpoint[6:]:
        return endpoint.rsplit(":", 1)[0] + ":" + default_port
    return DEFAULT_CONTROL


def secure_client(sock, key=None, server_key=None) -> bool:
    """Make ``sock`` a CURVE client (before it connects) when keys are given, as arguments or in the
    environment (``BEAMTAP_KEY``: this client's secret certificate file; ``BEAMTAP_SERVER_KEY``: the
    service's public certificate file). Returns True when CURVE is on."""
    key = key or os.environ.get("BEAMTAP_KEY") or None
    server_key = server_key or os.environ.get("BEAMTAP_SERVER_KEY") or None
    if key is None and server_key is None:
        return False
    if key is None or server_key is None:
        sock.close(linger=0)
        raise EndpointError("a secured service needs both --key (your NAME.key_secret) and --server-key (the "
                            "service's public .key)")
    import zmq.auth  # noqa: PLC0415

    try:
        public, secret = zmq.auth.load_certificate(key)
        server_public, _ = zmq.auth.load_certificate(server_key)
    except (OSError, ValueError) as exc:
        sock.close(linger=0)
        raise EndpointError(f"key file: {exc}") from None
    if not secret:
        sock.close(linger=0)
        raise EndpointError(f"--key {key}: holds no secret key (use your NAME.key_secret file)")
    sock.curve_secretkey, sock.curve_publickey, sock.curve_serverkey = secret, public, server_public
    return True


#: What a client says when a secured service stays silent.
KEY_HINT = ("the service did not answer: check --server-key and that your public key is in its clients (or "
            "readers) folder")


class EndpointError(ValueError):
    """An endpoint ZeroMQ cannot use (malformed address, unknown transport)."""


def _connect(sock, endpoint: str) -> None:
    try:
        sock.connect(endpoint)
    except zmq.ZMQError as exc:
        sock.close(linger=0)
        raise EndpointError(f"endpoint {endpoint!r}: {exc.strerror}; expected e.g. 'tcp://127.0.0.1:5560'") from None


@dataclass
class Frame:
    """One message from the stream.

    Attributes
    ----------
    topic : str
        ``"power"``, ``"audio"``, ``"raw"``, ``"status"``, ``"beams"``,
        ``"detections"`` or ``"tracks"``.
    header : dict
        Every header key (see docs/protocol.md).
    data : ndarray or None
        ``power``: float32 (n_bands, n_beams), dB re full scale;
        ``audio``: float32 (frames, n_audio); ``raw``: float32 (frames,
        channels); None for ``status`` and ``beams``; for ``detections`` a
        list of maps and for ``tracks`` a map ``{"tracks": [...], "ended":
        [...]}`` (see docs/protocol.md). A read-only view on
        the received bytes (no copy).
    gap : bool
        True when messages or samples were lost before this one: the
        service said so (``gap`` in the header), the per-topic sequence
        number jumped (this subscriber was too slow), or ``first_sample``
        did not follow on from the previous message of the topic.
    missed_messages : int
        Messages of this topic this subscriber did not receive.
    """

    topic: str
    header: dict
    data: np.ndarray | None
    gap: bool = False
    missed_messages: int = 0
    beams: dict | None = field(default=None, repr=False)

    def peak(self, band: int = 0) -> tuple:
        """The strongest power beam: ``((azimuth_deg, elevation_deg), level_db)`` in ``band``.

        Uses the beam table the message was formed with (``frame.beams``);
        raises ``ValueError`` for a message that is not ``power``, a band
        it does not have, or before the matching beam table has arrived.
        """
        if self.topic != "power" or self.data is None:
            raise ValueError(f"peak(): a {self.topic!r} message has no beam powers")
        if not 0 <= band < self.data.shape[0]:
            raise ValueError(f"peak(band={band}): the message has {self.data.shape[0]} band(s)")
        table = self.beams
        if table is None or table.get("beam_table") != self.header.get("beam_table"):
            raise ValueError("peak(): the beam table of this message has not arrived yet (subscribe to 'beams')")
        i = int(np.argmax(self.data[band]))
        az, el = table["power_deg"][i]
        return (float(az), float(el)), float(self.data[band, i])

    def __getattr__(self, name):
        # Header keys as attributes: frame.first_sample, frame.time_utc, ...
        header = self.__dict__.get("header", {})
        if name in header:
            return header[name]
        raise AttributeError(name)


class Subscriber:
    """Iterate over messages of a beamtap stream.

    Parameters
    ----------
    endpoint : str
        The service's ``[publish] endpoint``.
    topics : sequence of str
        Topics to receive (default: power, audio, status, beams).
    timeout_s : float or None
        :meth:`recv` waits at most this long (None: forever) and raises
        ``TimeoutError``.
    queue : int
        Messages ZeroMQ may queue here before dropping (receive high-water mark).

    Notes
    -----
    The subscriber keeps the latest ``beams`` table and attaches it to each
    frame (``frame.beams``) once one has been seen.
    """

    def __init__(self, endpoint: str = DEFAULT_PUBLISH, topics=("power", "audio", "status", "beams"),
                 timeout_s: float | None = 5.0, queue: int = 1000, context=None, key=None, server_key=None):
        for t in topics:
            if t not in protocol.TOPICS:
                raise ValueError(f"topics: {t!r} is not one of {', '.join(protocol.TOPICS)}")
        self.endpoint = endpoint
        self.timeout_s = timeout_s
        self._ctx = context or zmq.Context.instance()
        self._sock = self._ctx.socket(zmq.SUB)
        self._sock.setsockopt(zmq.RCVHWM, int(queue))
        self._sock.setsockopt(zmq.LINGER, 0)
        self._sock.setsockopt(zmq.MAXMSGSIZE, protocol.MAX_MESSAGE_BYTES)
        self.secured = secure_client(self._sock, key, server_key)
        _connect(self._sock, endpoint)
        for t in topics:
            self._sock.setsockopt(zmq.SUBSCRIBE, t.encode())
        self._last_seq: dict = {}
        self._next_first: dict = {}
        self._stream = None
        self.beams: dict | None = None
        self.bad_messages = 0

    @property
    def socket(self) -> zmq.Socket:
        """The underlying SUB socket (for polling it beside other inputs)."""
        return self._sock

    def recv(self) -> Frame:
        """The next frame; raises ``TimeoutError`` after ``timeout_s`` without one."""
        while True:
            if self.timeout_s is not None and not self._sock.poll(int(self.timeout_s * 1000)):
                raise TimeoutError(f"no message from {self.endpoint} within {self.timeout_s:g} s: "
                                   + (KEY_HINT if self.secured else "is a beamtap service publishing there "
                                      "(one that needs keys sends nothing without --key and --server-key)?"))
            try:
                topic, header, data = protocol.decode(self._sock.recv_multipart(copy=False))
            except protocol.ProtocolError:
                self.bad_messages += 1
                continue
            return self._frame(topic, header, data)

    def _frame(self, topic, header, data) -> Frame:
        if header.get("stream") != self._stream:
            # A new service run: sequence numbers start over.
            restarted = self._stream is not None
            self._stream = header.get("stream")
            self._last_seq.clear()
            self._next_first.clear()
        else:
            restarted = False
        seq = header.get("seq", 0)
        missed = 0
        if topic in self._last_seq:
            missed = max(0, seq - self._last_seq[topic] - 1)
        self._last_seq[topic] = seq
        gap = bool(header.get("gap")) or missed > 0 or restarted
        if data is not None and topic in ("audio", "raw") and "first_sample" in header:
            first = int(header["first_sample"])
            if topic in self._next_first and first != self._next_first[topic]:
                gap = True
            self._next_first[topic] = first + len(data)
        if topic == "beams":
            self.beams = header
        return Frame(topic, header, data, gap, missed, self.beams)

    def __iter__(self):
        while True:
            yield self.recv()

    def close(self) -> None:
        self._sock.close(linger=0)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class ServiceError(RuntimeError):
    """The service answered with an error, or did not answer."""


class Controller:
    """Send control requests to a beamtap service.

    Parameters
    ----------
    endpoint : str
        The service's ``[control] endpoint``.
    timeout_s : float
        How long to wait for each reply.

    Examples
    --------
    >>> with Controller("tcp://127.0.0.1:5561") as ctl:     # doctest: +SKIP
    ...     ctl.beams(set={"audio_deg": [[75.0, 0.0]]})
    """

    def __init__(self, endpoint: str = DEFAULT_CONTROL, timeout_s: float = 5.0, context=None, key=None,
                 server_key=None):
        self.endpoint = endpoint
        self.timeout_s = timeout_s
        self._ctx = context or zmq.Context.instance()
        self._sock = None
        self._keys = (key, server_key)
        self.secured = False

    def _socket(self):
        if self._sock is None:
            self._sock = self._ctx.socket(zmq.REQ)
            self._sock.setsockopt(zmq.LINGER, 0)
            self._sock.setsockopt(zmq.MAXMSGSIZE, protocol.MAX_MESSAGE_BYTES)
            self.secured = secure_client(self._sock, *self._keys)
            _connect(self._sock, self.endpoint)
        return self._sock

    def request(self, cmd: str, **kwargs) -> dict:
        """Send ``{"cmd": cmd, **kwargs}``; returns the reply map (``ok`` is True).

        Raises
        ------
        ServiceError
            On an error reply or when no reply comes within ``timeout_s``.
        """
        sock = self._socket()
        sock.send(protocol.pack({"cmd": cmd, **kwargs}))
        if not sock.poll(int(self.timeout_s * 1000)):
            # A REQ socket that lost its reply cannot be reused: start afresh next time.
            sock.close(linger=0)
            self._sock = None
            raise ServiceError(f"no reply from {self.endpoint} within {self.timeout_s:g} s: " + (
                KEY_HINT + ", or it is still busy" if self.secured else
                "the service may still be busy (a large beam change takes a few seconds; try a longer "
                "--timeout), nothing is listening there, or it needs keys (--key, --server-key)"))
        reply = protocol.unpack(sock.recv())
        if not isinstance(reply, dict) or not reply.get("ok"):
            raise ServiceError(reply.get("error", "malformed reply") if isinstance(reply, dict) else
                               "malformed reply")
        return reply

    def ping(self) -> dict:
        return self.request("ping")

    def status(self) -> dict:
        return self.request("status")["status"]

    def config(self) -> dict:
        return self.request("config")

    def beams(self, set: dict | None = None) -> dict:  # noqa: A002 - the protocol's own word
        return self.request("beams", set=set) if set is not None else self.request("beams")

    def detect(self, set: dict | None = None) -> dict:  # noqa: A002 - the protocol's own word
        """The detection settings in force, or change them (any ``[detect]`` keys); returns the settings."""
        return (self.request("detect", set=set) if set is not None else self.request("detect"))["detect"]

    def record(self, action: str, **kwargs) -> dict:
        return self.request("record", action=action, **kwargs)["record"]

    def mark(self, text: str) -> dict:
        return self.request("mark", text=text)["mark"]

    def close(self) -> None:
        if self._sock is not None:
            self._sock.close(linger=0)
            self._sock = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
