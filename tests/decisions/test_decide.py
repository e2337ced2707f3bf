"""The decision rules the README states: worked examples and a property test against a plain reference."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.decisions.decide import Decider, Hysteresis, Smoother, decide_sequence
from monitor.features.card import DecisionSettings


def two_class(p):
    return np.array([[v, 1 - v] for v in p])


def test_mean_worked_example():
    # causal mean over the last min(t+1, 3) windows (posterior averaging, Zhang et al. 2017,
    # "Hello Edge"), worked by hand: .9; (.9+.1)/2; (.9+.1+.8)/3; (.1+.8+.2)/3; (.8+.2+.9)/3
    s = Smoother(DecisionSettings(smoothing="mean", smoothing_windows=3))
    out = [s.update(p)[0] for p in two_class([.9, .1, .8, .2, .9])]
    np.testing.assert_allclose(out, [.9, .5, .6, 1.1 / 3, 1.9 / 3], atol=1e-12)


def test_ema_worked_example_and_time_constant():
    # exponential smoothing s_t = a p_t + (1 - a) s_{t-1} from s_0 = p_0, worked by hand for
    # a = 0.5: 1, .5, .25, .625, .8125; and it equals scipy.signal.lfilter([a], [1, a - 1])
    # after the first value
    import scipy.signal

    p = [1, 0, 0, 1, 1]
    s = Smoother(DecisionSettings(smoothing="ema", ema_alpha=0.5))
    out = [s.update(v)[0] for v in two_class(p)]
    np.testing.assert_allclose(out, [1, .5, .25, .625, .8125])
    zi = scipy.signal.lfiltic([0.5], [1, -0.5], y=[p[0]])
    ref, _ = scipy.signal.lfilter([0.5], [1, -0.5], p[1:], zi=zi)
    np.testing.assert_allclose(out[1:], ref)
    # a time constant tau at hop h: a = 1 - exp(-h / tau) (a first-order low-pass sampled
    # every h, common practice); tau = 2 s at h = 0.5 s keeps exp(-1/4) of the old value
    s = Smoother(DecisionSettings(smoothing="ema", ema_alpha=float(1 - np.exp(-0.5 / 2))))
    out = [s.update(v)[0] for v in two_class([1, 0])]
    assert out[1] == pytest.approx(np.exp(-0.25), abs=1e-12)


def test_median_normalised_and_zero_sum_fallback():
    s = Smoother(DecisionSettings(smoothing="median", smoothing_windows=3))
    seq = np.array([[.6, .3, .1], [.2, .7, .1], [.5, .4, .1]])
    out = [s.update(p) for p in seq]
    med = np.median(seq, axis=0)
    np.testing.assert_allclose(out[-1], med / med.sum())
    s = Smoother(DecisionSettings(smoothing="median", smoothing_windows=2))
    s.update(np.array([1.0, 0.0]))
    out = s.update(np.array([0.0, 1.0]))
    np.testing.assert_allclose(out, [0.5, 0.5])  # median [.5, .5] sums to 1: plain case
    s = Smoother(DecisionSettings(smoothing="median", smoothing_windows=3))
    for p in ([1.0, 0, 0], [0, 1.0, 0], [0, 0, 1.0]):
        out = s.update(np.array(p))
    np.testing.assert_allclose(out, [1 / 3] * 3)  # median sums to 0: the mean instead


def test_double_threshold_worked_example():
    # Dinkel, Wu and Yu 2019 (arXiv 1904.03841), causal form: on at the high threshold, stay
    # on at or above the low one. As a two-class stream: enter = .7, exit = .4, no margin.
    cfg = DecisionSettings(smoothing="none", enter=0.7, exit=0.4, margin=0.0, confirm=1)
    p = [.2, .6, .8, .6, .5, .3, .6, .2]
    h = Hysteresis(cfg)
    on = []
    for i, v in enumerate(p):
        d = h.update(np.array([1 - v, v]), 0.5 * (i + 2))
        on.append(int(d == 1))
    # class 0 holds the decision whenever class 1 is off; class 1's track is the detector
    assert on == [0, 0, 1, 1, 1, 0, 0, 0]


def test_plain_argmax_with_neutral_settings():
    # the README: none / confirm 1 / enter 0 / margin 0 / exit 0 is the plain argmax
    cfg = DecisionSettings(smoothing="none", confirm=1, enter=0.0, margin=0.0, exit=0.0)
    rng = np.random.default_rng(0)
    p = rng.dirichlet(np.ones(4), size=200)
    _, d = decide_sequence(p, np.arange(200) * 0.5 + 1, cfg)
    assert d == list(np.argmax(p, axis=1))


def test_confirm_needs_consecutive_windows():
    cfg = DecisionSettings(smoothing="none", enter=0.6, margin=0.1, confirm=2)
    p = two_class([.9, .2, .9, .9, .1, .1])  # class 0 prob
    _, d = decide_sequence(p, np.arange(1, 7) * 0.5, cfg)
    # window0: k=1; window1: class1 at .8 passes, k=1 (new candidate); window2: class0 k=1;
    # window3: k=2 -> decide 0; window4: class1 .9 passes (margin .8) k=1; window5: k=2 -> 1
    assert d == [None, None, None, 0, 0, 1]


def test_margin_blocks_a_narrow_lead():
    cfg = DecisionSettings(smoothing="none", enter=0.3, margin=0.2, confirm=1)
    seq = np.array([[.7, .2, .1], [.45, .5, .05], [.3, .6, .1]])
    _, d = decide_sequence(seq, np.array([1, 1.5, 2]), cfg)
    assert d == [0, 0, 1]  # .5 - .45 < .2 blocked; .6 - .3 >= .2 passes


def test_min_hold_delays_a_switch():
    cfg = DecisionSettings(smoothing="none", enter=0.5, margin=0.0, confirm=1, min_hold_s=1.0)
    seq = two_class([.9, .1, .1, .1])
    _, d = decide_sequence(seq, np.array([1.0, 1.5, 2.0, 2.5]), cfg)
    assert d == [0, 0, 1, 1]  # set at 1.0; switch allowed from t1 = 2.0


def test_exit_releases_to_undecided():
    cfg = DecisionSettings(smoothing="none", enter=0.8, exit=0.5, margin=0.0, confirm=1)
    seq = np.array([[.9, .1, 0], [.45, .35, .2], [.45, .35, .2]])
    _, d = decide_sequence(seq, np.array([1, 1.5, 2]), cfg)
    assert d == [0, None, None]


def test_tie_goes_to_lowest_index():
    cfg = DecisionSettings(smoothing="none", enter=0.0, margin=0.0, confirm=1)
    _, d = decide_sequence(np.array([[.5, .5]]), np.array([1.0]), cfg)
    assert d == [0]


# --- property test against a deliberately simple second implementation ------------------
def reference(probs, t1, cfg):
    """Straight from the README's text, with lists and no numpy tricks."""
    n = cfg.smoothing_windows
    D, set_t, k, L, out = None, 0.0, 0, None, []
    prev = None
    for t, p in enumerate(probs):
        p = list(map(float, p))
        if cfg.smoothing == "none":
            s = p
        elif cfg.smoothing == "ema":
            s = p if prev is None else [cfg.ema_alpha * a + (1 - cfg.ema_alpha) * b
                                        for a, b in zip(p, prev)]
        else:
            last = [list(map(float, q)) for q in probs[max(0, t + 1 - n):t + 1]]
            cols = list(zip(*last))
            if cfg.smoothing == "mean":
                s = [sum(c) / len(c) for c in cols]
            else:
                med = [sorted(c)[len(c) // 2] if len(c) % 2 else
                       (sorted(c)[len(c) // 2 - 1] + sorted(c)[len(c) // 2]) / 2 for c in cols]
                tot = sum(med)
                s = [m / tot for m in med] if tot > 0 else [sum(c) / len(c) for c in cols]
        prev = s
        if cfg.exit > 0 and D is not None and s[D] < cfg.exit:
            D = None
        c = max(range(len(s)), key=lambda j: (s[j], -j))
        ok = c != D and s[c] >= cfg.enter and (D is None or s[c] - s[D] >= cfg.margin)
        if ok:
            k = k + 1 if c == L else 1
            L = c
        else:
            k, L = 0, None
        if k >= cfg.confirm and (D is None or t1[t] - set_t >= cfg.min_hold_s - 1e-9):
            D, set_t, k, L = c, t1[t], 0, None
        out.append(D)
    return out


@settings(max_examples=300, deadline=None)
@given(
    seq=st.lists(st.lists(st.floats(0, 1), min_size=3, max_size=3), min_size=1, max_size=40),
    method=st.sampled_from(["none", "mean", "ema", "median"]),
    n=st.integers(1, 5), alpha=st.sampled_from([0.25, 0.5, 1.0]),
    enter=st.sampled_from([0.0, 0.4, 0.6]), exit_=st.sampled_from([0.0, 0.3]),
    margin=st.sampled_from([0.0, 0.1, 0.3]), confirm=st.integers(1, 3),
    hold=st.sampled_from([0.0, 1.0, 2.5]),
)
def test_decider_matches_reference(seq, method, n, alpha, enter, exit_, margin, confirm, hold):
    probs = np.array([np.array(r) / sum(r) if sum(r) > 0 else np.full(3, 1 / 3) for r in seq])
    probs = np.round(probs, 3)  # avoid knife-edge float ties between the two sums
    cfg = DecisionSettings(smoothing=method, smoothing_windows=n, ema_alpha=alpha, enter=enter,
                           exit=exit_, margin=margin, confirm=confirm, min_hold_s=hold)
    t1 = [1.0 + 0.5 * i for i in range(len(probs))]
    dec = Decider(cfg)
    ours = [dec.step(p, t)[1] for p, t in zip(probs, t1)]
    assert ours == reference(probs, t1, cfg)
