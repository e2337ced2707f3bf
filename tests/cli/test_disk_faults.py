"""Output folders the process cannot write: a read-only file system and a full one, made
for real with tmpfs mounts (root only; CI runs as root). One sentence, exit code 2, nothing
left behind. Failed before its fix (exit 1 with a traceback; `.summary.json.tmp` left)."""

import json
import os
import shutil
import subprocess

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, cli, write_wav

pytestmark = pytest.mark.system


def _mount(path, *options):
    if os.geteuid() != 0:
        if os.environ.get("CI"):
            pytest.fail("CI runs as root: tmpfs mounts are expected to work")
        pytest.skip("mounting a tmpfs needs root")
    path.mkdir(parents=True, exist_ok=True)
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", ",".join(options), "tmpfs", str(path)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {r.stderr.strip()}")
    return path


@pytest.fixture
def readonly(tmp_path):
    d = _mount(tmp_path / "ro", "ro", "size=1m")
    yield d
    subprocess.run(["umount", str(d)], check=False)


@pytest.fixture
def small_disk(tmp_path):
    d = _mount(tmp_path / "full", "size=2m")
    yield d
    subprocess.run(["umount", "-l", str(d)], check=False)


@pytest.fixture(scope="module")
def clip_session(tmp_path_factory, tour):
    d = tmp_path_factory.mktemp("c")
    x, sr = sf.read(str(tour[0]), dtype="float32")
    wav = write_wav(d / "clip.wav", x[60 * sr: 90 * sr], sr)
    out = d / "s"
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--fast", "--headless",
            "--out", out, "--capture", "uncertain,disagreement,unfamiliar")
    assert r.returncode == 0, r.stderr
    return wav, out


def _one_sentence(r, where):
    assert r.returncode == 2, (r.returncode, r.stderr[-2000:])
    lines = [x for x in r.stderr.splitlines() if x.strip() and "warning" not in x.lower()]
    assert len(lines) == 1 and "Traceback" not in r.stderr, r.stderr[-2000:]
    assert str(where) in lines[0], lines[0]


def test_score_into_a_read_only_folder(readonly, clip_session):
    arch = clip_session[0].parent / "arch"
    arch.mkdir(exist_ok=True)
    shutil.copy(clip_session[0], arch / "a.wav")
    r = cli("score", arch, "--model", MODELS / "demo.tflite", "--out", readonly / "o",
            "--workers", "1")
    _one_sentence(r, readonly)


def test_harvest_into_a_read_only_folder(readonly, clip_session):
    r = cli("harvest", clip_session[1], "--out", readonly / "set")
    _one_sentence(r, readonly)


def test_report_into_a_read_only_folder(readonly, clip_session):
    r = cli("report", clip_session[1], "--html", readonly / "r.html")
    _one_sentence(r, readonly)


def test_vectors_into_a_read_only_folder(readonly, clip_session):
    r = cli("vectors", clip_session[0], "--model", MODELS / "demo.tflite", "--out",
            readonly / "v")
    _one_sentence(r, readonly)


def test_repair_on_a_full_disk_leaves_nothing_behind(small_disk, clip_session):
    s = small_disk / "s"
    shutil.copytree(clip_session[1], s, ignore=shutil.ignore_patterns("audio*.wav"))
    meta = json.loads((s / "session.json").read_text())
    (s / "summary.json").unlink()
    (s / "truth.tsv").unlink(missing_ok=True)
    before = sorted(p.name for p in s.rglob("*"))
    filler = small_disk / "filler"
    with open(filler, "wb") as f:
        try:
            while True:
                f.write(np.zeros(65536, np.uint8).tobytes())
                f.flush()
        except OSError:
            pass
    r = cli("repair", s)
    assert r.returncode == 2 and "Traceback" not in r.stderr, r.stderr
    assert str(s) in r.stderr
    assert sorted(p.name for p in s.rglob("*")) == before
    assert json.loads((s / "session.json").read_text()) == meta
