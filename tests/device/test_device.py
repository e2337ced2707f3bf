"""Device parity: the portable C front end against the Python one, the C FFT against numpy,
golden vectors re-run, int8 quantisation against TFLite's own parameters, and compare."""

import json
import os
import shutil
import subprocess

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, ROOT, card_dict, compiler, run_cli
from monitor.device import C_SOURCES
from monitor.device.constants import c_buffers, c_tables, header
from monitor.device.vectors import read_csv
from monitor.features.card import card_from_dict, load_card
from monitor.features.frontend import FrontEnd
from monitor.inference.registry import load_runner
from monitor.sound.windower import windows_of

HARNESS = ROOT / "tests" / "c" / "harness.c"
CFLAGS = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic"]


_BUILT: dict[str, object] = {}  # one build per header text in a test run


def build(card, tmp_path, name, text=None):
    text = text if text is not None else header(card)
    if text in _BUILT and _BUILT[text].exists():
        return _BUILT[text]
    d = tmp_path / name
    d.mkdir()
    (d / "frontend_constants.h").write_text(text)
    exe = d / "harness"
    cmd = [compiler(), *CFLAGS, "-O2", f"-I{d}", f"-I{C_SOURCES[0].parent}", str(C_SOURCES[0]),
           str(HARNESS), "-o", str(exe), "-lm"]
    r = subprocess.run(cmd, capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    _BUILT[text] = exe
    return exe


def run(exe, mode, data: np.ndarray, shape) -> np.ndarray:
    r = subprocess.run([str(exe), mode], input=np.ascontiguousarray(data).tobytes(),
                       capture_output=True, timeout=600)
    assert r.returncode == 0, r.stderr
    return np.frombuffer(r.stdout, np.float32).reshape(-1, *shape)


def variant(frontend=None, audio=None, scaling="demo"):
    """The demo card with some [frontend] / [audio] keys changed (None removes a key)."""
    return card_from_dict(card_dict(frontend=frontend, audio=audio, scaling=scaling))


# every kind and every option, each at least once (scaling: per band, one value, full shape)
FULL = {"mean": 0.5, "std": 2.0}
C_CASES = {
    "logmel htk mel (demo)": {},
    "logmel htk hz": {"mel_triangles": "hz", "fmin": 20.0, "fmax": 7800.0},
    "logmel slaney hz slaney": {"mel_scale": "slaney", "mel_triangles": "hz",
                                "mel_norm": "slaney"},
    "logmel slaney mel, float input": {"mel_scale": "slaney", "pcm_bits": 0},
    "magnitude, log10": {"power": 1.0, "log": "log10"},
    "dB, ref max, top_db 80, floor": {"log": "db", "db_ref": "max", "top_db": 80.0,
                                      "log_offset": 0.0, "log_floor": 1e-10},
    "centre constant, window centred": {"center": True, "pad_mode": "constant",
                                        "window_in_frame": "centre"},
    "centre reflect, pre-emphasis": {"center": True, "pad_mode": "reflect",
                                     "preemphasis": 0.97},
    "hamming symmetric, mel_time": {"window": "hamming", "window_symmetric": True,
                                    "layout": "mel_time"},
    "flat layout, per-band scaling for every frame": {"layout": "flat"},
    "mfcc 13 ortho, lifter 22": {"kind": "mfcc", "mfcc": 13, "dct_norm": "ortho",
                                 "lifter": 22.0},
    "mfcc 20 uniform, magnitude (CMSIS-DSP style)": {"kind": "mfcc", "mfcc": 20,
                                                     "dct_norm": "uniform", "power": 1.0,
                                                     "frame_length": 512, "pcm_bits": 0},
    "mfcc 13 of dB, ref max, top_db 80": {"kind": "mfcc", "mfcc": 13, "dct_norm": "ortho",
                                         "log": "db", "db_ref": "max", "top_db": 80.0,
                                         "log_offset": 0.0, "log_floor": 1e-10},
    "spectrogram dB, mel_time": {"kind": "spectrogram", "log": "db", "layout": "mel_time",
                                 "mel_bands": None, "fmin": None, "fmax": None,
                                 "mel_scale": None, "mel_norm": None, "mel_triangles": None},
    "per-window standardisation, full-shape scaling": "per_window",
    "waveform, pre-emphasis, per window": "waveform",
}


def c_case(name):
    fe = C_CASES[name]
    if fe == "per_window":
        base = variant(scaling=None)
        full = np.linspace(-1, 1, int(np.prod(base.feature_shape))).reshape(base.feature_shape)
        return card_from_dict(card_dict(scaling={"per_window": "standardise",
                                                 "mean": full.tolist(), "std": 1.5}))
    if fe == "waveform":
        raw = card_dict(scaling={"per_window": "standardise", **FULL})
        raw["frontend"] = {"kind": "waveform", "pcm_bits": 16, "preemphasis": 0.9}
        return card_from_dict(raw)
    per_band = variant(fe, scaling=None).bands == 40  # the demo card's per-band scaling fits
    return variant(fe, scaling="demo" if per_band else FULL)


@pytest.fixture(scope="module")
def tour_pcm(tour):
    """The whole tour as int16."""
    x, _ = sf.read(str(tour[0]), dtype="int16")
    return x


FIGURES = {}


@pytest.mark.system
@pytest.mark.parametrize("name", list(C_CASES))
def test_c_front_end_matches_python_over_the_tour(tmp_path, tour_pcm, name):
    # the C front end against the Python one over the whole tour, whole windows (int16 and
    # float input) and the stream (one hop at a time): max abs difference at most 1e-3 of the
    # features' range (common practice for float32 parity across implementations)
    card = c_case(name)
    exe = build(card, tmp_path, "b")
    w, h = card.window_samples, card.hop_samples
    x = tour_pcm
    fe = FrontEnd(card)
    whole = windows_of(x, w, w)  # hop of one window: every sample once
    py_whole = fe.batch(whole.astype(np.float32) / 32768.0)
    span = float(py_whole.max() - py_whole.min())
    errs = {}
    c_i16 = run(exe, "i16", whole, card.feature_shape)
    errs["int16 windows"] = float(np.max(np.abs(c_i16 - py_whole)))
    c_f32 = run(exe, "f32", whole.astype(np.float32) / 32768.0, card.feature_shape)
    errs["float windows"] = float(np.max(np.abs(c_f32 - py_whole)))
    n = 1 + (x.size - w) // h
    stream = x[: (n - 1) * h + w]
    c_stream = run(exe, "stream_i16", stream, card.feature_shape)
    py_stream = fe.batch_consecutive(stream.astype(np.float32) / 32768.0, n)
    assert c_stream.shape == py_stream.shape
    errs["stream"] = float(np.max(np.abs(c_stream - py_stream)))
    FIGURES[name] = (errs, span)
    print(f"C vs Python, {name}: " + ", ".join(f"{k} {v:.1e}" for k, v in errs.items())
          + f" (range {span:.3g})")
    for k, v in errs.items():
        assert v <= 1e-3 * span, (k, v, span)


@pytest.mark.system
@pytest.mark.parametrize("name", ["centre reflect, pre-emphasis", "mfcc 13 ortho, lifter 22",
                                  "mfcc 13 of dB, ref max, top_db 80"])
def test_c_stream_equals_c_whole_windows(tmp_path, tour_pcm, name):
    # the C stream computes only the new frames (and, for a per-frame log, their DCT); its
    # numbers are the whole-window call's
    card = c_case(name)
    exe = build(card, tmp_path, "s")
    w, h = card.window_samples, card.hop_samples
    x = tour_pcm[: 16000 * 20]
    n = 1 + (x.size - w) // h
    a = run(exe, "stream_i16", x[: (n - 1) * h + w], card.feature_shape)
    b = run(exe, "i16", windows_of(x, w, h)[:n], card.feature_shape)
    np.testing.assert_array_equal(a, b)


DCT_LINE = "acc += d[m] * sm_row[m];"  # the DCT's multiply-add in frontend.c


def dct_multiply_adds(card, tmp_path, pcm, windows):
    """How often the C stream runs the DCT's multiply-add line over `windows` windows of
    `pcm`, counted by gcov (GCC's coverage tool: exact line counts of the program run)."""
    gcov = shutil.which("gcov")
    if gcov is None:
        if os.environ.get("SCENEMON_REQUIRE_CC") == "1":
            pytest.fail("SCENEMON_REQUIRE_CC=1 but gcov (GCC) is missing")
        pytest.skip("gcov (GCC) not found")
    d = tmp_path / "cov"
    d.mkdir()
    (d / "frontend_constants.h").write_text(header(card))
    flags = [*CFLAGS, "-O0", "--coverage", f"-I{d}", f"-I{C_SOURCES[0].parent}"]
    for src, obj in ((C_SOURCES[0], "frontend.o"), (HARNESS, "harness.o")):
        r = subprocess.run([compiler(), *flags, "-c", str(src), "-o", str(d / obj)],
                           capture_output=True, text=True)
        assert r.returncode == 0, r.stderr
    exe = d / "harness"
    r = subprocess.run([compiler(), "--coverage", str(d / "frontend.o"), str(d / "harness.o"),
                        "-o", str(exe), "-lm"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    w, h = card.window_samples, card.hop_samples
    out = run(exe, "stream_i16", pcm[: (windows - 1) * h + w], card.feature_shape)
    assert len(out) == windows
    r = subprocess.run([gcov, "-t", "-o", str(d), str(C_SOURCES[0])], capture_output=True,
                       text=True, cwd=d)
    assert r.returncode == 0, r.stderr
    counts = [line.split(":")[0].strip() for line in r.stdout.splitlines()
              if line.rstrip().endswith(DCT_LINE)]
    assert len(counts) == 1, counts
    return int(counts[0]) if counts[0].isdigit() else 0


@pytest.mark.system
@pytest.mark.parametrize("name", ["mfcc 13 ortho, lifter 22",
                                  "mfcc 13 of dB, ref max, top_db 80"])
def test_c_stream_computes_the_dct_of_the_new_frames_only(tmp_path, tour_pcm, name):
    # a log per frame (db_ref "one", no top_db): each hop computes the DCT of the frames it
    # adds, hop / frame_step of them (no centre padding here), the rest kept from the window
    # before; after db_ref "max" or top_db the DCT needs the whole window's values, so every
    # frame's is computed again per hop. Counted by gcov over the real program.
    card = c_case(name)
    fe = card.frontend
    assert not fe.centre.center and card.hop_samples % fe.framing.frame_step == 0
    frames, per_frame = card.frames_per_window, fe.dct.mfcc * fe.mel.mel_bands
    windows = 5
    new = (card.hop_samples // fe.framing.frame_step if fe.log.db_ref != "max"
           and fe.log.top_db == 0 else frames)
    expect = per_frame * (frames + (windows - 1) * new)  # the first window: every frame
    assert dct_multiply_adds(card, tmp_path, tour_pcm, windows) == expect


@pytest.mark.system
@pytest.mark.parametrize("name", ["mfcc 13 ortho, lifter 22",
                                  "mfcc 13 of dB, ref max, top_db 80"])
def test_budget_counts_the_dct_the_c_stream_computes(tmp_path, tour_pcm, name):
    # `budget`'s DCT multiply-adds per hop are what the C stream does per hop (gcov's count
    # over 5 windows, less the first window's, over the 4 hops after it)
    from monitor.device.budget import frontend_ops_per_hop

    card = c_case(name)
    first = card.frames_per_window * card.frontend.dct.mfcc * card.frontend.mel.mel_bands
    measured = (dct_multiply_adds(card, tmp_path, tour_pcm, 5) - first) / 4
    counted = [v for k, v in frontend_ops_per_hop(card).items() if k.startswith("DCT")]
    assert counted == [measured]


@pytest.mark.system
def test_c_fft_matches_numpy(tmp_path):
    # the C radix-2 FFT against numpy.fft.rfft on random input: relative error below 1e-5
    card = variant()
    exe = build(card, tmp_path, "f")
    rng = np.random.default_rng(3)
    x = rng.standard_normal((20, 512)).astype(np.float32)
    out = run(exe, "fft", x, (514,))
    spec = out[:, 0::2] + 1j * out[:, 1::2]
    ref = np.fft.rfft(x.astype(np.float64), axis=-1)
    rel = np.max(np.abs(spec - ref)) / np.max(np.abs(ref))
    assert rel < 1e-5


def _symbols(obj):
    """Sizes of the data objects in an object file, by name (nm -S: address size type name)."""
    nm = shutil.which("nm")
    if nm is None:
        if os.environ.get("SCENEMON_REQUIRE_CC") == "1":
            pytest.fail("SCENEMON_REQUIRE_CC=1 but nm (binutils) is missing")
        pytest.skip("nm (binutils) not found")
    r = subprocess.run([nm, "-S", "--defined-only", str(obj)], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    out = {}
    for line in r.stdout.splitlines():
        parts = line.split()
        if len(parts) == 4 and parts[2].lower() in "bdr":
            out[parts[3]] = int(parts[1], 16)
    return out


@pytest.mark.system
@pytest.mark.parametrize("name", ["logmel htk mel (demo)", "mfcc 13 ortho, lifter 22",
                                  "spectrogram dB, mel_time", "waveform, pre-emphasis, per window",
                                  "per-window standardisation, full-shape scaling",
                                  "centre constant, window centred"])
def test_budget_figures_are_the_object_files_symbols(tmp_path, name):
    # c_buffers (RAM) and c_tables (flash), which `scenemon budget` reports, are exactly the
    # static arrays of the compiled frontend.c (nm -S); only the class names are left out
    card = c_case(name)
    d = tmp_path / "o"
    d.mkdir()
    (d / "frontend_constants.h").write_text(header(card))
    obj = d / "fe.o"
    r = subprocess.run([compiler(), *CFLAGS, "-O0", f"-I{d}", "-c", str(C_SOURCES[0]), "-o",
                        str(obj)], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    syms = {k: v for k, v in _symbols(obj).items() if k != "sm_class_names"}
    assert syms == {**c_buffers(card), **c_tables(card)}


@pytest.mark.system
@pytest.mark.parametrize("define,value,check", [
    ("SM_FFT_LENGTH", "500", "sm_check_fft_power_of_two"),
    ("SM_FRAMES", "120", "sm_check_frames_fit"),
    ("SM_HOP_SAMPLES", "7000", "sm_check_history"),
])
def test_c_code_refuses_sizes_it_cannot_work_with(tmp_path, define, value, check):
    # issue 15: a header the card rules would never write (fft_length = 500 overflowed the
    # radix-2 FFT's buffers) does not compile: the sizes are checked at compile time
    card = variant()
    text = header(card)
    old = next(line for line in text.splitlines() if line.startswith(f"#define {define} "))
    text = text.replace(old, f"#define {define} {value}")
    d = tmp_path / "bad"
    d.mkdir()
    (d / "frontend_constants.h").write_text(text)
    r = subprocess.run([compiler(), *CFLAGS, f"-I{d}", "-c", str(C_SOURCES[0]), "-o",
                        str(d / "fe.o")], capture_output=True, text=True)
    assert r.returncode != 0 and check in r.stderr, r.stderr


def test_sparse_table_in_the_header_matches_references():
    # the sparse form of tf.signal.linear_to_mel_weight_matrix(10, 257, 16000, 0, 8000): these
    # first bins and lengths are computed from TensorFlow in test_frontend's bank check
    card = variant({"mel_bands": 10, "mel_triangles": "mel", "fmin": 0.0, "fmax": 8000.0},
                   scaling=None)
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


def test_runtime_help_says_each_commands_default():
    # vectors gives a .tflite model the microcontroller runtime unless told (cmd_vectors),
    # the session commands LiteRT; budget counts the microcontroller runtime only, so it
    # offers no --runtime and refuses one in one line (exit 2)
    from conftest import cli

    def runtime_help(command):
        text = " ".join(cli(command, "--help").stdout.split())
        return text[text.index("--runtime {litert,micro} for"):]

    assert runtime_help("vectors").startswith("--runtime {litert,micro} for a .tflite model: "
                                              "micro (default)")
    for command in ("replay", "compare", "score", "bench", "profile"):
        assert runtime_help(command).startswith("--runtime {litert,micro} for a .tflite "
                                                "model: litert (default)"), command
    assert "--runtime" not in cli("budget", "--help").stdout
    r = cli("budget", "--model", MODELS / "demo.int8.tflite", "--runtime", "litert")
    assert r.returncode == 2 and r.stdout == ""
    assert len(r.stderr.strip().splitlines()) == 1 and "--runtime" in r.stderr
