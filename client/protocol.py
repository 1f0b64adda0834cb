"""The beamtap wire format: the one module both the service and clients import.

Every published message is a ZeroMQ multipart message of three frames:

1. topic: ASCII bytes, one of :data:`TOPICS` (subscribers filter on it);
2. header: a msgpack map with string keys (see docs/protocol.md);
3. payload: the array's bytes, little-endian, C order, ``dtype`` and
   ``shape`` as the header says (empty for ``status`` and ``beams``); for
   ``detections`` and ``tracks`` a msgpack object (``dtype`` is
   ``"msgpack"``, ``shape`` empty).

Control requests and replies are single-frame msgpack maps.

Versioning: ``v`` in every header is :data:`PROTOCOL_VERSION`. Adding
header keys or topics keeps the version; changing the meaning or type of an
existing key, the frame layout or a payload layout increments it. Readers
ignore keys they do not know.
"""

from __future__ import annotations

import msgpack
import numpy as np

PROTOCOL_VERSION = 2
#: Default endpoints: the stream and the control socket, on loopback (the one definition).
DEFAULT_PUBLISH = "tcp://127.0.0.1:5560"
DEFAULT_CONTROL = "tcp://127.0.0.1:5561"
TOPICS = ("power", "audio", "raw", "status", "beams", "detections", "tracks")
#: The ``dtype`` of a payload that is one msgpack object rather than an array.
MSGPACK_PAYLOAD = "msgpack"
#: Largest control request accepted, bytes (a 20,000-direction list is about 360 kB of msgpack).
MAX_REQUEST_BYTES = 512 * 1024
#: Largest message part a client reads (a raw block of 64 channels x 65536 frames is 16 MiB).
MAX_MESSAGE_BYTES = 64 * 2**20


class ProtocolError(ValueError):
    """A message that does not follow the wire format."""


def pack(obj) -> bytes:
    """msgpack-encode a map (numpy scalars and arrays become plain values)."""
    return msgpack.packb(obj, default=_plain, use_bin_type=True)


def unpack(data: bytes, max_bytes: int | None = None):
    """Decode one msgpack object; raises :class:`ProtocolError` on bad data."""
    if max_bytes is not None and len(data) > max_bytes:
        raise ProtocolError(f"message of {len(data)} bytes is larger than the limit of {max_bytes}")
    try:
        return msgpack.unpackb(data, raw=False, strict_map_key=False)
    except Exception as exc:  # msgpack raises several exception types
        raise ProtocolError(f"not a msgpack object ({type(exc).__name__})") from None


def valid_track(t) -> bool:
    """A ``tracks`` entry with the values a reader uses: an integer ``track`` and finite numbers for
    ``bearing_deg`` (and ``rate_deg_per_s``, ``snr_db`` when present). Readers skip anything else."""
    def number(v):
        return isinstance(v, (int, float)) and not isinstance(v, bool) and np.isfinite(v)
    return (isinstance(t, dict) and type(t.get("track")) is int and number(t.get("bearing_deg"))
            and number(t.get("rate_deg_per_s", 0.0)) and number(t.get("snr_db", 0.0)))


def _plain(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, tuple):
        return list(o)
    raise TypeError(f"cannot encode {type(o).__name__}")


def encode(topic: str, header: dict, payload: np.ndarray | None = None) -> list:
    """Frames of one published message.

    Parameters
    ----------
    topic : str
    header : dict
        Topic-specific keys; ``v``, ``dtype`` and ``shape`` are filled in here.
    payload : ndarray, list, dict or None
        An array is sent little-endian, C order; a list or map (detections,
        tracks) as one msgpack object.

    Returns
    -------
    list of bytes-like
        ``[topic, header, payload]`` ready for ``socket.send_multipart``.
    """
    header = dict(header)
    header["v"] = PROTOCOL_VERSION
    if payload is None:
        header["dtype"], header["shape"] = None, []
        body = b""
    elif isinstance(payload, (list, dict)):  # detections, tracks: plain values
        header["dtype"], header["shape"] = MSGPACK_PAYLOAD, []
        body = pack(payload)
    else:
        arr = np.ascontiguousarray(payload, dtype=payload.dtype.newbyteorder("<"))
        header["dtype"], header["shape"] = arr.dtype.str, list(arr.shape)
        body = memoryview(arr).cast("B") if arr.size else b""
    return [topic.encode("ascii"), pack(header), body]


def decode(frames) -> tuple[str, dict, np.ndarray | None]:
    """Decode ``[topic, header, payload]`` frames into (topic, header, array).

    The array is a read-only view on the payload frame where possible
    (no copy). Raises :class:`ProtocolError` on anything malformed.
    """
    if len(frames) != 3:
        raise ProtocolError(f"expected 3 frames (topic, header, payload), got {len(frames)}")
    raw = [f.buffer if hasattr(f, "buffer") else f for f in frames]
    try:
        topic = bytes(raw[0]).decode("ascii")
    except UnicodeDecodeError:
        raise ProtocolError("topic frame is not ASCII") from None
    header = unpack(bytes(raw[1]))
    if not isinstance(header, dict):
        raise ProtocolError("header is not a map")
    if header.get("v") != PROTOCOL_VERSION:
        raise ProtocolError(f"protocol version {header.get('v')!r}, this reader speaks {PROTOCOL_VERSION}")
    dtype, shape = header.get("dtype"), header.get("shape", [])
    if dtype is None:
        return topic, header, None
    if dtype == MSGPACK_PAYLOAD:
        return topic, header, unpack(bytes(raw[2]))
    try:
        dt = np.dtype(dtype)
        arr = np.frombuffer(raw[2], dtype=dt) if len(raw[2]) else np.zeros(0, dt)
        arr = arr.reshape(shape)
    except (TypeError, ValueError) as exc:
        raise ProtocolError(f"payload does not match dtype {dtype!r} and shape {shape!r}: {exc}") from None
    return topic, header, arr
