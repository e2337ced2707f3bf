import os
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

ROOT = Path(__file__).resolve().parent.parent
MODELS = ROOT / "models"
AUDIO_SERVER = ROOT / "tests" / "audio_server.sh"
os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")


@pytest.fixture(scope="session")
def tour(tmp_path_factory):
    """The demo tour and its truth, made once per test run."""
    from monitor.demo.tour import ensure_tour

    return ensure_tour(tmp_path_factory.mktemp("tour"))


@pytest.fixture(scope="session")
def tour_windows(tour, demo_card):
    """How many windows of the demo card the tour holds: 1 + (samples - window) // hop."""
    n = sf.info(str(tour[0])).frames
    return 1 + (n - demo_card.window_samples) // demo_card.hop_samples


@pytest.fixture(scope="session")
def demo_card():
    from monitor.features.card import load_card

    return load_card(MODELS / "demo.toml")


@dataclass
class CliResult:
    returncode: int
    stdout: str
    stderr: str


def cli(*args, cwd=None) -> CliResult:
    """Run `scenemon` in this process (where a subprocess adds nothing: parsing, bad input,
    reports); stdout and stderr are captured."""
    import contextlib
    import io

    from monitor.cli import main

    out, err = io.StringIO(), io.StringIO()
    old = os.getcwd()
    try:
        if cwd:
            os.chdir(cwd)
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                code = main([str(a) for a in args])
            except SystemExit as exc:  # argparse's own exits
                code = exc.code if isinstance(exc.code, int) else 2
    finally:
        os.chdir(old)
    return CliResult(int(code), out.getvalue(), err.getvalue())


def run_cli(*args, timeout=300, env=None, cwd=None):
    """Run the real `scenemon` program in a subprocess."""
    e = {**os.environ, **(env or {})}
    return subprocess.run([sys.executable, "-m", "monitor", *map(str, args)],
                          capture_output=True, text=True, timeout=timeout, env=e,
                          cwd=cwd or ROOT)


def card_dict(*, frontend=None, audio=None, scaling="demo", classes=None, **top):
    """A complete card as parsed TOML: the demo card's tables with the given [frontend] and
    [audio] keys changed (a value of None removes the key); `scaling` None drops the table."""
    from monitor.features.card import read_card_table

    raw = read_card_table(MODELS / "demo.toml")
    for table, changes in (("frontend", frontend), ("audio", audio)):
        for k, v in (changes or {}).items():
            if v is None:
                raw[table].pop(k, None)
            else:
                raw[table][k] = v
    if scaling is None:
        raw.pop("scaling")
    elif scaling != "demo":
        raw["scaling"] = scaling
    if classes is not None:
        raw["classes"] = list(classes)
    raw.update(top)
    return raw


def write_wav(path, x, sr=16000, subtype="PCM_16"):
    sf.write(str(path), np.asarray(x, dtype=np.float32), sr, subtype=subtype)
    return path


def sine(freq, seconds, sr=16000, amp=0.5):
    t = np.arange(int(seconds * sr)) / sr
    return (amp * np.sin(2 * np.pi * freq * t)).astype(np.float32)


def jumpy_copy(folder, model="demo", *, profile=False):
    """A copy of a demo model (`model`: "demo" or "demo.int8") as ``folder/jumpy.tflite`` with
    a card of its own that decides on every raw window (no smoothing, no confirmation), so
    that its decisions differ from the original's at times; with `profile` its novelty
    profile beside it too. Returns the model's path."""
    import shutil

    folder = Path(folder)
    shutil.copy(MODELS / f"{model}.tflite", folder / "jumpy.tflite")
    if profile:
        shutil.copy(MODELS / f"{model}.profile.npz", folder / "jumpy.profile.npz")
    card = (MODELS / f"{model}.toml").read_text()
    jumpy = card.replace('smoothing = "mean"', 'smoothing = "none"').replace("confirm = 2",
                                                                           "confirm = 1")
    assert jumpy != card
    (folder / "jumpy.toml").write_text(jumpy)
    return folder / "jumpy.tflite"


def compiler():
    """The C compiler on PATH; the test fails under SCENEMON_REQUIRE_CC=1 without one, else skips."""
    for cc in ("gcc", "cc", "clang"):
        if shutil.which(cc):
            return shutil.which(cc)
    if os.environ.get("SCENEMON_REQUIRE_CC") == "1":
        pytest.fail("SCENEMON_REQUIRE_CC=1 but no C compiler (gcc, cc) found")
    pytest.skip("no C compiler found")


def need_audio_server() -> None:
    """Start the suite's PulseAudio server (tests/audio_server.sh) for a live test; skip with
    the reason where it cannot run, or fail when SCENEMON_REQUIRE_AUDIO=1 (set by .ci/run)."""
    why = None
    if not shutil.which("pactl") or not shutil.which("paplay"):
        why = "pulseaudio-utils (pactl, paplay) not installed"
    elif subprocess.run(["bash", str(AUDIO_SERVER), "start"], capture_output=True).returncode:
        why = "no PulseAudio server could be started"
    else:
        try:
            import sounddevice as sd
        except OSError as exc:
            why = f"PortAudio missing: {exc}"
        else:
            if not any(d["name"] == "pulse" and d["max_input_channels"] > 0
                       for d in sd.query_devices()):
                why = "PortAudio has no ALSA 'pulse' device (libasound2-plugins missing?)"
    if why:
        if os.environ.get("SCENEMON_REQUIRE_AUDIO") == "1":
            pytest.fail(f"SCENEMON_REQUIRE_AUDIO=1 but {why}")
        pytest.skip(why)
