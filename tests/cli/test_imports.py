"""What a run imports: a plain `.tflite` replay loads none of the heavy libraries.

Start-up is part of the job (a `.tflite` model is meant to answer in well under a second):
TensorFlow takes seconds to import, ``scipy.fft`` about 0.2 s (its array-API layer pulls in
``numpy.testing`` and ``numpy.f2py``), the terminal UI's libraries tens of milliseconds. The
command's own process lists its modules when it ends, so this test sees what a user's run
imports.
"""

import json
import subprocess
import sys

import numpy as np
import pytest

from conftest import ROOT, write_wav

HEAVY = ("tensorflow", "keras", "scipy", "textual", "rich", "matplotlib", "sounddevice",
         "librosa", "numpy.f2py", "numpy.testing", "distributed", "tomlkit")

# lighter modules a plain replay has no use for, each with why it is kept out (start-up is
# measured against a script that only imports NumPy, soundfile and LiteRT)
NOT_FOR_A_REPLAY = {
    "_hashlib": "OpenSSL, about 2.5 ms to load: a small file's sha256 is CPython's own "
                "(files.file_sha256, files.sha256_hex)",
    "monitor.session.runfolder": "a field run's folder: a session's clocks are session.clock, "
                                 "FieldPlan's Keep is made on demand",
    "monitor.inference.micro": "the microcontroller runner: imported for --runtime micro only",
    "monitor.inference.onnx": "the ONNX Runtime runner: imported for an .onnx model only",
}

DUMP = """if 1:
    import json, sys
    from monitor.cli import main
    code = main(sys.argv[2:])
    open(sys.argv[1], "w").write(json.dumps(sorted(sys.modules)))
    sys.exit(code)
"""


def modules_of(tmp_path, *args) -> set[str]:
    out = tmp_path / "modules.json"
    r = subprocess.run([sys.executable, "-c", DUMP, str(out), *map(str, args)], cwd=ROOT,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    return set(json.loads(out.read_text()))


def heavy_in(mods: set[str]) -> list[str]:
    return sorted(m for m in mods if any(m == h or m.startswith(h + ".") for h in HEAVY))


@pytest.mark.parametrize("model", ["demo.tflite", "demo-mfcc.int8.tflite"])
def test_tflite_replay_imports_no_heavy_library(tmp_path, model):
    wav = write_wav(tmp_path / "a.wav", np.random.default_rng(0).uniform(-0.3, 0.3, 48000))
    mods = modules_of(tmp_path, "replay", wav, "--model", ROOT / "models" / model, "--fast",
                      "--headless", "--out", tmp_path / "s")
    assert heavy_in(mods) == []
    assert {m: why for m, why in NOT_FOR_A_REPLAY.items() if m in mods} == {}
    assert "ai_edge_litert.interpreter" in mods  # the run did load its model
    # only its own command's module
    assert sorted(m for m in mods if m.startswith("monitor.cli.")) == [
        "monitor.cli.flags", "monitor.cli.replay", "monitor.cli.screen"]


def test_report_imports_no_model_runtime(tmp_path):
    wav = write_wav(tmp_path / "a.wav", np.random.default_rng(0).uniform(-0.3, 0.3, 48000))
    modules_of(tmp_path, "replay", wav, "--model", ROOT / "models" / "demo.tflite", "--fast",
               "--headless", "--out", tmp_path / "s")
    mods = modules_of(tmp_path, "report", tmp_path / "s")
    assert not any(m.startswith(("ai_edge_litert", "tensorflow")) for m in mods)
