"""The fixed-point C front end (frontend_q15.c) against its Python model, bit for bit: whole
windows (int16 and float input) and the stream one hop at a time, over every option the q15
front end computes, built with the address and undefined-behaviour sanitizers; and the golden
vectors' exact check (`vectors` of a q15 card, `make check`)."""

import subprocess

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, ROOT, card_dict, cli, compiler
from monitor.device import Q15_SOURCE
from monitor.device.constants import header
from monitor.features.card import card_from_dict
from monitor.features.frontend import FrontEnd
from monitor.sound.windower import windows_of

HARNESS = ROOT / "tests" / "c" / "harness.c"
SANITIZE = ["-std=c99", "-O1", "-Wall", "-Wextra", "-Werror", "-pedantic", "-ffp-contract=off",
            "-fsanitize=address,undefined", "-fno-sanitize-recover=all"]

Q15_CASES = {
    "logmel htk mel (demo)": {},
    "logmel slaney hz slaney": {"mel_scale": "slaney", "mel_triangles": "hz",
                                "mel_norm": "slaney"},
    "magnitude, log10, floor": {"power": 1.0, "log": "log10", "log_floor": 1e-5},
    "dB, ref max, top_db 80": {"log": "db", "db_ref": "max", "top_db": 80.0,
                               "log_offset": 0.0, "log_floor": 1e-10},
    "centre reflect, window centred": {"center": True, "pad_mode": "reflect",
                                       "window_in_frame": "centre"},
    "hamming symmetric, mel_time": {"window": "hamming", "window_symmetric": True,
                                    "layout": "mel_time"},
    "mfcc 13 ortho, lifter 22": {"kind": "mfcc", "mfcc": 13, "dct_norm": "ortho",
                                 "lifter": 22.0},
    "mfcc 20 uniform, magnitude (CMSIS-DSP style)": {"kind": "mfcc", "mfcc": 20,
                                                     "dct_norm": "uniform", "power": 1.0,
                                                     "frame_length": 512},
}


def q15_case(fe):
    per_band = card_from_dict(card_dict(frontend=fe, scaling=None)).bands == 40
    return card_from_dict(card_dict(frontend={"pcm_bits": 16, "arithmetic": "q15", **fe},
                                    scaling="demo" if per_band else {"mean": -3.0, "std": 4.0}))


def run(exe, mode, data, shape):
    r = subprocess.run([str(exe), mode], input=np.ascontiguousarray(data).tobytes(),
                       capture_output=True, timeout=600)
    assert r.returncode == 0, r.stderr.decode()
    return np.frombuffer(r.stdout, np.float32).reshape(-1, *shape)


@pytest.mark.system
@pytest.mark.parametrize("name", list(Q15_CASES))
def test_q15_c_front_end_is_its_python_model_bit_for_bit(tmp_path, tour, name):
    card = q15_case(Q15_CASES[name])
    (tmp_path / "frontend_constants.h").write_text(header(card))
    exe = tmp_path / "harness"
    r = subprocess.run([compiler(), *SANITIZE, f"-I{tmp_path}", f"-I{Q15_SOURCE.parent}",
                        str(Q15_SOURCE), str(HARNESS), "-o", str(exe)],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    x, _ = sf.read(str(tour[0]), dtype="int16")
    x = x[:60 * 16000]
    # the tour, 50 dB quieter, and driven into clipping: the headroom shift and saturation
    quiet = np.round(x / 316.0).astype(np.int16)
    loud = np.clip(x.astype(np.int32) * 8, -32768, 32767).astype(np.int16)
    w, h = card.window_samples, card.hop_samples
    fe = FrontEnd(card)
    for sig in (x, quiet, loud):
        whole = windows_of(sig, w, w)
        want = fe.batch(whole.astype(np.float32) / 32768.0)
        assert np.array_equal(run(exe, "i16", whole, card.feature_shape), want)
        assert np.array_equal(run(exe, "f32", whole.astype(np.float32) / 32768.0,
                                  card.feature_shape), want)
        n = 1 + (sig.size - w) // h
        stream = sig[:(n - 1) * h + w]
        assert np.array_equal(run(exe, "stream_i16", stream, card.feature_shape),
                              fe.batch_consecutive(stream.astype(np.float32) / 32768.0, n))


@pytest.mark.system
@pytest.mark.parametrize("model", ["demo.int8", "demo-mfcc.int8"])
def test_golden_vectors_of_a_q15_card_check_exactly(tmp_path, tour, model):
    # `vectors` of the int8 model behind the q15 front end; the shipped check, built with the
    # sanitizers, must find every q16 value, every float and every int8 input equal
    card = (MODELS / f"{model}.toml").read_text().replace("[frontend]\n",
                                                           '[frontend]\narithmetic = "q15"\n')
    (tmp_path / "q15.toml").write_text(card)
    out = tmp_path / "v"
    r = cli("vectors", tour[0], "--model", MODELS / f"{model}.tflite", "--card",
            tmp_path / "q15.toml", "--out", out, "--count", "12")
    assert r.returncode == 0, r.stderr
    assert (out / "frontend_q15.c").is_file() and not (out / "frontend.c").exists()
    r = subprocess.run(["make", "-C", str(out), "check", f"CC={compiler()}",
                        "CFLAGS=" + " ".join(SANITIZE)], capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0, r.stdout + r.stderr
    last = next(x for x in r.stdout.splitlines() if x.endswith(("passed", "FAILED")))
    assert "features max abs diff 0 (tolerance 0)" in last
    assert "int8 input values that differ: 0, by at most 0 steps (tolerance 0)" in last
    assert "q16 values that differ: 0 (exact check)" in last and last.endswith("passed")


@pytest.mark.system
@pytest.mark.parametrize("name", ["logmel htk mel (demo)", "mfcc 13 ortho, lifter 22"])
def test_q15_budget_figures_are_the_object_files_symbols(tmp_path, name):
    # c_buffers (RAM) and c_tables (flash) of a q15 card, which `scenemon budget` reports, are
    # exactly the static arrays of the compiled frontend_q15.c (nm -S), class names aside
    from test_device import _symbols

    from monitor.device.constants import c_buffers, c_tables

    card = q15_case(Q15_CASES[name])
    (tmp_path / "frontend_constants.h").write_text(header(card))
    obj = tmp_path / "fe.o"
    r = subprocess.run([compiler(), "-std=c99", "-O0", "-Wall", "-Wextra", "-Werror",
                        "-pedantic", f"-I{tmp_path}", "-c", str(Q15_SOURCE), "-o", str(obj)],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    syms = {k: v for k, v in _symbols(obj).items() if k != "sm_class_names"}
    assert syms == {**c_buffers(card), **c_tables(card)}


def _check(out):
    r = subprocess.run(["make", "-C", str(out), "check", f"CC={compiler()}",
                        "CFLAGS=" + " ".join(SANITIZE)], capture_output=True, text=True,
                       timeout=300)
    last = next((x for x in r.stdout.splitlines() if x.endswith(("passed", "FAILED"))), "")
    return r.returncode, last


def _q15_card_file(tmp_path, model="demo.int8", extra=""):
    card = (MODELS / f"{model}.toml").read_text().replace(
        "[frontend]\n", f'[frontend]\narithmetic = "q15"\n{extra}')
    path = tmp_path / "q15.toml"
    path.write_text(card)
    return path


@pytest.mark.system
def test_a_vectors_folder_rewritten_for_another_card_keeps_nothing_of_the_first(tmp_path, tour):
    # found by trying it: q15 vectors, then float vectors into the same folder left
    # frontend_q15.c and features_q16.csv behind, and the Makefile built the wrong front end
    out = tmp_path / "v"
    r = cli("vectors", tour[0], "--model", MODELS / "demo.int8.tflite", "--card",
            _q15_card_file(tmp_path), "--out", out, "--count", "4")
    assert r.returncode == 0, r.stderr
    r = cli("vectors", tour[0], "--model", MODELS / "demo.int8.tflite", "--out", out,
            "--count", "4")
    assert r.returncode == 0, r.stderr
    assert not (out / "frontend_q15.c").exists() and not (out / "features_q16.csv").exists()
    code, last = _check(out)
    assert code == 0 and last.endswith("passed"), last


@pytest.mark.system
@pytest.mark.parametrize("spoil,words", [
    (lambda t: "\n".join(t.splitlines()[:-2]) + "\n", "read 2 windows of pcm.csv, expected 4"),
    (lambda t: t.replace(",", ",x", 1), "pcm.csv row 1 is not"),
    (lambda t: t[:len(t) // 2], "is not 16000 int16 numbers"),
])
def test_a_spoilt_pcm_file_fails_the_check_and_says_why(tmp_path, tour, spoil, words):
    # found by trying it: a pcm.csv cut short or holding a word stopped the reading as if
    # the file had ended, and the summary line still said "passed"
    out = tmp_path / "v"
    r = cli("vectors", tour[0], "--model", MODELS / "demo.int8.tflite", "--card",
            _q15_card_file(tmp_path), "--out", out, "--count", "4")
    assert r.returncode == 0, r.stderr
    pcm = out / "pcm.csv"
    pcm.write_text(spoil(pcm.read_text()))
    code, last = _check(out)
    assert code != 0 and last.endswith("FAILED") and words in last, last


@pytest.mark.system
def test_scaled_values_beyond_int32_saturate_alike_in_c_and_python(tmp_path, tour):
    # a std of 1e-6 takes the scaled values far beyond int32: both sides saturate, so the
    # exact check still holds (the C wrapped them before, and the check's reading did too)
    std = ", ".join(["1e-6"] + ["1.0"] * 39)
    card = _q15_card_file(tmp_path)
    text = card.read_text()
    start = text.index("std = ")
    end = text.index("\n", start)
    card.write_text(text[:start] + f"std = [{std}]" + text[end:])
    out = tmp_path / "v"
    r = cli("vectors", tour[0], "--model", MODELS / "demo.int8.tflite", "--card", card,
            "--out", out, "--count", "4")
    assert r.returncode == 0, r.stderr
    q = np.loadtxt(out / "features_q16.csv", delimiter=",", dtype=np.int64, ndmin=2)
    assert q.max() == 2 ** 31 - 1 or q.min() == -2 ** 31  # it does reach the limit
    code, last = _check(out)
    assert code == 0 and "q16 values that differ: 0" in last, last
