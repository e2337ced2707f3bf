"""The firmware-side check says only what it computed: for a float model it compares the
features and the float outputs' inputs, and has no int8 tensor to compare. Failed before its
fix (it printed "int8 inputs match (0 of 416 differ)" for every window)."""

import subprocess

import pytest
import soundfile as sf

from conftest import MODELS, cli, compiler, write_wav


@pytest.mark.system
def test_check_of_a_float_model_claims_no_int8_comparison(tmp_path, tour):
    x, sr = sf.read(str(tour[0]), dtype="float32")
    wav = write_wav(tmp_path / "clip.wav", x[: 10 * sr], sr)
    out = tmp_path / "v"
    r = cli("vectors", wav, "--model", MODELS / "demo.tflite", "--runtime", "litert",
            "--out", out, "--count", "6")
    assert r.returncode == 0, r.stderr
    r = subprocess.run(["make", "-C", str(out), "check", f"CC={compiler()}"],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stdout + r.stderr
    lines = [x for x in r.stdout.splitlines() if x.startswith("window ")]
    assert len(lines) == 6
    assert not any("int8" in x for x in lines), lines
    assert "a float model: no int8 input compared" in r.stdout and "passed" in r.stdout
