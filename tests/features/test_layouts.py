"""Model inputs laid out as training code lays them out: flat (frames x bands values, common
on microcontrollers) and channels-first (PyTorch's (channels, bands, frames)). The same
network behind each layout gives the same probabilities as the original on every window, and
a card whose layout does not fit, where the sizes do, names the layout key. Failed before
its fix: no card could describe these inputs, and the error blamed frame_step."""

import json
import shutil

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, cli, write_wav


def _wrapped(tmp_path, name, input_shape, to_demo):
    """The demo Keras model behind a first layer that takes `input_shape` (exact reshapes)."""
    import keras
    from keras import layers

    demo = keras.saving.load_model(MODELS / "demo.keras", compile=False)
    inp = keras.Input(input_shape)
    model = keras.Model(inp, demo(to_demo(inp, layers)))
    model.save(tmp_path / f"{name}.keras")
    return tmp_path / f"{name}.keras"


def _card(tmp_path, name, layout):
    text = (MODELS / "demo.toml").read_text()
    assert 'layout = "time_mel"' in text
    (tmp_path / f"{name}.toml").write_text(text.replace('layout = "time_mel"',
                                                        f'layout = "{layout}"'))


def _probs(out):
    return np.array([json.loads(x)["probs"] for x in (out / "windows.jsonl").read_text().splitlines()])


@pytest.fixture(scope="module")
def clip(tmp_path_factory, tour):
    d = tmp_path_factory.mktemp("lay")
    x, sr = sf.read(str(tour[0]), dtype="float32")
    return write_wav(d / "clip.wav", x[30 * sr: 60 * sr], sr)


@pytest.fixture(scope="module")
def original(tmp_path_factory, clip):
    out = tmp_path_factory.mktemp("orig") / "s"
    r = cli("replay", clip, "--model", MODELS / "demo.keras", "--fast", "--headless",
            "--out", out)
    assert r.returncode == 0, r.stderr
    return _probs(out)


CASES = {
    # flat: frames x bands values, frame after frame (time-major)
    "flat": ((98 * 40,), "flat", lambda x, L: L.Reshape((98, 40, 1))(x)),
    # channels first, (1, frames, bands)
    "chan_first": ((1, 98, 40), "time_mel", lambda x, L: L.Reshape((98, 40, 1))(x)),
    # channels first, (1, bands, frames): PyTorch's (C, H = mel, W = time)
    "chan_first_mel_time": ((1, 40, 98), "mel_time",
                            lambda x, L: L.Reshape((98, 40, 1))(L.Permute((2, 1))(
                                L.Reshape((40, 98))(x)))),
}


@pytest.mark.slow
@pytest.mark.parametrize("name", list(CASES))
def test_a_layout_gives_the_original_probabilities(tmp_path, clip, original, name):
    shape, layout, to_demo = CASES[name]
    _wrapped(tmp_path, name, shape, to_demo)
    _card(tmp_path, name, layout)
    out = tmp_path / "s"
    r = cli("replay", clip, "--model", tmp_path / f"{name}.keras", "--fast", "--headless",
            "--out", out)
    assert r.returncode == 0, r.stderr
    got = _probs(out)
    assert got.shape == original.shape
    np.testing.assert_allclose(got, original, atol=1e-5)  # the same network, reshaped inputs


@pytest.mark.slow
def test_a_layout_that_does_not_fit_names_the_layout_key(tmp_path, clip):
    shape, _, to_demo = CASES["flat"]
    _wrapped(tmp_path, "m", shape, to_demo)
    shutil.copy(MODELS / "demo.toml", tmp_path / "m.toml")  # layout = "time_mel"
    r = cli("replay", clip, "--model", tmp_path / "m.keras", "--fast", "--headless",
            "--out", tmp_path / "s")
    assert r.returncode == 2
    assert 'set layout = "flat"' in r.stderr and "frame_step" not in r.stderr, r.stderr


def test_a_flat_layout_takes_a_per_band_scaler_for_every_frame():
    from conftest import card_dict
    from monitor.features.card import card_from_dict
    from monitor.features.frontend import FrontEnd

    raw = card_dict(frontend={"layout": "flat"})
    flat = card_from_dict(raw)
    grid = card_from_dict(card_dict())
    assert flat.feature_shape == (98 * 40,)
    w = np.random.default_rng(0).standard_normal((2, 16000)).astype(np.float32) * 0.1
    np.testing.assert_array_equal(FrontEnd(flat).batch(w),
                                  FrontEnd(grid).batch(w).reshape(2, -1))
