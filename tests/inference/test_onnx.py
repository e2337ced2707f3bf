"""A model trained the way PyTorch users train it, exported to ONNX, run by scenemon.

The training code here is ordinary: librosa log-mel features of one-second windows of a
recording, scikit-learn's StandardScaler, a small PyTorch network trained with Adam and
exported with ``torch.onnx.export``. scenemon replays the recording with the ``.onnx`` file
and a card that says what the training code did; its probabilities must be the training
code's own prediction on every window (within 1e-4), and the int8 QDQ graph that ONNX
Runtime's static quantisation makes of it must pick the same top class on at least 99% of
the windows.
"""

import json

import numpy as np
import pytest
import soundfile as sf

from conftest import cli

torch = pytest.importorskip("torch")
ort = pytest.importorskip("onnxruntime")
librosa = pytest.importorskip("librosa")
preprocessing = pytest.importorskip("sklearn.preprocessing")

SR, WIN, HOP = 16000, 16000, 8000
CLASSES = ["quiet_room", "voices", "traffic", "machinery"]

# what the training code below does, in the card's words: librosa.feature.melspectrogram
# (n_fft 512, win_length 400, hop 160, n_mels 40, center with zeros, Slaney mel scale and
# norm) and power_to_db(ref=1.0, amin=1e-10, top_db=None), as librosa 0.11 documents them;
# the network ends in logits
CARD = """classes = ["quiet_room", "voices", "traffic", "machinery"]
output = "logits"
input_name = "features"
output_name = "logits"

[audio]
sample_rate = 16000
window_s = 1.0
hop_s = 0.5

[frontend]
kind = "logmel"
frame_length = 400
frame_step = 160
fft_length = 512
window = "hann"
window_in_frame = "centre"
center = true
pad_mode = "constant"
mel_bands = 40
fmin = 0.0
fmax = 8000.0
mel_scale = "slaney"
mel_norm = "slaney"
mel_triangles = "hz"
power = 2.0
log = "db"
log_offset = 0.0
log_floor = 1e-10
layout = "time_mel"

[scaling]
mean = "scaler.npz"
std = "scaler.npz"
"""


def features(w: np.ndarray) -> np.ndarray:
    """The training code's features of one window: (101 frames, 40 bands)."""
    s = librosa.feature.melspectrogram(y=w, sr=SR, n_fft=512, hop_length=160, win_length=400,
                                       n_mels=40, fmax=8000.0)
    return librosa.power_to_db(s, ref=1.0, amin=1e-10, top_db=None).T


@pytest.fixture(scope="module")
def trained(tour, tmp_path_factory):
    from monitor.session.truth import load_truth

    d = tmp_path_factory.mktemp("onnx")
    x, _ = sf.read(str(tour[0]), dtype="float32")
    x = x[: 90 * SR]
    sf.write(str(d / "walk.wav"), x, SR, subtype="PCM_16")
    x, _ = sf.read(str(d / "walk.wav"), dtype="float32")  # the samples scenemon reads
    truth = load_truth(tour[1])
    n = 1 + (x.size - WIN) // HOP
    feats = np.stack([features(x[k * HOP:k * HOP + WIN]) for k in range(n)])
    labels = [truth.label_for(k * HOP / SR, (k * HOP + WIN) / SR) for k in range(n)]
    y = np.array([CLASSES.index(lab) if lab in CLASSES else 0 for lab in labels])
    scaler = preprocessing.StandardScaler().fit(feats.reshape(-1, 40))  # per mel band
    np.savez(d / "scaler.npz", mean=scaler.mean_.astype(np.float32),
             std=scaler.scale_.astype(np.float32))
    scaled = ((feats - scaler.mean_) / scaler.scale_).astype(np.float32)
    torch.manual_seed(0)
    net = torch.nn.Sequential(torch.nn.Flatten(), torch.nn.Linear(101 * 40, 24),
                              torch.nn.ReLU(), torch.nn.Linear(24, 4))
    opt = torch.optim.Adam(net.parameters(), lr=1e-3)
    xt, yt = torch.from_numpy(scaled), torch.from_numpy(y)
    for _ in range(60):
        opt.zero_grad()
        loss = torch.nn.functional.cross_entropy(net(xt), yt)
        loss.backward()
        opt.step()
    net.eval()
    with torch.no_grad():
        own = torch.softmax(net(xt), dim=1).numpy()  # the training code's own prediction
    torch.onnx.export(net, (xt[:1],), str(d / "walk.onnx"), input_names=["features"],
                      output_names=["logits"], dynamo=False,
                      dynamic_axes={"features": {0: "batch"}, "logits": {0: "batch"}})
    (d / "walk.toml").write_text(CARD)
    return d, own, scaled


def replay_probs(d, model, out):
    r = cli("replay", d / "walk.wav", "--model", d / model, "--card", d / "walk.toml",
            "--fast", "--headless", "--out", d / out)
    assert r.returncode == 0, r.stderr
    lines = (d / out / "windows.jsonl").read_text().splitlines()
    return np.array([json.loads(line)["probs"] for line in lines]), d / out


def test_an_onnx_model_gives_the_training_codes_own_prediction(trained):
    d, own, _ = trained
    probs, session = replay_probs(d, "walk.onnx", "s")
    assert probs.shape == own.shape
    print(f"onnx float: {probs.shape[0]} windows, largest difference {np.max(np.abs(probs - own)):.2g}")
    assert np.max(np.abs(probs - own)) <= 1e-4
    assert (own.argmax(1) != own.argmax(1)[0]).any()  # the network learnt more than one class
    meta = json.loads((session / "session.json").read_text())
    assert meta["model"]["kind"] == "onnx-float" and meta["model"]["runtime"] == "onnxruntime"


def test_the_int8_qdq_graph_picks_the_same_class(trained):
    # ONNX Runtime's static quantisation in QDQ form, calibrated on the training windows
    from onnxruntime.quantization import CalibrationDataReader, QuantFormat, quantize_static

    d, own, scaled = trained

    class Windows(CalibrationDataReader):
        def __init__(self):
            self.rows = iter(scaled[::3])

        def get_next(self):
            row = next(self.rows, None)
            return None if row is None else {"features": row[None]}

    quantize_static(str(d / "walk.onnx"), str(d / "walk.int8.onnx"), Windows(),
                    quant_format=QuantFormat.QDQ)
    probs, session = replay_probs(d, "walk.int8.onnx", "s8")
    same = np.mean(probs.argmax(1) == own.argmax(1))
    print(f"onnx int8: same top class on {same:.1%}, largest difference {np.max(np.abs(probs - own)):.2g}")
    assert same >= 0.99, same
    meta = json.loads((session / "session.json").read_text())
    assert meta["model"]["kind"] == "onnx-int8"
    # compare runs the two graphs on the same windows
    r = cli("compare", d / "walk.wav", "--model", d / "walk.onnx", "--card", d / "walk.toml",
            "--model", d / "walk.int8.onnx", "--card", d / "walk.toml")
    assert r.returncode == 0, r.stderr
    assert "windows" in r.stdout


def test_score_and_bench_take_an_onnx_model(trained, tmp_path):
    d, own, _ = trained
    arch = tmp_path / "arch"
    arch.mkdir()
    (arch / "walk.wav").write_bytes((d / "walk.wav").read_bytes())
    r = cli("score", arch, "--model", d / "walk.onnx", "--card", d / "walk.toml", "--out",
            tmp_path / "sc", "--workers", "1")
    assert r.returncode == 0, r.stderr
    rows = [json.loads(x) for x in next((tmp_path / "sc" / "results").glob("*.jsonl"))
            .read_text().splitlines()]
    assert np.max(np.abs(np.array([x["probs"] for x in rows]) - own)) <= 1e-4
    r = cli("bench", "--model", d / "walk.onnx", "--card", d / "walk.toml", "--seconds", "5")
    assert r.returncode == 0, r.stderr
    assert "onnxruntime" in r.stdout


def test_a_card_naming_another_tensor_is_refused(trained, tmp_path):
    d, _, _ = trained
    (tmp_path / "w.toml").write_text(CARD.replace('input_name = "features"',
                                                  'input_name = "spectrogram"')
                                     .replace('"scaler.npz"', f'"{d / "scaler.npz"}"'))
    r = cli("replay", d / "walk.wav", "--model", d / "walk.onnx", "--card", tmp_path / "w.toml",
            "--fast", "--headless", "--out", tmp_path / "s")
    assert r.returncode == 2
    assert "walk.onnx" in r.stderr and "'spectrogram'" in r.stderr and "features" in r.stderr


def test_logits_under_a_probabilities_card_are_refused_by_name(trained, tmp_path):
    d, _, _ = trained
    (tmp_path / "w.toml").write_text(CARD.replace('output = "logits"\n', "")
                                     .replace('"scaler.npz"', f'"{d / "scaler.npz"}"'))
    r = cli("replay", d / "walk.wav", "--model", d / "walk.onnx", "--card", tmp_path / "w.toml",
            "--fast", "--headless", "--out", tmp_path / "s")
    assert r.returncode == 2
    assert 'output = "logits"' in r.stderr


@pytest.mark.system
@pytest.mark.slow
def test_live_takes_an_onnx_model(trained, tmp_path):
    # a real PortAudio stream from the PulseAudio server the suite runs (tests/audio_server.sh)
    from conftest import need_audio_server, run_cli

    need_audio_server()
    d, _, _ = trained
    r = run_cli("live", "--model", d / "walk.onnx", "--card", d / "walk.toml", "--input",
                "pulse", "--headless", "--seconds", "3", "--out", tmp_path / "s")
    assert r.returncode == 0, r.stderr
    lines = (tmp_path / "s" / "windows.jsonl").read_text().splitlines()
    assert len(lines) >= 3
    assert all(abs(sum(json.loads(x)["probs"]) - 1.0) < 1e-5 for x in lines)  # a softmax


def test_several_labels_from_logits_and_from_a_sigmoid(trained, tmp_path):
    # the same network read as several labels: output = "sigmoid_logits" applies the
    # logistic function to its outputs; output = "sigmoid" refuses them (they are not each
    # from 0 to 1) with the key to set
    d, _, scaled = trained
    with torch.no_grad():
        logits = trained_net(d)(torch.from_numpy(scaled)).numpy()
    card = CARD.replace('output = "logits"', 'output = "sigmoid_logits"').replace(
        '"scaler.npz"', f'"{d / "scaler.npz"}"')
    (tmp_path / "w.toml").write_text(card)
    r = cli("replay", d / "walk.wav", "--model", d / "walk.onnx", "--card", tmp_path / "w.toml",
            "--fast", "--headless", "--out", tmp_path / "s")
    assert r.returncode == 0, r.stderr
    probs = np.array([json.loads(x)["probs"] for x in
                      (tmp_path / "s" / "windows.jsonl").read_text().splitlines()])
    np.testing.assert_allclose(probs, 1.0 / (1.0 + np.exp(-logits)), atol=1e-5)  # logistic
    (tmp_path / "v.toml").write_text(card.replace('"sigmoid_logits"', '"sigmoid"'))
    r = cli("replay", d / "walk.wav", "--model", d / "walk.onnx", "--card", tmp_path / "v.toml",
            "--fast", "--headless", "--out", tmp_path / "t")
    assert r.returncode == 2 and 'output = "sigmoid_logits"' in r.stderr


def trained_net(d):
    """The exported network back as PyTorch computes it (the reference for its logits)."""
    import onnx
    from onnx import numpy_helper

    weights = [numpy_helper.to_array(t) for t in onnx.load(str(d / "walk.onnx")).graph.initializer]
    (w1, b1, w2, b2) = [torch.from_numpy(w.copy()) for w in weights]
    return lambda x: torch.relu(x.flatten(1) @ w1.T + b1) @ w2.T + b2


def test_without_onnx_runtime_one_sentence(trained, tmp_path, monkeypatch):
    # a fake for what cannot be arranged on demand here: ONNX Runtime missing
    import sys

    d, _, _ = trained
    monkeypatch.setitem(sys.modules, "onnxruntime", None)
    r = cli("replay", d / "walk.wav", "--model", d / "walk.onnx", "--card", d / "walk.toml",
            "--fast", "--headless", "--out", tmp_path / "s")
    assert r.returncode == 2
    assert "walk.onnx" in r.stderr and "pip install onnxruntime" in r.stderr
    assert not (tmp_path / "s").exists()
