"""The SPSC ring: order, sample index across losses, overrun accounting, threads."""

import threading
import time

import numpy as np

from livefilt.acquire.ring import GAP_DEVICE, GAP_OVERRUN, Ring


def test_fifo_and_index_wraparound():
    r = Ring(2, 10)
    out = []
    k = 0
    for n in (3, 4, 7, 2, 9, 1):
        x = np.arange(k, k + n, dtype=np.float32)[:, None].repeat(2, 1)
        assert r.write(x) == n
        k += n
        while r.available:
            b = r.read(4, min_frames=1)
            assert b.data[0, 0] == b.start_index
            out.append(b.data[:, 0].copy())
    assert np.array_equal(np.concatenate(out), np.arange(k))


def test_overrun_is_counted_never_overwrites_and_index_skips():
    r = Ring(1, 8)
    assert r.write(np.arange(6, dtype=np.float32)) == 6
    assert r.write(np.arange(6, 12, dtype=np.float32)) == 2  # 4 frames lost
    assert (r.overruns, r.overrun_frames) == (1, 4)
    b = r.read(8)
    assert np.array_equal(b.data[:, 0], np.arange(8)) and b.dropped == 0
    r.write(np.arange(12, 15, dtype=np.float32))
    b = r.read(8, min_frames=1)
    assert b.dropped == 4 and b.gaps[0][0] == GAP_OVERRUN
    assert b.start_index == 12  # acquired time includes the lost frames
    assert np.array_equal(b.data[:, 0], [12, 13, 14])


def test_read_stops_short_at_a_device_gap():
    r = Ring(1, 32)
    r.write(np.zeros(5, np.float32))
    r.mark_gap(3, GAP_DEVICE, "serial sequence gap")
    r.write(np.ones(5, np.float32))
    a = r.read(16, min_frames=1)
    assert a.frames == 5 and a.dropped == 0
    b = r.read(16, min_frames=1)
    assert b.frames == 5 and b.dropped == 3 and b.start_index == 8
    assert r.device_lost_frames == 3


def test_zero_length_event_is_attached():
    r = Ring(1, 16)
    r.write(np.zeros(4, np.float32))
    r.mark_gap(0, note="input overflow")
    r.write(np.zeros(4, np.float32))
    r.read(16, min_frames=1)
    b = r.read(16, min_frames=1)
    assert b.dropped == 0 and b.gaps == [(GAP_DEVICE, 0, "input overflow")] and r.device_events == 1


def test_threads_exchange_every_frame_in_order():
    r = Ring(1, 1000)
    total = 200_000
    got = []

    def produce():
        k = 0
        while k < total:
            n = min(137, total - k)
            if r.free >= n:
                r.write(np.arange(k, k + n, dtype=np.float64).astype(np.float32))
                k += n
        r.close()

    t = threading.Thread(target=produce)
    t.start()
    while True:
        b = r.read(256, min_frames=1, timeout=1.0)
        if b is None:
            if r.closed:
                break
            continue
        got.append(b.data[:, 0].astype(np.int64))
    t.join()
    # float32 holds integers exactly below 2**24
    assert np.array_equal(np.concatenate(got), np.arange(total)) and r.overruns == 0


def test_a_producer_waiting_for_room_is_woken_by_the_read():
    # a fast source waits on the ring's room, not in a polling loop: a read wakes it
    r = Ring(1, 100)
    r.write(np.zeros(100, np.float32))
    assert not r.wait_for_room(10, 0.01)  # full: times out
    woke = []

    def produce():
        t0 = time.perf_counter()
        woke.append((r.wait_for_room(10, 5.0), time.perf_counter() - t0))

    t = threading.Thread(target=produce)
    t.start()
    time.sleep(0.05)
    r.read(20)
    t.join(2.0)
    ok, waited = woke[0]
    assert ok and waited < 1.0  # woken by the read, well before its 5 s timeout


def test_pacer_fast_stops_while_the_ring_stays_full():
    from livefilt.acquire.source import Pacer
    r = Ring(1, 100)
    r.write(np.zeros(100, np.float32))
    stop = threading.Event()
    p = Pacer(48000.0, False, stop)
    threading.Timer(0.05, stop.set).start()
    t0 = time.perf_counter()
    assert p.wait(r, 0, 10) is False
    assert time.perf_counter() - t0 < 1.0  # the stop seen within one 50 ms wait
