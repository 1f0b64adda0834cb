"""Sample index → UTC mapping: drift correction and consistency across threads."""

import threading

import pytest

from beamtap.service.clock import SampleClock

FS = 48000.0


def test_follows_a_fast_sound_card_clock():
    # A card running 50 ppm fast (within the ±100 ppm of common crystal oscillators; common practice).
    true_rate = FS * (1 + 50e-6)
    clock = SampleClock(FS, anchor_utc=1000.0)
    for i in range(0, 2000):
        n = i * 24000
        clock.observe(n, 1000.0 + n / true_rate)
    # Uncorrected, the mapping would be 50 ms off after these 1000 s; corrected, within 1 ms.
    n = 2000 * 24000
    assert clock.utc(n) == pytest.approx(1000.0 + n / true_rate, abs=1e-3)
    assert abs(clock.rate_hz - true_rate) < abs(FS - true_rate)


def test_readers_never_see_a_torn_anchor():
    """utc() reads anchor and rate as one; a torn read (new anchor sample, old anchor time) would be
    off by the 0.5 s between observations."""
    clock = SampleClock(FS, anchor_utc=0.0)
    stop = threading.Event()
    worst = [0.0]

    def reader():
        while not stop.is_set():
            n = 10 ** 9
            worst[0] = max(worst[0], abs(clock.utc(n) - n / FS))

    t = threading.Thread(target=reader)
    t.start()
    try:
        for i in range(200000):
            n = i * 24000
            clock.observe(n, n / FS)
    finally:
        stop.set()
        t.join()
    assert worst[0] < 1e-3
