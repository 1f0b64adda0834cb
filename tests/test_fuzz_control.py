"""Property-based fuzzing of the control socket against a running service (hypothesis).

Random msgpack of any shape, and random requests built from the real schema (commands, keys,
nested beam tables) with random values including nil, NaN, infinities, huge and negative
numbers: every request is answered with ``ok`` true or false and a one-line error, and the
service keeps publishing throughout with every missing message counted by its publisher.
The service records into a temporary folder with a temporary HOME, so nothing lands in a real
data folder.
"""

import threading
import time

import msgpack
import numpy as np
import pytest
import zmq
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from beamtap.client import Controller, Subscriber
from beamtap.client.protocol import unpack

from conftest import line_config, running_service

_scalars = st.one_of(st.none(), st.booleans(), st.integers(-2**63, 2**64 - 1),
                     st.floats(allow_nan=True, allow_infinity=True), st.sampled_from([0, -1, 1e308, -1e308, 1e-300]),
                     st.text(max_size=12), st.binary(max_size=12))
_any = st.recursive(_scalars, lambda inner: st.lists(inner, max_size=4) | st.dictionaries(
    st.one_of(st.text(max_size=8), st.integers(-5, 5)), inner, max_size=4), max_leaves=12)
_number = st.one_of(_scalars, st.floats(-400, 400), st.integers(-400, 400))
_pair = st.lists(_number, min_size=0, max_size=3)
_fan = st.fixed_dictionaries({}, optional={"from_deg": _number, "to_deg": _number, "step_deg": _number,
                                           "elevation_deg": _number, "bogus": _any})
_grid = st.fixed_dictionaries({}, optional={k: _number for k in ("az_from_deg", "az_to_deg", "az_step_deg",
                                                                  "el_from_deg", "el_to_deg", "el_step_deg")})
_band = st.one_of(_pair, st.lists(_pair, max_size=3), st.tuples(st.floats(1, 8000), st.floats(1, 8000)).map(list))
_set = st.fixed_dictionaries({}, optional={
    "fan": st.one_of(_fan, _any), "grid": st.one_of(_grid, _any), "directions_deg": st.lists(_pair, max_size=4),
    "audio_deg": st.one_of(st.lists(_pair, max_size=4), _any), "shading": st.one_of(
        st.sampled_from(["uniform", "hann", "hamming", "chebyshev", "taylor", "kaiser"]), _scalars),
    "sidelobe_db": _number, "nbar": _number, "band_hz": _band, "transition_hz": _number,
    "power_batch_blocks": _number, "colour": _any})

@st.composite
def _mostly_valid_set(draw):
    """A legal beam change (so retargets really happen, at random block positions), sometimes with
    one key replaced by a random value."""
    lo = draw(st.floats(0, 90))
    low_hz = draw(st.floats(100, 3000))
    out = {"fan": {"from_deg": lo, "to_deg": draw(st.floats(lo, 180)), "step_deg": draw(st.floats(0.5, 10))},
           "audio_deg": [[draw(st.floats(0, 180)), 0.0] for _ in range(draw(st.integers(0, 4)))],
           "band_hz": [low_hz, draw(st.floats(low_hz + 50, 7000))],
           "shading": draw(st.sampled_from(["uniform", "hann", "hamming", "chebyshev", "taylor"]))}
    if draw(st.booleans()):
        out["transition_hz"] = draw(st.floats(20, 400))
    if draw(st.booleans()):
        key = draw(st.sampled_from(sorted(out)))
        out[key] = draw(_any)
    return out


_schema = st.one_of(
    st.fixed_dictionaries({"cmd": st.just("beams"), "set": _mostly_valid_set()}),
    st.fixed_dictionaries({"cmd": st.sampled_from(["ping", "status", "config"])}, optional={"extra": _any}),
    st.fixed_dictionaries({"cmd": st.just("beams")}, optional={"set": st.one_of(_set, _any)}),
    st.fixed_dictionaries({"cmd": st.just("record")}, optional={
        "action": st.one_of(st.sampled_from(["start", "stop", "status"]), _scalars),
        "what": st.one_of(st.lists(st.sampled_from(["raw", "audio", "power", "video"]), max_size=3), _any),
        "label": st.one_of(st.text(max_size=300), _scalars)}),
    st.fixed_dictionaries({"cmd": st.just("mark")}, optional={"text": st.one_of(st.text(max_size=1200), _scalars)}),
    st.fixed_dictionaries({"cmd": st.one_of(_scalars, st.text(max_size=8))}, optional={"set": _any}),
)


@pytest.fixture(scope="module")
def fuzzed(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("fuzz")
    home = tmp / "home"
    home.mkdir()
    cfg = line_config(count=8, samplerate_hz=16000, block_frames=512, fan=(0.0, 180.0, 2.0),
                      band_hz=(300.0, 3000.0), audio_deg=[(60.0, 0.0)],
                      extra=f'[record]\nfolder = "{tmp / "rec"}"\nwhat = ["power"]\nsegment_s = 5.0\n'
                            'min_free_mb = 1.0\n')
    with running_service(tmp, cfg, env={"HOME": str(home)}) as svc:
        seen = {"seqs": [], "stop": threading.Event()}

        def watch():  # every power message's seq while the fuzz runs
            with Subscriber(svc.publish, topics=["power"], timeout_s=30, queue=100000) as sub:
                while not seen["stop"].is_set():
                    seen["seqs"].append(sub.recv().seq)

        t = threading.Thread(target=watch, daemon=True)
        t.start()
        ctx = zmq.Context.instance()
        with ctx.socket(zmq.REQ) as req:
            req.setsockopt(zmq.LINGER, 0)
            req.connect(svc.control)
            yield svc, req, seen
        seen["stop"].set()
        t.join(timeout=40)


def _ask(req, payload: bytes) -> dict:
    req.send(payload)
    assert req.poll(30000), "no reply"
    reply = unpack(req.recv())
    assert isinstance(reply, dict) and isinstance(reply.get("ok"), bool), reply
    if not reply["ok"]:
        assert isinstance(reply["error"], str) and "\n" not in reply["error"] and reply["error"]
        assert "internal error" not in reply["error"], reply["error"]
    return reply


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(obj=_any)
def test_fuzz_random_msgpack_is_answered(fuzzed, obj):
    _, req, _ = fuzzed
    _ask(req, msgpack.packb(obj, use_bin_type=True))


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(request=_schema)
# Found by this fuzz on 2026-12-05: a key holding a line break was echoed into a two-line error.
@example(request={"cmd": "beams", "set": {"fan": {}, "colour": {"\n": None}}})
@example(request={"cmd": "beams", "set": {"fan\nx": 1}})
def test_fuzz_schema_requests_are_answered(fuzzed, request):
    _, req, _ = fuzzed
    _ask(req, msgpack.packb(request, use_bin_type=True))


def test_after_the_fuzz_the_service_runs_and_every_missing_message_is_counted(fuzzed):
    svc, req, seen = fuzzed
    assert "beams retargeted" in svc.log()  # the fuzz did change the beams, not only get refused
    with Controller(svc.control) as ctl:
        ctl.record("stop")
        n = len(seen["seqs"])
        deadline = time.monotonic() + 30
        while len(seen["seqs"]) < n + 20:  # still publishing
            assert time.monotonic() < deadline, "power stopped after the fuzz"
            time.sleep(0.05)
        st_ = ctl.status()
        config_text = ctl.config()["document"]
    assert st_["state"] == "running" and svc.proc.poll() is None
    seqs = np.array(seen["seqs"])
    missing = int(np.sum(np.diff(seqs) - 1))
    assert np.all(np.diff(seqs) >= 1)
    assert missing <= st_["messages_dropped"]
    # Whatever the fuzz left in force still reads back as one valid config.
    from beamtap.service.config import loads

    assert loads(config_text).beams.power_deg.shape[1] == 2
