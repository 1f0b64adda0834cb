"""The browser view's server: settings rules, the bounded per-page feed, and the WebSocket relay
against a real service (real ZeroMQ and HTTP sockets on loopback, both as subprocesses).

The page itself is tested in a real headless Chromium in test_web_browser.py.
"""

from __future__ import annotations

import asyncio
import json
import math
import os
import subprocess
import sys
import time

import numpy as np
import pytest
from hypothesis import given, settings as hsettings, strategies as st

from beamtap.client import Subscriber
from beamtap.client.web import feed as feedmod
from beamtap.client.web.feed import Feed
from beamtap.client.web.server import listen_request, origin_allowed, parse_page_message
from beamtap.client.web.settings import MIN_TOKEN_CHARS, WebSettings, parse_listen, role_of
from beamtap.errors import UsageError

from conftest import line_config, running_service, running_web

aiohttp = pytest.importorskip("aiohttp")

SCENE = line_config(scene=[{"azimuth_deg": 60.0, "signal": "noise", "band_hz": [300.0, 1400.0], "level_db": -20.0}],
                    fan=(0.0, 180.0, 4.0), audio_deg=[(90.0, 0.0)])
TOKEN_OP = "op-" + "a" * MIN_TOKEN_CHARS
TOKEN_RD = "rd-" + "b" * MIN_TOKEN_CHARS


# ---- settings ---------------------------------------------------------------------------------
@pytest.mark.parametrize("text", ["", "8080", "host:", ":80", "127.0.0.1:99999", "127.0.0.1:-1", "127.0.0.1:http",
                                  None, 8080])
def test_listen_address_refused_in_one_line(text):
    with pytest.raises(UsageError, match="HOST:PORT"):
        parse_listen(text)


def test_listen_address_forms():
    assert parse_listen("127.0.0.1:8080") == ("127.0.0.1", 8080)
    assert parse_listen("[::1]:0") == ("::1", 0)


def _token_file(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text)
    return str(p)


def test_off_loopback_needs_tokens_and_tls(tmp_path):
    op = _token_file(tmp_path, "op", TOKEN_OP)
    with pytest.raises(UsageError, match="operator_token_file"):
        WebSettings(listen="0.0.0.0:8080").check()
    with pytest.raises(UsageError, match="tls_cert and tls_key, or set \\[security\\] allow_insecure"):
        WebSettings(listen="0.0.0.0:8080", operator_token_file=op).check()
    # allow_insecure lifts TLS only (warned), never the tokens
    warnings = WebSettings(listen="0.0.0.0:8080", operator_token_file=op, allow_insecure=True).check()
    assert warnings and "without TLS" in warnings[0]
    with pytest.raises(UsageError, match="operator_token_file"):
        WebSettings(listen="192.0.2.7:8080", allow_insecure=True).check()
    assert WebSettings(listen="127.0.0.1:8080").check() == []
    assert WebSettings(listen="localhost:0").check() == []


def test_tls_files_go_together_and_must_exist(tmp_path):
    with pytest.raises(UsageError, match="go together"):
        WebSettings(tls_cert=str(tmp_path / "c.pem")).check()
    with pytest.raises(UsageError, match="no such file"):
        WebSettings(tls_cert=str(tmp_path / "c.pem"), tls_key=str(tmp_path / "k.pem")).check()


@pytest.mark.parametrize("text", ["", "short", "two words " + "x" * 40, "x" * (MIN_TOKEN_CHARS - 1)])
def test_weak_or_malformed_tokens_refused(tmp_path, text):
    with pytest.raises(UsageError, match="at least"):
        WebSettings(operator_token_file=_token_file(tmp_path, "t", text)).check()


def test_unreadable_token_file(tmp_path):
    with pytest.raises(UsageError, match="cannot be read"):
        WebSettings(reader_token_file=str(tmp_path / "missing")).check()
    p = tmp_path / "bin"
    p.write_bytes(b"\xff\xfe\x00" * 20)
    with pytest.raises(UsageError, match="not a text file"):
        WebSettings(reader_token_file=str(p)).check()


def test_roles_of_tokens():
    tokens = {TOKEN_OP: "operator", TOKEN_RD: "reader"}
    assert role_of(TOKEN_OP, tokens) == "operator"
    assert role_of(TOKEN_RD, tokens) == "reader"
    for forged in (TOKEN_OP[:-1], TOKEN_OP + "x", "", None, 42, [TOKEN_OP], TOKEN_OP.upper()):
        assert role_of(forged, tokens) is None


# ---- the feed: bounded, merging rows in power -----------------------------------------------------
def test_feed_merges_rows_in_power_when_the_page_falls_behind():
    f = Feed(max_rows=2)
    rows = [np.array([[-10.0, -20.0]], np.float32), np.array([[-30.0, -40.0]], np.float32),
            np.array([[-13.0, -17.0]], np.float32), np.array([[-20.0, -20.0]], np.float32)]
    for i, r in enumerate(rows):
        f.put_power(r, 1, 100.0 + i)
    assert f.rows_merged == 2 and len(f) == 2
    kind, merged, table, t, first = feedmod.decode(f.take())
    assert (kind, merged, table, t) == (feedmod.POWER, 0, 1, 100.0)
    np.testing.assert_array_equal(first, rows[0])
    kind, merged, table, t, last = feedmod.decode(f.take())
    assert merged == 2 and t == 101.0
    # The mean of band powers, not of their dB values (band power is a mean square: common practice).
    want = 10 * np.log10(np.mean([10 ** (r / 10) for r in rows[1:]], axis=0))
    np.testing.assert_allclose(last, want, atol=1e-4)
    assert f.take() is None


def test_feed_stays_bounded_under_a_flood():
    f = Feed(max_rows=8, max_audio_frames=4096)
    for i in range(20000):
        f.put_power(np.full((1, 3), -float(i % 50), np.float32), 1, float(i))
        f.put_audio(np.zeros(1024, np.float32), 1, float(i))
        f.put_json("status", {"n": i}, latest_only=True)
    assert len(f) <= 8 + 4 + 1
    assert f.rows_merged == 20000 - 8 and f.audio_dropped == 20000 - 4
    texts = [x for x in iter(f.take, None) if isinstance(x, str)]
    assert texts == [json.dumps({"type": "status", "n": 19999}, separators=(",", ":"))]


def test_feed_does_not_merge_rows_of_different_beam_tables():
    f = Feed(max_rows=1)
    f.put_power(np.zeros((1, 3), np.float32), 1, 0.0)
    f.put_power(np.zeros((1, 5), np.float32), 2, 1.0)
    assert f.rows_merged == 0 and len(f) == 2


def test_json_for_browsers_has_no_nan():
    text = feedmod.json_text({"a": math.nan, "b": [math.inf, 1.5], "c": np.float32(2.0), "d": b"\x00"})
    assert json.loads(text) == {"a": None, "b": [None, 1.5], "c": 2.0, "d": None}


def test_binary_frame_round_trip_and_truncation():
    values = np.arange(12, dtype=np.float32).reshape(3, 4)
    frame = feedmod.encode(feedmod.POWER, values, 7, math.nan, merged=300)
    kind, merged, table, t, back = feedmod.decode(frame)
    assert (kind, merged, table) == (1, 255, 7) and math.isnan(t)
    np.testing.assert_array_equal(back, values)
    with pytest.raises(ValueError, match="header says"):
        feedmod.decode(frame[:-4])


# ---- what a page may send --------------------------------------------------------------------------
@pytest.mark.parametrize("msg,field", [({"type": "listen"}, "azimuth_deg"),
                                       ({"type": "listen", "azimuth_deg": "90"}, "azimuth_deg"),
                                       ({"type": "listen", "azimuth_deg": True}, "azimuth_deg"),
                                       ({"type": "listen", "azimuth_deg": math.nan}, "azimuth_deg"),
                                       ({"type": "listen", "azimuth_deg": 1e300}, "azimuth_deg"),
                                       ({"type": "listen", "azimuth_deg": 90, "elevation_deg": None}, "elevation_deg"),
                                       ({"type": "listen", "azimuth_deg": 90, "elevation_deg": 91}, "elevation_deg")])
def test_listen_request_refuses_bad_fields(msg, field):
    with pytest.raises(ValueError, match=field):
        listen_request(msg)


@hsettings(max_examples=300, deadline=None)
@given(st.one_of(st.text(max_size=200), st.binary(max_size=200).map(lambda b: b.decode("latin-1")),
                 st.recursive(st.none() | st.booleans() | st.floats() | st.integers() | st.text(max_size=20),
                              lambda c: st.lists(c, max_size=4) | st.dictionaries(st.text(max_size=12), c, max_size=4),
                              max_leaves=20).map(lambda o: json.dumps(o, allow_nan=True))))
def test_any_page_message_is_parsed_or_refused_with_valueerror(text):
    try:
        msg = parse_page_message(text)
    except ValueError:
        return
    assert isinstance(msg["type"], str)
    try:
        az, el = listen_request(msg)
    except ValueError:
        return
    assert math.isfinite(az) and -90 <= el <= 90


def test_origin_must_be_this_server():
    assert origin_allowed(None, "127.0.0.1:8080", "http")
    assert origin_allowed("http://127.0.0.1:8080", "127.0.0.1:8080", "http")
    for bad in ("http://evil.example", "https://127.0.0.1:8080", "http://127.0.0.1:8081", "null", "::::"):
        assert not origin_allowed(bad, "127.0.0.1:8080", "http")


# ---- against a real service ------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def svc(tmp_path_factory):
    with running_service(tmp_path_factory.mktemp("websvc"), SCENE) as s:
        yield s


@pytest.fixture(scope="module")
def web_url(svc, tmp_path_factory):
    with running_web(tmp_path_factory.mktemp("web"), svc.publish, svc.control) as (url, _):
        yield url


async def _messages(ws, want, timeout_s=20.0):
    """Read until ``want(texts, binaries)`` is true; returns (texts as dicts, binary frames decoded)."""
    texts, binaries = [], []
    deadline = time.monotonic() + timeout_s
    while not want(texts, binaries):
        left = deadline - time.monotonic()
        assert left > 0, f"timed out; got {[t.get('type') for t in texts]} and {len(binaries)} binary frames"
        msg = await ws.receive(timeout=left)
        if msg.type == aiohttp.WSMsgType.TEXT:
            texts.append(json.loads(msg.data))
        elif msg.type == aiohttp.WSMsgType.BINARY:
            binaries.append(feedmod.decode(msg.data))
        else:
            texts.append({"type": f"closed:{ws.close_code}"})
            return texts, binaries
    return texts, binaries


def _of(texts, kind):
    return [t for t in texts if t.get("type") == kind]


def test_page_and_headers(web_url):
    async def go():
        async with aiohttp.ClientSession() as s:
            async with s.get(web_url) as r:
                assert r.status == 200
                csp = r.headers["Content-Security-Policy"]
                assert "script-src 'self'" in csp and "default-src 'none'" in csp and "unsafe" not in csp
                html = await r.text()
            assert '<script type="module" src="/static/app.js">' in html and "<script>" not in html
            async with s.get(web_url + "static/app.js") as r:
                assert r.status == 200 and "javascript" in r.headers["Content-Type"]
            for path in ("static/../server.py", "static/feed.py", "etc/passwd", "static/%2e%2e/settings.py"):
                async with s.get(web_url + path) as r:
                    assert r.status == 404, path
    asyncio.run(go())


def test_power_rows_relayed_exactly(svc, web_url):
    """Every row a page gets is the service's row, bit for bit, with its time and beam table."""
    async def go():
        async with aiohttp.ClientSession() as s:
            async with s.ws_connect(web_url + "ws") as ws:
                texts, rows = await _messages(ws, lambda t, b: len(b) >= 30 and _of(t, "beams") and _of(t, "status"))
        return texts, rows

    with Subscriber(svc.publish, topics=["power"], timeout_s=10) as sub:
        texts, rows = asyncio.run(go())
        direct = {}
        while len(direct) < 400:
            f = sub.recv()
            direct[f.time_utc] = np.array(f.data)
            if rows[-1][3] in direct:
                break
    hello = _of(texts, "hello")[0]
    assert hello["auth"] is False and len(hello["palette"]) == 9 and "CAUTION" in hello["caution"]
    assert _of(texts, "welcome")[0]["role"] == "operator"
    beams = _of(texts, "beams")[0]
    assert len(beams["power_deg"]) == 46 and beams["samplerate_hz"] == 48000
    assert _of(texts, "status")[0]["stream"] == svc.endpoints["stream"]
    matched = 0
    for kind, merged, table, t, values in rows:
        assert kind == feedmod.POWER and merged == 0 and values.shape == (1, 46)
        if t in direct:
            np.testing.assert_array_equal(values, direct[t])
            matched += 1
    assert matched >= 10
    peak = int(np.argmax(rows[-1][4][0]))
    assert abs(beams["power_deg"][peak][0] - 60.0) <= 4.0


def test_listen_points_the_beam_and_sends_its_audio(svc, web_url):
    async def go():
        async with aiohttp.ClientSession() as s:
            async with s.ws_connect(web_url + "ws") as ws:
                await ws.send_str(json.dumps({"type": "listen", "azimuth_deg": 132.0, "elevation_deg": 0.0}))
                texts, frames = await _messages(
                    ws, lambda t, b: _of(t, "listening") and sum(f[0] == feedmod.AUDIO for f in b) >= 5)
                await ws.send_str(json.dumps({"type": "stop"}))
                more, _ = await _messages(ws, lambda t, b: any(x.get("on") is False for x in _of(t, "listening")))
        return texts, frames

    texts, frames = asyncio.run(go())
    on = _of(texts, "listening")[0]
    assert on["on"] is True and on["azimuth_deg"] == 132.0
    audio = [f for f in frames if f[0] == feedmod.AUDIO]
    # Chunks of whole blocks, at least AUDIO_CHUNK_S long (fewer frames for the page to handle).
    assert all(f[4].shape[1] == 1 and f[4].shape[0] % 1024 == 0 and f[4].shape[0] >= 0.08 * 48000 for f in audio)
    from beamtap.client import Controller
    with Controller(svc.control) as ctl:
        assert ctl.beams()["beams"]["audio_deg"][0] == [132.0, 0.0]


def test_hostile_page_messages_get_errors_and_the_server_stays_up(web_url):
    bad = ["not json", "[]", "{}", '{"type": 5}', '{"type": "reboot"}', '{"type": "listen", "azimuth_deg": NaN}',
           '{"type": "listen", "azimuth_deg": "north"}', '{"type": "listen", "azimuth_deg": 1e999}',
           json.dumps({"type": "listen", "azimuth_deg": 10, "elevation_deg": [1]})]

    async def go():
        async with aiohttp.ClientSession() as s:
            async with s.ws_connect(web_url + "ws") as ws:
                for text in bad:
                    await ws.send_str(text)
                await ws.send_bytes(b"\x00" * 100)
                texts, _ = await _messages(ws, lambda t, b: len(_of(t, "error")) >= len(bad) + 1)
            # Too big for a page message: the server closes that connection (RFC 6455 code 1009) ...
            async with s.ws_connect(web_url + "ws") as ws:
                await ws.send_str(json.dumps({"type": "listen", "pad": "x" * 10000}))
                closed, _ = await _messages(ws, lambda t, b: any(x["type"].startswith("closed") for x in t))
            # ... and keeps serving everyone else.
            async with s.ws_connect(web_url + "ws") as ws:
                again, _ = await _messages(ws, lambda t, b: len(b) >= 3)
        return texts, closed, again

    texts, closed, again = asyncio.run(go())
    errors = [t["error"] for t in _of(texts, "error")]
    assert any("not JSON" in e for e in errors) and any("unknown message type 'reboot'" in e for e in errors)
    assert any("azimuth_deg" in e for e in errors) and any("JSON text" in e for e in errors)
    assert closed[-1]["type"] == "closed:1009"
    assert _of(again, "welcome")


def test_foreign_origin_refused(web_url):
    async def go():
        async with aiohttp.ClientSession() as s:
            with pytest.raises(aiohttp.WSServerHandshakeError) as exc:
                await s.ws_connect(web_url + "ws", headers={"Origin": "http://evil.example"})
            return exc.value.status
    assert asyncio.run(go()) == 403


def _self_signed(tmp_path):
    cert, key = tmp_path / "cert.pem", tmp_path / "key.pem"
    subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2", "-subj", "/CN=localhost",
                    "-addext", "subjectAltName=IP:127.0.0.1", "-keyout", str(key), "-out", str(cert)],
                   check=True, capture_output=True)
    return str(cert), str(key)


def test_tls_and_tokens(svc, tmp_path):
    """HTTPS/WSS with a self-signed certificate; operator, reader, wrong and missing tokens."""
    import ssl

    cert, key = _self_signed(tmp_path)
    op, rd = _token_file(tmp_path, "op", TOKEN_OP + "\n"), _token_file(tmp_path, "rd", TOKEN_RD)
    ctx = ssl.create_default_context(cafile=cert)

    async def session(url, token, then=None):
        async with aiohttp.ClientSession() as s:
            async with s.ws_connect(url + "ws", ssl=ctx) as ws:
                hello, _ = await _messages(ws, lambda t, b: _of(t, "hello"))
                assert hello[0]["auth"] is True
                if token is not None:
                    await ws.send_str(json.dumps({"type": "auth", "token": token}))
                texts, frames = await _messages(ws, lambda t, b: _of(t, "welcome") or _of(t, "denied")
                                                or any(x["type"].startswith("closed") for x in t), timeout_s=40)
                if then and _of(texts, "welcome"):
                    await ws.send_str(json.dumps(then))
                    more, _ = await _messages(ws, lambda t, b: _of(t, "error") or _of(t, "listening"))
                    texts += more
                return texts

    extra = ["--tls-cert", cert, "--tls-key", key, "--operator-token-file", op, "--reader-token-file", rd]
    with running_web(tmp_path, svc.publish, svc.control, extra) as (url, _):
        assert url.startswith("https://")
        listen = {"type": "listen", "azimuth_deg": 100.0}
        as_op = asyncio.run(session(url, TOKEN_OP, listen))
        as_rd = asyncio.run(session(url, TOKEN_RD, listen))
        wrong = asyncio.run(session(url, TOKEN_OP[:-1] + "z"))
        forged = asyncio.run(session(url, {"$ne": None}))
        # Plain HTTP to the TLS port gets nothing.
        async def plain():
            async with aiohttp.ClientSession() as s:
                with pytest.raises(aiohttp.ClientError):
                    async with s.get(url.replace("https", "http")) as r:
                        await r.read()
        asyncio.run(plain())
    assert _of(as_op, "welcome")[0]["role"] == "operator" and _of(as_op, "listening")[0]["azimuth_deg"] == 100.0
    assert _of(as_rd, "welcome")[0]["role"] == "reader"
    assert "operator token" in _of(as_rd, "error")[0]["error"] and not _of(as_rd, "listening")
    for texts in (wrong, forged):
        assert _of(texts, "denied") and not _of(texts, "welcome")


@pytest.mark.parametrize("args,expect", [
    (["--listen", "0.0.0.0:0"], "can be reached from other machines"),
    (["--listen", "nonsense"], "HOST:PORT"),
    (["--listen", "127.0.0.1:0", "--tls-cert", "/nonexistent.pem"], "go together"),
])
def test_web_usage_errors_exit_2_in_one_line(args, expect):
    r = subprocess.run([sys.executable, "-m", "beamtap", "web", *args], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("beamtap web: error:") and expect in lines[0], r.stderr


def test_port_in_use_is_one_line(web_url):
    port = web_url.rsplit(":", 1)[1].strip("/")
    r = subprocess.run([sys.executable, "-m", "beamtap", "web", "--listen", f"127.0.0.1:{port}"],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "beamtap web: error: web: listen" in r.stderr and "Traceback" not in r.stderr


def test_service_serves_the_page_itself_and_takes_it_down(tmp_path):
    """``[web]`` in the config: the service starts the view as a child; killing the service (no
    chance to clean up) still takes the view down within a few seconds."""
    text = SCENE + '\n[web]\nlisten = "127.0.0.1:0"\n'
    with running_service(tmp_path, text, expect_rc=None) as s:
        url = s.endpoints["web"]

        async def get():
            async with aiohttp.ClientSession() as session:
                async with session.ws_connect(url + "ws") as ws:
                    texts, rows = await _messages(ws, lambda t, b: len(b) >= 3 and _of(t, "status"))
            return texts
        texts = asyncio.run(get())
        assert _of(texts, "status")[0]["stream"] == s.endpoints["stream"]
        children = subprocess.run(["pgrep", "-P", str(s.proc.pid), "-f", "beamtap web"], capture_output=True,
                                  text=True).stdout.split()
        assert len(children) == 1
        s.proc.kill()
        s.proc.wait()
        deadline = time.monotonic() + 10
        while os.path.exists(f"/proc/{children[0]}") and time.monotonic() < deadline:
            time.sleep(0.1)  # polling another process's exit
        status = open(f"/proc/{children[0]}/status").read() if os.path.exists(f"/proc/{children[0]}") else ""
        assert not status or "zombie" in status, "the web view outlived its service"


def test_web_config_errors(tmp_path):
    from beamtap.errors import ConfigError
    from beamtap.service import config

    for extra, expect in [('[web]\nlisten = "0.0.0.0:8080"\n', "can be reached from other machines"),
                          ('[web]\nlisten = 8080\n', "expected a string"),
                          ('[web]\ntls_cert = "nope.pem"\n', "an existing file"),
                          ('[web]\ncolour = "red"\n', "colour"),
                          ('[web]\nenabled = "yes"\n', "true or false")]:
        with pytest.raises(ConfigError, match=expect):
            config.loads(SCENE + extra, str(tmp_path / "x.toml"))
    assert config.loads(SCENE + '[web]\nenabled = false\nlisten = "0.0.0.0:1"\n').web.enabled is False
    assert config.loads(SCENE).web.enabled is False


@pytest.mark.parametrize("folder,can_steer", [("clients", True), ("readers", False)])
def test_secured_service_runs_its_view_with_the_views_own_key(tmp_path, folder, can_steer):
    """[security] on: the view connects with its own key ([web] key); the service, not the view,
    decides what that key may change (a reader key cannot point the listening beam)."""
    mine, clients, readers = tmp_path / "mine", tmp_path / "clients", tmp_path / "readers"
    for d in (mine, clients, readers):
        d.mkdir()

    def keys(name):
        r = subprocess.run([sys.executable, "-m", "beamtap", "keys", name, "--out", str(mine)], capture_output=True,
                           text=True, timeout=60)
        assert r.returncode == 0, r.stderr
        return mine / f"{name}.key", mine / f"{name}.key_secret"

    _, svc_secret = keys("pier-service")
    web_public, web_secret = keys("web-view")
    import shutil
    shutil.copy(web_public, tmp_path / folder)
    text = (SCENE + f'[security]\nserver_key = "{svc_secret}"\nclients = "{clients}"\nreaders = "{readers}"\n'
            f'[web]\nlisten = "127.0.0.1:0"\nkey = "{web_secret}"\n')
    with running_service(tmp_path, text) as s:
        async def go():
            async with aiohttp.ClientSession() as session:
                async with session.ws_connect(s.endpoints["web"] + "ws") as ws:
                    texts, rows = await _messages(ws, lambda t, b: len(b) >= 5)
                    await ws.send_str(json.dumps({"type": "listen", "azimuth_deg": 20.0}))
                    more, _ = await _messages(ws, lambda t, b: _of(t, "listening") or _of(t, "error"))
            return rows, more
        rows, more = asyncio.run(go())
    assert rows[0][4].shape == (1, 46)
    if can_steer:
        assert _of(more, "listening")[0]["azimuth_deg"] == 20.0
    else:
        assert "refused" in _of(more, "error")[0]["error"] and not _of(more, "listening")


def test_secured_service_needs_a_key_for_its_view(tmp_path):
    from beamtap.errors import ConfigError
    from beamtap.service import config

    key = tmp_path / "k.key_secret"
    key.write_text("x")
    (tmp_path / "c").mkdir()
    with pytest.raises(ConfigError, match=r"\[web.key\]|web\.key"):
        config.loads(SCENE + f'[security]\nserver_key = "{key}"\nclients = "{tmp_path / "c"}"\n[web]\n',
                     str(tmp_path / "x.toml"))
