"""The front end against outside references (each check names its source)."""

import os
import subprocess
import sys

import numpy as np
import pytest
import scipy.fft
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st

from conftest import MODELS, ROOT, card_dict
from monitor.features.card import card_from_dict
from monitor.features.frontend import (
    FrontEnd,
    hz_to_mel,
    mel_band_edges,
    mel_filterbank,
    mel_to_hz,
    window_coefficients,
)
from monitor.features.stages import keys_of
from monitor.features.stages.mel import MelConfig

librosa = pytest.importorskip("librosa")


def make_card(**fe):
    base = {"kind": "logmel", "frame_length": 400, "frame_step": 160, "fft_length": 512,
            "mel_bands": 40, "fmin": 0.0, "fmax": 8000.0, "mel_scale": "htk",
            "mel_norm": "none", "mel_triangles": "hz", "power": 2.0, "log": "ln",
            "log_offset": 1e-6, "window": "hann", "layout": "time_mel"}
    base.update(fe)
    return card_from_dict({"classes": ["a", "b"], "audio": {"sample_rate": 16000,
                           "window_s": 1.0, "hop_s": 0.5}, "frontend": base})


# --- mel scale formulas -----------------------------------------------------------------
def test_htk_mel_formula():
    # HTK Book (Young et al.): m = 2595 log10(1 + f/700) puts 1000 Hz at about 1000 mel (the
    # formula itself gives 999.9855, so 0.02, not 0.01); the other values are the formula
    # evaluated here, and librosa.hz_to_mel(htk=True) gives the same
    assert abs(hz_to_mel(1000.0) - 1000.0) < 0.02
    for f in (500, 2000, 3000, 8000):
        m = 2595.0 * np.log10(1.0 + f / 700.0)
        assert hz_to_mel(f) == pytest.approx(m, abs=1e-9)
        assert hz_to_mel(f) == pytest.approx(librosa.hz_to_mel(f, htk=True), abs=1e-6)
    assert mel_to_hz(1000.0) == pytest.approx(700.0 * (10 ** (1000.0 / 2595.0) - 1.0), abs=1e-9)
    assert mel_to_hz(200.0) == pytest.approx(135.92888, abs=1e-4)


def test_slaney_mel_linear_below_1k():
    # Slaney 1998, Auditory Toolbox: linear at 200/3 Hz per mel below 1 kHz
    for f in (0.0, 60.0, 200.0, 500.0, 999.0):
        assert hz_to_mel(f, scale="slaney") == pytest.approx(f / (200.0 / 3.0), abs=1e-9)
    assert hz_to_mel(2000.0, scale="slaney") == pytest.approx(25.08188, abs=1e-4)
    assert mel_to_hz(30.0, scale="slaney") == pytest.approx(2804.64413, abs=1e-4)
    # agrees with librosa's implementation of the same published scale
    f = np.linspace(0, 8000, 101)
    np.testing.assert_allclose(hz_to_mel(f, scale="slaney"), librosa.hz_to_mel(f, htk=False),
                               atol=1e-9)


@pytest.mark.parametrize("scale,centres", [
    ("htk", [180.219, 406.837, 691.799, 1050.126, 1500.707, 2067.292, 2779.749, 3675.631,
             4802.165, 6218.731]),
    ("slaney", [274.216, 548.432, 822.648, 1105.053, 1466.218, 1945.422, 2581.244, 3424.871,
                4544.221, 6029.409]),
])
def test_band_centres_10_bands(scale, centres):
    # 10 bands, 0-8000 Hz: the centres librosa.mel_frequencies(12, fmax=8000, htk=...) gives
    # (its HTK and Slaney scales), listed to 3 decimals
    edges = mel_band_edges(mel_bands=10, fmin=0, fmax=8000, scale=scale)
    np.testing.assert_allclose(edges[1:-1], centres, atol=1e-3)
    ref = librosa.mel_frequencies(12, fmin=0.0, fmax=8000.0, htk=scale == "htk")[1:-1]
    np.testing.assert_allclose(edges[1:-1], ref, atol=1e-6)


# --- filterbanks against librosa and TensorFlow ------------------------------------------
COMBOS = [(0.0, 8000.0, 40, 512), (125.0, 7500.0, 32, 512), (50.0, 4000.0, 20, 1024),
          (300.0, 8000.0, 64, 1024), (0.0, 8000.0, 10, 256)]


@pytest.mark.parametrize("fmin,fmax,bands,nfft", COMBOS)
@pytest.mark.parametrize("scale", ["htk", "slaney"])
@pytest.mark.parametrize("norm", ["none", "slaney"])
def test_filterbank_matches_librosa(fmin, fmax, bands, nfft, scale, norm):
    # librosa.filters.mel draws triangles linearly in Hz at the FFT bins ("hz")
    ours = mel_filterbank(sample_rate=16000, fft_length=nfft, mel_bands=bands, fmin=fmin,
                          fmax=fmax, scale=scale, norm=norm, triangles="hz")
    ref = librosa.filters.mel(sr=16000, n_fft=nfft, n_mels=bands, fmin=fmin, fmax=fmax,
                              htk=(scale == "htk"), norm="slaney" if norm == "slaney" else None)
    np.testing.assert_allclose(ours, ref, atol=1e-6 * max(1.0, ref.max()))


@pytest.fixture(scope="module")
def tf():
    import os

    os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
    return pytest.importorskip("tensorflow")


@pytest.mark.slow
@pytest.mark.parametrize("fmin,fmax,bands,nfft", COMBOS)
def test_filterbank_matches_tensorflow(tf, fmin, fmax, bands, nfft):
    # tf.signal.linear_to_mel_weight_matrix draws triangles linearly in mel ("mel"), HTK, no norm
    ours = mel_filterbank(sample_rate=16000, fft_length=nfft, mel_bands=bands, fmin=fmin,
                          fmax=fmax, scale="htk", triangles="mel")
    ref = tf.signal.linear_to_mel_weight_matrix(bands, nfft // 2 + 1, 16000, fmin, fmax).numpy()
    np.testing.assert_allclose(ours.T, ref, atol=2e-5)


def test_triangle_constructions_differ():
    # HTK, 16 kHz, 512 FFT, 10 bands: triangles linear in Hz (librosa.filters.mel) and linear
    # in mel (tf.signal.linear_to_mel_weight_matrix) differ by up to 0.0286 in a weight
    # (measured with both libraries when this test was written)
    a = mel_filterbank(sample_rate=16000, fft_length=512, mel_bands=10, fmin=0, fmax=8000,
                       triangles="hz")
    b = mel_filterbank(sample_rate=16000, fft_length=512, mel_bands=10, fmin=0, fmax=8000,
                       triangles="mel")
    assert abs(a - b).max() == pytest.approx(0.0286, abs=5e-4)


def test_sparse_layout_of_tf_style_bank():
    # first non-zero bins and lengths of tf.signal.linear_to_mel_weight_matrix(10, 257, 16000,
    # 0, 8000), as read off TensorFlow's matrix when this test was written (the TensorFlow
    # comparison below checks the whole bank)
    w = mel_filterbank(sample_rate=16000, fft_length=512, mel_bands=10, fmin=0, fmax=8000,
                       triangles="mel")
    nz = [np.flatnonzero(row) for row in w]
    assert [int(r[0]) for r in nz] == [1, 6, 14, 23, 34, 49, 67, 89, 118, 154]
    assert [int(r[-1] - r[0] + 1) for r in nz] == [13, 17, 20, 26, 33, 40, 51, 65, 81, 102]


# --- log-mel end to end ------------------------------------------------------------------
def _noise(seed=0, n=16000):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(n) * 0.1
    x += 0.3 * np.sin(2 * np.pi * 440 * np.arange(n) / 16000)
    return x.astype(np.float32)


def _half_quiet(seed=0):
    """`_noise` with its second half 100 dB down (x 1e-5): near-silence, so a window's dB
    values span more than 100 dB and a top_db of 80 really floors some of them."""
    x = _noise(seed)
    x[x.size // 2:] *= np.float32(1e-5)
    return x


@pytest.mark.parametrize("scale", ["htk", "slaney"])
@pytest.mark.parametrize("norm", ["none", "slaney"])
@pytest.mark.parametrize("fmin,fmax,bands,nfft", COMBOS[:3])
def test_logmel_matches_librosa(scale, norm, fmin, fmax, bands, nfft):
    # librosa.stft (periodic Hann, no centring) + librosa.filters.mel in float64. librosa
    # centres a 400-sample window inside each 512-sample frame; padding the signal by the
    # same offset lines the frames up (the magnitude spectrum ignores the zero-pad position).
    card = make_card(mel_scale=scale, mel_norm=norm, fmin=fmin, fmax=fmax, mel_bands=bands,
                     fft_length=nfft)
    x = _noise()
    ours = FrontEnd(card).logmel(x[None, :])[0]
    off = (nfft - 400) // 2
    xp = np.pad(x.astype(np.float64), (off, nfft - 400 - off))
    S = np.abs(librosa.stft(xp, n_fft=nfft, hop_length=160, win_length=400, window="hann",
                            center=False)) ** 2
    mel = librosa.filters.mel(sr=16000, n_fft=nfft, n_mels=bands, fmin=fmin, fmax=fmax,
                              htk=(scale == "htk"), norm="slaney" if norm == "slaney" else None,
                              dtype=np.float64)
    ref = np.log(mel @ S + 1e-6).T
    assert ours.shape == ref.shape == (98, bands)
    assert np.max(np.abs(ours - ref)) <= 1e-4


@pytest.mark.slow
def test_logmel_matches_tensorflow(tf):
    # tf.signal.stft(400, 160, 512) + linear_to_mel_weight_matrix: the "mel" construction
    card = make_card(mel_triangles="mel", fmin=20.0, fmax=7600.0)
    x = _noise(3)
    ours = FrontEnd(card).logmel(x[None, :])[0]
    S = tf.abs(tf.signal.stft(x, 400, 160, 512)) ** 2
    W = tf.signal.linear_to_mel_weight_matrix(40, 257, 16000, 20.0, 7600.0)
    ref = tf.math.log(tf.matmul(S, W) + 1e-6).numpy()
    assert ours.shape == ref.shape == (98, 40)  # tf.signal.stft(400, 160) of 1 s: 98 frames
    assert np.max(np.abs(ours - ref)) <= 1e-4


def test_frames_per_window():
    # 1 + (16000 - 400) // 160 = 98 frames, as tf.signal.stft(400, 160, 512) without pad_end
    assert make_card().frames_per_window == 98


def test_batch_equals_single(demo_card):
    fe = FrontEnd(demo_card)
    rng = np.random.default_rng(5)
    w = (rng.standard_normal((7, 16000)) * 0.2).astype(np.float32)
    b = fe.batch(w)
    for i in range(7):
        np.testing.assert_array_equal(b[i], fe.single(w[i]))


@pytest.mark.parametrize("layout", ["time_mel", "mel_time"])
def test_standardisation_matches_sklearn(layout):
    # sklearn.preprocessing.StandardScaler fitted on the same features, per mel band
    from sklearn.preprocessing import StandardScaler

    card0 = make_card(layout="time_mel")
    fe0 = FrontEnd(card0)
    x = np.stack([_noise(s) for s in range(4)])
    feats = fe0.logmel(x).reshape(-1, 40)
    sc = StandardScaler().fit(feats)
    card = card_from_dict(card_dict(frontend={**card0.frontend.settings(), "layout": layout},
                                    scaling={"mean": sc.mean_.tolist(),
                                             "std": np.sqrt(sc.var_).tolist()}))
    ours = FrontEnd(card).batch(x)
    ref = sc.transform(feats).reshape(4, 98, 40)
    if layout == "mel_time":
        ref = np.swapaxes(ref, 1, 2)
    np.testing.assert_allclose(ours, ref, atol=2e-4)


def test_tone_lands_in_nearest_band():
    # a 1 kHz tone peaks in the band whose centre is nearest 1 kHz (common practice)
    card = make_card()
    t = np.arange(16000) / 16000
    x = (0.5 * np.sin(2 * np.pi * 1000 * t)).astype(np.float32)
    lm = FrontEnd(card).logmel(x[None])[0].mean(axis=0)
    centres = mel_band_edges(mel_bands=40, fmin=0, fmax=8000)[1:-1]
    assert int(np.argmax(lm)) == int(np.argmin(np.abs(centres - 1000)))


def test_silence_is_flat_at_the_offset():
    # silence: every band reads ln(log_offset)
    lm = FrontEnd(make_card()).logmel(np.zeros((1, 16000), np.float32))
    np.testing.assert_allclose(lm, np.log(np.float32(1e-6)), rtol=1e-6)


# --- windows ------------------------------------------------------------------------------
def test_periodic_hann_matches_scipy_and_harris():
    # scipy.signal.get_window('hann', N) is periodic; Harris 1978 values for N = 8
    for n in (8, 400, 512):
        np.testing.assert_allclose(window_coefficients(n), scipy.signal.get_window("hann", n),
                                   atol=1e-7)
    np.testing.assert_allclose(window_coefficients(8),
                               [0, .146447, .5, .853553, 1, .853553, .5, .146447], atol=1e-6)
    np.testing.assert_allclose(window_coefficients(8, symmetric=True), np.hanning(8), atol=1e-7)
    w = window_coefficients(512).astype(np.float64)
    # Harris 1978: the periodic Hann window of N points sums to N/2 (coherent gain 0.5), its
    # squares to 3N/8, so its equivalent noise bandwidth is 1.5 bins
    assert w.sum() == pytest.approx(256.0, abs=1e-3)
    assert (w ** 2).sum() == pytest.approx(192.0, abs=1e-3)
    assert 512 * (w ** 2).sum() / w.sum() ** 2 == pytest.approx(1.5, abs=1e-5)  # ENBW, bins


def test_hamming_matches_scipy():
    np.testing.assert_allclose(window_coefficients(400, kind="hamming"),
                               scipy.signal.get_window("hamming", 400), atol=1e-7)


def test_pcm16_quantises_like_the_device():
    # pcm_bits = 16 promises the device's microphone path (the README's card): int16 samples
    # read as q / 32768, float input rounded to them as monitor/device/frontend.c's
    # sm_pcm_f32 does: x * 32768 rounded half to even, saturated to [-32768, 32767].
    # The reference: Python's built-in round(), which rounds halves to the even neighbour
    # (Python language reference, "round"), on the exact product (a float32 times 2^15 is
    # exact in float64), clipped to numpy.iinfo(numpy.int16)'s limits.
    stage = FrontEnd(make_card(pcm_bits=16)).stages[0]
    halves = np.array([k + 0.5 for k in (-1001, -1000, -3, -2, -1, 0, 1, 2, 3, 1000, 1001,
                                         32766)]) / 32768
    edges = [1.0, 32767.4 / 32768, 32767.5 / 32768, 1.5, -1.0, -32768.5 / 32768, -1.7, 0.0]
    rng = np.random.default_rng(11)
    x = np.concatenate([halves, edges, rng.uniform(-1, 1, 4000), [0.3 + 1e-7]]).astype(np.float32)
    lo, hi = int(np.iinfo(np.int16).min), int(np.iinfo(np.int16).max)
    want = np.array([max(lo, min(hi, round(float(v) * 32768))) for v in x]) / 32768
    got = stage.run(x[None])[0]
    assert got.dtype == np.float32
    np.testing.assert_array_equal(got.astype(np.float64), want)
    # the rule at the halves: 0.5 -> 0, 1.5 -> 2, 2.5 -> 2, -0.5 -> 0, -1.5 -> -2 (steps)
    assert [int(v) for v in got[:12] * 32768] == [-1000, -1000, -2, -2, 0, 0, 2, 2, 4, 1000,
                                                  1002, 32766]
    # libsndfile (soundfile's PCM_16 write, libsndfile 1.2.2 as measured when this test was
    # written) rounds toward minus infinity, not to the nearest step: -0.9 gives -29492 there,
    # -29491 here, so it differs from the device's rule at every product that is not a whole
    # step, not only at the halves. What it shares with the device, and is checked here: the
    # step is 1/32768, so every int16 value k written as k / 32768 reads back as k and the
    # quantisation leaves it unchanged
    import io

    import soundfile as sf

    k = np.arange(-32768, 32768, 3)
    steps = (k / 32768).astype(np.float32)
    buf = io.BytesIO()
    sf.write(buf, steps, 16000, subtype="PCM_16", format="WAV")
    buf.seek(0)
    np.testing.assert_array_equal(sf.read(buf, dtype="int16")[0], k)
    np.testing.assert_array_equal(stage.run(steps[None])[0] * 32768, k)
    # and the features of the float input are those of the int16 samples the device's
    # microphone path delivers (read as q / 32768, no further quantisation)
    y = (rng.standard_normal(16000) * 0.2).astype(np.float32)
    q = np.array([max(lo, min(hi, round(float(v) * 32768))) for v in y]) / 32768
    np.testing.assert_array_equal(FrontEnd(make_card(pcm_bits=16)).batch(y[None]),
                                  FrontEnd(make_card(pcm_bits=0)).batch(
                                      q.astype(np.float32)[None]))


@pytest.mark.parametrize("n", [2, 5, 33])
def test_consecutive_batch_equals_single(demo_card, n):
    # fast replay shares frames between overlapping windows; the numbers must not change
    fe = FrontEnd(demo_card)
    hop, win = demo_card.hop_samples, demo_card.window_samples
    x = (np.random.default_rng(n).standard_normal((n - 1) * hop + win) * 0.2).astype(np.float32)
    b = fe.batch_consecutive(x, n)
    for i in range(n):
        np.testing.assert_array_equal(b[i], fe.single(x[i * hop:i * hop + win]))


# --- the stages against outside references (issue 12) ------------------------------------
def fe_card(**fe):
    """The demo card's [frontend] with float input and the given keys (no scaling)."""
    return card_from_dict(card_dict(frontend={"pcm_bits": 0, **fe}, scaling=None))


LIBROSA_DB = {"log": "db", "log_offset": 0.0, "log_floor": 1e-10, "top_db": 80.0,
              "mel_triangles": "hz", "mel_scale": "slaney", "mel_norm": "slaney"}


@pytest.mark.parametrize("center,pad_mode", [(True, "constant"), (True, "reflect"),
                                             (False, None)])
@pytest.mark.parametrize("ref", ["one", "max"])
def test_librosa_melspectrogram_power_to_db(center, pad_mode, ref):
    # librosa.feature.melspectrogram (0.10 / 0.11; n_fft 512, win_length 400 < n_fft, so the
    # window sits centred in each 512-sample frame: window_in_frame "centre") + power_to_db
    # with amin 1e-10 (log_floor), ref 1.0 or np.max (db_ref), top_db 80; center=True pads
    # n_fft // 2 with pad_mode (constant, reflect): 101 frames, else 97 (librosa's counts).
    # A window half near-silence: its dB values span more than 80 dB, so top_db floors some
    fe = {**LIBROSA_DB, "center": center, "window_in_frame": "centre", "db_ref": ref}
    if pad_mode:
        fe["pad_mode"] = pad_mode
    x = _half_quiet()
    ours = FrontEnd(fe_card(**fe)).unscaled(x[None])[0]
    S = librosa.feature.melspectrogram(y=x.astype(np.float64), sr=16000, n_fft=512,
                                       hop_length=160, win_length=400, window="hann",
                                       center=center, pad_mode=pad_mode or "constant", n_mels=40,
                                       fmin=0.0, fmax=8000.0, htk=False, norm="slaney")
    db = dict(ref=np.max if ref == "max" else 1.0, amin=1e-10)
    want = librosa.power_to_db(S, **db, top_db=80.0).T
    # librosa.power_to_db's top_db floor changes its output here (by tens of dB), so the
    # comparison below fails if ours did not floor
    unfloored = librosa.power_to_db(S, **db, top_db=None).T
    assert np.max(np.abs(want - unfloored)) > 10.0
    assert ours.shape == want.shape == ((101 if center else 97), 40)
    assert np.max(np.abs(ours - want)) <= 1e-4  # dB


@pytest.mark.parametrize("window_in_frame,frames", [("centre", 97), ("start", 98)])
def test_librosa_win_length_below_n_fft_without_centring(window_in_frame, frames):
    # librosa.stft(center=False, n_fft=512, win_length=400) frames 512 samples (97 frames of
    # a second) with the window in the middle; "start" frames 400 samples (98, TensorFlow's
    # count): the same spectra where the frames coincide, one frame step of 56 samples apart
    x = _noise(4)
    fe = {**LIBROSA_DB, "top_db": 0.0, "window_in_frame": window_in_frame}
    ours = FrontEnd(fe_card(**fe)).unscaled(x[None])[0]
    assert ours.shape == (frames, 40)
    S = librosa.feature.melspectrogram(y=x.astype(np.float64), sr=16000, n_fft=512,
                                       hop_length=160, win_length=400, center=False, n_mels=40,
                                       fmax=8000.0, htk=False, norm="slaney")
    want = librosa.power_to_db(S, amin=1e-10, top_db=None).T
    if window_in_frame == "centre":
        np.testing.assert_allclose(ours, want, atol=1e-4)
    else:  # librosa's frame t windows samples 56 .. 456 of its 512: our frame t, 56 later
        shifted = FrontEnd(fe_card(**fe)).unscaled(np.pad(x[56:], (0, 56))[None])[0]
        np.testing.assert_allclose(shifted[:97], want, atol=1e-4)


@pytest.mark.parametrize("n_mfcc", [13, 20])
@pytest.mark.parametrize("lifter", [0, 22])
def test_librosa_mfcc(n_mfcc, lifter):
    # librosa.feature.mfcc 0.11 defaults: power_to_db(ref 1, amin 1e-10, top_db 80) of the
    # Slaney-normalised mel spectrogram, DCT-II norm "ortho", the lifter 1 + (L/2) sin(pi n / L).
    # A window half near-silence, so librosa's top_db of 80 floors some log-mel values
    fe = {**LIBROSA_DB, "kind": "mfcc", "mfcc": n_mfcc, "dct_norm": "ortho",
          "lifter": float(lifter), "center": True, "pad_mode": "constant",
          "window_in_frame": "centre"}
    x = _half_quiet(5)
    ours = FrontEnd(fe_card(**fe)).unscaled(x[None])[0]
    mel = dict(sr=16000, n_fft=512, hop_length=160, win_length=400, n_mels=40, fmax=8000.0)
    want = librosa.feature.mfcc(y=x.astype(np.float64), n_mfcc=n_mfcc, lifter=lifter, **mel).T
    # the same with librosa's floor switched off (librosa.feature.mfcc given S =
    # power_to_db(melspectrogram, top_db=None)) differs: the floor applies in this window
    S = librosa.feature.melspectrogram(y=x.astype(np.float64), **mel)
    unfloored = librosa.feature.mfcc(S=librosa.power_to_db(S, top_db=None), n_mfcc=n_mfcc,
                                     lifter=lifter).T
    assert np.max(np.abs(want - unfloored)) > 10.0
    assert ours.shape == want.shape == (101, n_mfcc)
    assert np.max(np.abs(ours - want)) <= 2e-4 * max(1.0, np.abs(want).max())


@pytest.mark.slow
def test_tensorflow_mfccs_from_log_mel_spectrograms(tf):
    # tf.signal.stft(400, 160, 512) (periodic Hann, no padding: "start"), |X|^2,
    # linear_to_mel_weight_matrix (triangles linear in mel), log(x + 1e-6),
    # mfccs_from_log_mel_spectrograms (DCT-II times rsqrt(2 M): "uniform")
    c = fe_card(kind="mfcc", mfcc=13, dct_norm="uniform", mel_triangles="mel", fmin=20.0,
                fmax=7600.0)
    x = _noise(6)
    ours = FrontEnd(c).unscaled(x[None])[0]
    S = tf.abs(tf.signal.stft(x, 400, 160, 512)) ** 2
    W = tf.signal.linear_to_mel_weight_matrix(40, 257, 16000, 20.0, 7600.0)
    log_mel = tf.math.log(tf.matmul(S, W) + 1e-6)
    want = tf.signal.mfccs_from_log_mel_spectrograms(log_mel)[..., :13].numpy()
    assert ours.shape == want.shape == (98, 13)
    assert np.max(np.abs(ours - want)) <= 1e-4


@pytest.mark.parametrize("window", ["hann", "hamming"])
@pytest.mark.parametrize("fmin,fmax", [(20.0, 4000.0), (0.0, 8000.0)])
def test_cmsis_dsp_arm_mfcc_f32_frame_by_frame(window, fmin, fmax):
    # CMSIS-DSP's own Python package (cmsisdsp 1.10.1, the library the firmware links):
    # arm_mfcc_f32 with its melFilterMatrix and dctMatrix and our window, frame by frame.
    # Its conventions (its C source): frame_length = fft_length, magnitude, triangles linear in
    # mel, ln(x + 1e-6), DCT-II times sqrt(2 / M) on every row ("uniform"). Noise-like frames:
    # where bands fall 1e5 below the peak its float32 FFT floor dominates (common practice)
    dsp = pytest.importorskip("cmsisdsp")
    import cmsisdsp.mfcc as cm
    from cmsisdsp.datatype import F32

    c = fe_card(kind="mfcc", mfcc=13, dct_norm="uniform", frame_length=512, power=1.0,
                mel_triangles="mel", fmin=fmin, fmax=fmax, window=window)
    x = (np.random.default_rng(7).standard_normal(16000) * 0.1).astype(np.float32)
    ours = FrontEnd(c).unscaled(x[None])[0]
    lengths, firsts, packed = cm.melFilterMatrix(F32, fmin, fmax, 40, 16000, 512)
    dct = cm.dctMatrix(F32, 13, 40)
    win = window_coefficients(512, kind=window)
    inst = dsp.arm_mfcc_instance_f32()
    assert dsp.arm_mfcc_init_f32(inst, 512, 40, 13, dct, firsts, lengths, packed, win) == 0
    tmp = np.zeros(2 * 512, np.float32)  # 2N floats: arm_cmplx_mag_f32 reads 2N
    want = np.stack([dsp.arm_mfcc_f32(inst, x[t * 160:t * 160 + 512], tmp)
                     for t in range(ours.shape[0])])
    np.testing.assert_allclose(ours, want, atol=1e-4)
    # and its tables are ours: the DCT rows, the mel weights (its 1127 ln(1 + f/700) scale)
    from monitor.features.dsp import dct_matrix

    np.testing.assert_allclose(dct_matrix(13, 40, norm="uniform"),
                               np.asarray(dct).reshape(13, 40), atol=1e-7)
    dense = np.zeros((40, 257))
    o = 0
    for i, (p, n) in enumerate(zip(firsts, lengths)):
        dense[i, p:p + n] = packed[o:o + n]
        o += n
    bank = mel_filterbank(sample_rate=16000, fft_length=512, mel_bands=40, fmin=fmin, fmax=fmax,
                          triangles="mel")
    bank[:, -1] = 0.0  # CMSIS-DSP never weights the Nyquist bin (zero here anyway at fmax)
    np.testing.assert_allclose(bank, dense, atol=1e-6)


@pytest.mark.parametrize("m,k", [(40, 13), (40, 40), (26, 20)])
def test_dct_matrix_against_scipy(m, k):
    # scipy.fft.dct(type=2, norm="ortho") is "ortho"; scipy.fft.dct(type=2) / sqrt(2 M) is
    # "uniform" (TensorFlow's mfccs_from_log_mel_spectrograms); the lifter as librosa.feature.mfcc
    from monitor.features.dsp import dct_matrix

    eye = np.eye(m)
    ortho = scipy.fft.dct(eye, type=2, norm="ortho", axis=0)[:k]
    np.testing.assert_allclose(dct_matrix(k, m, norm="ortho", dtype=np.float64), ortho,
                               atol=1e-12)
    uniform = scipy.fft.dct(eye, type=2, axis=0)[:k] / np.sqrt(2 * m)
    np.testing.assert_allclose(dct_matrix(k, m, norm="uniform", dtype=np.float64), uniform,
                               atol=1e-12)
    lift = 1 + (22 / 2) * np.sin(np.pi * np.arange(1, k + 1) / 22)
    np.testing.assert_allclose(dct_matrix(k, m, norm="ortho", lifter=22, dtype=np.float64),
                               ortho * lift[:, None], atol=1e-10)


def test_silence_mfcc_uniform_c0():
    # silence: every log-mel band reads ln(1e-6), so with "uniform" c0 = sqrt(2 / M) M ln(1e-6)
    # = -123.5697 for M = 40 (as CMSIS-DSP gives) and the other coefficients 0
    c = fe_card(kind="mfcc", mfcc=13, dct_norm="uniform")
    out = FrontEnd(c).unscaled(np.zeros((1, 16000), np.float32))[0]
    np.testing.assert_allclose(out[:, 0], np.sqrt(2 / 40) * 40 * np.log(1e-6), atol=1e-3)
    np.testing.assert_allclose(out[:, 1:], 0.0, atol=1e-4)


# --- every kind and option: float32 against the float64 reference ---------------------------
NO_MEL = {name: None for name in keys_of(MelConfig)}  # a spectrogram card carries no mel keys
OPTIONS = {
    "demo": {},
    "pre-emphasis": {"preemphasis": 0.97},
    "centre constant": {"center": True, "pad_mode": "constant"},
    "centre reflect, window centred": {"center": True, "pad_mode": "reflect",
                                       "window_in_frame": "centre"},
    # top_db 30: the test signal's dB values span about 42-45 dB a window, so 30 floors some
    "dB, ref max, top_db": {"log": "db", "db_ref": "max", "top_db": 30.0},
    "log10, floor, no offset": {"log": "log10", "log_offset": 0.0, "log_floor": 1e-8},
    "magnitude, hamming symmetric": {"power": 1.0, "window": "hamming",
                                     "window_symmetric": True},
    "mfcc ortho lifter": {"kind": "mfcc", "mfcc": 20, "dct_norm": "ortho", "lifter": 22.0},
    "mfcc uniform mel_time": {"kind": "mfcc", "mfcc": 13, "dct_norm": "uniform",
                              "layout": "mel_time"},
    "mfcc flat": {"kind": "mfcc", "mfcc": 13, "dct_norm": "ortho", "layout": "flat"},
    "spectrogram": {"kind": "spectrogram", **NO_MEL},
    "waveform": {"kind": "waveform"},
}


def option_card(name, per_window=False):
    fe = dict(OPTIONS[name])
    raw = card_dict(frontend=fe, scaling={"mean": 0.25, "std": 1.5,
                                          **({"per_window": "standardise"} if per_window
                                             else {})})
    if fe.get("kind") == "waveform":
        raw["frontend"] = {"kind": "waveform", "pcm_bits": 16, "preemphasis": 0.5}
    return card_from_dict(raw)


@pytest.mark.parametrize("name", list(OPTIONS))
@pytest.mark.parametrize("per_window", [False, True])
def test_float32_against_the_float64_reference(name, per_window):
    # each stage's float32 run against its own float64 reference (built separately: the
    # literal semantics of the card, scipy's DCT): within 1e-4 of the features' range
    from monitor.features.frontend import reference_features

    card = option_card(name, per_window)
    w = np.stack([_noise(s) for s in range(3)])
    fe = FrontEnd(card)
    ref_unscaled, ref = reference_features(card, w)
    ours = fe.batch(w)
    assert ours.shape == ref.shape == (3, *card.feature_shape)
    span = float(ref.max() - ref.min())
    assert np.max(np.abs(ours - ref)) <= 1e-4 * span
    unscaled = fe.unscaled(w)
    np.testing.assert_allclose(unscaled, ref_unscaled,
                               atol=1e-4 * float(np.ptp(ref_unscaled)))
    log = card.frontend.log
    if log is not None and log.top_db > 0:
        # the floor applies: in every window, both ways, some values sit at max - top_db
        for got in (unscaled.astype(np.float64), ref_unscaled):
            floor = got.max(axis=(1, 2), keepdims=True) - log.top_db
            at_floor = np.isclose(got, floor, rtol=0, atol=1e-3).mean(axis=(1, 2))
            assert np.all(at_floor > 0.01), at_floor


# --- streaming frames: computed once, the same numbers byte for byte ---------------------
@pytest.mark.parametrize("name", list(OPTIONS))
def test_stream_and_consecutive_equal_whole_windows(tour, name):
    # windows one at a time as the live engine gets them, in runs as fast replay gets them,
    # and after gaps: byte-identical to computing each window whole
    import soundfile as sf

    card = option_card(name)
    x, _ = sf.read(str(tour[0]), dtype="float32", frames=16000 * 40)
    hop, win = card.hop_samples, card.window_samples
    n = 1 + (x.size - win) // hop
    starts = [i * hop for i in range(n)]
    wins = [x[s:s + win] for s in starts]
    fe = FrontEnd(card)
    whole = fe.batch(np.stack(wins))
    live = np.concatenate([fe.stream.features([s], [w]) for s, w in zip(starts, wins)])
    np.testing.assert_array_equal(live, whole)
    np.testing.assert_array_equal(fe.batch_consecutive(x[:(n - 1) * hop + win], n), whole)
    np.testing.assert_array_equal(fe.batch_of_stream(np.stack(wins)), whole)  # compare, vectors
    fe.stream.reset()
    keep = [i for i in range(n) if i % 7 not in (3, 4)]  # gaps, and runs of several windows
    runs = [keep[:10], keep[10:11], keep[11:30], keep[30:]]
    got = np.concatenate([fe.stream.features([starts[i] for i in r], [wins[i] for i in r])
                          for r in runs])
    np.testing.assert_array_equal(got, whole[keep])


def test_stream_computes_only_the_new_frames(monkeypatch, demo_card):
    # the demo card: 98 frames a window, 50 new ones a hop (0.5 s / 10 ms); the others come
    # from the window before
    from monitor.features.stages import spectrum as stages

    counted = []
    run = stages.SpectrumStage.run
    monkeypatch.setattr(stages.SpectrumStage, "run",
                        lambda self, x: counted.append(int(np.prod(x.shape[:-1]))) or run(self, x))
    fe = FrontEnd(demo_card)
    x = _noise(9, 16000 * 3)
    for i in range(5):
        fe.stream.features([i * 8000], [x[i * 8000:i * 8000 + 16000]])
    assert counted == [98, 50, 50, 50, 50]
    counted.clear()
    fe = FrontEnd(option_card("centre reflect, window centred"))  # 2 + 2 edge frames per window
    for i in range(3):
        fe.stream.features([i * 8000], [x[i * 8000:i * 8000 + 16000]])
    lo, hi = fe.framing.shared
    assert (lo, hi, fe.framing.frames) == (2, 98, 101)
    assert counted == [97, 4, 50, 4, 50, 4]  # per window: shared frames (all, then new), edges


def test_stream_weights_each_frame_once(monkeypatch, demo_card):
    # the mel weighting (one GEMM per block of a hop's 50 frames, laid from the window's end)
    # runs on the new frames only: the first window's 98 frames are a short block (48 frames
    # padded to 50) and a whole one, then each hop's 50 new frames are one block
    from monitor.features.stages import base

    rows = []
    real = np.matmul

    def counting(a, b, *args, **kw):
        if b.shape == (257, 40):
            rows.append(int(np.prod(a.shape[:-1])))
        return real(a, b, *args, **kw)

    monkeypatch.setattr(base.np, "matmul", counting)
    fe = FrontEnd(demo_card)
    x = _noise(9, 16000 * 3)
    for i in range(5):
        fe.stream.features([i * 8000], [x[i * 8000:i * 8000 + 16000]])
    assert rows == [50, 50, 50, 50, 50, 50]
    rows.clear()
    fe.batch_consecutive(x[: 4 * 8000 + 16000], 5)  # fast replay: 298 frames, each once
    assert rows == [50, 250]  # the short first block (48 frames), then five whole ones


@settings(max_examples=40, deadline=None, derandomize=True)
@given(rows=st.integers(1, 130), block=st.integers(1, 60), place=st.integers(-200, 200),
       seed=st.integers(0, 2**16))
def test_blocked_product_rounds_each_row_by_its_place_alone(rows, block, place, seed):
    # A row's result is the row's own product in a GEMM of `block` rows at its place: the
    # same bytes as that row computed alone in such a block (numpy.matmul through OpenBLAS,
    # whose rounding depends on the matrix size and the row's place), and within float32
    # rounding of the float64 product
    from monitor.features.stages.base import blocked_product

    rng = np.random.default_rng(seed)
    x = (rng.standard_normal((rows, 257)) ** 2).astype(np.float32)
    m = rng.uniform(0, 1, (257, 40)).astype(np.float32)
    y = blocked_product(x, m, block, place)
    assert y.shape == (rows, 40)
    j = int(rng.integers(rows))
    alone = np.zeros((block, 257), np.float32)
    at = (place + j) % block
    alone[at] = x[j]
    np.testing.assert_array_equal(y[j], np.matmul(alone, m)[at])
    np.testing.assert_allclose(y, x.astype(np.float64) @ m.astype(np.float64), rtol=1e-5)


def test_features_do_not_depend_on_what_the_program_imported_first(tour, tmp_path):
    """A program that imports numpy before scenemon (a notebook, this test suite) gets the
    very features the command line gets: the BLAS library runs one thread either way (with
    two, OpenBLAS splits the mel product differently and the last bits change)."""
    code = """if 1:
        import sys
        if sys.argv[1] == "numpy-first":
            import numpy
        else:
            import monitor
        import numpy as np, soundfile as sf
        from monitor.features.card import load_card
        from monitor.features.frontend import FrontEnd
        x = sf.read(sys.argv[2], dtype="float32")[0][: 16000 * 20]
        fe = FrontEnd(load_card(sys.argv[3]))
        np.save(sys.argv[4], fe.batch_consecutive(x[: 37 * 8000 + 16000], 38))
    """
    outs = []
    for order in ("scenemon-first", "numpy-first"):
        out = tmp_path / f"{order}.npy"
        env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
        r = subprocess.run([sys.executable, "-c", code, order, str(tour[0]),
                            str(MODELS / "demo.toml"), str(out)], cwd=ROOT, env=env,
                           capture_output=True, text=True)
        assert r.returncode == 0, r.stderr
        outs.append(np.load(out))
    assert outs[0].tobytes() == outs[1].tobytes()
