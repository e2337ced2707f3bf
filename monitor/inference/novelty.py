"""Unfamiliar sounds: how far a window's features lie from the audio a model is meant for.

A model always answers with one of its classes, so a sound it was never meant for shows up
as a confident wrong decision. A profile (``<model>.profile.npz``, written by
``scenemon profile``) holds statistics of the model's own scaled features over audio it is
meant for. Each window is summarised by the mean and the standard deviation over time of
every feature band (``2 * bands`` numbers). For each class ``c`` of the model the profile
keeps the mean ``m_c`` of the summaries of that class's windows and their shrunk covariance
``S_c`` (Ledoit and Wolf 2004, "A well-conditioned estimator for large-dimensional
covariance matrices", J. Multivariate Analysis 88(2)): class-conditional Gaussians, as in
Lee, Lee, Lee and Shin 2018 ("A simple unified framework for detecting out-of-distribution
samples and adversarial attacks", NeurIPS), with a covariance per class.

A window's novelty is its Mahalanobis distance (Mahalanobis 1936) to the nearest class,
``d = min_c sqrt((x - m_c)^T S_c^-1 (x - m_c))``. The threshold is a quantile (default
99.5%) of the distances of held-out profile windows (every fifth block of 20 consecutive
windows, not used to fit the means and covariances, so that neighbours do not leak). A window
is unfamiliar once ``d`` has been above the threshold for ``confirm`` windows in a row (the
decision's own confirmation count). Without class labels the profile is one Gaussian.

The file is a plain ``.npz`` read with ``allow_pickle=False``.
"""

from __future__ import annotations

from dataclasses import field
from pathlib import Path
from typing import Any

import numpy as np

from monitor.base.errors import ScenemonError
from monitor.base.records import record
from monitor.features.card import ModelCard

PROFILE_VERSION = 2
DEFAULT_QUANTILE = 0.995
HOLD_OUT_EVERY = 5
MIN_CLASS_WINDOWS = 20  # below this a class's covariance is mostly shrinkage


def profile_path_for(model_path: str | Path) -> Path:
    """``models/demo.tflite`` -> ``models/demo.profile.npz``.

    Parameters
    ----------
    model_path : str or Path
        The model file.

    Returns
    -------
    Path
        The profile's path beside it.
    """
    p = Path(model_path)
    return p.with_name(p.stem + ".profile.npz")


def summarise(features: np.ndarray, *, time_axis: int) -> np.ndarray:
    """Per-band mean and standard deviation over time of one window's (or many windows')
    features; shape ``(..., 2 * bands)``, float64.

    Parameters
    ----------
    features : numpy.ndarray
        ``(frames, bands)`` / ``(bands, frames)``, or a stack of them with a leading axis;
        for a waveform model (`time_axis` -1) ``(samples,)`` or ``(n, samples)``.
    time_axis : int
        The frames axis within one window: 0 for "time_mel", 1 for "mel_time", -1 for a
        waveform (one band: the samples).

    Returns
    -------
    numpy.ndarray
        ``(..., 2 * bands)`` float64: the means, then the standard deviations.
    """
    f = np.asarray(features, dtype=np.float64)
    if time_axis < 0:
        f = f[..., None]  # one band of samples
        axis = f.ndim - 2
    else:
        axis = f.ndim - 2 + time_axis
    # one pass: the mean and the mean square (population std, as numpy.std), summed along
    # the frames by einsum without a squared copy; float64 keeps the difference exact enough
    n = f.shape[axis]
    letters = "abcd"[:f.ndim]
    kept = letters.replace(letters[axis], "")
    mean = f.sum(axis=axis) / n
    square = np.einsum(f"{letters},{letters}->{kept}", f, f) / n
    std = np.sqrt(np.maximum(square - mean * mean, 0.0))
    return np.concatenate([mean, std], axis=-1)


def ledoit_wolf(x: np.ndarray) -> tuple[np.ndarray, float]:
    """Ledoit-Wolf shrunk covariance of the rows of `x` (centred here), and the shrinkage.

    ``S = (1 - a) C + a mu I`` with ``C`` the empirical covariance, ``mu = trace(C) / p`` and
    the shrinkage ``a`` of Ledoit and Wolf 2004 (the estimator scikit-learn's ``LedoitWolf``
    implements).

    Parameters
    ----------
    x : numpy.ndarray
        ``(n, d)`` observations in rows.

    Returns
    -------
    covariance : numpy.ndarray
        ``(d, d)`` shrunk covariance.
    shrinkage : float
        The weight ``a`` of the scaled identity, from 0 to 1.

    References
    ----------
    O. Ledoit and M. Wolf, "A well-conditioned estimator for large-dimensional covariance
    matrices", Journal of Multivariate Analysis 88(2), 2004.
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


@record(frozen=False)
class Profile:
    """A loaded profile and the per-window state of one session (see module docstring).

    ``means`` is ``(k, d)`` and ``covariances`` ``(k, d, d)`` for ``k`` classes (1 when the
    profile was fitted without labels) and ``d = 2 * bands`` summary numbers.

    Attributes
    ----------
    means : numpy.ndarray
        ``(k, d)`` mean summary of each class.
    covariances : numpy.ndarray
        ``(k, d, d)`` shrunk covariance of each class.
    threshold : float
        Distance above which a window counts toward unfamiliar.
    quantile : float
        The quantile of held-out distances the threshold is.
    time_axis : int
        The frames axis of one window's features (-1: a waveform).
    windows : int
        Windows the profile was fitted on.
    confirm : int
        Windows in a row above the threshold before a sound is unfamiliar.
    path : Path or None
        The file it was read from.
    shrinkage : numpy.ndarray or None
        The Ledoit-Wolf shrinkage of each class.
    """

    means: np.ndarray
    covariances: np.ndarray
    threshold: float
    quantile: float
    time_axis: int
    windows: int
    confirm: int = 2
    path: Path | None = None
    shrinkage: np.ndarray | None = None
    _precisions: np.ndarray = field(init=False, repr=False)
    _run: int = field(default=0, init=False, repr=False)

    def __post_init__(self) -> None:
        self.means = np.atleast_2d(self.means)
        if self.covariances.ndim == 2:
            self.covariances = self.covariances[None]
        self._precisions = np.linalg.inv(self.covariances)

    def distances(self, summaries: np.ndarray) -> np.ndarray:
        """Mahalanobis distance of each summary (rows) to each class: ``(n, k)``."""
        x = np.atleast_2d(summaries)
        d = x[:, None, :] - self.means[None]  # (n, classes, 2 x bands)
        # a stack of one-row products, one per window and class: a window's distance does
        # not depend on how many windows came with it (a single many-row matrix product
        # could go through other BLAS kernels), and one call serves the whole batch
        q = np.matmul(d[:, :, None, :], self._precisions)[:, :, 0, :]
        return np.sqrt(np.maximum((q * d).sum(axis=-1), 0.0))

    def distance(self, summaries: np.ndarray) -> np.ndarray:
        """Novelty of each summary: the distance to the nearest class."""
        return self.distances(summaries).min(axis=1)

    def distances_of(self, features: np.ndarray) -> np.ndarray:
        """Novelty of each window of a stack of features ``(n, *feature_shape)``."""
        return self.distance(summarise(features, time_axis=self.time_axis))

    def count(self, d: float) -> bool:
        """Take the next window's novelty `d`; True once it has been above the threshold
        for `confirm` windows in a row (the sound is unfamiliar)."""
        self._run = self._run + 1 if d > self.threshold else 0
        return self._run >= self.confirm

    def step(self, features: np.ndarray) -> tuple[float, bool]:
        """Novelty of one window's features, and whether the sound is now unfamiliar."""
        d = float(self.distances_of(features[None])[0])
        return d, self.count(d)

    def fresh(self, confirm: int) -> Profile:
        """A copy with its own run counter (one per session and model)."""
        return Profile(self.means, self.covariances, self.threshold, self.quantile,
                       self.time_axis, self.windows, confirm, self.path, self.shrinkage)

    def describe(self) -> dict[str, Any]:
        """session.json's ``profile``: file, threshold, quantile, windows, classes, confirm."""
        return {"path": Path(self.path).name if self.path else None,
                "threshold": round(self.threshold, 4), "quantile": self.quantile,
                "windows": self.windows, "classes": int(self.means.shape[0]),
                "confirm": self.confirm}


def time_axis_of(card: ModelCard) -> int:
    """The frames axis of one window's features (-1: a waveform, no frames).

    Parameters
    ----------
    card : ModelCard
        The model's card.

    Returns
    -------
    int
        0 for "time_mel", 1 for "mel_time", -1 for a waveform.
    """
    if len(card.feature_shape) == 1:
        return -1
    return card.time_axis


def block_groups(n: int, block: int = 20) -> np.ndarray:
    """Group ids of `n` consecutive windows in blocks of `block` (for holding out blocks).

    Parameters
    ----------
    n : int
        Windows.
    block : int
        Windows per block.

    Returns
    -------
    numpy.ndarray
        ``(n,)`` int: window i is in group ``i // block``.
    """
    return np.arange(n) // block


def fit_profile(features: np.ndarray, card: ModelCard, *, labels: np.ndarray | None = None,
                groups: np.ndarray | None = None,
                quantile: float = DEFAULT_QUANTILE) -> Profile:
    """Fit a profile to a stack of windows' scaled features ``(n, *card.feature_shape)``.

    Parameters
    ----------
    features : numpy.ndarray
        The model input of each window.
    card : ModelCard
    labels : numpy.ndarray, optional
        Class index of each window (-1: none, left out); without it one Gaussian is fitted.
    groups : numpy.ndarray, optional
        Group id of each window (a file, a clip, a block of neighbours); every fifth group
        is held out for the threshold. Default: blocks of 20 consecutive windows.
    quantile : float
        The threshold's quantile of the held-out distances, in [0.5, 1).

    Returns
    -------
    Profile
        The fitted profile.

    Raises
    ------
    ScenemonError
        A quantile outside [0.5, 1), or too few windows (per class, with labels) to fit it.
    """
    if not 0.5 <= quantile < 1.0:
        raise ScenemonError(f"--quantile {quantile} must be in [0.5, 1)")
    axis = time_axis_of(card)
    s = summarise(features, time_axis=axis)
    n = s.shape[0]
    labels = np.zeros(n, int) if labels is None else np.asarray(labels, int)
    groups = block_groups(n) if groups is None else np.asarray(groups)
    keep = labels >= 0
    s, labels, groups = s[keep], labels[keep], groups[keep]
    _, gidx = np.unique(groups, return_inverse=True)
    held = (gidx % HOLD_OUT_EVERY) == HOLD_OUT_EVERY - 1
    present = sorted(set(labels[~held].tolist()))
    small = [c for c in present if np.sum(~held & (labels == c)) < MIN_CLASS_WINDOWS]
    if not present or small or held.sum() < MIN_CLASS_WINDOWS:
        names = list(card.classes)
        fit = ", ".join(f"{names[c] if 0 <= c < len(names) else c} "
                        f"{int(np.sum(~held & (labels == c)))}" for c in present)
        # every HOLD_OUT_EVERY-th block is held out: a class needs about this many windows
        need = -(-MIN_CLASS_WINDOWS * HOLD_OUT_EVERY // (HOLD_OUT_EVERY - 1))
        raise ScenemonError(
            f"{n} windows are too few for a profile: each class needs {MIN_CLASS_WINDOWS} "
            f"windows to fit after every {HOLD_OUT_EVERY}th block of windows is held out, "
            f"and the held-out part {MIN_CLASS_WINDOWS} in all; windows to fit per class: "
            f"{fit or 'none'}, held out: {int(held.sum())}. Give each class at least about "
            f"{need} windows ({need * card.hop_s:.1f} s of audio at a hop of {card.hop_s:g} s)")
    means, covs, shrink = [], [], []
    for c in present:
        x = s[~held & (labels == c)]
        cov, a = ledoit_wolf(x)
        means.append(x.mean(axis=0))
        covs.append(cov)
        shrink.append(a)
    prof = Profile(np.stack(means), np.stack(covs), 0.0, quantile, axis, int(keep.sum()),
                   card.decision.confirm, shrinkage=np.array(shrink))
    prof.threshold = float(np.quantile(prof.distance(s[held]), quantile))
    return prof


def save_profile(prof: Profile, path: Path) -> None:
    """Write `prof` to `path` as a plain ``.npz`` (no pickle), atomically.

    The confirmation count is not stored: `load_profile` takes it from the card's
    ``[decision]`` table, so the profile follows the decision settings.

    Parameters
    ----------
    prof : Profile
    path : Path
        Usually `profile_path_for` the model, where `profile_beside` finds it.
    """
    import io

    from monitor.base.files import atomic_write

    buf = io.BytesIO()
    np.savez(buf, version=np.int64(PROFILE_VERSION), means=prof.means,
             covariances=prof.covariances, threshold=np.float64(prof.threshold),
             quantile=np.float64(prof.quantile), time_axis=np.int64(prof.time_axis),
             windows=np.int64(prof.windows),
             shrinkage=np.asarray(prof.shrinkage if prof.shrinkage is not None else [], float))
    atomic_write(Path(path), buf.getvalue())


def is_profile_file(path: Path) -> bool:
    """True when `path` is a profile `save_profile` wrote (a zip of its arrays), so that
    ``profile --out`` may write over it and over nothing else.

    Parameters
    ----------
    path : Path
        The file to look at.

    Returns
    -------
    bool
        True for a zip holding a profile's arrays.
    """
    import zipfile

    try:
        with zipfile.ZipFile(path) as z:
            return {"version.npy", "means.npy", "threshold.npy"} <= set(z.namelist())
    except (OSError, zipfile.BadZipFile):
        return False


MAX_CONDITION = 1e12  # a covariance worse conditioned than this cannot be inverted usefully
MIN_VARIANCE = 1e-12  # below it the windows a profile was made from did not vary
MAX_MEAN = 1e12  # scaled features' summaries far beyond this are not features


def _scalar(z: Any, name: str, path: Path, kind: type) -> Any:
    """One scalar of a profile file, as `kind`; ScenemonError naming the array otherwise."""
    a = np.asarray(z[name])
    if a.shape != () or a.dtype.kind not in "fiu" or not np.isfinite(a):
        raise ScenemonError(f"{path}: {name} must be one finite number, not an array of "
                            f"shape {a.shape} ({a.dtype})")
    return kind(a)


def load_profile(path: Path, card: ModelCard) -> Profile:
    """Read a profile (no pickle) and check it against the card.

    Every array's shape and type is checked before it is used, and each covariance must be
    positive definite and invertible in float64 (condition number at most 1e12, as a
    Ledoit-Wolf shrunk estimate always is): a profile made by ``scenemon profile`` passes,
    a damaged or hand-made one is refused with the reason.

    Parameters
    ----------
    path : Path
        The ``.profile.npz`` file.
    card : ModelCard
        The card of the model the profile belongs to.

    Returns
    -------
    Profile
        The profile, ready to measure windows.

    Raises
    ------
    ScenemonError
        The file cannot be read as a profile, an array has the wrong shape or type, a value
        is not finite, or a covariance cannot be inverted.
    """
    try:
        with np.load(path, allow_pickle=False) as z:
            arrays = {k: z[k] for k in z.files}
    except (OSError, ValueError, EOFError) as exc:
        raise ScenemonError(f"{path}: not a readable novelty profile ({exc})") from None
    missing = [k for k in ("means", "covariances", "threshold", "quantile", "time_axis",
                           "windows") if k not in arrays]
    if missing:
        raise ScenemonError(f"{path}: not a novelty profile (no {', '.join(missing)})")
    threshold = _scalar(arrays, "threshold", path, float)
    quantile = _scalar(arrays, "quantile", path, float)
    axis = _scalar(arrays, "time_axis", path, float)
    windows = _scalar(arrays, "windows", path, float)
    if axis != time_axis_of(card):
        raise ScenemonError(f"{path}: was made for features with their frames on axis "
                            f"{axis:g}, but the card {card.name} puts them on axis "
                            f"{time_axis_of(card)}; make it again with scenemon profile")
    if not (threshold > 0 and 0 < quantile <= 1 and windows >= 0):
        raise ScenemonError(f"{path}: threshold {threshold:g}, quantile {quantile:g} and "
                            f"windows {windows:g} are not a profile's (threshold > 0, "
                            f"quantile in (0, 1])")
    d = 2 * card.bands
    means, covs = arrays["means"], arrays["covariances"]
    if means.dtype.kind not in "fiu" or covs.dtype.kind not in "fiu":
        raise ScenemonError(f"{path}: means and covariances must be arrays of numbers")
    if means.ndim != 2 or means.shape[1] != d or means.shape[0] < 1:
        raise ScenemonError(f"{path}: means has shape {means.shape}, but the card "
                            f"{card.name} gives {d} numbers per window (classes, {d}); make "
                            f"it again with scenemon profile")
    if covs.shape != (means.shape[0], d, d):
        raise ScenemonError(f"{path}: covariances has shape {covs.shape}, not "
                            f"{(means.shape[0], d, d)} for means of shape {means.shape}")
    means, covs = means.astype(np.float64), covs.astype(np.float64)
    if not (np.all(np.isfinite(means)) and np.all(np.isfinite(covs))):
        raise ScenemonError(f"{path}: holds non-finite values")
    if np.abs(means).max() > MAX_MEAN:
        raise ScenemonError(f"{path}: its means reach {np.abs(means).max():.3g}, far beyond "
                            f"any scaled feature; make it again with scenemon profile")
    shrink = arrays.get("shrinkage")
    if shrink is not None:
        if shrink.dtype.kind not in "fiu" or shrink.shape != (means.shape[0],):
            raise ScenemonError(f"{path}: shrinkage has shape {shrink.shape}, not "
                                f"({means.shape[0]},)")
        shrink = shrink.astype(np.float64)
    for k, c in enumerate(covs):
        if not np.allclose(c, c.T, rtol=1e-6, atol=1e-12 * max(1.0, float(np.abs(c).max()))):
            raise ScenemonError(f"{path}: covariance {k} is not symmetric")
        ev = np.linalg.eigvalsh(c)
        if not (ev[0] >= MIN_VARIANCE and ev[-1] / ev[0] <= MAX_CONDITION):
            raise ScenemonError(f"{path}: covariance {k} cannot be inverted (its smallest "
                                f"eigenvalue is {ev[0]:.3g}: it must be at least "
                                f"{MIN_VARIANCE:g} and the condition number at most "
                                f"{MAX_CONDITION:g}); "
                                f"make the profile again with scenemon profile, which "
                                f"regularises it")
    return Profile(means, covs, threshold, quantile, int(axis), int(windows),
                   card.decision.confirm, Path(path), shrink)


def profile_beside(model_path: str | Path, card: ModelCard) -> Profile | None:
    """The profile beside a model, if there is one.

    Parameters
    ----------
    model_path : str or Path
        The model file.
    card : ModelCard
        Its card.

    Returns
    -------
    Profile or None
        The profile read by `load_profile`, or None when there is no ``.profile.npz`` beside
        the model.
    """
    p = profile_path_for(model_path)
    return load_profile(p, card) if p.is_file() else None
