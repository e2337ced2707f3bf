"""Device parity: the portable C front end against the Python one, the C FFT against numpy,
golden vectors re-run, int8 quantisation against TFLite's own parameters, and compare."""

import json
import os
import shutil
import subprocess

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, ROOT, run_cli
from monitor.card import card_from_dict, load_card
from monitor.device import C_SOURCES
from monitor.device.constants import header
from monitor.device.vectors import read_csv
from monitor.frontend import FrontEnd
from monitor.runners import load_runner
from monitor.windower import windows_of

HARNESS = ROOT / "tests" / "c" / "harness.c"


def compiler():
    for cc in ("gcc", "cc", "clang"):
        if shutil.which(cc):
            return shutil.which(cc)
    if os.environ.get("SCENEMON_REQUIRE_CC") == "1":
        pytest.fail("SCENEMON_REQUIRE_CC=1 but no C compiler (gcc, cc) found")
    pytest.skip("no C compiler found")


def build(card, tmp_path, name):
    d = tmp_path / name
    d.mkdir()
    (d / "frontend_constants.h").write_text(header(card))
    exe = d / "harness"
    cmd = [compiler(), "-std=c99", "-O2", "-Wall", "-Wextra", "-Werror", "-pedantic",
           f"-I{d}", f"-I{C_SOURCES[0].parent}", str(C_SOURCES[0]), str(HARNESS), "-o", str(exe),
           "-lm"]
    r = subprocess.run(cmd, capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    return exe


def run(exe, mode, csv_path):
    with open(csv_path) as f:
        r = subprocess.run([str(exe), mode], stdin=f, capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr
    return np.array([[float(v) for v in line.split(",")] for line in r.stdout.splitlines()])


def card_variant(scale, triangles, pcm_bits, norm="none"):
    demo = load_card(MODELS / "demo.toml")
    return card_from_dict({
        "classes": list(demo.classes),
        "audio": {"sample_rate": 16000, "window_s": 1.0, "hop_s": 1.0},
        "frontend": {"mel_scale": scale, "mel_triangles": triangles, "mel_norm": norm,
                     "pcm_bits": pcm_bits, "fmin": 20.0, "fmax": 7800.0, "mel_bands": 40},
        "scaling": {"mean": demo.mean.tolist(), "std": demo.std.tolist()}})


@pytest.fixture(scope="module")
def tour_pcm(tour, tmp_path_factory):
    """The whole tour as int16 windows (hop 1 s), written once as pcm.csv."""
    x, _ = sf.read(str(tour[0]), dtype="int16")
    n = x.size // 16000
    pcm = x[: n * 16000].reshape(n, 16000)
    path = tmp_path_factory.mktemp("c") / "pcm.csv"
    np.savetxt(path, pcm, fmt="%d", delimiter=",")
    return pcm, path


@pytest.mark.parametrize("scale,triangles,norm", [("htk", "mel", "none"), ("htk", "hz", "none"),
                                                  ("slaney", "hz", "slaney"),
                                                  ("slaney", "mel", "none")])
@pytest.mark.system
@pytest.mark.parametrize("pcm_bits,mode", [(16, "i16"), (0, "f32"), (16, "f32")])
def test_c_front_end_matches_python_over_the_tour(tmp_path, tour_pcm, scale, triangles, norm,
                                                   pcm_bits, mode):
    # issue 6: max abs difference on the log-mel at most 1e-3 over the whole tour
    pcm, path = tour_pcm
    card = card_variant(scale, triangles, pcm_bits, norm)
    exe = build(card, tmp_path, "b")
    ours = run(exe, mode, path).reshape(len(pcm), 98, 40)
    fe = FrontEnd(card)
    ref_scaled = fe.batch(pcm.astype(np.float32) / 32768.0)
    # back to log-mel units for the figure the issue asks for
    c_logmel = ours * card.std + card.mean
    py_logmel = fe.logmel(pcm.astype(np.float32) / 32768.0)
    err = float(np.max(np.abs(c_logmel - py_logmel)))
    print(f"C vs Python log-mel max abs diff ({scale}, {triangles}, pcm_bits {pcm_bits}, "
          f"{mode}): {err:.2e}")
    assert err <= 1e-3
    assert float(np.max(np.abs(ours - ref_scaled))) <= 1e-3


@pytest.mark.system
def test_c_fft_matches_numpy(tmp_path):
    # the C radix-2 FFT against numpy.fft.rfft on random input: relative error below 1e-5
    card = card_variant("htk", "mel", 0)
    exe = build(card, tmp_path, "f")
    rng = np.random.default_rng(3)
    x = rng.standard_normal((20, 512)).astype(np.float32)
    np.savetxt(tmp_path / "sig.csv", x, fmt="%.9g", delimiter=",")
    out = run(exe, "fft", tmp_path / "sig.csv")
    spec = out[:, 0::2] + 1j * out[:, 1::2]
    ref = np.fft.rfft(x.astype(np.float64), axis=-1)
    rel = np.max(np.abs(spec - ref)) / np.max(np.abs(ref))
    assert rel < 1e-5


def test_sparse_table_in_the_header_matches_references():
    # the sparse form of tf.signal.linear_to_mel_weight_matrix(10, 257, 16000, 0, 8000): these
    # first bins and lengths are computed from TensorFlow in test_frontend's bank check
    card = card_from_dict({"classes": ["a", "b"], "frontend": {"mel_bands": 10,
                           "mel_triangles": "mel", "fmax": 8000.0}})
    text = header(card)
    assert "sm_mel_first_bin[10] = {\n    1, 6, 14, 23, 34, 49, 67, 89, 118, 154\n}" in text
    assert "sm_mel_length[10] = {\n    13, 17, 20, 26, 33, 40, 51, 65, 81, 102\n}" in text
    assert "#define SM_MEL_COEFFS 448" in text


@pytest.mark.system
def test_golden_vectors_rerun_through_python(tmp_path, tour):
    # LiteRT's own runtime this time (the default is the microcontroller one: test_micro.py)
    out = tmp_path / "gv"
    r = run_cli("vectors", "--model", MODELS / "demo.int8.tflite", tour[0], "--out", out,
                "--count", "30", "--runtime", "litert")
    assert r.returncode == 0, r.stderr
    for name in ("pcm.csv", "features.csv", "output.csv", "input_int8.csv", "output_int8.csv",
                 "meta.json", "frontend_constants.h", "frontend.c", "frontend.h", "check.c",
                 "check_params.h", "Makefile"):
        assert (out / name).is_file(), name
    meta = json.loads((out / "meta.json").read_text())
    card = load_card(MODELS / "demo.int8.toml")
    runner = load_runner(MODELS / "demo.int8.tflite", card)
    pcm = read_csv(out / "pcm.csv", np.int64)
    feats = FrontEnd(card).batch(pcm.astype(np.float32) / 32768.0)
    np.testing.assert_allclose(feats.reshape(len(pcm), -1), read_csv(out / "features.csv"),
                               atol=1e-6)
    np.testing.assert_allclose(runner.predict(feats), read_csv(out / "output.csv"), atol=1e-7)
    raw = [runner.raw(f) for f in feats]
    np.testing.assert_array_equal(np.stack([r[0] for r in raw]), read_csv(out / "input_int8.csv"))
    np.testing.assert_array_equal(np.stack([r[1] for r in raw]), read_csv(out / "output_int8.csv"))
    assert meta["quantization"]["output_scale"] == pytest.approx(1 / 256)
    assert meta["model_sha256"] == runner.sha256 and meta["windows"] == 30
    # the rows are the tour's own windows at the card's hop, at the starts meta.json lists
    x, _ = sf.read(str(tour[0]), dtype="int16")
    idx = [int(round(t / card.hop_s)) for t in meta["window_starts_s"]]
    assert idx == sorted(idx) and len(set(idx)) == 30
    np.testing.assert_array_equal(pcm, windows_of(x, card.window_samples, card.hop_samples)[idx])
    # and the shipped C sources compile against the written header
    cc = compiler()
    r = subprocess.run([cc, "-std=c99", "-Wall", "-Werror", "-c", str(out / "frontend.c"),
                        f"-I{out}", "-o", str(tmp_path / "fe.o")], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr


@pytest.fixture(scope="module")
def quantized(tour, tmp_path_factory):
    d = tmp_path_factory.mktemp("q")
    out = d / "site.int8.tflite"
    r = run_cli("quantize", "--model", MODELS / "demo.keras", "--calibrate", tour[0],
                "--out", out, "--windows", "200", timeout=600)
    assert r.returncode == 0, r.stderr
    return out


@pytest.mark.slow
def test_quantize_writes_model_and_card(quantized):
    assert quantized.is_file() and quantized.with_suffix(".toml").is_file()
    text = quantized.with_suffix(".toml").read_text()
    assert text.startswith("# int8 model site.int8.tflite") and "[frontend]" in text
    card = load_card(quantized.with_suffix(".toml"))
    r = load_runner(quantized, card)
    assert r.model_kind == "tflite-int8"


@pytest.mark.slow
def test_quantisation_maths_against_tflite(quantized):
    # TFLite's own reported scale and zero point: int8 = round(x / scale) + zero_point, saturated
    from ai_edge_litert.interpreter import Interpreter

    interp = Interpreter(model_path=str(quantized))
    det = interp.get_input_details()[0]
    scale, zero = det["quantization"]
    assert det["dtype"] == np.int8
    r = load_runner(quantized, load_card(quantized.with_suffix(".toml")))
    x = np.linspace(-200 * scale, 200 * scale, 1001).astype(np.float32)
    expect = np.clip(np.round(x / np.float32(scale)) + zero, -128, 127).astype(np.int8)
    np.testing.assert_array_equal(r.quantize_input(x), expect)
    out = interp.get_output_details()[0]
    assert out["quantization"][0] == pytest.approx(1 / 256) and out["quantization"][1] == -128


@pytest.mark.slow
def test_int8_agrees_with_float_on_the_tour(quantized, tour, tour_windows):
    # issue 6: top-1 agreement >= 95% for the demo model; compare gates with --min-agree
    r = run_cli("compare", "--model", MODELS / "demo.keras", "--model", quantized, tour[0],
                "--json", "--min-agree", "0.95", timeout=600)
    assert r.returncode == 0, r.stderr
    res = json.loads(r.stdout)
    assert res["top1_agreement"] >= 0.95 and res["windows"] == tour_windows
    assert res["frontend_float32_vs_float64_max_abs"] < 1e-3
    assert sum(map(sum, res["confusion_a_vs_b"])) == tour_windows
    r = run_cli("compare", "--model", MODELS / "demo.tflite", "--model",
                MODELS / "demo.int8.tflite", tour[0], "--min-agree", "1.0")
    assert r.returncode in (0, 1)
    if r.returncode == 1:
        assert "below --min-agree" in r.stderr
