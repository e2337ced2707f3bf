"""A dynamic-range ("hybrid") int8 model in the microcontroller runtime: one sentence that
says so and how to make a full-integer one. Failed before its fix ("TFLM failed to allocate
tensors", after growing the arena to its limit)."""

import shutil

import pytest
import soundfile as sf

from conftest import MODELS, cli, run_cli, write_wav


@pytest.mark.slow
def test_a_hybrid_model_is_named_as_such_in_the_micro_runtime(tmp_path, tour):
    pytest.importorskip("tflite_micro")
    import keras
    import tensorflow as tf
    from keras import layers

    inp = keras.Input((98, 40, 1))
    x = layers.Dense(32, activation="relu")(layers.Flatten()(inp))
    model = keras.Model(inp, layers.Dense(4, activation="softmax")(x))
    conv = tf.lite.TFLiteConverter.from_keras_model(model)
    conv.optimizations = [tf.lite.Optimize.DEFAULT]  # no representative data: dynamic range
    (tmp_path / "h.tflite").write_bytes(conv.convert())
    shutil.copy(MODELS / "demo.toml", tmp_path / "h.toml")

    from monitor.inference.micro import is_hybrid

    assert is_hybrid((tmp_path / "h.tflite").read_bytes())
    assert not is_hybrid((MODELS / "demo.int8.tflite").read_bytes())
    x, sr = sf.read(str(tour[0]), dtype="float32")
    wav = write_wav(tmp_path / "c.wav", x[: 5 * sr], sr)
    r = cli("replay", wav, "--model", tmp_path / "h.tflite", "--runtime", "micro", "--fast",
            "--headless", "--out", tmp_path / "s")
    assert r.returncode == 2, r.stderr
    assert "hybrid" in r.stderr and "scenemon quantize" in r.stderr and "TFLM" not in r.stderr
    # with --debug the runtime's own line comes along (it was dropped)
    r = run_cli("--debug", "replay", wav, "--model", tmp_path / "h.tflite", "--runtime", "micro",
            "--fast", "--headless", "--out", tmp_path / "s2")
    assert "the runtime said:" in r.stderr
