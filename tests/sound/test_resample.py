"""Streaming resampling (soxr HQ) against one-shot soxr and against first principles."""

import numpy as np
import pytest

from monitor.sound.sources import StreamResampler

soxr = pytest.importorskip("soxr")


def feed(rs, x, sizes):
    out, i, k = [], 0, 0
    while i < x.size:
        n = sizes[k % len(sizes)]
        out.append(rs(x[i:i + n]))
        i += n
        k += 1
    out.append(rs(np.zeros(0, np.float32), last=True))
    return np.concatenate(out)


@pytest.mark.parametrize("rate", [48000, 44100])
def test_odd_blocks_equal_one_shot(rate):
    # soxr's documentation: ResampleStream's chunked output equals soxr.resample's one-shot
    # output (same filter, state carried across chunks)
    x = (np.random.default_rng(rate).standard_normal(rate * 3) * 0.3).astype(np.float32)
    chunked = feed(StreamResampler(rate, 16000), x, [997, 31, 4801, 1, 12345])
    whole = soxr.resample(x, rate, 16000, quality="HQ")
    assert chunked.shape == whole.shape
    np.testing.assert_array_equal(chunked, whole)


@pytest.mark.parametrize("rate", [48000, 44100])
@pytest.mark.parametrize("freq", [9000, 10000, 12000, 15000, 18000, 22000])
def test_stop_band_at_least_90_db(rate, freq):
    # tones above the new Nyquist must vanish: >= 90 dB down (issue 3; soxr HQ measured ~ -136)
    t = np.arange(rate * 2) / rate
    x = (0.9 * np.sin(2 * np.pi * freq * t)).astype(np.float32)
    y = feed(StreamResampler(rate, 16000), x, [4096])[2000:-2000]
    rms_in = 0.9 / np.sqrt(2)
    rms_out = np.sqrt(np.mean(y.astype(np.float64) ** 2)) + 1e-20
    assert 20 * np.log10(rms_out / rms_in) <= -90


@pytest.mark.parametrize("rate,min_snr", [(48000, 65), (44100, 65)])
def test_passband_matches_direct_synthesis(rate, min_snr):
    # first principles: sines below 7 kHz resampled equal the same sines computed at 16 kHz
    # (measured when this test was written: soxr HQ about 134 dB from 48 kHz and 71 dB from
    # 44.1 kHz; the bound asked here is 65 dB, common practice for a 16-bit path)
    freqs, amps, phases = [220, 1000, 3100, 5300, 6900], [.2, .15, .1, .1, .05], [0, 1, 2, 3, 4]

    def synth(sr, n):
        t = np.arange(n) / sr
        return sum(a * np.sin(2 * np.pi * f * t + p) for f, a, p in zip(freqs, amps, phases))

    x = synth(rate, rate * 2).astype(np.float32)
    y = feed(StreamResampler(rate, 16000), x, [1234, 777]).astype(np.float64)
    ref = synth(16000, y.size)
    core = slice(1600, y.size - 1600)
    # soxr's output is time-aligned with its input (its delay is compensated)
    err = y[core] - ref[core]
    snr = 10 * np.log10(np.mean(ref[core] ** 2) / np.mean(err ** 2))
    assert snr >= min_snr
