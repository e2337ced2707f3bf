"""The real FFT of the spectrum stage: SciPy's pocketfft, loaded without ``scipy.fft``.

Importing ``scipy.fft`` costs about 0.2 s and 20 MB (its array-API layer pulls in
``numpy.testing`` and ``numpy.f2py``, its FFTLog pulls in ``scipy.special``), more than
everything else a replay imports besides NumPy. The transform itself lives in one compiled
module, ``scipy/fft/_pocketfft/pypocketfft``, which needs only NumPy; `rfft` loads that
file directly and calls it exactly as ``scipy.fft.rfft`` does, so the numbers are the same
bytes (a test checks them against ``scipy.fft.rfft``). Where the file is not where this
SciPy keeps it, ``scipy.fft`` is imported after all.

NumPy's own ``numpy.fft.rfft`` would need no SciPy, but it computes float32 frames several
times slower than pocketfft in SciPy (about 9x on 200 frames of 512 here) and rounds
differently.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path
from typing import Any

import numpy as np

_TRANSFORM: Any = None


def _load() -> Any:
    """The ``r2c`` of SciPy's compiled pocketfft, or ``scipy.fft``'s own entry point."""
    spec = importlib.util.find_spec("scipy")
    if spec is not None and spec.origin is not None:
        folder = Path(spec.origin).parent / "fft" / "_pocketfft"
        for so in sorted(folder.glob("pypocketfft*")):
            if so.suffix not in (".so", ".pyd"):
                continue
            try:
                mod_spec = importlib.util.spec_from_file_location("_scenemon_fft.pypocketfft", so)
                module = importlib.util.module_from_spec(mod_spec)
                mod_spec.loader.exec_module(module)
                return module.r2c
            except (ImportError, AttributeError, OSError):
                break
    import scipy.fft

    return lambda x, axes, forward, norm, out, workers: scipy.fft.rfft(
        x, axis=axes[0], workers=workers)


def rfft(x: np.ndarray) -> np.ndarray:
    """The unnormalised real FFT of each row (last axis), one thread, as ``scipy.fft.rfft``.

    Parameters
    ----------
    x : numpy.ndarray
        ``(..., n)`` float32 (complex64 out) or float64 (complex128 out); any strides.

    Returns
    -------
    numpy.ndarray
        ``(..., n // 2 + 1)`` complex.

    References
    ----------
    SciPy's ``scipy.fft.rfft`` (pocketfft, M. Reinecke); the same call with ``norm=None``
    ("backward": no scaling forward) and ``workers=1``.
    """
    global _TRANSFORM
    if _TRANSFORM is None:
        _TRANSFORM = _load()
    x = np.asarray(x)
    if x.dtype not in (np.float32, np.float64):
        x = x.astype(np.float64)
    return _TRANSFORM(x, (x.ndim - 1,), True, 0, None, 1)
