"""The microcontroller runtime in the chain, golden vectors it reproduces, the firmware-side
check program, and `budget`.

The reference here is the microcontroller interpreter itself: `tflite_micro.runtime` from
the `tflite-micro` package on PyPI (TensorFlow Lite for Microcontrollers' Python
interpreter). Skipped without it unless SCENEMON_REQUIRE_MICRO=1 (set by .ci/run).
"""

import contextlib
import json
import math
import os
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, ROOT, cli, compiler, run_cli

if os.environ.get("SCENEMON_REQUIRE_MICRO") == "1":
    import tflite_micro  # noqa: F401 - must be installed: a missing one fails here
else:
    pytest.importorskip("tflite_micro", reason="tflite-micro not installed "
                        "(pip install 'scenemon[micro]')")

from monitor.device.vectors import pick_windows, read_csv  # noqa: E402
from monitor.features.card import load_card  # noqa: E402
from monitor.features.frontend import FrontEnd  # noqa: E402
from monitor.inference.micro import MicroRunner, UnsupportedOperator  # noqa: E402
from monitor.inference.registry import load_runner  # noqa: E402

INT8 = MODELS / "demo.int8.tflite"


@contextlib.contextmanager
def fd2_text():
    """What native code writes on file descriptor 2 inside the block."""
    box = {}
    saved = os.dup(2)
    with tempfile.TemporaryFile() as tmp:
        os.dup2(tmp.fileno(), 2)
        try:
            yield box
        finally:
            os.dup2(saved, 2)
            os.close(saved)
            tmp.seek(0)
            box["text"] = tmp.read().decode(errors="replace")


@pytest.fixture(scope="module")
def tour_features(tour):
    card = load_card(MODELS / "demo.int8.toml")
    x, _ = sf.read(str(tour[0]), dtype="float32")
    n = 1 + (x.size - card.window_samples) // card.hop_samples
    w = np.stack([x[i * card.hop_samples:i * card.hop_samples + card.window_samples]
                  for i in range(n)])
    return card, FrontEnd(card).batch(w)


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_micro_against_litert_on_the_whole_tour(tour_features):
    # the microcontroller interpreter's reference kernels against LiteRT's default delegate
    # on every tour window: top-1 and (after smoothing) decisions agree on >= 99%
    from monitor.decisions.decide import decide_sequence

    card, feats = tour_features
    micro, lite = MicroRunner(INT8, card), load_runner(INT8, card)
    assert micro.runtime == "micro" and micro.model_kind == "tflite-int8"
    qm = np.stack([micro.raw(f)[1] for f in feats]).astype(int)
    ql = np.stack([lite.raw(f)[1] for f in feats]).astype(int)
    same = int(np.sum(np.all(qm == ql, axis=1)))
    steps = int(np.max(np.abs(qm - ql)))
    print(f"micro vs LiteRT: {same} of {len(feats)} windows bit-identical, max {steps} steps")
    pm, pl = micro.predict(feats), lite.predict(feats)
    assert np.mean(np.argmax(pm, 1) == np.argmax(pl, 1)) >= 0.99
    t1 = (np.arange(len(feats)) * card.hop_samples + card.window_samples) / card.sample_rate
    _, dm = decide_sequence(pm, t1, card.decision)
    _, dl = decide_sequence(pl, t1, card.decision)
    assert np.mean([a == b for a, b in zip(dm, dl)]) >= 0.99


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_replay_with_the_micro_runtime_records_it(tour, tmp_path, tour_windows):
    out = tmp_path / "s"
    r = run_cli("replay", tour[0], "--model", INT8, "--runtime", "micro", "--truth", tour[1],
                "--fast", "--out", out, "--capture", "none")
    assert r.returncode == 0, r.stderr
    meta = json.loads((out / "session.json").read_text())
    assert meta["model"]["runtime"] == "micro" and meta["models"][0]["runtime"] == "micro"
    assert len((out / "windows.jsonl").read_text().splitlines()) == tour_windows


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_compare_one_model_in_two_runtimes(tour):
    r = run_cli("compare", "--model", INT8, "--runtime", "litert", "--model", INT8,
                "--runtime", "micro", tour[0], "--json")
    assert r.returncode == 0, r.stderr
    res = json.loads(r.stdout)
    assert (res["a"]["runtime"], res["b"]["runtime"]) == ("litert", "micro")
    assert 0 < res["int8_windows_identical"] <= res["windows"]
    assert res["top1_agreement"] >= 0.99 and res["decision_agreement"] >= 0.99
    assert res["int8_max_step_difference"] >= 0


@pytest.fixture(scope="module")
def golden(tour, tmp_path_factory):
    out = tmp_path_factory.mktemp("gv") / "golden"
    r = run_cli("vectors", "--model", INT8, tour[0], "--out", out, "--count", "16",
                "--seed", "3")
    assert r.returncode == 0, r.stderr
    return out


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_golden_outputs_rerun_through_the_micro_interpreter(golden):
    # the firmware must reproduce these exactly: re-run through tflite_micro's interpreter
    # directly (not through scenemon's runner), every int8 output is identical
    from tflite_micro import runtime

    meta = json.loads((golden / "meta.json").read_text())
    assert meta["runtime"] == "micro"
    interp = runtime.Interpreter.from_file(str(INT8), arena_size=1 << 20)
    shape = tuple(interp.get_input_details(0)["shape"])
    q_in = read_csv(golden / "input_int8.csv", np.int64).astype(np.int8)
    want = read_csv(golden / "output_int8.csv", np.int64).astype(np.int8)
    for row, expect in zip(q_in, want):
        interp.set_input(row.reshape(shape), 0)
        interp.invoke()
        np.testing.assert_array_equal(interp.get_output(0).reshape(-1), expect)


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_golden_windows_cover_every_predicted_class_in_time_order(golden, tour):
    meta = json.loads((golden / "meta.json").read_text())
    card = load_card(MODELS / "demo.int8.toml")
    runner = MicroRunner(INT8, card)
    x, _ = sf.read(str(tour[0]), dtype="float32")
    n = 1 + (x.size - card.window_samples) // card.hop_samples
    w = np.stack([x[i * card.hop_samples:i * card.hop_samples + card.window_samples]
                  for i in range(n)])
    predicted_in_tour = {card.classes[k] for k in np.argmax(runner.predict(
        FrontEnd(card).batch(w)), 1)}
    assert set(meta["predicted"]) == predicted_in_tour
    starts = meta["window_starts_s"]
    assert starts == sorted(starts) and len(starts) == 16
    assert starts[-1] - starts[0] > 0.5 * n * card.hop_s  # spread over the recording


def test_pick_windows_is_stratified_and_seeded():
    top = np.array([0] * 50 + [1] * 30 + [2] * 15 + [3] * 5)
    a = pick_windows(top, 10, seed=1)
    assert list(a) == sorted(a) and len(set(a)) == 10
    assert {int(top[i]) for i in a} == {0, 1, 2, 3}
    counts = np.bincount(top[a], minlength=4)
    assert counts[0] >= counts[1] >= counts[2] >= counts[3] >= 1  # in proportion, each covered
    assert list(pick_windows(top, 10, seed=1)) == list(a)
    assert list(pick_windows(top, 10, seed=2)) != list(a)


def test_vectors_write_no_machine_paths(golden):
    for p in golden.iterdir():
        text = p.read_text(errors="replace")
        assert str(ROOT) not in text and "/tmp/" not in text and str(golden) not in text, p.name
    meta = json.loads((golden / "meta.json").read_text())
    assert meta["model"] == INT8.name and "/" not in meta["source"]


@pytest.mark.system
def test_check_program_builds_and_passes_on_the_vectors(golden, tmp_path):
    # the generated firmware-side check: C99 with -Wall -Wextra -Werror, built by its own
    # Makefile with the shipped front end, exit 0 within tolerance
    d = tmp_path / "g"
    shutil.copytree(golden, d)
    r = subprocess.run(["make", "-C", str(d), "check", f"CC={compiler()}"], capture_output=True,
                       text=True, timeout=300)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "-std=c99" in r.stdout and "-Werror" in r.stdout and "passed" in r.stdout
    m = re.search(r"features max abs diff ([0-9.e+-]+) \(tolerance ([0-9.e+-]+)\)", r.stdout)
    print(m.group(0))
    assert float(m.group(1)) <= float(m.group(2))
    # a corrupted golden file is caught: the check fails
    rows = (d / "features.csv").read_text().splitlines()
    vals = rows[0].split(",")
    vals[0] = str(float(vals[0]) + 1.0)
    (d / "features.csv").write_text("\n".join([",".join(vals)] + rows[1:]) + "\n")
    r = subprocess.run([str(d / "check_fe")], cwd=d, capture_output=True, text=True)
    assert r.returncode == 1 and "FAILED" in r.stdout


@pytest.mark.system
@pytest.mark.parametrize("bad", ["nan", "-nan", "inf"])
def test_check_program_fails_a_feature_that_is_not_finite(golden, tmp_path, bad):
    # a NaN compares false with everything (IEEE 754), so a "largest difference" never sees
    # it: one value of features.csv made NaN or infinite must fail its window (exit 1)
    d = tmp_path / "g"
    shutil.copytree(golden, d)
    r = subprocess.run(["make", "-C", str(d), "check_fe", f"CC={compiler()}"],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stdout + r.stderr
    rows = (d / "features.csv").read_text().splitlines()
    vals = rows[1].split(",")
    vals[5] = bad
    (d / "features.csv").write_text("\n".join([rows[0], ",".join(vals), *rows[2:]]) + "\n")
    r = subprocess.run([str(d / "check_fe")], cwd=d, capture_output=True, text=True)
    assert r.returncode == 1 and "FAILED" in r.stdout, r.stdout + r.stderr
    window = [x for x in r.stdout.splitlines() if x.startswith("window    1 ")]
    assert len(window) == 1 and "1 not finite" in window[0] and "OUT OF TOLERANCE" in window[0]
    assert all("OUT OF TOLERANCE" not in x for x in r.stdout.splitlines()
               if x.startswith("window ") and x not in window)


def test_arena_is_the_interpreters_own_allocation_record():
    # budget's arena figure is what the interpreter's recording allocator prints
    # (print_allocations), and it is the smallest arena that works
    from tflite_micro import runtime

    card = load_card(MODELS / "demo.int8.toml")
    r = cli("budget", "--model", INT8, "--json")
    assert r.returncode == 0, r.stderr
    b = json.loads(r.stdout)
    data = INT8.read_bytes()
    interp = runtime.Interpreter.from_bytes(data, arena_size=1 << 20)
    with fd2_text() as log:
        interp.print_allocations()
    recorded = int(re.search(r"Arena allocation total (\d+) bytes", log["text"]).group(1))
    assert b["arena_bytes"] == recorded == MicroRunner(INT8, card).arena_bytes
    runtime.Interpreter.from_bytes(data, arena_size=recorded)  # enough
    with fd2_text(), pytest.raises(RuntimeError):
        runtime.Interpreter.from_bytes(data, arena_size=recorded - 64)  # not enough
    assert b["flash_bytes"] > len(data) and b["ram_bytes"] > recorded
    assert set(b) >= {"arena_bytes", "ram_bytes", "flash_bytes", "macs", "ops", "unsupported_ops"}


@pytest.mark.parametrize("model", ["demo.int8.tflite", "demo-mfcc.int8.tflite"])
def test_budget_table_fits_80_columns_and_cuts_no_name(model):
    # every line of the printed budget fits a terminal of 80 columns (the VT100's width, still
    # the common default), wrapping rather than cutting: each name of the --json figures is
    # printed whole, and the assumed cycle figures stand on a line of their own
    r = cli("budget", "--model", MODELS / model, "--clock-mhz", "80")
    assert r.returncode == 0, r.stderr
    lines = r.stdout.splitlines()
    assert max(len(x) for x in lines) <= 80, max(lines, key=len)
    b = json.loads(cli("budget", "--model", MODELS / model, "--json").stdout)
    names = [*b["frontend_ops_per_hop"], *b["ops"], *b["frontend_ram"], *b["frontend_flash"]]
    for name in names:
        assert name.removeprefix("front end: ") in r.stdout, name
    at = lines.index("estimate at 80 MHz")
    assert lines[at + 1].strip().startswith("assumed, not measured: 1 cycle per int8 MAC, "
                                            "2 cycles per front-end operation")
    assert "cycle(s)" not in r.stdout


def test_loading_leaves_file_descriptor_2_to_the_other_threads():
    # the terminal UI draws its screen on file descriptor 2 (textual's Linux driver writes to
    # sys.__stderr__ from its own thread) while the session worker loads the model; what is
    # written there during the load must reach fd 2, not a capture of the interpreter's log.
    # Fault injection: a profile hook writes on fd 2 just as the interpreter package parses
    # the model (its count_resource_variables), standing in for a screen update that lands
    # then. Nothing else may appear: the load itself prints nothing.
    code = f"""
import os, sys
from monitor.features.card import load_card
from monitor.inference.micro import MicroRunner

def hook(frame, event, arg):
    if event == "call" and frame.f_code.co_name == "count_resource_variables":
        os.write(2, b"screen update\\n")

card = load_card({str(MODELS / "demo.int8.toml")!r})
sys.setprofile(hook)
runner = MicroRunner({str(INT8)!r}, card)
sys.setprofile(None)
print(runner.arena_bytes)
"""
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT,
                       timeout=300)
    assert r.returncode == 0, r.stderr
    assert r.stderr.splitlines() == ["screen update"]
    assert int(r.stdout) > 0  # the allocation record was read all the same


def test_the_loading_child_runs_no_file_of_the_current_folder(tmp_path):
    # the child that loads a model is started with -I: a file in the folder the command runs
    # in, named like the interpreter's package, is not imported in its place
    (tmp_path / "tflite_micro.py").write_text("raise SystemExit(5)\n")
    exe = Path(sys.executable).parent / "scenemon"  # the installed command, as a user runs it
    r = subprocess.run([str(exe), "budget", "--model", str(INT8)], cwd=tmp_path,
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr


def _tflite_of(build, tmp_path, name):
    """Convert a Keras model built by `build()` to a float .tflite (in a subprocess: the
    converter leaks memory per call, tensorflow issue 122598)."""
    code = f"""
import os; os.environ["TF_CPP_MIN_LOG_LEVEL"] = "3"
import tensorflow as tf, keras
from keras import layers
{build}
conv = tf.lite.TFLiteConverter.from_keras_model(model)
open({str(tmp_path / name)!r}, "wb").write(conv.convert())
"""
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr[-2000:]
    return tmp_path / name


def _card_for(path, shape, classes):
    frames, bands = shape
    hop = 0.5
    path.with_suffix(".toml").write_text(f"""classes = {json.dumps(classes)}
[audio]
sample_rate = 16000
window_s = {(frames - 1) * 160 / 16000 + 400 / 16000}
hop_s = {hop}
[frontend]
kind = "logmel"
frame_length = 400
frame_step = 160
fft_length = 512
window = "hann"
mel_bands = {bands}
fmin = 0.0
fmax = 8000.0
mel_scale = "htk"
mel_norm = "none"
mel_triangles = "mel"
power = 2.0
log = "ln"
log_offset = 1e-6
layout = "time_mel"
""")


@pytest.mark.slow
def test_macs_of_a_hand_built_model_equal_the_hand_count(tmp_path):
    # a conv (3x3, 6 filters, stride 1, same) on 10 x 8 x 1, then a dense layer of 3:
    # H_out W_out C_out K_h K_w C_in = 10*8*6*3*3*1 = 4320; dense 480 inputs x 3 = 1440
    build = """
inp = keras.Input((10, 8, 1))
x = layers.Conv2D(6, 3, padding="same")(inp)
x = layers.Flatten()(x)
model = keras.Model(inp, layers.Dense(3, activation="softmax")(x))
"""
    path = _tflite_of(build, tmp_path, "hand.tflite")
    _card_for(path, (10, 8), ["a", "b", "c"])
    r = cli("budget", "--model", path, "--json")
    assert r.returncode == 0, r.stderr
    b = json.loads(r.stdout)
    by_op = {x["op"]: x["macs"] for x in b["layers"]}
    assert by_op["CONV_2D"] == 10 * 8 * 6 * 3 * 3 * 1
    assert by_op["FULLY_CONNECTED"] == 10 * 8 * 6 * 3
    assert b["macs"] == math.fsum([4320, 1440])


@pytest.mark.slow
def test_an_operator_the_micro_runtime_lacks_is_named(tmp_path):
    # the exact GELU (erf form) is a TFLite builtin that the microcontroller runtime has no
    # kernel for: budget and replay say so in one sentence, naming GELU
    build = """
inp = keras.Input((10, 8, 1))
x = layers.Flatten()(inp)
x = layers.Dense(16)(x)
x = layers.Lambda(lambda t: tf.nn.gelu(t, approximate=False))(x)
model = keras.Model(inp, layers.Dense(3, activation="softmax")(x))
"""
    path = _tflite_of(build, tmp_path, "gelu.tflite")
    _card_for(path, (10, 8), ["a", "b", "c"])
    with pytest.raises(UnsupportedOperator) as err:  # the name travels with the error
        MicroRunner(path, load_card(path.with_suffix(".toml")))
    assert err.value.operator == "GELU" and "GELU" in str(err.value)
    r = cli("budget", "--model", path)
    assert r.returncode == 1 and "GELU" in r.stdout and "GELU" in r.stderr
    assert len([x for x in r.stderr.splitlines() if x.strip()]) == 1
    b = json.loads(cli("budget", "--model", path, "--json").stdout)
    assert b["unsupported_ops"] == ["GELU"] and b["arena_bytes"] is None and "GELU" in b["ops"]
    wav = tmp_path / "n.wav"
    sf.write(str(wav), np.zeros(16000, np.float32), 16000)
    r = cli("replay", wav, "--model", path, "--runtime", "micro", "--fast", "--out",
            tmp_path / "s")
    assert r.returncode == 2 and "no kernel for the operator GELU" in r.stderr
    assert not (tmp_path / "s").exists()


def test_without_the_package_one_sentence_says_how_to_install(tmp_path):
    # fault injection: the import of tflite_micro is blocked in a fresh process (the
    # package cannot be uninstalled on demand)
    wav = tmp_path / "n.wav"
    sf.write(str(wav), np.zeros(16000, np.float32), 16000)
    code = ("import sys\n"
            "class Block:\n"
            "    def find_spec(self, name, path=None, target=None):\n"
            "        if name.startswith('tflite_micro'): raise ImportError(name)\n"
            "sys.meta_path.insert(0, Block())\n"
            "from monitor.cli import main\n"
            f"sys.exit(main(['replay', {str(wav)!r}, '--model', {str(INT8)!r}, '--runtime',"
            f" 'micro', '--fast', '--out', {str(tmp_path / 's')!r}]))\n")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 2, r.stderr
    lines = [x for x in r.stderr.splitlines() if x.strip()]
    assert len(lines) == 1 and "tflite-micro" in lines[0] and "pip install" in lines[0]
