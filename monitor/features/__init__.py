"""How a window becomes features: the model card, its stages, the front end, the card check.

Owns: `card` (the sidecar TOML read into a frozen `ModelCard`), `stages` (one small module
per front-end stage with its config and card keys, and the registry of kinds), `dsp` (mel,
window, DCT building blocks), `fft` (the real FFT, SciPy's pocketfft without importing
``scipy.fft``), `frontend` (`FrontEnd`: batch, single window, stream; the
float64 reference), `cardcheck` (``scenemon card check``) and `fromcode` (``scenemon card write``).
May import: ``monitor.base``, ``monitor.sound``.
"""
