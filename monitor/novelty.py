"""Unfamiliar sounds: how far a window's features lie from the audio a model is meant for.

A model always answers with one of its classes, so a sound it was never meant for shows up
as a confident wrong decision. A profile (``<model>.profile.npz``, written by
``scenemon profile``) holds statistics of the model's own scaled features over audio it is
meant for. Each window is summarised by the mean and the standard deviation over time of
every feature band (``2 * bands`` numbers); the profile keeps the mean ``m`` of those
summaries and a shrunk covariance ``S`` (Ledoit and Wolf 2004, "A well-conditioned
estimator for large-dimensional covariance matrices", J. Multivariate Analysis 88(2)).

A window's novelty is the Mahalanobis distance of its summary ``x`` to the profile,
``d = sqrt((x - m)^T S^-1 (x - m))`` (Mahalanobis 1936). The threshold is a quantile
(default 99.5%) of the distances of held-out profile windows (every fifth window, not used
to fit ``m`` and ``S``). A window is unfamiliar once ``d`` has been above the threshold for
``confirm`` windows in a row (the decision's own confirmation count).

The file is a plain ``.npz`` read with ``allow_pickle=False``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from monitor.card import ModelCard
from monitor.errors import ScenemonError

PROFILE_VERSION = 1
DEFAULT_QUANTILE = 0.995
HOLD_OUT_EVERY = 5


def profile_path_for(model_path: str | Path) -> Path:
    """``models/demo.tflite`` -> ``models/demo.profile.npz``."""
    p = Path(model_path)
    return p.with_name(p.stem + ".profile.npz")


def summarise(features: np.ndarray, *, time_axis: int) -> np.ndarray:
    """Per-band mean and standard deviation over time of one window's (or many windows')
    features; shape ``(..., 2 * bands)``, float64.

    Parameters
    ----------
    features : numpy.ndarray
        ``(frames, bands)`` / ``(bands, frames)``, or a stack of them with a leading axis.
    time_axis : int
        The frames axis within one window (0 for "time_mel", 1 for "mel_time").
    """
    f = np.asarray(features, dtype=np.float64)
    axis = time_axis - 2 if f.ndim >= 2 else -1
    if f.ndim == 1:  # a waveform model: one band
        f = f[:, None]
        axis = 0
    return np.concatenate([f.mean(axis=axis), f.std(axis=axis)], axis=-1)


def ledoit_wolf(x: np.ndarray) -> tuple[np.ndarray, float]:
    """Ledoit-Wolf shrunk covariance of the rows of `x` (centred here), and the shrinkage.

    ``S = (1 - a) C + a mu I`` with ``C`` the empirical covariance, ``mu = trace(C) / p`` and
    the shrinkage ``a`` of Ledoit and Wolf 2004 (the estimator scikit-learn's ``LedoitWolf``
    implements).
    """
    x = np.asarray(x, dtype=np.float64)
    n, p = x.shape
    x = x - x.mean(axis=0)
    emp = x.T @ x / n
    mu = np.trace(emp) / p
    x2 = x ** 2
    beta_ = float(np.sum(x2.T @ x2))
    delta_ = float(np.sum((x.T @ x) ** 2)) / n ** 2
    beta = (beta_ / n - delta_) / (p * n)
    delta = (delta_ - 2.0 * mu * np.trace(emp) + p * mu ** 2) / p
    beta = min(beta, delta)
    shrink = 0.0 if beta == 0 else beta / delta
    return (1.0 - shrink) * emp + shrink * mu * np.eye(p), float(shrink)


@dataclass
class Profile:
    """A loaded profile and the per-window state of one session (see module docstring)."""

    mean: np.ndarray
    covariance: np.ndarray
    threshold: float
    quantile: float
    time_axis: int
    windows: int
    confirm: int = 2
    path: Path | None = None
    shrinkage: float = 0.0
    _precision: np.ndarray = field(init=False, repr=False)
    _run: int = field(default=0, init=False, repr=False)

    def __post_init__(self) -> None:
        self._precision = np.linalg.inv(self.covariance)

    def distance(self, summaries: np.ndarray) -> np.ndarray:
        """Mahalanobis distance of each summary (rows) to the profile."""
        d = np.atleast_2d(summaries) - self.mean
        return np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", d, self._precision, d), 0.0))

    def step(self, features: np.ndarray) -> tuple[float, bool]:
        """Novelty of one window's features, and whether the sound is now unfamiliar."""
        d = float(self.distance(summarise(features, time_axis=self.time_axis))[0])
        self._run = self._run + 1 if d > self.threshold else 0
        return d, self._run >= self.confirm

    def fresh(self, confirm: int) -> Profile:
        """A copy with its own run counter (one per session and model)."""
        return Profile(self.mean, self.covariance, self.threshold, self.quantile,
                       self.time_axis, self.windows, confirm, self.path, self.shrinkage)

    def describe(self) -> dict[str, Any]:
        return {"path": str(self.path) if self.path else None, "threshold": self.threshold,
                "quantile": self.quantile, "windows": self.windows, "confirm": self.confirm}


def time_axis_of(card: ModelCard) -> int:
    return card.time_axis


def fit_profile(features: np.ndarray, card: ModelCard, *,
                quantile: float = DEFAULT_QUANTILE) -> Profile:
    """Fit a profile to a stack of windows' scaled features ``(n, *card.feature_shape)``."""
    if not 0.5 <= quantile < 1.0:
        raise ScenemonError(f"--quantile {quantile} must be in [0.5, 1)")
    axis = time_axis_of(card)
    s = summarise(features, time_axis=axis)
    n = s.shape[0]
    held = np.zeros(n, bool)
    held[HOLD_OUT_EVERY - 1::HOLD_OUT_EVERY] = True
    if (~held).sum() < 2 * s.shape[1] or held.sum() < 20:
        raise ScenemonError(f"{n} windows are too few for a profile of {s.shape[1]} numbers "
                            f"per window (give at least {max(25, 3 * s.shape[1])} windows)")
    cov, shrink = ledoit_wolf(s[~held])
    prof = Profile(s[~held].mean(axis=0), cov, 0.0, quantile, axis, int(n),
                   card.decision.confirm, shrinkage=shrink)
    prof.threshold = float(np.quantile(prof.distance(s[held]), quantile))
    return prof


def save_profile(prof: Profile, path: Path) -> None:
    import io

    from monitor.files import atomic_write

    buf = io.BytesIO()
    np.savez(buf, version=np.int64(PROFILE_VERSION), mean=prof.mean, covariance=prof.covariance,
             threshold=np.float64(prof.threshold), quantile=np.float64(prof.quantile),
             time_axis=np.int64(prof.time_axis), windows=np.int64(prof.windows),
             shrinkage=np.float64(prof.shrinkage))
    atomic_write(Path(path), buf.getvalue())


def load_profile(path: Path, card: ModelCard) -> Profile:
    """Read a profile (no pickle) and check it against the card."""
    try:
        with np.load(path, allow_pickle=False) as z:
            mean, cov = np.asarray(z["mean"], np.float64), np.asarray(z["covariance"], np.float64)
            threshold, quantile = float(z["threshold"]), float(z["quantile"])
            axis, windows = int(z["time_axis"]), int(z["windows"])
            shrink = float(z["shrinkage"]) if "shrinkage" in z else 0.0
    except (OSError, KeyError, ValueError) as exc:
        raise ScenemonError(f"{path}: not a readable novelty profile ({exc})") from None
    bands = card.bands
    if mean.shape != (2 * bands,) or cov.shape != (2 * bands, 2 * bands):
        raise ScenemonError(f"{path}: holds {mean.shape[0]} numbers per window but the card "
                            f"{card.name} gives {2 * bands}; make it again with scenemon profile")
    if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(cov)) and np.isfinite(threshold)):
        raise ScenemonError(f"{path}: holds non-finite values")
    try:
        return Profile(mean, cov, threshold, quantile, axis, windows, card.decision.confirm,
                       Path(path), shrink)
    except np.linalg.LinAlgError:
        raise ScenemonError(f"{path}: its covariance cannot be inverted") from None


def profile_beside(model_path: str | Path, card: ModelCard) -> Profile | None:
    """The profile beside a model, if there is one."""
    p = profile_path_for(model_path)
    return load_profile(p, card) if p.is_file() else None
