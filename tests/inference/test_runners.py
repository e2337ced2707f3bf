"""Model runners: Keras vs TFLite agreement, int8 agreement, safety and shape checks."""

import os
import shutil
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, ROOT, card_dict, run_cli
from monitor.base.errors import ModelError
from monitor.features.card import card_from_dict, load_card
from monitor.features.frontend import FrontEnd
from monitor.inference.registry import load_runner


@pytest.fixture(scope="module")
def tour_features(tour, demo_card):
    x, _ = sf.read(str(tour[0]), dtype="float32")
    n = 1 + (x.size - 16000) // 8000
    w = np.stack([x[i * 8000:i * 8000 + 16000] for i in range(n)])
    return FrontEnd(demo_card).batch(w)


@pytest.fixture(scope="module")
def keras_runner(demo_card):
    return load_runner(MODELS / "demo.keras", demo_card)


@pytest.mark.slow
def test_tflite_float_matches_keras(keras_runner, tour_features):
    # the converted artifact gives the Keras model's numbers (YAMNet's export.py habit)
    lite = load_runner(MODELS / "demo.tflite", load_card(MODELS / "demo.toml"))
    a = keras_runner.predict(tour_features[::4])
    b = lite.predict(tour_features[::4])
    assert np.max(np.abs(a - b)) <= 1e-5


def test_int8_top1_agreement_on_tour(tour_features):
    f = load_runner(MODELS / "demo.tflite", load_card(MODELS / "demo.toml"))
    q = load_runner(MODELS / "demo.int8.tflite", load_card(MODELS / "demo.int8.toml"))
    assert q.model_kind == "tflite-int8"
    agree = np.mean(np.argmax(f.predict(tour_features), 1) == np.argmax(q.predict(tour_features), 1))
    assert agree >= 0.95


def test_int8_quantisation_uses_tensor_params():
    # TFLite's rule: q = clip(round(x / scale) + zero_point, -128, 127); x = scale * (q - zp)
    q = load_runner(MODELS / "demo.int8.tflite", load_card(MODELS / "demo.int8.toml"))
    x = np.array([-1e9, -1.0, 0.0, 0.37, 1e9], np.float32)
    ref = np.clip(np.round(x / q.in_scale) + q.in_zero, -128, 127).astype(np.int8)
    np.testing.assert_array_equal(q.quantize_input(x), ref)
    # a softmax output gets scale 1/256 and zero point -128 (TFLite 8-bit quantization
    # specification, the softmax operator's output constraint)
    assert q.out_scale == pytest.approx(1 / 256) and q.out_zero == -128


@pytest.mark.slow
def test_keras_runner_gives_the_models_own_numbers(keras_runner, tour_features):
    # the runner's batch-1 tf.function against Keras itself (keras.saving.load_model, the
    # model called on the whole batch at once): the same probabilities up to float32 rounding
    import keras

    model = keras.saving.load_model(MODELS / "demo.keras", safe_mode=True)
    x = tour_features[:9].reshape((9, *keras_runner.input_shape))
    ref = np.asarray(model(x, training=False))
    a = keras_runner.predict(tour_features[:9])
    assert a.shape == ref.shape and np.max(np.abs(a - ref)) <= 1e-5


def _tiny(tmp_path, kind):
    import keras
    from keras import layers

    inp = keras.Input((98, 40, 1))
    x = layers.GlobalAveragePooling2D()(inp)
    if kind == "lambda":
        x = layers.Lambda(lambda t: t * 2.0)(x)
    if kind == "two_inputs":
        inp2 = keras.Input((3,))
        x = layers.Concatenate()([x, inp2])
        out = layers.Dense(4, activation="softmax")(x)
        model = keras.Model([inp, inp2], out)
    else:
        act = None if kind == "logits" else "softmax"
        model = keras.Model(inp, layers.Dense(4, activation=act)(x))
    path = tmp_path / f"{kind}.keras"
    model.save(path)
    return path


@pytest.mark.slow
def test_lambda_layer_refused_unless_trusted(tmp_path, demo_card, keras_runner):
    path = _tiny(tmp_path, "lambda")
    with pytest.raises(ModelError, match="Lambda.*--trust-model"):
        load_runner(path, demo_card)
    assert load_runner(path, demo_card, trust_model=True).n_outputs == 4


@pytest.mark.slow
def test_two_inputs_refused(tmp_path, demo_card, keras_runner):
    with pytest.raises(ModelError, match="2 inputs"):
        load_runner(_tiny(tmp_path, "two_inputs"), demo_card)


@pytest.mark.slow
def test_logits_model_is_refused_and_softmax_on_request(tmp_path, demo_card, keras_runner):
    # a softmax output is never negative and sums to 1; logits decided on as probabilities
    # gave negative "probabilities" and exit 0 before: now the card key to set is named
    path = _tiny(tmp_path, "logits")
    with pytest.raises(ModelError, match='set output = "logits" in its card'):
        load_runner(path, demo_card)
    card = card_from_dict(card_dict(output="logits"))
    p = load_runner(path, card).predict(np.random.default_rng(0).standard_normal((3, 98, 40)))
    np.testing.assert_allclose(p.sum(axis=1), 1.0, atol=1e-6)


def test_shape_mismatch_names_the_problem(demo_card):
    card = card_from_dict(card_dict(frontend={"frame_step": 320}, scaling=None))
    with pytest.raises(ModelError, match=r"expects \(98, 40, 1\) but the card .* gives 49 frames x 40 bands: check frame_step"):
        load_runner(MODELS / "demo.tflite", card)


def test_class_count_mismatch(demo_card):
    card = card_from_dict(card_dict(classes=["a", "b", "c"]))
    with pytest.raises(ModelError, match="4 outputs but the card .* 3 classes"):
        load_runner(MODELS / "demo.tflite", card)


@pytest.mark.parametrize("name,data", [
    ("trunc.tflite", (MODELS / "demo.tflite").read_bytes()[:3000]),
    ("random.tflite", os.urandom(4096)),
    # the first Keras load imports TensorFlow (seconds): in the full suite only
    pytest.param("trunc.keras", (MODELS / "demo.keras").read_bytes()[:5000],
                 marks=pytest.mark.slow),
], ids=["truncated .tflite", "random .tflite", "truncated .keras"])
def test_broken_model_files(tmp_path, demo_card, name, data):
    p = tmp_path / name
    p.write_bytes(data)
    with pytest.raises(ModelError, match=str(p).replace(".", r"\.")):
        load_runner(p, demo_card)


def test_tflite_never_imports_tensorflow():
    code = ("import sys; from monitor.features.card import load_card; from monitor.inference.registry import load_runner;"
            "c = load_card('models/demo.toml'); r = load_runner('models/demo.tflite', c);"
            "import numpy as np; r.predict(np.zeros((1, 98, 40), np.float32));"
            "print('tensorflow' in sys.modules, 'keras' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True)
    assert out.stdout.strip() == "False False", out.stderr


def test_core_imports_no_ui_or_audio_device():
    # the core works without textual or sounddevice imported (DEVELOPERS.md)
    code = ("import sys; import monitor.features.card, monitor.features.frontend, monitor.decisions.decide, monitor.decisions.tally,"
            " monitor.session.writer, monitor.session.reader, monitor.session.snippets, monitor.base.files,"
            " monitor.inference.runners, monitor.assembly.engine, monitor.sound.sources, monitor.sound.ringbuffer,"
            " monitor.sound.windower, monitor.session.capture, monitor.assembly.plan, monitor.assembly.assemble,"
            " monitor.assembly.observers, monitor.inference.novelty, monitor.review.metrics, monitor.review.score;"
            "print(sorted(m for m in ('textual', 'sounddevice', 'tensorflow', 'matplotlib')"
            " if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True)
    assert out.stdout.strip() == "[]", out.stderr


@pytest.mark.slow
def test_a_custom_layer_gives_the_whole_reason_and_what_to_do(tmp_path, tour):
    # a model saved with a registered custom layer, loaded in a process that does not import
    # the code registering it: Keras's whole reason (it was cut mid-word at 200 characters)
    # and what to do about it
    import keras
    from keras import layers

    @keras.saving.register_keras_serializable(package="usercode")
    class ScaleBy(layers.Layer):
        def __init__(self, k=2.0, **kw):
            super().__init__(**kw)
            self.k = k

        def call(self, x):
            return x * self.k

        def get_config(self):
            return {**super().get_config(), "k": self.k}

    inp = keras.Input((98, 40, 1))
    x = ScaleBy()(layers.GlobalAveragePooling2D()(inp))
    model = keras.Model(inp, layers.Dense(4, activation="softmax")(x))
    model.save(tmp_path / "custom.keras")
    shutil.copy(MODELS / "demo.toml", tmp_path / "custom.toml")
    r = run_cli("replay", tour[0], "--model", tmp_path / "custom.keras", "--fast",
                "--headless", "--out", tmp_path / "s", timeout=300)
    assert r.returncode == 2, r.stderr
    line = [x for x in r.stderr.splitlines() if x.startswith("scenemon: ") and "warning" not in x]
    assert len(line) == 1 and "ScaleBy" in line[0] and "register_keras_serializable" in line[0]
