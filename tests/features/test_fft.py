"""The spectrum stage's FFT against SciPy's own `scipy.fft.rfft` (the reference library)."""

import numpy as np
import pytest
import scipy.fft

from monitor.features import fft


@pytest.mark.parametrize("shape", [(512,), (98, 512), (3, 98, 400), (7, 1024)])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_rfft_is_scipy_rfft_byte_for_byte(shape, dtype):
    x = np.random.default_rng(len(shape)).standard_normal(shape).astype(dtype)
    got = fft.rfft(x)
    want = scipy.fft.rfft(x, axis=-1, workers=1)  # SciPy's pocketfft, the same transform
    assert got.dtype == want.dtype
    np.testing.assert_array_equal(got, want)


def test_rfft_of_strided_frames():
    # frames as the front end makes them: an overlapping strided view of one signal
    x = np.random.default_rng(1).standard_normal(16000).astype(np.float32)
    frames = np.lib.stride_tricks.sliding_window_view(x, 512)[::160]
    np.testing.assert_array_equal(fft.rfft(frames), scipy.fft.rfft(frames, axis=-1, workers=1))
    # and NumPy's FFT in float64 (another implementation) within float32 rounding
    np.testing.assert_allclose(fft.rfft(frames), np.fft.rfft(frames.astype(np.float64)),
                               rtol=0, atol=2e-4 * np.abs(np.fft.rfft(frames)).max())


def test_rfft_without_scipys_compiled_file(monkeypatch):
    # where the compiled module is not found, scipy.fft itself computes the same numbers
    monkeypatch.setattr(fft, "_TRANSFORM", None)
    monkeypatch.setattr(fft.importlib.util, "find_spec", lambda name: None)
    x = np.random.default_rng(2).standard_normal((5, 256)).astype(np.float32)
    np.testing.assert_array_equal(fft.rfft(x), scipy.fft.rfft(x, axis=-1, workers=1))
