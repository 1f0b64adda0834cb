"""The control socket: msgpack requests and replies on a ZeroMQ REP socket.

Every request is a map with a ``cmd`` key; every reply is a map with
``ok`` (bool) and either the result keys or ``error`` (one line saying what
was wrong). The socket runs in its own thread; changes reach the
processing thread only as fully validated, fully prepared steering, taken
at a block boundary, so no request can stop the service or change it
half-way.

Commands: ``ping``, ``status``, ``config``, ``beams`` (read, or replace
with ``set``), ``record`` (``action``: start | stop | status) and ``mark``.
"""

from __future__ import annotations

import logging
import math
import threading

import zmq

from beamtap.client.protocol import MAX_REQUEST_BYTES, ProtocolError, pack, unpack
from beamtap.errors import ConfigError, UsageError

from . import config as cfg
from . import security
from .engine.cost import AdmissionError
from .publisher import bind
from .tomlcheck import _Table, key_text

log = logging.getLogger("beamtap.control")

COMMANDS = ("ping", "status", "config", "beams", "detect", "record", "mark", "reload_keys")
#: The keys each command takes.
_KEYS = {"ping": {"cmd"}, "status": {"cmd"}, "config": {"cmd"}, "beams": {"cmd", "set"}, "detect": {"cmd", "set"},
         "record": {"cmd", "action", "what", "label"}, "mark": {"cmd", "text"}, "reload_keys": {"cmd"}}
#: Deepest nesting a request may have (the deepest real one, a grid in ``set``, has 3 levels).
_MAX_DEPTH = 8


class RequestError(Exception):
    """A bad request; the message goes back to the client."""


def _refuse_missing_values(req: dict) -> None:
    """Refuse nil, NaN and infinities anywhere in a request, naming the key.

    msgpack nil must never read as "key absent" (that would silently keep a
    default) and a non-finite number must never reach arithmetic.
    """
    stack = [(v, key_text(k), 1) for k, v in req.items()]
    while stack:
        value, where, depth = stack.pop()
        if depth > _MAX_DEPTH:
            raise RequestError(f"{where}: nested deeper than {_MAX_DEPTH} levels")
        if value is None:
            raise RequestError(f"{where}: nil is not a value; leave the key out to keep its current value")
        if isinstance(value, float) and not math.isfinite(value):
            raise RequestError(f"{where}: {value!r} is not a finite number")
        if isinstance(value, dict):
            for k, v in value.items():
                if not isinstance(k, str):
                    raise RequestError(f"{where}: key {k!r} is not a string")
                stack.append((v, f"{where}.{key_text(k)}", depth + 1))
        elif isinstance(value, list):
            stack.extend((v, f"{where}[{i}]", depth + 1) for i, v in enumerate(value))


def beams_as_request(beams) -> dict:
    """The current beam set in the same shape a ``beams`` ``set`` request takes."""
    out = {
        "directions_deg": beams.power_deg.tolist(),
        "audio_deg": beams.audio_deg.tolist(),
        "shading": beams.shading,
        "sidelobe_db": beams.sidelobe_db,
        "nbar": beams.nbar,
        "band_hz": [list(b) for b in beams.bands_hz],
    }
    if beams.transition_hz is not None:
        out["transition_hz"] = beams.transition_hz
    out["method"] = beams.method
    out["adaptive"] = beams.adaptive.as_dict()
    return out


class ControlServer:
    """REP socket serving control requests in a thread.

    Parameters
    ----------
    endpoint : str
    service : object
        Provides ``pipeline``, ``config`` and optionally ``recorder``.
    """

    def __init__(self, endpoint: str, service, context=None):
        self.service = service
        self._ctx = context or zmq.Context.instance()
        self._sock = self._ctx.socket(zmq.REP)
        # A larger message is never read: ZeroMQ drops the connection that sends it.
        self._sock.setsockopt(zmq.MAXMSGSIZE, MAX_REQUEST_BYTES)
        self.guard = getattr(service, "guard", None)
        if self.guard is not None:
            self.guard.apply(self._sock)  # CURVE server, before the bind
        self.endpoint = bind(self._sock, endpoint, "control")
        self._stop = threading.Event()
        self._thread = None
        self.requests = 0
        self.errors = 0

    def start(self):
        self._thread = threading.Thread(target=self._run, name="beamtap-control", daemon=True)
        self._thread.start()

    def stop(self):
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=2.0)
        self._sock.close(linger=0)

    def _run(self):
        while not self._stop.is_set():
            if not self._sock.poll(100):
                continue
            try:
                frames = self._sock.recv_multipart(copy=False)
            except zmq.ZMQError:
                continue
            user = None
            if self.guard is not None and self.guard.enabled:
                try:
                    user = frames[0].get("User-Id")  # the sender's public key, as ZAP accepted it
                except zmq.ZMQError:
                    user = None
            reply = self.handle([f.bytes for f in frames], user)
            try:
                self._sock.send(pack(reply))
            except zmq.ZMQError as exc:
                log.warning("control: reply not sent: %s", exc)

    def handle(self, frames, user: str | None = None) -> dict:
        """Answer one request (list of frames) from ``user`` (a ZAP User-Id, or None); never raises."""
        self.requests += 1
        try:
            if len(frames) != 1:
                raise RequestError(f"a request is one msgpack frame, got {len(frames)} frames")
            try:
                req = unpack(frames[0], MAX_REQUEST_BYTES)
            except ProtocolError as exc:
                raise RequestError(f"request {exc}") from None
            if not isinstance(req, dict):
                raise RequestError(f"request must be a map with a 'cmd' key, got {type(req).__name__}")
            cmd = req.get("cmd")
            if not isinstance(cmd, str):
                raise RequestError(f"'cmd' must be a string, one of {', '.join(COMMANDS)}; got {cmd!r}")
            if cmd not in COMMANDS:
                raise RequestError(f"unknown cmd {cmd!r}; expected one of {', '.join(COMMANDS)}")
            unknown = sorted(set(req) - _KEYS[cmd])
            if unknown:
                raise RequestError(f"unknown key {unknown[0]!r} in {cmd} request; expected "
                                   f"{', '.join(repr(k) for k in sorted(_KEYS[cmd] - {'cmd'})) or 'no other keys'}")
            _refuse_missing_values(req)
            name, role = self.guard.who(user) if self.guard is not None else ("local", security.OPERATOR)
            change = security.is_change(req)
            if change and role != security.OPERATOR:
                raise RequestError(f"refused: key {name!r} is a reader; readers may watch (ping, status, config, "
                                   "beams) but change nothing; ask for an operator key (the clients folder)")
            result = getattr(self, f"_cmd_{cmd}")(req)
            if change:
                self._note_change(name, req)
            return {"ok": True, "cmd": cmd, **result}
        except RequestError as exc:
            self.errors += 1
            return {"ok": False, "error": str(exc)}
        except (ConfigError, UsageError) as exc:
            self.errors += 1
            return {"ok": False, "error": str(exc)}
        except Exception as exc:  # a bug must not take the socket down: report it
            self.errors += 1
            log.exception("control request failed")
            return {"ok": False, "error": f"internal error: {type(exc).__name__}: {exc}"}

    def _note_change(self, who: str, req: dict) -> None:
        """Every change is logged with who asked, and noted in the session when recording."""
        what = {k: v for k, v in req.items() if k != "cmd"}
        text = str(what)
        log.info("control: %s %s by %s", req["cmd"], text if len(text) < 300 else text[:300] + "…", who)
        rec = getattr(self.service, "recorder", None)
        if rec is not None:
            rec.note("control", cmd=req["cmd"], by=who, request=what)

    # ---- commands ----------------------------------------------------------
    def _cmd_reload_keys(self, req):
        if self.guard is None or not self.guard.enabled:
            raise RequestError("reload_keys: this service has no [security] server_key (no keys to read)")
        return {"keys": self.guard.reload()}

    def _cmd_ping(self, req):
        import beamtap  # noqa: PLC0415

        return {"version": beamtap.__version__, "stream": self.service.stream_id}

    def _cmd_status(self, req):
        return {"status": self.service.pipeline.status()}

    def _cmd_config(self, req):
        p = self.service.pipeline
        beams = dict(beams_as_request(p.engine.beams), power_batch_blocks=p.engine.power_batch_blocks)
        return {"text": self.service.config.text, "where": self.service.config.where,
                "document": cfg.with_beams(self.service.config.text, beams, self.service.config.where),
                "beam_table": p.beam_table_id}

    def _cmd_beams(self, req):
        p = self.service.pipeline
        if "set" not in req:
            return {"beams": beams_as_request(p.engine.beams), "table": p.beam_table}
        change = req["set"]
        if not isinstance(change, dict) or not change:
            raise RequestError("'set' must be a non-empty map of [beams] keys")
        merged = beams_as_request(p.engine.beams)
        if any(k in change for k in ("fan", "directions_deg", "grid")):
            merged.pop("directions_deg")
        merged.update(change)
        beams, batch = cfg.parse_beams(merged, "beams request", "set", p.samplerate_hz)
        if batch != p.engine.power_batch_blocks:
            raise RequestError("set.power_batch_blocks cannot change while running")
        try:  # priced from counts and ranges before any steering is built
            estimate = self.service.cost.admit(beams)
        except AdmissionError as exc:
            raise RequestError(f"beams refused: {exc}") from None
        try:
            table_id = p.request_retarget(beams)
        except Exception as exc:
            raise RequestError(f"beams not applied: {exc}") from None
        return {"beam_table": table_id, "beams": beams_as_request(beams), "estimate": estimate.describe(),
                "block_share": estimate.share}

    def _cmd_detect(self, req):
        p = self.service.pipeline
        current = p.detect_settings
        if "set" not in req:
            return {"detect": current.as_dict(), "tracks_live": p.tracking.tracks_live}
        change = req["set"]
        if not isinstance(change, dict) or not change:
            raise RequestError("'set' must be a non-empty map of [detect] keys")
        settings = cfg.parse_detect(_Table(change, "detect request", "set"), len(p.engine.beams.bands_hz), current)
        p.request_detect(settings)
        return {"detect": settings.as_dict()}

    def _recorder(self):
        rec = getattr(self.service, "recorder", None)
        if rec is None:
            raise RequestError("recording is not available in this service")
        return rec

    def _cmd_record(self, req):
        action = req.get("action", "status")
        if action not in ("start", "stop", "status"):
            raise RequestError(f"record action {action!r}; expected start, stop or status")
        rec = self._recorder()
        if action != "start" and set(req) - {"cmd", "action"}:
            raise RequestError(f"unknown key {sorted(set(req) - {'cmd', 'action'})[0]!r} in record {action}")
        if action == "start":
            what = req.get("what")
            if what is not None and (not isinstance(what, list) or not what
                                     or any(w not in cfg.RECORD_KINDS for w in what)):
                raise RequestError(f"what={what!r}: expected a list drawn from {', '.join(cfg.RECORD_KINDS)}")
            label = req.get("label", "")
            if not isinstance(label, str) or len(label) > 200:
                raise RequestError("label must be a string of at most 200 characters")
            return {"record": rec.start(what, label)}
        if action == "stop":
            return {"record": rec.stop()}
        return {"record": rec.status()}

    def _cmd_mark(self, req):
        text = req.get("text")
        if not isinstance(text, str) or not text.strip() or len(text) > 1000:
            raise RequestError("mark needs 'text': a non-empty string of at most 1000 characters")
        rec = self._recorder()
        return {"mark": rec.mark(text, self.service.pipeline.engine.next_sample)}
