"""The fixed-point front end (card ``arithmetic = "q15"``): its integer parts against Python's
own integer functions and numpy's FFT, the whole against CMSIS-DSP's ``arm_mfcc_q15`` and
``arm_mfcc_f32`` (cmsisdsp 1.10.1, the library firmware links) and against the float64
reference, the demo models behind it, and the cards it refuses."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from conftest import MODELS, card_dict, cli
from monitor.features.card import card_from_dict, load_card, with_arithmetic
from monitor.features.fixedpoint import (
    FixedFrontEnd,
    bit_length,
    isqrt64,
    log2_q24,
    log2_table,
)
from monitor.features.frontend import FrontEnd, reference_features


def q15_card(scaling=None, **fe):
    return card_from_dict(card_dict(frontend={"pcm_bits": 16, "arithmetic": "q15", **fe},
                                    scaling=scaling))


def noise(db, seconds=1.0, seed=3):
    """Gaussian noise with an RMS of 0.25 * 10^(db/20), in int16 steps, as float32."""
    rng = np.random.default_rng(seed)
    x = np.clip(rng.standard_normal(int(16000 * seconds)) * 0.25 * 10 ** (db / 20), -1, 0.99996)
    return (np.round(x * 32768) / 32768).astype(np.float32)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(1, (1 << 62) - 1), min_size=1, max_size=20))
def test_log2_q24_within_the_interpolation_bound(values):
    # linear interpolation between points h apart errs by at most h^2/8 max|f''| (Burden and
    # Faires, Numerical Analysis, 3.1); log2 on [1, 2): f'' = -1/(x^2 ln 2), h = 1/256, so
    # 2.75e-6, plus the table's and the result's rounding (2^-24 each)
    v = np.array(values, np.int64)
    got = log2_q24(v, log2_table()) / 2 ** 24
    want = np.array([math.log2(x) for x in values])
    bound = (1 / 256) ** 2 / 8 / math.log(2) + 2 * 2 ** -24
    assert np.max(np.abs(got - want)) <= bound


@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(0, 1 << 62), min_size=1, max_size=20))
def test_integer_square_root_and_bit_length_are_pythons(values):
    # math.isqrt and int.bit_length (Python's exact integer functions)
    v = np.array(values, np.int64)
    assert isqrt64(v).tolist() == [math.isqrt(x) for x in values]
    pos = [x for x in values if x > 0]
    if pos:
        assert bit_length(np.array(pos, np.int64)).tolist() == [x.bit_length() for x in pos]


def test_fft_is_numpys_divided_by_n_within_a_step_per_stage():
    # numpy.fft.fft(z) / M of the N/2-point complex FFT, and numpy.fft.rfft(x) / N of the real
    # FFT built on it (even samples real, odd imaginary, one split step: Oppenheim and Schafer,
    # Discrete-Time Signal Processing, two real sequences in one complex FFT), in q30 units:
    # each stage rounds its product and its halving (half a step each), the split twice more,
    # so the error stays within log2(N) + 1 steps (Oppenheim and Schafer 9.7, fixed-point FFT
    # with scaling per stage)
    fx = FixedFrontEnd(q15_card())
    m = fx.n // 2
    rng = np.random.default_rng(1)
    zr = rng.integers(-(1 << 30), 1 << 30, size=(8, m)).astype(np.int64)
    zi = rng.integers(-(1 << 30), 1 << 30, size=(8, m)).astype(np.int64)
    got_r, got_i = fx.fft(zr, zi)
    want = np.fft.fft(zr + 1j * zi.astype(np.float64), axis=-1) / m
    assert np.max(np.abs(got_r - want.real)) <= fx.bits - 1
    assert np.max(np.abs(got_i - want.imag)) <= fx.bits - 1
    x = rng.integers(-(1 << 30), 1 << 30, size=(8, fx.n)).astype(np.int64)
    got_r, got_i = fx.rfft(x)
    want = np.fft.rfft(x.astype(np.float64), axis=-1) / fx.n
    assert got_r.shape == want.shape
    assert np.max(np.abs(got_r - want.real)) <= fx.bits + 1
    assert np.max(np.abs(got_i - want.imag)) <= fx.bits + 1


CMSIS_MFCC = {"kind": "mfcc", "mfcc": 13, "dct_norm": "uniform", "frame_length": 512,
              "frame_step": 512, "power": 1.0, "mel_triangles": "mel", "fmin": 20.0,
              "fmax": 8000.0, "log": "ln", "log_offset": 1e-6}


@pytest.mark.parametrize("db", [0, -20, -40, -60])
def test_against_cmsis_dsp_arm_mfcc_q15_and_f32(db):
    # CMSIS-DSP's conventions for its MFCC (its C source, cmsisdsp 1.10.1): frame_length =
    # fft_length, magnitude, triangles linear in mel, ln(x + 1e-6), DCT-II times sqrt(2 / M).
    # arm_mfcc_q15 takes q15 samples and q15 tables and gives q8.7 (value / 128). Ours equals
    # arm_mfcc_f32 to 1e-4 of the feature range at every level; arm_mfcc_q15 is within 0.5% of
    # it at full scale and loses precision as the level falls (it rounds the spectrum to q15
    # magnitudes and the log to q8.7): ours differs from arm_mfcc_q15 by arm_mfcc_q15's own error
    dsp = pytest.importorskip("cmsisdsp")
    import cmsisdsp.fixedpoint as fix
    import cmsisdsp.mfcc as cm
    from cmsisdsp.datatype import F32, Q15

    from monitor.features.dsp import window_coefficients

    x = noise(db)
    ours = FrontEnd(q15_card(**CMSIS_MFCC)).unscaled(x[None])[0]
    n = 512
    win = window_coefficients(n, kind="hann", dtype=np.float64)
    lq, fq, pq = cm.melFilterMatrix(Q15, 20.0, 8000.0, 40, 16000, n)
    iq = dsp.arm_mfcc_instance_q15()
    assert dsp.arm_mfcc_init_q15(iq, n, 40, 13, cm.dctMatrix(Q15, 13, 40), fq, lq, pq,
                                 fix.toQ15(win)) == 0
    lf, ff, pf = cm.melFilterMatrix(F32, 20.0, 8000.0, 40, 16000, n)
    i32 = dsp.arm_mfcc_instance_f32()
    assert dsp.arm_mfcc_init_f32(i32, n, 40, 13, cm.dctMatrix(F32, 13, 40), ff, lf, pf,
                                 win.astype(np.float32)) == 0
    pcm = np.round(x * 32768).astype(np.int16)
    frames = [pcm[t * n:(t + 1) * n] for t in range(ours.shape[0])]
    q15 = np.stack([np.asarray(dsp.arm_mfcc_q15(iq, f.copy(), np.zeros(2 * n, np.int32))[1],
                               np.float64) / 128 for f in frames])
    f32 = np.stack([dsp.arm_mfcc_f32(i32, (f / 32768).astype(np.float32),
                                     np.zeros(2 * n, np.float32)) for f in frames])
    span = float(f32.max() - f32.min())
    q15_err = np.max(np.abs(q15 - f32))
    print(f"\n{db} dB: ours against arm_mfcc_f32 {np.max(np.abs(ours - f32)) / span:.2e} of the "
          f"range, arm_mfcc_q15 against it {q15_err / span:.2%}, ours against arm_mfcc_q15 "
          f"{np.max(np.abs(ours - q15)) / span:.2%}")  # the README's figures
    assert np.max(np.abs(ours - f32)) <= 1e-4 * span
    assert np.max(np.abs(ours - q15)) <= q15_err + 1e-4 * span
    if db == 0:
        assert q15_err <= 0.005 * span
    if db <= -40:  # the headroom shift keeps quiet frames as precise as loud ones
        assert np.max(np.abs(ours - f32)) * 20 < q15_err


@pytest.mark.parametrize("db", [0, -30, -60, -80])
@pytest.mark.parametrize("kind", ["logmel", "mfcc"])
def test_quiet_rooms_keep_their_precision(db, kind):
    # the demo card's front end in q15 against the same card in float64 (the stages' own
    # float64 references, each checked against librosa / TensorFlow / CMSIS-DSP elsewhere)
    fe = {"kind": kind, **({"mfcc": 13, "dct_norm": "uniform"} if kind == "mfcc" else {})}
    card = q15_card(**fe)
    x = noise(db)[None]
    ref, _ = reference_features(card, x)
    got = FrontEnd(card).unscaled(x)
    assert np.max(np.abs(got - ref)) <= 2e-3


def test_every_path_gives_the_same_numbers():
    # whole windows, a stream of windows (fast replay, compare, vectors) and the live path's
    # FrameStream: integers, so byte for byte
    card = with_arithmetic(load_card(MODELS / "demo.toml"), "q15")
    x = noise(-20, seconds=4.0)
    hop, w = card.hop_samples, card.window_samples
    n = 1 + (len(x) - w) // hop
    wins = np.stack([x[k * hop:k * hop + w] for k in range(n)])
    fe = FrontEnd(card)
    whole = fe.batch(wins)
    assert np.array_equal(fe.batch_of_stream(wins), whole)
    assert np.array_equal(fe.batch_consecutive(x[:(n - 1) * hop + w], n), whole)
    live = FrontEnd(card).stream
    got = np.concatenate([live.features([k * hop for k in ks], [wins[k] for k in ks])
                          for ks in ([0, 1, 2], [3], [5, 6])])
    assert np.array_equal(got, whole[[0, 1, 2, 3, 5, 6]])


@pytest.mark.parametrize("model", ["demo", "demo-mfcc"])
def test_demo_models_decide_the_same_behind_the_fixed_point_front_end(model, tour):
    # the float32 chain (checked against librosa and TensorFlow elsewhere) and the same model
    # behind the q15 front end: top-1 on at least 99% of the tour's windows, float and int8
    from monitor.assembly.assemble import file_windows
    from monitor.inference.registry import load_runner

    card = load_card(MODELS / f"{model}.toml")
    fixed = with_arithmetic(card, "q15")
    w = file_windows(tour[0], card)
    xf, xq = FrontEnd(card).batch_of_stream(w), FrontEnd(fixed).batch_of_stream(w)
    assert np.max(np.abs(xq - xf)) < 0.01
    for path in (MODELS / f"{model}.tflite", MODELS / f"{model}.int8.tflite"):
        r = load_runner(path, card)
        agree = np.mean(np.argmax(r.predict(xf), 1) == np.argmax(r.predict(xq), 1))
        assert agree >= 0.99, (path.name, agree)


def test_compare_reports_the_fixed_point_front_end(tour):
    r = cli("compare", "--model", MODELS / "demo.tflite", "--model",
            MODELS / "demo.int8.tflite", "--q15", tour[0])
    assert r.returncode == 0, r.stderr
    assert "front end float32)" in r.stdout and "front end q15)" in r.stdout
    line = next(x for x in r.stdout.splitlines() if x.startswith("front ends B vs A"))
    assert 0 < float(line.split("difference ")[1].split()[0]) < 0.01


@pytest.mark.parametrize("fe,scaling,words", [
    ({"kind": "spectrogram", "mel_bands": None, "fmin": None, "fmax": None,
      "mel_scale": None, "mel_norm": None, "mel_triangles": None}, None, 'not kind = "spectrogram"'),
    ({"pcm_bits": 0}, None, "set pcm_bits = 16"),
    ({"preemphasis": 0.97}, None, "no pre-emphasis"),
    ({}, {"per_window": "standardise"}, "per-window standardisation"),
    ({"log_offset": 1e6}, None, "too large for the q15 front end"),
])
def test_cards_it_cannot_compute_are_refused_in_one_sentence(tmp_path, tour, fe, scaling,
                                                             words):
    import tomlkit

    raw = card_dict(frontend={"pcm_bits": 16, "arithmetic": "q15", **fe},
                    scaling=scaling if scaling is not None else "demo")
    path = tmp_path / "m.toml"
    path.write_text(tomlkit.dumps(raw))
    (tmp_path / "m.tflite").write_bytes((MODELS / "demo.tflite").read_bytes())
    r = cli("replay", "--model", tmp_path / "m.tflite", "--headless", "--fast", tour[0])
    assert r.returncode == 2
    assert words in r.stderr and str(path) in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and "Traceback" not in r.stderr
