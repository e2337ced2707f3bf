"""Ring buffer and windower: sample-clock accounting, overruns and gaps."""

import threading

import numpy as np
import pytest

from monitor.sound.ringbuffer import RingBuffer
from monitor.sound.windower import Windower


def test_ring_roundtrip_and_wrap():
    r = RingBuffer(10)
    r.write(np.arange(7, dtype=np.float32))
    out, gap = r.read()
    assert gap == 0 and out.tolist() == list(range(7))
    r.write(np.arange(7, 14, dtype=np.float32))  # wraps
    out, gap = r.read()
    assert gap == 0 and out.tolist() == list(range(7, 14))


def test_ring_overrun_drops_oldest_and_counts():
    r = RingBuffer(10)
    r.write(np.arange(25, dtype=np.float32))
    out, gap = r.read()
    assert gap == 15 and out.tolist() == list(range(15, 25))
    assert r.overruns == 1 and r.dropped == 15


def test_ring_concurrent_producer_never_tears_silently():
    # a producer racing the consumer: every sample read is where the sample clock says it is
    r = RingBuffer(1000)
    total = 200_000
    def produce():
        for start in range(0, total, 37):
            r.write(np.arange(start, min(start + 37, total), dtype=np.float32))
    t = threading.Thread(target=produce)
    t.start()
    pos = 0
    while t.is_alive() or r.available():
        out, gap = r.read(300)
        pos += gap
        if out.size:
            assert out[0] == pos and np.all(np.diff(out) == 1)
            pos += out.size
    t.join()
    assert pos == total


def test_windower_counts_30_windows_in_30_s():
    # 30 s at window 1 s / hop 1 s -> 30 windows (common practice)
    w = Windower(16000, 16000)
    n = 0
    x = np.zeros(16000 * 30, np.float32)
    for chunk in np.array_split(x, 77):
        n += len(w.push(chunk))
    assert n == 30


def test_windower_hop_half_and_sample_clock():
    w = Windower(4, 2)
    wins = w.push(np.arange(10, dtype=np.float32))
    assert [x.start for x in wins] == [0, 2, 4, 6]
    assert wins[1].samples.tolist() == [2, 3, 4, 5]


@pytest.mark.parametrize("window, hop", [(4, 2), (6, 2), (5, 3), (4, 4), (3, 5)])
def test_windower_span_is_the_windows_samples_joined(window, hop):
    # the span of one push is the first window and each later window's last hop, the array
    # the front end and the levels would otherwise join (None without overlap)
    rng = np.random.default_rng(window * 10 + hop)
    w = Windower(window, hop)
    x = np.arange(400, dtype=np.float32)
    pos = 0
    while pos < x.size:
        n, gap = int(rng.integers(1, 40)), int(rng.integers(0, 3)) * int(rng.integers(0, 9))
        wins = w.push(x[pos:pos + n], gap)
        pos += n
        if not wins or hop > window:
            assert w.span is None
            continue
        joined = np.concatenate([wins[0].samples] + [v.samples[-hop:] for v in wins[1:]])
        assert w.span.tolist() == joined.tolist()
        assert np.shares_memory(w.span, wins[-1].samples)  # a view, not a copy


def test_windower_gap_moves_times_forward_on_the_grid():
    w = Windower(4, 2)
    w.push(np.arange(6, dtype=np.float32))  # windows at 0, 2
    wins = w.push(np.arange(100, 110, dtype=np.float32), gap=5)  # samples 6..10 lost
    # stream resumes at 11; the next hop-grid start at or after it is 12
    assert wins[0].start == 12 and wins[0].gap == 5
    assert wins[0].samples.tolist() == [101, 102, 103, 104]
    assert all(x.gap == 0 for x in wins[1:])


def test_a_device_gap_is_reported_as_a_gap_and_no_window_spans_it():
    # the producer skips samples that never arrived (a device away and back): the reader
    # must stop before them and report them as the gap, never hand out the ring's old bytes
    r = RingBuffer(200)
    w = Windower(20, 10)
    r.write(np.ones(35, np.float32))
    r.skip(30)
    r.write(np.full(40, 2.0, np.float32))
    out, gap = r.read()
    assert gap == 0 and out.tolist() == [1.0] * 35  # up to the gap, not across it
    wins = w.push(out, gap)
    out, gap = r.read()
    assert gap == 30 and out.tolist() == [2.0] * 40
    wins += w.push(out, gap)
    assert r.overruns == 0 and r.dropped == 0 and r.skipped == 30
    for win in wins:  # each window holds one side only
        assert set(win.samples.tolist()) in ({1.0}, {2.0})
        assert win.start + 20 <= 35 or win.start >= 65
    assert [win.gap for win in wins if win.start >= 65][0] == 30


def test_a_device_gap_longer_than_the_ring_is_a_gap_not_an_overrun():
    r = RingBuffer(100)
    r.write(np.ones(10, np.float32))
    out, gap = r.read()
    r.skip(1000)  # gone for ten ring lengths
    r.write(np.full(50, 2.0, np.float32))
    out, gap = r.read()
    assert gap == 1000 and out.tolist() == [2.0] * 50
    assert r.overruns == 0 and r.skipped == 1000
