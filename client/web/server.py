"""``beamtap web``: serve the browser view of a running service (needs the ``web`` extra, aiohttp).

One process, apart from the service's DSP: a thread subscribes to the
service's stream (as ``watch`` does) and hands each message to the event
loop, which serves the static page and one WebSocket per page. Each page
has its own bounded :class:`~.feed.Feed`, so a slow page gets merged rows
(and is told so), never an unbounded queue, and never slows the others.

WebSocket messages, all our own:

- server to page, text (JSON): ``hello`` (``auth``: a token is needed;
  ``palette``; ``caution``), ``welcome`` (``role``), ``denied``, ``beams``
  (the service's beam table), ``status`` (the service's status, plus
  ``web``: this page's merged rows and dropped audio blocks, and the pages
  connected), ``tracks``, ``listening``, ``error``;
- server to page, binary: power rows and audio blocks (see :mod:`.feed`);
- page to server, text (JSON): ``auth`` (``token``), ``listen``
  (``azimuth_deg``, ``elevation_deg``: point the listening beam there and
  send its audio; operators only), ``stop`` (no more audio).

Pages must come from this server (the WebSocket's ``Origin`` is checked),
so a page elsewhere in the same browser cannot use it.
"""

from __future__ import annotations

import asyncio
import json
import logging
import math
import os
import signal
import ssl
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from importlib.resources import files
from urllib.parse import urlsplit

import numpy as np

from beamtap import palette
from beamtap.errors import UsageError

from ..listen import CAUTION, point_audio_beam
from ..protocol import valid_track
from ..subscriber import Controller, ServiceError, Subscriber
from .feed import POWER, Feed, encode, json_text
from .settings import OPERATOR, WebSettings, role_of

try:
    from aiohttp import WSMsgType, web
except ImportError:  # pragma: no cover - exercised only without the extra
    web = None

log = logging.getLogger("beamtap.web")

#: The audio beam the page listens to (the first; clicking a bearing points it there).
LISTEN_BEAM = 0
#: The page's files (nothing else is served).
STATIC = {"index.html": "text/html", "app.js": "text/javascript", "style.css": "text/css", "icon.svg": "image/svg+xml"}
#: Strict: our own scripts, styles and WebSocket only; no inline code, no other origin, no frames.
CSP = ("default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; connect-src 'self'; "
       "base-uri 'none'; form-action 'none'; frame-ancestors 'none'")
#: Audio goes to pages in chunks of at least this many seconds (fewer WebSocket frames; well inside the
#: page's 200 ms jitter buffer).
AUDIO_CHUNK_S = 0.08
#: A view started by the service runs this much nicer than it, so the DSP always gets a core first.
CHILD_NICE = 5
#: Seconds a page has to give its token.
AUTH_TIMEOUT_S = 20.0
#: Largest message a page may send (a listen request is about 60 bytes).
MAX_PAGE_MESSAGE_BYTES = 4096
TOPICS = ("power", "audio", "status", "beams", "tracks")
NEED_EXTRA = "the browser view needs the web extra: pip install 'beamtap[web]' (aiohttp)"


class Hub:
    """The service's stream, fanned out to the pages' feeds (feeds are touched on the loop only).

    Parameters
    ----------
    endpoint, control : str
        The service's stream and control endpoints.
    loop : asyncio.AbstractEventLoop
        The web server's loop.
    """

    def __init__(self, endpoint: str, control: str, loop, key=None, server_key=None):
        self.endpoint, self.control, self.loop = endpoint, control, loop
        self.keys = (key, server_key)
        self.feeds: set[Feed] = set()
        self.sockets: set = set()  # the pages' WebSockets, closed when the server stops
        self.latest: dict[str, dict] = {}
        self.received = 0
        self.bad_messages = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._pump, name="web-subscriber", daemon=True)
        self._control_pool = ThreadPoolExecutor(1, thread_name_prefix="web-control")
        self.error: str | None = None
        self.listeners = 0  # pages listening (written on the loop, read by the subscriber thread)
        self._audio: list = []  # the listening beam's blocks not yet handed to the pages
        self._audio_frames = 0

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(timeout=5)
        self._control_pool.shutdown(wait=False, cancel_futures=True)

    # ---- the subscriber thread --------------------------------------------------
    def _pump(self) -> None:
        try:
            with Subscriber(self.endpoint, topics=TOPICS, timeout_s=0.5, queue=200, key=self.keys[0],
                            server_key=self.keys[1]) as sub:
                while not self._stop.is_set():
                    try:
                        frame = sub.recv()
                    except TimeoutError:
                        continue
                    item = self._prepare(frame)
                    self.bad_messages = sub.bad_messages
                    if item is not None:
                        self.loop.call_soon_threadsafe(self._dispatch, item)
        except Exception as exc:  # the page says so; the server stays up
            self.error = f"subscriber: {exc}"
            log.error("web: %s", self.error)

    def _prepare(self, frame):
        """What the loop needs from one message, copied out of ZeroMQ's buffer (subscriber thread)."""
        h = frame.header
        if frame.topic == "power":
            return ("power", np.array(frame.data, np.float32), h.get("beam_table", 0), h.get("time_utc"))
        if frame.topic == "audio":
            if frame.data.ndim != 2 or frame.data.shape[1] <= LISTEN_BEAM or not self.listeners:
                self._audio, self._audio_frames = [], 0
                return None
            if frame.gap or (self._audio and self._audio[0][1] != h.get("beam_table", 0)):
                self._audio, self._audio_frames = [], 0  # never join audio across a gap or a beam change
            self._audio.append((np.array(frame.data[:, LISTEN_BEAM], np.float32), h.get("beam_table", 0),
                                h.get("time_utc")))
            self._audio_frames += len(frame.data)
            if self._audio_frames < AUDIO_CHUNK_S * float(h.get("samplerate_hz", 48000.0)):
                return None
            blocks, self._audio, self._audio_frames = self._audio, [], 0
            return ("audio", np.concatenate([b[0] for b in blocks]), blocks[0][1], blocks[0][2])
        if frame.topic == "tracks":
            tracks = frame.data.get("tracks", []) if isinstance(frame.data, dict) else []
            return ("tracks", {"utc": h.get("time_utc"), "band": h.get("band"), "beam_table": h.get("beam_table"),
                               "tracks": [t for t in tracks if valid_track(t)]})
        body = {k: v for k, v in h.items() if k not in ("dtype", "shape")}
        return (frame.topic, body)

    # ---- the loop -------------------------------------------------------------------
    def _dispatch(self, item) -> None:
        self.received += 1
        kind = item[0]
        if kind in ("beams", "status"):
            self.latest[kind] = item[1]
        if not self.feeds:
            return
        # Encoded once for every page (a page's own frame is made only when its rows are merged).
        if kind == "power":
            frame = encode(POWER, item[1], item[2], item[3])
        elif kind in ("beams", "tracks"):
            text = json_text({"type": kind, **item[1]})
        for feed in self.feeds:
            if kind == "power":
                feed.put_power(*item[1:], frame=frame)
            elif kind == "audio":
                if feed.listening:
                    feed.put_audio(*item[1:])
            elif kind == "status":
                feed.put_json("status", self.status_for(feed, item[1]), latest_only=True)
            else:
                # Of beams and tracks only the latest waits: a page that is behind skips to it
                # (the page marks track trails at the rows it has).
                feed.put_json(kind, item[1], latest_only=True, text=text)

    def status_for(self, feed: Feed, status: dict) -> dict:
        return dict(status, web={"pages": len(self.feeds), "rows_merged": feed.rows_merged,
                                 "audio_dropped": feed.audio_dropped, "bad_messages": self.bad_messages,
                                 "error": self.error})

    def add(self, feed: Feed) -> None:
        self.feeds.add(feed)
        if "beams" in self.latest:
            feed.put_json("beams", self.latest["beams"], latest_only=True)
        if "status" in self.latest:
            feed.put_json("status", self.status_for(feed, self.latest["status"]), latest_only=True)

    def remove(self, feed: Feed) -> None:
        self.set_listening(feed, False)
        self.feeds.discard(feed)

    def set_listening(self, feed: Feed, on: bool) -> None:
        if feed.listening != on:
            feed.listening = on
            self.listeners += 1 if on else -1

    async def point(self, azimuth_deg: float, elevation_deg: float) -> dict:
        """Point the listening beam (on a thread: the control socket blocks)."""
        def request():
            with Controller(self.control, timeout_s=10.0, key=self.keys[0], server_key=self.keys[1]) as ctl:
                point_audio_beam(ctl, LISTEN_BEAM, (azimuth_deg, elevation_deg))
                return ctl.beams()["beams"]
        return await self.loop.run_in_executor(self._control_pool, request)


# ---- validation of what a page sends ---------------------------------------------------------
def listen_request(msg: dict) -> tuple[float, float]:
    """(azimuth_deg, elevation_deg) of a ``listen`` message; ``ValueError`` naming the bad field."""
    out = []
    for name, low, high, default in (("azimuth_deg", -360.0, 360.0, None), ("elevation_deg", -90.0, 90.0, 0.0)):
        v = msg.get(name, default)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or not low <= v <= high:
            raise ValueError(f"listen: {name} {v!r}: expected a number from {low:g} to {high:g}")
        out.append(float(v))
    return out[0], out[1]


def parse_page_message(text) -> dict:
    """A page's JSON message as a map with a string ``type``; ``ValueError`` otherwise."""
    try:
        msg = json.loads(text, parse_constant=lambda c: math.nan)
    except (ValueError, TypeError):
        raise ValueError("not JSON") from None
    if not isinstance(msg, dict) or not isinstance(msg.get("type"), str):
        raise ValueError("expected a JSON object with a string 'type'")
    return msg


def origin_allowed(origin: str | None, host: str | None, scheme: str) -> bool:
    """A page's WebSocket must come from a page this server served (same scheme, host and port).
    Programs that send no Origin (not browsers) are let through; tokens still apply."""
    if origin is None:
        return True
    try:
        o = urlsplit(origin)
    except ValueError:
        return False
    return o.scheme == scheme and o.netloc.lower() == (host or "").lower()


# ---- the application ---------------------------------------------------------------------------
def make_app(hub: Hub, tokens: dict[str, str]):
    """The aiohttp application: the page's files and ``/ws``."""
    app = web.Application(middlewares=[_headers], client_max_size=MAX_PAGE_MESSAGE_BYTES)
    static = files("beamtap.client.web").joinpath("static")
    body = {name: static.joinpath(name).read_bytes() for name in STATIC}

    def serve(name):
        async def handler(request):
            return web.Response(body=body[name], content_type=STATIC[name], charset="utf-8")
        return handler

    app.router.add_get("/", serve("index.html"))
    for name in STATIC:
        app.router.add_get(f"/static/{name}", serve(name))
    app.router.add_get("/ws", _websocket_handler(hub, tokens))
    return app


if web is not None:
    @web.middleware
    async def _headers(request, handler):
        resp = await handler(request)
        resp.headers["Content-Security-Policy"] = CSP
        resp.headers["X-Content-Type-Options"] = "nosniff"
        resp.headers["Referrer-Policy"] = "no-referrer"
        resp.headers["X-Frame-Options"] = "DENY"
        resp.headers["Cache-Control"] = "no-store"
        return resp


def _websocket_handler(hub: Hub, tokens: dict[str, str]):
    async def handler(request):
        if not origin_allowed(request.headers.get("Origin"), request.host, request.scheme):
            return web.Response(status=403, text="this WebSocket serves pages from this server only")
        ws = web.WebSocketResponse(max_msg_size=MAX_PAGE_MESSAGE_BYTES, heartbeat=10.0)
        await ws.prepare(request)
        hub.sockets.add(ws)
        try:
            return await _session(ws, hub, tokens)
        finally:
            hub.sockets.discard(ws)
    return handler


async def _session(ws, hub: Hub, tokens: dict[str, str]):
    """One page's connection, from hello to close."""
    await ws.send_str(json_text({"type": "hello", "auth": bool(tokens), "palette": list(palette.STOPS),
                                 "caution": CAUTION.format(limit=-6)}))
    role = OPERATOR if not tokens else await _authenticate(ws, tokens)
    if role is None:
        await ws.close(code=4401, message=b"token refused")
        return ws
    await ws.send_str(json_text({"type": "welcome", "role": role}))
    feed = Feed()
    wake = asyncio.Event()
    feed.wanted = wake.set
    hub.add(feed)
    sender = asyncio.create_task(_send_loop(ws, feed, wake))
    pending = None  # the listen request on its way (one at a time per page)
    try:
        async for msg in ws:
            if msg.type != WSMsgType.TEXT:
                feed.put_json("error", {"error": "expected JSON text messages"})
                continue
            try:
                req = parse_page_message(msg.data)
                kind = req["type"]
                if kind == "stop":
                    hub.set_listening(feed, False)
                    feed.put_json("listening", {"on": False})
                    continue
                if kind != "listen":
                    raise ValueError(f"unknown message type {kind!r} (expected listen or stop)")
                az, el = listen_request(req)
                if role != OPERATOR:
                    raise ValueError("pointing the listening beam needs an operator token")
                if pending is not None and not pending.done():
                    raise ValueError("a listen request is still on its way; try again in a moment")
            except ValueError as exc:
                feed.put_json("error", {"error": str(exc)})
                continue
            pending = asyncio.create_task(_point(hub, feed, az, el))
    finally:
        hub.remove(feed)
        sender.cancel()
    return ws


async def _point(hub: Hub, feed: Feed, az: float, el: float) -> None:
    try:
        beams = await hub.point(az, el)
    except (ServiceError, UsageError, OSError) as exc:
        feed.put_json("error", {"error": f"the service refused the listening beam: {exc}"})
        return
    hub.set_listening(feed, True)
    feed.put_json("listening", {"on": True, "azimuth_deg": az, "elevation_deg": el,
                                "beam_table": beams.get("beam_table")})


async def _authenticate(ws, tokens) -> str | None:
    try:
        msg = await ws.receive(timeout=AUTH_TIMEOUT_S)
    except asyncio.TimeoutError:
        return None
    if msg.type != WSMsgType.TEXT:
        return None
    try:
        req = parse_page_message(msg.data)
    except ValueError:
        return None
    role = role_of(req.get("token"), tokens) if req.get("type") == "auth" else None
    if role is None:
        log.warning("web: a page gave a wrong token")
        await ws.send_str(json_text({"type": "denied", "error": "token refused"}))
    return role


async def _send_loop(ws, feed: Feed, wake: asyncio.Event) -> None:
    try:
        while not ws.closed:
            out = feed.take()
            if out is None:
                wake.clear()
                await wake.wait()
                continue
            if isinstance(out, bytes):
                await ws.send_bytes(out)
            else:
                await ws.send_str(out)
    except (ConnectionError, RuntimeError):  # the page went away mid-send
        pass


def tls_context(settings: WebSettings):
    if not settings.tls:
        return None
    ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    try:
        ctx.load_cert_chain(settings.tls_cert, settings.tls_key)
    except (ssl.SSLError, OSError) as exc:
        raise UsageError(f"web: tls_cert {settings.tls_cert} / tls_key {settings.tls_key}: cannot be used: "
                         f"{getattr(exc, 'reason', None) or exc}") from None
    return ctx


def run(endpoint: str, control: str, settings: WebSettings, ready_file: str | None = None,
        seconds: float | None = None, parent_pid: int | None = None, server_key: str | None = None) -> int:
    """Serve until SIGINT/SIGTERM, ``seconds``, or the death of ``parent_pid``; returns the exit status."""
    if web is None:
        raise UsageError(NEED_EXTRA)
    if parent_pid is not None:
        os.nice(CHILD_NICE)
    for warning in settings.check("web"):
        log.warning(warning)
    tokens = settings.tokens("web")
    ssl_ctx = tls_context(settings)
    return asyncio.run(_serve(endpoint, control, settings, tokens, ssl_ctx, ready_file, seconds, parent_pid,
                              server_key))


async def _serve(endpoint, control, settings, tokens, ssl_ctx, ready_file, seconds, parent_pid, server_key) -> int:
    loop = asyncio.get_running_loop()
    stop = asyncio.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)
    hub = Hub(endpoint, control, loop, settings.key, server_key)
    runner = web.AppRunner(make_app(hub, tokens), access_log=None, handle_signals=False, shutdown_timeout=2.0)
    await runner.setup()
    host, port = settings.host_port
    site = web.TCPSite(runner, host, port, ssl_context=ssl_ctx)
    try:
        await site.start()
    except OSError as exc:
        await runner.cleanup()
        raise UsageError(f"web: listen {settings.listen}: {exc.strerror or exc}") from None
    hub.start()
    bound = runner.addresses[0]
    shown = f"[{bound[0]}]" if ":" in bound[0] else bound[0]
    url = f"{'https' if ssl_ctx else 'http'}://{shown}:{bound[1]}/"
    log.info("browser view on %s (stream %s, control %s%s)", url, endpoint, control,
             "; a token is asked for" if tokens else "")
    print(f"beamtap web: open {url} in a browser", flush=True)
    if ready_file:
        tmp = f"{ready_file}.tmp"
        with open(tmp, "w") as f:
            json.dump({"url": url, "pid": os.getpid()}, f)
        os.replace(tmp, ready_file)
    deadline = None if seconds is None else time.monotonic() + seconds
    try:
        while not stop.is_set():
            try:
                await asyncio.wait_for(stop.wait(), timeout=0.5)
            except asyncio.TimeoutError:
                pass
            if deadline is not None and time.monotonic() >= deadline:
                break
            if parent_pid is not None and os.getppid() != parent_pid:
                log.info("web: the service that started this server is gone; stopping")
                break
    finally:
        for ws in list(hub.sockets):  # pages reconnect on their own when a server comes back
            await ws.close(code=1001, message=b"server stopping")
        hub.stop()
        await runner.cleanup()
        if ready_file:
            try:
                os.unlink(ready_file)
            except OSError:
                pass
    return 0
