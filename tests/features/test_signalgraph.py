"""The signal-operator front end (card ``arithmetic = "micro-signal"``): a graph of the
tflite-micro signal library's operators run in the microcontroller interpreter of the
``tflite-micro`` package, against an independent float64 computation of the same definition
(numpy's ``rfft`` in float64, SciPy's ``get_window``, the card's float64 mel matrix, itself
checked against librosa and TensorFlow in test_frontend.py); the operator's filter-bank
tables against ``FilterbankAccumulateChannels`` as the library's source defines it; the demo
models behind the graph; vectors; the cards it refuses.

Skipped without ``tflite-micro`` unless SCENEMON_REQUIRE_MICRO=1 (set by .ci/run).
"""

import json
import os

import numpy as np
import pytest
import tomlkit

from conftest import MODELS, card_dict, cli

if os.environ.get("SCENEMON_REQUIRE_MICRO") == "1":
    import tflite_micro  # noqa: F401 - must be installed: a missing one fails here
else:
    pytest.importorskip("tflite_micro", reason="tflite-micro not installed "
                        "(pip install 'scenemon[micro]')")

from monitor.features.card import card_from_dict, load_card, with_arithmetic  # noqa: E402
from monitor.features.dsp import mel_filterbank  # noqa: E402
from monitor.features.frontend import FrontEnd  # noqa: E402
from monitor.features.signalgraph import (  # noqa: E402
    SignalGraph,
    bank_tables,
    graph_bytes,
    power_from_graph,
)

CARDS = {  # mel conventions the graph takes (each bin feeds two neighbouring bands at most)
    "demo (HTK, triangles in mel)": {},
    "HTK, triangles in Hz": {"mel_triangles": "hz"},
    "Slaney scale and norm, triangles in Hz": {"mel_scale": "slaney", "mel_norm": "slaney",
                                               "mel_triangles": "hz"},
    "Hamming, symmetric, 64 bands, FFT 1024": {"window": "hamming", "window_symmetric": True,
                                              "mel_bands": 64, "fft_length": 1024,
                                              "frame_length": 640, "frame_step": 320},
}


def signal_card(**fe):
    return card_from_dict(card_dict(frontend={"pcm_bits": 16, "arithmetic": "micro-signal",
                                              **fe}, scaling=None))


def noise(db, frames, length, seed=5):
    """int16 Gaussian noise frames with an RMS of 0.25 * 10^(db/20) of full scale."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((frames, length)) * 0.25 * 10 ** (db / 20) * 32768
    return np.clip(np.round(x), -32768, 32767).astype(np.int16)


def reference_power(card, pcm):
    """float64 mel power of int16 frames: SciPy's window, numpy's rfft, the card's matrix."""
    from scipy.signal import get_window

    f, w, m = card.frontend.framing, card.frontend.window, card.frontend.mel
    win = get_window(w.window, f.frame_length, fftbins=not w.window_symmetric)
    mel = mel_filterbank(sample_rate=card.sample_rate, fft_length=f.fft_length,
                         mel_bands=m.mel_bands, fmin=m.fmin, fmax=m.fmax, scale=m.mel_scale,
                         norm=m.mel_norm, triangles=m.mel_triangles, dtype=np.float64)
    spec = np.abs(np.fft.rfft(pcm.astype(np.float64) / 32768 * win, f.fft_length)) ** 2
    return spec @ mel.T


def graph_of(card):
    return FrontEnd(card).signal


def test_graph_is_signal_operators_and_runs_in_a_fresh_interpreter():
    # the .tflite as the firmware gets it: read back with the flatbuffer schema of the
    # tflite-micro package, loaded in its interpreter with no custom registerer (the
    # operators are the ones its resolver registers), one frame per invoke
    from tflite_micro import runtime
    from tflite_micro.tensorflow.lite.micro.python import schema_py_generated as fb

    card = signal_card()
    g = graph_of(card)
    model = fb.ModelT.InitFromObj(fb.Model.GetRootAsModel(g.model, 0))
    names = [c.customCode.decode() if c.customCode else f"builtin {c.builtinCode}"
             for c in model.operatorCodes]
    ops = [names[op.opcodeIndex] for op in model.subgraphs[0].operators]
    assert ops == ["builtin 55", "SignalFftAutoScale", "SignalWindow", "SignalFftAutoScale", "SignalRfft",
                   "SignalEnergy", "SignalFilterBank", "SignalFilterBankSquareRoot",
                   "SignalFilterBankLog"]
    interp = runtime.Interpreter.from_bytes(g.model, arena_size=256 * 1024)
    frame = noise(-20, 1, 400)[0]
    interp.set_input(frame, 0)
    interp.invoke()
    q, s1, s2 = interp.get_output(0), interp.get_output(1), interp.get_output(2)
    assert q.dtype == np.int16 and q.shape == (40,) and s1.dtype == np.int32
    # FftAutoScale (signal/src/fft_auto_scale.cc): the most left shift that keeps the frame
    # within int16, 15 - bit length of the largest magnitude
    assert int(s1) == 15 - int(np.max(np.abs(frame.astype(np.int32)))).bit_length()
    got_q, got_s = g.run_frame(frame)
    assert np.array_equal(got_q, q) and got_s == int(s1) + int(s2)


@pytest.mark.parametrize("name", list(CARDS))
def test_filter_bank_tables_give_the_card_matrix(name):
    # FilterbankAccumulateChannels (signal/src/filter_bank.cc): range i adds weights to
    # channel i and unweights to channel i + 1; channel 0 is scratch and discarded
    card = signal_card(**CARDS[name])
    f, m = card.frontend.framing, card.frontend.mel
    mel = mel_filterbank(sample_rate=16000, fft_length=f.fft_length, mel_bands=m.mel_bands,
                         fmin=m.fmin, fmax=m.fmax, scale=m.mel_scale, norm=m.mel_norm,
                         triangles=m.mel_triangles, dtype=np.float64)
    t = bank_tables(mel=mel)
    bands, bins = mel.shape
    got = np.zeros((bands + 2, bins))
    for i in range(bands + 1):
        for j in range(t.widths[i]):
            b = t.freq_starts[i] + j
            got[i, b] += t.weights[t.weight_starts[i] + j]
            got[i + 1, b] += t.unweights[t.weight_starts[i] + j]
    # each entry is one rounded q14 value (a bin feeds a band through one table only)
    assert np.max(np.abs(got[1:bands + 1] - mel * t.gain)) <= 0.5
    assert t.weights.max() <= 2 ** 14 and t.unweights.max() <= 2 ** 14


def test_clipped_frames():
    # noise driven 6, 12 and 20 dB into clipping, -32768 in thousands of samples: the
    # graph's MAXIMUM takes -32768 to -32767 (the auto scale's MaxAbs16 cannot hold 32768);
    # against float64 of the same, the error of unclipped noise
    card = signal_card()
    g = graph_of(card)
    for db in (6, 12, 20):
        pcm = noise(db, 64, 400)
        assert np.sum(pcm == -32768) > 100
        q, s = g.run_frames(pcm)
        got = power_from_graph(q, s, frame_length=400, fft_length=512, gain=g.tables.gain)
        d = np.log(got) - np.log(reference_power(card, np.maximum(pcm, -32767)))
        assert np.max(np.abs(d)) < 0.1 and np.mean(np.abs(d)) < 0.02


@pytest.mark.parametrize("name", list(CARDS))
@pytest.mark.parametrize("db", [0, -20, -40, -60, -80])
def test_noise_against_float64(name, db):
    # white noise (RMS 0.25 of full scale times 10^(db/20)), 64 frames: the graph's mel
    # power against float64. The auto scale keeps a quiet frame's precision, so the error
    # does not grow with the level; what is left is the int16 FFT's rounding (a kiss FFT
    # that halves each stage: a bin of white noise keeps about 8 bits), most in the narrow
    # low bands of one or two bins, the integer square root and the log's 1/1024 steps.
    # Measured (2026-12-04): at most 0.070 in ln units (0.3 dB), mean 0.007 to 0.013
    card = signal_card(**CARDS[name])
    g = graph_of(card)
    pcm = noise(db, 64, card.frontend.framing.frame_length)
    q, s = g.run_frames(pcm)
    got = power_from_graph(q, s, frame_length=g.frame_length, fft_length=g.fft_length,
                           gain=g.tables.gain)
    want = reference_power(card, pcm)
    d = np.log(got) - np.log(want)
    print(f"{name}, {db} dB: max {np.max(np.abs(d)):.3g}, mean {np.mean(np.abs(d)):.3g} ln")
    assert np.all(q > 0)
    assert np.max(np.abs(d)) < 0.1
    assert np.mean(np.abs(d)) < 0.02


def test_tour_against_float64(tour):
    # the demo tour's frames: the same, split by each band's level under its frame's
    # loudest band. The int16 FFT's rounding (a bin keeps about 8 to 10 bits of a frame
    # scaled to full scale) is a floor some 40 dB under a frame's loudest band: bands near it
    # or below come out off, or zero (then the card's log_offset stands). Measured
    # (2026-12-04), in ln units: within 20 dB of the peak at most 0.050; 20 to 40 dB under,
    # 99% within 0.14 (the README's table has every range)
    from monitor.assembly.assemble import file_windows

    card = with_arithmetic(load_card(MODELS / "demo.toml"), "micro-signal")
    g = graph_of(card)
    x = file_windows(tour[0], card)
    pcm = np.round(x.reshape(-1) * 32768).astype(np.int16)
    step, n = card.frontend.framing.frame_step, card.frontend.framing.frame_length
    starts = np.arange(0, len(pcm) - n, step * 7)  # every 7th frame: a sample of the tour
    frames = pcm[starts[:, None] + np.arange(n)]
    q, s = g.run_frames(frames)
    got = power_from_graph(q, s, frame_length=g.frame_length, fft_length=g.fft_length,
                           gain=g.tables.gain)
    want = reference_power(card, frames)
    lo = want.max(axis=1) > 1e-6  # frames with sound (the tour's silences are digital zero)
    frames, q, s, got, want = frames[lo], q[lo], s[lo], got[lo], want[lo]
    under = 10 * np.log10(want.max(axis=1, keepdims=True) / np.maximum(want, 1e-300))
    for a, b in ((0, 20), (20, 40), (40, 60), (60, 200)):
        sel = (under >= a) & (under < b)
        zero = np.mean(got[sel] == 0)  # below the int16 FFT's floor: the card's log_offset
        sel &= got > 0
        d = np.abs(np.log(got[sel]) - np.log(want[sel]))
        print(f"tour, bands {a}-{b} dB under the frame's peak: {sel.sum()} values, "
              f"median {np.median(d):.3g}, 99th percentile {np.percentile(d, 99):.3g}, "
              f"max {d.max():.3g} ln; {zero:.1%} zero")
        if b == 20:
            assert d.max() < 0.1 and zero == 0
        if b == 40:
            assert np.percentile(d, 99) < 0.25 and zero < 0.01


def test_every_path_gives_the_same_numbers():
    # whole windows, a stream (fast replay, compare, vectors) and the live FrameStream: the
    # graph's integers, so byte for byte
    card = with_arithmetic(load_card(MODELS / "demo.toml"), "micro-signal")
    x = noise(-20, 1, 4 * 16000)[0].astype(np.float32) / 32768
    hop, w = card.hop_samples, card.window_samples
    n = 1 + (len(x) - w) // hop
    wins = np.stack([x[k * hop:k * hop + w] for k in range(n)])
    whole = FrontEnd(card).batch(wins)
    assert np.array_equal(FrontEnd(card).batch_of_stream(wins), whole)
    assert np.array_equal(FrontEnd(card).batch_consecutive(x[:(n - 1) * hop + w], n), whole)
    live = FrontEnd(card).stream
    got = np.concatenate([live.features([k * hop for k in ks], [wins[k] for k in ks])
                          for ks in ([0, 1, 2], [3], [5, 6])])
    assert np.array_equal(got, whole[[0, 1, 2, 3, 5, 6]])


def test_centre_padding_and_a_centred_window_against_float32():
    # librosa-style framing (center=True, the window centred in the FFT buffer) cuts the
    # frames before the graph; a window centred in the buffer changes the phase of the
    # spectrum, not its power (the DFT's shift theorem), so the graph takes the frame as is.
    # Against the same card in float32 on noise: the graph's own error (test above) only
    keys = {"center": True, "pad_mode": "reflect", "window_in_frame": "centre"}
    sig, flt = signal_card(**keys), card_from_dict(card_dict(frontend={"pcm_bits": 16, **keys},
                                                             scaling=None))
    x = noise(-30, 3, 16000).astype(np.float32) / 32768
    a, b = FrontEnd(sig).unscaled(x), FrontEnd(flt).unscaled(x)
    assert a.shape == b.shape
    assert np.max(np.abs(a - b)) < 0.1 and np.mean(np.abs(a - b)) < 0.02


@pytest.mark.parametrize("model", ["demo.tflite", "demo.int8.tflite"])
def test_demo_models_behind_the_graph(model, tour):
    # the float32 chain (checked against librosa and TensorFlow elsewhere) and the same
    # model behind the graph. Measured (2026-12-04): 474 of 475 windows agree on top-1, float
    # and int8; no threshold on it (the demo model was trained on float features, not on the
    # graph's); the unscaled features must agree at the median to 0.02 ln, which a wrong
    # constant (a factor 2 of power is 0.69) would break
    from monitor.assembly.assemble import file_windows
    from monitor.inference.registry import load_runner

    card = load_card(MODELS / model.replace(".tflite", ".toml"))
    sig = with_arithmetic(card, "micro-signal")
    w = file_windows(tour[0], card)
    uf, us = FrontEnd(card).unscaled(w), FrontEnd(sig).unscaled(w)
    assert np.median(np.abs(uf - us)) < 0.02
    r = load_runner(MODELS / model, card)
    pf, ps = r.predict(FrontEnd(card).batch_of_stream(w)), r.predict(FrontEnd(sig).batch_of_stream(w))
    agree = np.mean(np.argmax(pf, 1) == np.argmax(ps, 1))
    print(f"{model} behind the graph: top-1 {np.sum(np.argmax(pf, 1) == np.argmax(ps, 1))} "
          f"of {len(w)} ({agree:.1%}), largest probability difference {np.abs(pf - ps).max():.3g}")


def test_vectors_carry_the_graph_and_its_exact_outputs(tmp_path, tour):
    # the written graph, loaded anew in the interpreter, gives graph_q.csv from pcm.csv
    # exactly; features.csv is the front end's
    from tflite_micro import runtime

    from monitor.device.vectors import read_csv

    d = tmp_path / "m"
    d.mkdir()
    (d / "m.tflite").write_bytes((MODELS / "demo.int8.tflite").read_bytes())
    raw = tomlkit.parse((MODELS / "demo.int8.toml").read_text())
    raw["frontend"]["arithmetic"] = "micro-signal"
    (d / "m.toml").write_text(tomlkit.dumps(raw))
    out = tmp_path / "vec"
    r = cli("vectors", "--model", d / "m.tflite", "--count", "6", tour[0], "--out", out)
    assert r.returncode == 0, r.stderr
    meta = json.loads((out / "meta.json").read_text())
    sg = meta["signal_graph"]
    model = (out / sg["file"]).read_bytes()
    assert sg["graph_bytes"] == len(model)
    assert not (out / "frontend.c").exists() and "frontend_ram" not in meta["budget"]
    interp = runtime.Interpreter.from_bytes(model, arena_size=256 * 1024)
    pcm = read_csv(out / "pcm.csv", np.int16)
    q_csv, s_csv = read_csv(out / "graph_q.csv", np.int64), read_csv(out / "graph_shift.csv", np.int64)
    step, n, frames = sg["frame_step"], sg["frame_length"], sg["frames_per_window"]
    for k, window in enumerate(pcm):
        for f in range(frames):
            interp.set_input(np.ascontiguousarray(window[f * step:f * step + n]), 0)
            interp.invoke()
            assert np.array_equal(interp.get_output(0),
                                  q_csv[k, f * sg["bands"]:(f + 1) * sg["bands"]])
            assert int(interp.get_output(1)) + int(interp.get_output(2)) == s_csv[k, f]
    card = load_card(d / "m.toml")
    feats = FrontEnd(card).batch(pcm.astype(np.float32) / 32768)
    assert np.allclose(read_csv(out / "features.csv", np.float32).reshape(feats.shape), feats,
                       rtol=0, atol=1e-6)


def test_graph_of_a_matrix_the_operator_cannot_compute_is_refused():
    # a bin feeding three bands (bands narrower than a bin) has no weight / unweight form
    mel = np.zeros((3, 5))
    mel[:, 2] = [0.2, 0.5, 0.3]
    with pytest.raises(ValueError, match="not two neighbours"):
        graph_bytes(window=np.ones(8), mel=mel, fft_length=8)
    assert isinstance(SignalGraph, type)


@pytest.mark.parametrize("fe,words", [
    ({"kind": "mfcc", "mfcc": 13, "dct_norm": "ortho"}, 'not kind = "mfcc"'),
    ({"pcm_bits": 0}, "set pcm_bits = 16"),
    ({"preemphasis": 0.97}, "no pre-emphasis"),
    ({"power": 1.0}, "set power = 2"),
    ({"mel_bands": 128, "fft_length": 256, "frame_length": 256}, "cannot compute this mel matrix"),
])
def test_cards_it_cannot_compute_are_refused_in_one_sentence(tmp_path, tour, fe, words):
    raw = card_dict(frontend={"pcm_bits": 16, "arithmetic": "micro-signal", **fe})
    path = tmp_path / "m.toml"
    path.write_text(tomlkit.dumps(raw))
    (tmp_path / "m.tflite").write_bytes((MODELS / "demo.tflite").read_bytes())
    r = cli("replay", "--model", tmp_path / "m.tflite", "--headless", "--fast", tour[0])
    assert r.returncode == 2
    assert words in r.stderr and str(path) in r.stderr, r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and "Traceback" not in r.stderr


def test_budget_of_a_graph_card_counts_the_graph_and_refuses_target(tmp_path):
    # the front end of such a card is the graph (its flatbuffer is its flash), not frontend.c;
    # --target measures C front ends, so it is refused in one sentence
    import json

    card = (MODELS / "demo.int8.toml").read_text().replace(
        "[frontend]\n", '[frontend]\narithmetic = "micro-signal"\n')
    (tmp_path / "sig.toml").write_text(card)
    r = cli("budget", "--model", MODELS / "demo.int8.tflite", "--card", tmp_path / "sig.toml",
            "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert list(out["frontend_flash"]) == ["front end: the signal operators' graph"]
    assert out["frontend_flash"]["front end: the signal operators' graph"] > 0
    r = cli("budget", "--model", MODELS / "demo.int8.tflite", "--card", tmp_path / "sig.toml",
            "--target", "cortex-m4")
    assert r.returncode == 2 and "not as C" in r.stderr and "Traceback" not in r.stderr
