import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

ROOT = Path(__file__).resolve().parent.parent
MODELS = ROOT / "models"
os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")


@pytest.fixture(scope="session")
def tour(tmp_path_factory):
    """The demo tour and its truth, made once per test run."""
    from monitor.demo.tour import ensure_tour

    return ensure_tour(tmp_path_factory.mktemp("tour"))


@pytest.fixture(scope="session")
def demo_card():
    from monitor.spec import load_card

    return load_card(MODELS / "demo.toml")


def run_cli(*args, timeout=300, env=None, cwd=None):
    """Run the real `scenemon` program in a subprocess."""
    e = {**os.environ, **(env or {})}
    return subprocess.run([sys.executable, "-m", "monitor", *map(str, args)],
                          capture_output=True, text=True, timeout=timeout, env=e,
                          cwd=cwd or ROOT)


def write_wav(path, x, sr=16000, subtype="PCM_16"):
    sf.write(str(path), np.asarray(x, dtype=np.float32), sr, subtype=subtype)
    return path


def sine(freq, seconds, sr=16000, amp=0.5):
    t = np.arange(int(seconds * sr)) / sr
    return (amp * np.sin(2 * np.pi * freq * t)).astype(np.float32)
