"""Decision smoothing and the hysteresis state machine, exactly as the README states them.

Smoothing of the raw probability vectors ``p_t``:

- ``none``: ``s_t = p_t``;
- ``mean``: mean of the last ``min(t+1, N)`` raw vectors (posterior averaging, Zhang et al.
  2017, "Hello Edge");
- ``ema``: ``s_0 = p_0``, ``s_t = a p_t + (1 - a) s_{t-1}``;
- ``median``: per-class median of the last ``min(t+1, N)`` raw vectors divided by its sum
  (the mean where that sum is 0), the classic post-processing of sound event detection.

Hysteresis (double thresholding, Dinkel, Wu and Yu 2019, arXiv 1904.03841, with a margin and
a confirmation count): see `Hysteresis.update`.
"""

from __future__ import annotations

from collections import deque

import numpy as np

from monitor.features.card import DecisionSettings

_EPS = 1e-9  # slack on time comparisons of sample-clock times


class Smoother:
    """Smoothing of the raw probability vectors by the card's method (see module docstring).

    Parameters
    ----------
    settings : DecisionSettings
        ``smoothing`` names the method; ``smoothing_windows`` is N for mean and median,
        ``ema_alpha`` the weight of the newest vector for ema.
    """

    def __init__(self, settings: DecisionSettings) -> None:
        self.method = settings.smoothing
        self.n = settings.smoothing_windows if settings.smoothing in ("mean", "median") else 1
        self.alpha = settings.ema_alpha
        self._hist: deque[np.ndarray] = deque(maxlen=self.n)
        self._ema: np.ndarray | None = None

    def update(self, p: np.ndarray) -> np.ndarray:
        """Take the next raw vector `p` and return the smoothed one.

        Returns
        -------
        numpy.ndarray
            float64, same shape as `p`; a new array each call, so the caller may keep it.
        """
        p = np.asarray(p, dtype=np.float64)
        if self.method == "none":
            return p.copy()
        if self.method == "ema":
            self._ema = p.copy() if self._ema is None else self.alpha * p + (1 - self.alpha) * self._ema
            return self._ema.copy()
        self._hist.append(p)
        if self.method == "mean":
            # the rows added in order, then divided: the very numbers of np.mean(axis=0)
            # (its reduction over the outer axis is this loop), without building a stack
            it = iter(self._hist)
            acc = next(it).copy()
            for v in it:
                acc += v
            acc /= len(self._hist)
            return acc
        stack = np.stack(self._hist)
        med = np.median(stack, axis=0)
        total = med.sum()
        return med / total if total > 0 else stack.mean(axis=0)


class Hysteresis:
    """The decision state machine (the README's decision rules).

    For each window, in this order:

    1. release: if ``exit > 0``, a decision ``D`` is set and ``s[D] < exit``: undecided;
    2. ``c = argmax s`` (lowest index on ties) passes when ``c != D``, ``s[c] >= enter`` and
       (``D`` undecided or ``s[c] - s[D] >= margin``);
    3. if it passes, ``k`` counts consecutive passes of the same ``c``, else ``k = 0``;
    4. at ``k >= confirm`` and (undecided or held for ``min_hold_s``): ``D = c``.

    Parameters
    ----------
    settings : DecisionSettings
        enter, exit, margin, confirm and min_hold_s.
    """

    def __init__(self, settings: DecisionSettings) -> None:
        self.s = settings
        self.decision: int | None = None
        self.set_t = 0.0
        self.k = 0
        self.last: int | None = None

    def update(self, smoothed: np.ndarray, t1: float) -> int | None:
        """Take the smoothed vector of the window ending at `t1`; return the decision.

        Parameters
        ----------
        smoothed : numpy.ndarray
            The smoothed probabilities, ``(n_classes,)``.
        t1 : float
            The window's end in session seconds; the minimum hold is timed on it.

        Returns
        -------
        int or None
            Index of the decided class, None while undecided (the four steps of the class
            docstring, in order).
        """
        s, st = smoothed, self.s
        d = self.decision
        if st.exit > 0 and d is not None and s[d] < st.exit:
            d = self.decision = None
        c = int(np.argmax(s))
        passes = c != d and s[c] >= st.enter and (d is None or s[c] - s[d] >= st.margin)
        if passes:
            self.k = self.k + 1 if c == self.last else 1
            self.last = c
        else:
            self.k, self.last = 0, None
        if self.k >= st.confirm and (d is None or t1 - self.set_t >= st.min_hold_s - _EPS):
            self.decision, self.set_t, self.k, self.last = c, t1, 0, None
        return self.decision


class Decider:
    """Smoothing then hysteresis; `step(p, t1) -> (smoothed, decision index or None)`.

    Parameters
    ----------
    settings : DecisionSettings
        The smoothing method and the hysteresis settings.
    """

    def __init__(self, settings: DecisionSettings) -> None:
        self.settings = settings
        self.smoother = Smoother(settings)
        self.hysteresis = Hysteresis(settings)

    def step(self, p: np.ndarray, t1: float) -> tuple[np.ndarray, int | None]:
        """Smooth the raw vector `p` of the window ending at `t1`, then decide.

        Returns
        -------
        smoothed : numpy.ndarray
            float64, shape ``(n_classes,)``.
        decision : int or None
            Index of the decided class; None while undecided.
        """
        s = self.smoother.update(p)
        return s, self.hysteresis.update(s, t1)


def decide_sequence(probs: np.ndarray, t1: np.ndarray, settings: DecisionSettings
                    ) -> tuple[np.ndarray, list[int | None]]:
    """Run a whole sequence of raw probabilities through a fresh `Decider`.

    Parameters
    ----------
    probs : numpy.ndarray
        ``(n, classes)`` raw probabilities in stream order.
    t1 : numpy.ndarray
        ``(n,)`` end time of each window, in seconds.
    settings : DecisionSettings
        The decision settings.

    Returns
    -------
    smoothed : numpy.ndarray
        ``(n, classes)``.
    decisions : list of int or None
        The decided class index of each window (None: undecided).
    """
    dec = Decider(settings)
    smoothed, decisions = [], []
    for p, t in zip(probs, t1):
        s, d = dec.step(p, float(t))
        smoothed.append(s)
        decisions.append(d)
    return np.array(smoothed), decisions
