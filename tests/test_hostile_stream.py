"""A ``stream`` source fed by a forging upstream: every bad message is dropped, counted by reason,
and never moves the sample counter; a real forward jump is a flagged gap; nothing stops the source.

The upstream here is the test's own PUB socket on loopback (an ephemeral port), sending real
``raw`` messages in the wire format (client/protocol.py) interleaved with forged ones; the
service runs as a subprocess the way a user runs it.
"""

import threading
import time

import msgpack
import numpy as np
import pytest
import zmq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from beamtap.client import Controller, Subscriber
from beamtap.client.protocol import PROTOCOL_VERSION, encode

from conftest import line_config, running_service

FS, BLOCK, CH = 16000, 512, 8


class Upstream:
    """A paced fake upstream: genuine blocks in real time, plus whatever the test injects."""

    def __init__(self):
        self.ctx = zmq.Context.instance()
        self.sock = self.ctx.socket(zmq.PUB)
        self.sock.setsockopt(zmq.LINGER, 0)
        self.sock.bind("tcp://127.0.0.1:*")
        self.endpoint = self.sock.getsockopt(zmq.LAST_ENDPOINT).decode()
        self.next_sample = 0
        self.lock = threading.Lock()
        self.stop = threading.Event()
        self.skip_frames = 0
        self.rng = np.random.default_rng(5)
        self.t0 = time.monotonic()
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def genuine(self, first_sample):
        data = (0.01 * self.rng.standard_normal((BLOCK, CH))).astype(np.float32)
        return encode("raw", {"first_sample": first_sample, "samplerate_hz": FS, "time_utc": 1.8e9 + first_sample / FS,
                              "stream": "upstream-1", "seq": first_sample // BLOCK}, data)

    def send(self, frames):
        with self.lock:
            self.sock.send_multipart(frames)

    def _run(self):
        while not self.stop.is_set():
            due = self.t0 + (self.next_sample + BLOCK) / FS
            left = due - time.monotonic()
            if left > 0:
                time.sleep(min(left, 0.05))
                continue
            with self.lock:
                self.next_sample += self.skip_frames
                self.skip_frames = 0
                self.sock.send_multipart(self.genuine(self.next_sample))
                self.next_sample += BLOCK

    def close(self):
        self.stop.set()
        self.thread.join()
        self.sock.close()


def header(**overrides):
    h = {"v": PROTOCOL_VERSION, "first_sample": 0, "samplerate_hz": FS, "time_utc": 1.8e9, "stream": "upstream-1",
         "dtype": "<f4", "shape": [BLOCK, CH]}
    h.update(overrides)
    return {k: v for k, v in h.items() if v is not _ABSENT}


_ABSENT = object()


def forged(h, payload=None):
    if payload is None:
        payload = np.zeros((BLOCK, CH), np.float32).tobytes()
    return [b"raw", msgpack.packb(h, use_bin_type=True), payload]


@pytest.fixture(scope="module")
def downstream(tmp_path_factory):
    up = Upstream()
    cfg = line_config(count=CH, samplerate_hz=FS, block_frames=BLOCK, source="stream",
                      input_extra=f'endpoint = "{up.endpoint}"', fan=(0.0, 180.0, 5.0), band_hz=(300.0, 3000.0))
    try:
        with running_service(tmp_path_factory.mktemp("stream"), cfg) as svc:
            with Controller(svc.control) as ctl:
                deadline = time.monotonic() + 30
                while ctl.status()["frames_captured"] == 0:  # the subscription has reached the upstream
                    assert time.monotonic() < deadline, "the stream source received nothing"
                    time.sleep(0.05)
            yield svc, up
    finally:
        up.close()


def _status(svc):
    with Controller(svc.control) as ctl:
        return ctl.status()


def _power_until(sub, predicate, timeout_s=20):
    frames = []
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        f = sub.recv()
        if f.topic == "power":
            frames.append(f)
            if predicate(frames):
                return frames
    raise AssertionError("condition not reached")


def _assert_no_unflagged_break(frames):
    for a, b in zip(frames, frames[1:]):
        assert b.seq == a.seq + 1
        step = b.first_sample - a.first_sample
        assert step == BLOCK or (step > BLOCK and b.gap and b.frames_lost == step - BLOCK), (a, b)


def test_forged_messages_are_dropped_counted_and_never_move_the_counter(downstream):
    svc, up = downstream
    before = _status(svc)["source_rejected"]
    with Subscriber(svc.publish, topics=["power"], timeout_s=20) as sub:
        _power_until(sub, lambda f: len(f) >= 3)
        with up.lock:
            last = up.next_sample - BLOCK
        cases = {
            "bad first_sample": [header(first_sample=_ABSENT), header(first_sample="5"), header(first_sample=2**63),
                                 header(first_sample=-5000), header(first_sample=1.5), header(first_sample=True)],
            "bad dtype": [header(first_sample=last + 10 * BLOCK, dtype="<U4", shape=[BLOCK // 4, CH]),
                          header(first_sample=last + 10 * BLOCK, dtype="<f8", shape=[BLOCK // 2, CH]),
                          header(first_sample=last + 10 * BLOCK, dtype="<i2", shape=[BLOCK * 2, CH]),
                          header(first_sample=last + 10 * BLOCK, dtype=">f4")],
            "bad time_utc": [header(first_sample=last + 10 * BLOCK, time_utc=float("nan")),
                             header(first_sample=last + 10 * BLOCK, time_utc=None)],
            "bad shape": [header(first_sample=last + 10 * BLOCK, shape=[BLOCK * 2, CH // 2])],
            "repeated or backward": [header(first_sample=last), header(first_sample=0)],
            "ahead of real time": [header(first_sample=10**12)],
            "malformed": [header(v=_ABSENT)],
        }
        for msgs in cases.values():
            for h in msgs:
                up.send(forged(h))
        up.send([b"raw", b"\xc1 not msgpack", b""])
        up.send([b"raw", b"only two frames"])
        up.send(forged(header(first_sample=last + 10 * BLOCK), payload=b"\x00" * 7))  # payload does not fit
        with up.lock:
            up.skip_frames = 2 * BLOCK  # a real forward jump: two blocks lost upstream
        frames = _power_until(sub, lambda f: any(x.gap for x in f) and not f[-1].gap and len(f) > 20)
    _assert_no_unflagged_break(frames)
    gaps = [f for f in frames if f.gap]
    assert len(gaps) == 1 and gaps[0].frames_lost == 2 * BLOCK
    # time_utc still follows first_sample from the genuine stream (no shift by a forged message)
    t = np.array([f.time_utc for f in frames])
    n = np.array([f.first_sample for f in frames])
    assert np.allclose(t - t[0], (n - n[0]) / FS, atol=2e-3)
    st = _status(svc)
    assert st["state"] == "running"
    got = {k: st["source_rejected"].get(k, 0) - before.get(k, 0) for k in st["source_rejected"]}
    for reason, msgs in cases.items():
        extra = {"malformed": 3}.get(reason, 0)  # the garbage header, the two-frame and the short payload
        assert got.get(reason, 0) == len(msgs) + extra, (reason, got)


_values = st.one_of(st.none(), st.booleans(), st.integers(-2**63, 2**64 - 1),
                    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=8),
                    st.binary(max_size=8), st.lists(st.integers(-2**31, 2**31), max_size=3))


@st.composite
def forged_messages(draw):
    h = {}
    for key in ("v", "first_sample", "time_utc", "stream", "dtype", "shape", "samplerate_hz"):
        if draw(st.booleans()):
            h[key] = draw(st.one_of(_values, st.sampled_from({
                "v": [PROTOCOL_VERSION], "first_sample": [0, 2**62, 10**6], "time_utc": [1.8e9], "stream": ["upstream-1", "other"],
                "dtype": ["<f4", "<f8", "|u1", "<i2"], "shape": [[BLOCK, CH], [1, CH], [BLOCK, 1], [0, CH]],
                "samplerate_hz": [FS]}[key])))
    payload = draw(st.one_of(st.binary(max_size=64), st.just(np.zeros((BLOCK, CH), np.float32).tobytes())))
    parts = [b"raw", msgpack.packb(h, use_bin_type=True), payload]
    extra = draw(st.integers(0, 2))
    return parts[:3 - extra] if draw(st.booleans()) and extra else parts


@settings(max_examples=500, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(messages=st.lists(forged_messages(), min_size=1, max_size=5))
def test_fuzz_random_forged_stream_messages(downstream, messages):
    """Property: whatever arrives on the stream, the source keeps running and the service keeps
    publishing, every break in its output is a flagged gap."""
    svc, up = downstream
    for m in messages:
        up.send(m)


def test_after_the_fuzz_the_service_still_publishes_with_every_break_flagged(downstream):
    svc, _ = downstream
    with Subscriber(svc.publish, topics=["power"], timeout_s=20) as sub:
        frames = _power_until(sub, lambda f: len(f) >= 30)
    _assert_no_unflagged_break(frames[1:])
    st_ = _status(svc)
    assert st_["state"] == "running" and st_["source_error"] is None
    assert sum(st_["source_rejected"].values()) > 0
    assert svc.proc.poll() is None
