"""Keras models that carry their own preprocessing: a Normalization layer over unscaled
features, and Keras 3's MelSpectrogram layer over the raw waveform. The card says what the
model takes (kind = "waveform": the window's samples; no [scaling]: features as they are)
and scenemon's probabilities are the model's own `predict` on the same windows."""

import json

import numpy as np
import pytest
import soundfile as sf

from conftest import cli

keras = pytest.importorskip("keras")
pytestmark = pytest.mark.slow

WAVEFORM_CARD = """classes = ["quiet_room", "voices", "traffic", "machinery"]

[audio]
sample_rate = 16000
window_s = 1.0
hop_s = 0.5

[frontend]
kind = "waveform"
"""


@pytest.fixture(scope="module")
def piece(tour, tmp_path_factory):
    d = tmp_path_factory.mktemp("inside")
    x, _ = sf.read(str(tour[0]), dtype="float32")
    sf.write(str(d / "walk.wav"), x[: 40 * 16000], 16000, subtype="PCM_16")
    x, _ = sf.read(str(d / "walk.wav"), dtype="float32")
    n = 1 + (x.size - 16000) // 8000
    return d, np.stack([x[k * 8000:k * 8000 + 16000] for k in range(n)])


def replay(d, model, card):
    (d / "m.toml").write_text(card)
    r = cli("replay", d / "walk.wav", "--model", d / model, "--card", d / "m.toml", "--fast",
            "--headless", "--out", d / f"s-{model}")
    assert r.returncode == 0, r.stderr
    return np.array([json.loads(x)["probs"] for x in
                     (d / f"s-{model}" / "windows.jsonl").read_text().splitlines()])


def test_a_mel_spectrogram_layer_on_the_waveform(piece):
    d, windows = piece
    keras.utils.set_random_seed(0)
    model = keras.Sequential([
        keras.Input((16000,)),
        keras.layers.MelSpectrogram(fft_length=512, sequence_stride=160, sequence_length=400,
                                    num_mel_bins=40, sampling_rate=16000),
        keras.layers.Normalization(axis=None, mean=-20.0, variance=100.0),
        keras.layers.GlobalAveragePooling1D(), keras.layers.Dense(4, activation="softmax")])
    model.compile(loss="sparse_categorical_crossentropy")
    model.save(d / "wave.keras")
    own = model.predict(windows, verbose=0, batch_size=1)  # the model.s own numbers, one by one
    batched = model.predict(windows, verbose=0)
    print("batch 1 against 32:", np.max(np.abs(own - batched)))
    probs = replay(d, "wave.keras", WAVEFORM_CARD)
    assert probs.shape == own.shape
    assert np.max(np.abs(probs - own)) <= 1e-4


def test_a_normalization_layer_over_unscaled_features(piece):
    # the card has no [scaling]: the features go in as the front end makes them, and the
    # model's own Normalization layer (adapted on them) scales them
    from monitor.features.card import load_card
    from monitor.features.frontend import FrontEnd

    d, windows = piece
    card_text = WAVEFORM_CARD.replace('kind = "waveform"\n', """kind = "logmel"
frame_length = 400
frame_step = 160
fft_length = 512
window = "hann"
mel_bands = 40
fmin = 0.0
fmax = 8000.0
mel_scale = "htk"
mel_norm = "none"
mel_triangles = "hz"
power = 2.0
log = "ln"
log_offset = 1e-6
layout = "time_mel"
""")
    (d / "n.toml").write_text(card_text)
    feats = FrontEnd(load_card(d / "n.toml")).batch(windows)
    keras.utils.set_random_seed(1)
    norm = keras.layers.Normalization(axis=-1)
    norm.adapt(feats.reshape(-1, 40))
    model = keras.Sequential([keras.Input(feats.shape[1:]), norm, keras.layers.Flatten(),
                              keras.layers.Dense(4, activation="softmax")])
    model.save(d / "norm.keras")
    own = model.predict(feats, verbose=0, batch_size=1)
    probs = replay(d, "norm.keras", card_text)
    assert np.max(np.abs(probs - own)) <= 1e-4
