"""Sample-level helpers: levels (AES17), clipping, 16-bit PCM, the silence and clipping
stretches every report uses."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.decisions.tally import LevelTally
from monitor.sound.samples import (
    clipped_fraction,
    from_pcm16,
    level_dbfs,
    quantise_pcm16,
    to_pcm16,
    window_levels,
)


def test_level_dbfs_aes17():
    # AES17-2015: 0 dB FS is the RMS of a full-scale sine; a full-scale square wave is
    # +3.01 dB FS (20 log10(sqrt 2)); half amplitude is -6.02 dB (20 log10 0.5)
    t = np.arange(16000) / 16000
    s = np.sin(2 * np.pi * 1000 * t)
    assert level_dbfs(s) == pytest.approx(0.0, abs=0.005)
    assert level_dbfs(0.5 * s) == pytest.approx(20 * np.log10(0.5), abs=0.005)
    square = np.sign(np.sin(2 * np.pi * 100 * t + 0.1))
    assert level_dbfs(square) == pytest.approx(20 * np.log10(np.sqrt(2)), abs=0.005)
    assert level_dbfs(np.zeros(100)) == -160.0  # digital silence: the one floor


def test_pcm16_round_trip_and_rounding():
    # numpy's round (half to even) then saturation, as the C front end does
    x = np.array([-1.5, -1.0, -0.5 / 32768, 0.5 / 32768, 1.5 / 32768, 1.0, 2.0], np.float32)
    np.testing.assert_array_equal(to_pcm16(x), [-32768, -32768, 0, 0, 2, 32767, 32767])
    q = quantise_pcm16(np.float32(0.3) + np.zeros(5, np.float32))
    np.testing.assert_array_equal(q, from_pcm16(to_pcm16(q)))


def test_clipped_fraction_counts_full_scale():
    x = np.array([0.0, 0.5, 0.999, -1.0], np.float32)
    assert clipped_fraction(x) == 0.5


@settings(max_examples=60, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 6), st.sampled_from([0.0, 0.999, 1.0, -1.0]),
       st.integers(0, 5))
def test_window_levels_of_shared_pieces_equal_each_window_alone(seed, n, peak, peaks):
    # windows of 8 pieces every piece, some samples at (or just under) full scale, of either
    # sign, or none: each window's level is AES17's 20 log10(sqrt(2) rms) of its own samples
    # and its clipped share the count of |x| >= 0.999 over its length (the definitions,
    # computed here in float64 window by window)
    rng = np.random.default_rng(seed)
    piece, per = 40, 8
    x = (0.3 * rng.standard_normal((n - 1 + per) * piece)).clip(-0.99, 0.99).astype(np.float32)
    x[rng.integers(0, x.size, peaks)] = peak
    levels, clipped = window_levels(x, np.arange(n) * piece, per * piece, piece)
    for k in range(n):
        w = x[k * piece:(k + per) * piece].astype(np.float64)
        rms = np.sqrt(np.mean(w * w))
        assert levels[k] == pytest.approx(max(-160.0, 20 * np.log10(max(np.sqrt(2) * rms, 1e-300))),
                                          abs=1e-9)
        assert clipped[k] == np.count_nonzero(np.abs(w) >= 0.999) / w.size


def test_silent_and_clipping_stretches():
    # windows every 0.5 s: 8 silent windows (4.5 s, at least 3 s) then 2 clipped ones
    t = LevelTally()
    for i in range(10):
        t.add(0.5 * i, 0.5 * i + 1.0, -160.0, 0.0)
    t.add(5.0, 6.0, -10.0, 0.01)
    t.add(5.5, 6.5, -10.0, 0.02)
    t.add(6.0, 7.0, -10.0, 0.0)
    t.add(6.5, 7.5, -80.0, 0.0)  # a short quiet run: not a stretch
    s = t.finish().summary()
    assert s["silent_stretches"] == [[0.0, 5.5]] and s["silent_s"] == 5.5
    assert s["clipping_stretches"] == [[5.0, 6.5]] and s["clipped_windows"] == 2
