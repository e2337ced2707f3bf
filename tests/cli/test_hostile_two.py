"""Hostile input, second probe: windows left out without a word, cards corrupted by an
edit, truth and review decisions lost, workers that outlive their parent, files written
through links, and one sentence with exit code 2 for every hostile file. Each test here
failed before its fix."""

import csv
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, ROOT, cli, run_cli, write_wav


def records(path):
    return [json.loads(x) for x in path.read_text().splitlines()]


def sentence(r):
    """The stderr lines that are not warnings: bad input gets exactly one."""
    return [x for x in r.stderr.splitlines() if x.strip() and "warning" not in x.lower()]


def assert_refused(r, *words):
    assert r.returncode == 2, (r.returncode, r.stderr[-2000:])
    lines = sentence(r)
    assert len(lines) == 1 and "Traceback" not in r.stderr, r.stderr[-2000:]
    for w in words:
        assert w in lines[0], (w, lines[0])


def model_copy(folder, *, card_text=None, profile=None):
    """The demo model copied into `folder` with its card (or `card_text`), and a profile."""
    folder.mkdir(parents=True, exist_ok=True)
    shutil.copy(MODELS / "demo.tflite", folder / "m.tflite")
    (folder / "m.toml").write_text(card_text or (MODELS / "demo.toml").read_text())
    if profile is not None:
        np.savez(folder / "m.profile.npz", **profile)
    return folder / "m.tflite"


def demo_profile():
    with np.load(MODELS / "demo.profile.npz", allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


@pytest.fixture(scope="module")
def short(tmp_path_factory, tour):
    """The first 20 s of the tour and their truth."""
    d = tmp_path_factory.mktemp("short")
    x, sr = sf.read(str(tour[0]), dtype="float32")
    wav = write_wav(d / "short.wav", x[: 20 * sr], sr)
    lines = []
    for line in tour[1].read_text().splitlines():
        if not line.strip() or line.startswith("#"):
            continue
        a, b, lab = line.split("\t")
        if float(a) < 20:
            lines.append(f"{a}\t{min(float(b), 20.0)}\t{lab}")
    (d / "short.tsv").write_text("\n".join(lines) + "\n")
    return wav, d / "short.tsv"


# --- windows never left out -----------------------------------------------------------------
def test_a_profile_whose_covariance_cannot_be_used_is_refused_before_a_session_starts(
        tmp_path, short):
    prof = demo_profile()
    prof["covariances"] = np.broadcast_to(np.eye(prof["means"].shape[1]) * 1e-300,
                                          prof["covariances"].shape).copy()
    model = model_copy(tmp_path / "m", profile=prof)
    out = tmp_path / "s"
    r = cli("replay", short[0], "--model", model, "--fast", "--headless", "--out", out)
    assert_refused(r, "m.profile.npz", "covariance")
    assert not out.exists()


def test_a_profile_with_wrong_shapes_leaves_no_session_behind(tmp_path, short):
    prof = demo_profile()
    prof["means"] = prof["means"][:, :7]
    model = model_copy(tmp_path / "m", profile=prof)
    out = tmp_path / "s"
    r = cli("replay", short[0], "--model", model, "--fast", "--headless", "--out", out)
    assert_refused(r, "m.profile.npz")
    assert not out.exists()


def test_a_non_finite_figure_is_flagged_on_its_line_not_left_out(tmp_path, short):
    # a profile that is fine when read but gives an infinite distance for some windows:
    # every window is still written, the figure is null and the line says why
    prof = demo_profile()
    prof["means"] = prof["means"].copy()
    prof["means"][:, 0] = 1e300
    model = model_copy(tmp_path / "m", profile=prof)
    out = tmp_path / "s"
    r = cli("replay", short[0], "--model", model, "--fast", "--headless", "--out", out)
    assert r.returncode in (0, 2), r.stderr
    if r.returncode == 2:  # refused as it was read: nothing was started
        assert_refused(r, "m.profile.npz")
        return
    lines = records(out / "windows.jsonl")
    assert len(lines) == 1 + (20 * 16000 - 16000) // 8000
    summary = json.loads((out / "summary.json").read_text())
    assert summary["windows"] == len(lines)


def test_a_log_floor_below_float32_is_refused(tmp_path, short):
    # log_floor 1e-50 is 0 in float32, so silence would give log(0) = -inf
    # (numpy.finfo(numpy.float32).tiny = 1.1754944e-38, IEEE 754 binary32)
    text = (MODELS / "demo.toml").read_text()
    import re
    text = re.sub(r"(?m)^log_offset = .*$", "log_offset = 0.0\nlog_floor = 1e-50", text)
    model = model_copy(tmp_path / "m", card_text=text)
    r = cli("replay", short[0], "--model", model, "--fast", "--headless",
            "--out", tmp_path / "s")
    assert_refused(r, "log_floor")


@pytest.mark.parametrize("key, value", [("enter", "1e400"), ("margin", "-inf"),
                                        ("ema_alpha", "nan")])
def test_a_non_finite_decision_setting_is_refused(tmp_path, short, key, value):
    text = (MODELS / "demo.toml").read_text()
    import re
    text, n = re.subn(rf"(?m)^{key} = .*$", f"{key} = {value}", text)
    if n == 0:
        text = text.replace("[decision]", f"[decision]\n{key} = {value}")
    model = model_copy(tmp_path / "m", card_text=text)
    r = cli("replay", short[0], "--model", model, "--fast", "--headless",
            "--out", tmp_path / "s")
    assert_refused(r, key)


# --- cards edited in place keep everything but the tuned keys ------------------------------
HAND_EDITED = (
    '# a card as people write them\r\n'
    'classes = ["quiet_room", "voices", "traffic", "machinery"]\r\n'
    'frontend = { kind = "logmel", frame_length = 400, frame_step = 160, fft_length = 512, '
    'window = "hann", mel_bands = 40, fmin = 0.0, fmax = 8000.0, mel_scale = "htk", '
    'mel_norm = "none", mel_triangles = "hz", power = 2.0, log = "ln", log_offset = 1e-6, '
    'layout = "time_mel" }   # an inline table\r\n'
    'scaling.mean = 0.0   # dotted keys\r\n'
    'scaling.std = 1.0\r\n'
    '\r\n'
    '[ audio ]\r\n'
    '"sample_rate" = 16000   # quoted key\r\n'
    'window_s = 1.0\r\n'
    'hop_s = 0.5\r\n'
    '\r\n'
    '[ decision ]   # tuned by hand\r\n'
    'smoothing = "mean"\r\n'
    'smoothing_windows = 3\r\n'
    'enter = 0.6   # keep this comment\r\n'
    '"exit" = 0.0\r\n'
    'margin = 0.1\r\n'
    'confirm = 2\r\n'
)


def test_tune_apply_keeps_a_hand_edited_card_byte_for_byte_but_the_tuned_keys(tmp_path):
    import tomllib

    from monitor.decisions.decide import DecisionSettings
    from monitor.review.tune import apply_to_card

    card = tmp_path / "c.toml"
    text = HAND_EDITED
    card.write_bytes(text.encode())
    before = tomllib.loads(text)
    new = DecisionSettings(smoothing="ema", smoothing_windows=3, ema_alpha=0.25, enter=0.7,
                           exit=0.0, margin=0.1, confirm=3, min_hold_s=0.0)
    apply_to_card(card, new)
    after_text = card.read_bytes().decode()
    after = tomllib.loads(after_text)
    # the same settings apart from the tuned keys (tomllib is Python's own TOML 1.0 reader)
    assert {k: v for k, v in after.items() if k != "decision"} == \
        {k: v for k, v in before.items() if k != "decision"}
    assert after["decision"] == {**before["decision"], **new.to_dict()}
    # every line that held no tuned value is as it was, CRLF endings, spacing and comments too
    assert "\r\n" in after_text and "\n" not in after_text.replace("\r\n", "")
    kept = [x for x in text.split("\r\n") if not any(
        x.lstrip('"').startswith(k) for k in ("smoothing", "ema_alpha", "enter", "confirm"))]
    got = after_text.split("\r\n")
    for line in kept:
        assert line in got, line
    assert "enter = 0.7   # keep this comment" in got
    assert got.count("[ decision ]   # tuned by hand") == 1


# --- truth and review decisions the session was given are kept ------------------------------
def test_repair_keeps_the_truth_file_the_session_was_given(tmp_path, short):
    out = tmp_path / "s"
    r = cli("replay", short[0], "--model", MODELS / "demo.tflite", "--truth", short[1],
            "--fast", "--headless", "--out", out)
    assert r.returncode == 0, r.stderr
    given = (out / "truth.tsv").read_text()
    (out / "truth.tsv").unlink()
    (out / "summary.json").unlink()
    r = cli("repair", out)
    assert r.returncode == 0, r.stderr
    from monitor.session.truth import load_truth

    want = [(s.onset, s.offset, s.label) for s in load_truth(out / "truth.tsv").spans]
    assert want == [(s.onset, s.offset, s.label)
                    for s in load_truth(short[1]).spans], (given, (out / "truth.tsv").read_text())


@pytest.fixture(scope="module")
def captured(tmp_path_factory, tour):
    out = tmp_path_factory.mktemp("cap") / "s"
    r = run_cli("replay", tour[0], "--model", MODELS / "demo.tflite", "--truth", tour[1],
                "--fast", "--headless", "--out", out)
    assert r.returncode == 0, r.stderr
    return out


def _manifest(out):
    with open(out / "manifest.csv", newline="") as f:
        return list(csv.DictReader(f))


def test_a_second_harvest_takes_the_newest_review_decision(tmp_path, captured):
    from monitor.session import snippets as S

    s = tmp_path / "s"
    shutil.copytree(captured, s)
    out = tmp_path / "set"
    assert cli("harvest", s, "--out", out).returncode == 0
    first = _manifest(out)
    snips = S.iter_snippets(s)
    assert len(snips) >= 2 and len(first) == len(snips)
    relabelled, dropped = snips[0], snips[1]
    old_label = relabelled.label
    new_label = next(c for c in ("quiet_room", "voices", "traffic", "machinery")
                     if c != old_label)
    S.relabel(relabelled, s, new_label, ["quiet_room", "voices", "traffic", "machinery"])
    S.drop(dropped, s)
    r = cli("harvest", s, "--out", out)
    assert r.returncode == 0, r.stderr
    rows = _manifest(out)
    assert "decision" in rows[0]
    by_sha = {row["audio_sha256"]: row for row in rows}
    import hashlib
    sha_r = hashlib.sha256(relabelled.wav.read_bytes()).hexdigest()
    sha_d = hashlib.sha256(dropped.wav.read_bytes()).hexdigest()
    assert by_sha[sha_r]["label"] == new_label and by_sha[sha_r]["decision"] == "relabelled"
    assert (out / by_sha[sha_r]["path"]).is_file()
    assert by_sha[sha_r]["path"].startswith(new_label + "/")
    assert sha_d not in by_sha
    assert len(rows) == len(first) - 1
    on_disk = sorted(str(p.relative_to(out)) for p in out.glob("*/*.wav"))
    assert on_disk == sorted(row["path"] for row in rows)


# --- each model's lines with that model's classes --------------------------------------------
def test_tune_model_b_reads_b_with_its_own_classes(tmp_path, short):
    # model B: the demo model with its classes named in another order; read with A's names
    # its figures would be another model's
    folder = tmp_path / "b"
    text = (MODELS / "demo.toml").read_text()
    text = text.replace('classes = ["quiet_room", "voices", "traffic", "machinery"]',
                        'classes = ["machinery", "traffic", "voices", "quiet_room"]')
    b = model_copy(folder, card_text=text)
    alone = tmp_path / "alone"
    r = cli("replay", short[0], "--model", b, "--truth", short[1], "--fast", "--headless",
            "--out", alone)
    assert r.returncode == 0, r.stderr
    ab = tmp_path / "ab"
    r = cli("replay", short[0], "--model", MODELS / "demo.tflite", "--model", b, "--truth",
            short[1], "--fast", "--headless", "--out", ab)
    assert r.returncode == 0, r.stderr
    one = cli("tune", alone)
    two = cli("tune", ab, "--model-b")
    assert one.returncode == 0 and two.returncode == 0, (one.stderr, two.stderr)
    def figures(out):  # the table, without the line that says how long the sweep took
        return [x for x in out.splitlines()[1:] if not x.startswith("swept ")]

    assert figures(one.stdout) == figures(two.stdout)
    # the report reads B's lines with B's classes too: the same figures as B alone
    ja, jb = json.loads(cli("report", alone, "--json").stdout), \
        json.loads(cli("report", ab, "--json").stdout)
    for k in ("accuracy", "confusion", "decided_s"):
        assert ja[k] == jb["b"][k], k


# --- no worker outlives its parent -----------------------------------------------------------
def _children(pid):
    out = set()
    for task in os.listdir(f"/proc/{pid}/task"):
        try:
            with open(f"/proc/{pid}/task/{task}/children") as f:
                out |= {int(x) for x in f.read().split()}
        except OSError:
            pass
    return out


def _alive(pid):
    try:
        with open(f"/proc/{pid}/stat") as f:
            return f.read().split(")")[-1].split()[0] != "Z"
    except OSError:
        return False


@pytest.mark.slow
@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGKILL])
def test_score_workers_end_when_their_parent_is_killed(tmp_path, tour, sig):
    # files long enough that a worker is still busy with one when its parent dies (32 min
    # of audio each: several seconds of work)
    arch = tmp_path / "a"
    arch.mkdir()
    x, sr = sf.read(str(tour[0]), dtype="int16")
    long = np.tile(x, 8)
    for k in range(4):
        sf.write(str(arch / f"f{k}.wav"), long, sr, subtype="PCM_16")
    p = subprocess.Popen([sys.executable, "-m", "monitor", "score", str(arch), "--model",
                          str(MODELS / "demo.tflite"), "--out", str(tmp_path / "o"),
                          "--workers", "2"], cwd=ROOT, stdout=subprocess.DEVNULL,
                         stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 60
        kids: set[int] = set()
        while time.monotonic() < deadline and len(kids) < 1:
            kids = _children(p.pid)
            time.sleep(0.05)
        assert kids, "no worker started"
        time.sleep(1.0)
        kids |= _children(p.pid)
        os.kill(p.pid, sig)
        p.wait(timeout=30)
        deadline = time.monotonic() + 3
        while time.monotonic() < deadline and any(_alive(k) for k in kids):
            time.sleep(0.1)
        left = [k for k in kids if _alive(k)]
        assert left == [], f"workers {left} outlived their parent"
    finally:
        for k in _children(p.pid) if _alive(p.pid) else ():
            os.kill(k, signal.SIGKILL)
        if p.poll() is None:
            p.kill()


# --- nothing written outside the folder given --------------------------------------------------
def test_harvest_refuses_a_link_inside_its_folder(tmp_path, captured):
    out = tmp_path / "set"
    assert cli("harvest", captured, "--out", out).returncode == 0
    outside = tmp_path / "outside"
    outside.mkdir()
    label = _manifest(out)[0]["label"]
    shutil.rmtree(out / label)
    (out / label).symlink_to(outside, target_is_directory=True)
    (out / "manifest.csv").write_text((out / "manifest.csv").read_text().split("\n")[0] + "\n")
    r = cli("harvest", captured, "--out", out)
    assert_refused(r, str(out / label))
    assert list(outside.iterdir()) == []


@pytest.mark.system
def test_vectors_refuses_a_link_inside_its_folder(tmp_path, short):
    # an earlier vectors folder, one of its files now a link to a file outside it
    out = tmp_path / "v"
    r = cli("vectors", short[0], "--model", MODELS / "demo.tflite", "--out", out)
    assert r.returncode == 0, r.stderr
    outside = tmp_path / "outside.c"
    outside.write_text("/* mine */\n")
    (out / "frontend.c").unlink()
    (out / "frontend.c").symlink_to(outside)
    r = cli("vectors", short[0], "--model", MODELS / "demo.tflite", "--out", out)
    assert_refused(r, str(out / "frontend.c"))
    assert outside.read_text() == "/* mine */\n"


def test_a_card_that_is_a_link_to_a_card_is_read(tmp_path, short):
    folder = tmp_path / "m"
    folder.mkdir()
    shutil.copy(MODELS / "demo.tflite", folder / "m.tflite")
    real = tmp_path / "cards" / "real.toml"
    real.parent.mkdir()
    shutil.copy(MODELS / "demo.toml", real)
    (folder / "m.toml").symlink_to(real)
    r = cli("replay", short[0], "--model", folder / "m.tflite", "--fast", "--headless",
            "--out", tmp_path / "s")
    assert r.returncode == 0, r.stderr


# --- score: file names within the file system's limit, globs escaped ---------------------------
def test_score_result_names_stay_within_255_bytes_and_unique(tmp_path, short):
    arch = tmp_path / "a"
    deep = arch
    for k in range(3):
        deep = deep / (f"{k}" + "d" * 120)
    deep.mkdir(parents=True)
    shutil.copy(short[0], deep / ("x" * 100 + ".wav"))
    shutil.copy(short[0], deep / ("x" * 99 + "y.wav"))
    out = tmp_path / "o"
    r = cli("score", arch, "--model", MODELS / "demo.tflite", "--out", out, "--workers", "1")
    assert r.returncode == 0, r.stderr
    names = [p.name for p in out.rglob("*")]
    assert names and max(len(n.encode()) for n in names) <= 255
    agg = json.loads((out / "aggregate.json").read_text())
    assert agg["files"] == 2


def test_truth_glob_takes_the_stem_literally(tmp_path, short):
    arch = tmp_path / "a"
    arch.mkdir()
    shutil.copy(short[0], arch / "take[1].wav")
    shutil.copy(short[1], arch / "take[1].truth.tsv")
    (arch / "take1.truth.tsv").write_text("0\t20\tmachinery\n")  # what [1] would match
    out = tmp_path / "o"
    r = cli("score", arch, "--model", MODELS / "demo.tflite", "--out", out, "--workers", "1",
            "--truth-glob", "{stem}.truth.tsv")
    assert r.returncode == 0, r.stderr
    agg = json.loads((out / "aggregate.json").read_text())
    # the truth of take[1].wav is take[1].truth.tsv (20 s of it), not take1.truth.tsv
    assert agg["overall"]["windows_with_truth"] == agg["overall"]["windows"]
    assert agg["overall"]["accuracy"] > 0.5


# --- hostile session files ----------------------------------------------------------------------
@pytest.mark.parametrize("line", ["[1, 2, 3]", "42", "[" * 1000 + "]" * 1000, '"text"',
                                  '{"i": 0, "t0": 1e999}'],
                         ids=["list", "number", "deep", "string", "huge"])
@pytest.mark.parametrize("command", ["report", "harvest", "tune"])
def test_a_hostile_window_line_gives_a_sentence_not_a_traceback(tmp_path, captured, line,
                                                               command):
    s = tmp_path / "s"
    shutil.copytree(captured, s)
    with open(s / "windows.jsonl", "a") as f:
        f.write(line + "\n")
    before = {p: p.read_bytes() for p in s.rglob("*") if p.is_file()}
    args = [command, s] + (["--out", tmp_path / "set"] if command == "harvest" else [])
    r = cli(*args)
    assert r.returncode in (0, 2) and "Traceback" not in r.stderr, r.stderr[-3000:]
    assert {p: p.read_bytes() for p in s.rglob("*") if p.is_file()} == before


@pytest.mark.parametrize("field, value", [("started_at", 10 ** 400), ("classes", [1e308] * 4),
                                          ("card", {"audio": {"hop_s": 10 ** 400}}),
                                          ("models", [{"path": 1}] * 3)])
def test_a_hostile_session_json_gives_a_sentence_not_a_traceback(tmp_path, captured, field,
                                                                value):
    s = tmp_path / "s"
    shutil.copytree(captured, s)
    meta = json.loads((s / "session.json").read_text())
    meta[field] = value
    (s / "session.json").write_text(json.dumps(meta))
    for command in ("report", "tune"):
        r = cli(command, s)
        assert r.returncode in (0, 2) and "Traceback" not in r.stderr, (command, r.stderr[-3000:])
    r = cli("harvest", s, "--out", tmp_path / "set")
    assert r.returncode in (0, 2) and "Traceback" not in r.stderr, r.stderr[-3000:]


def test_one_bad_sidecar_is_skipped_counted_and_named(tmp_path, captured):
    s = tmp_path / "s"
    shutil.copytree(captured, s)
    sides = sorted((s / "snippets").glob("*/*.json"))
    sides[0].write_text('{"label": ["not", "a", "label"], "t0": "soon"}')
    r = cli("harvest", s, "--out", tmp_path / "set")
    assert r.returncode == 0, r.stderr
    assert sides[0].name in r.stdout + r.stderr
    assert len(_manifest(tmp_path / "set")) == len(sides) - 1


# --- hostile model-side files -------------------------------------------------------------------
def _flipped(tmp_path):
    data = bytearray((MODELS / "demo.int8.tflite").read_bytes())
    rng = np.random.default_rng(7)
    for k in rng.integers(64, len(data), 40):
        data[k] ^= 0xFF
    folder = tmp_path / "m"
    folder.mkdir()
    (folder / "m.tflite").write_bytes(bytes(data))
    shutil.copy(MODELS / "demo.int8.toml", folder / "m.toml")
    return folder / "m.tflite"


@pytest.mark.slow
def test_a_bit_flipped_model_in_the_micro_runtime_is_one_sentence(tmp_path, short):
    pytest.importorskip("tflite_micro")
    model = _flipped(tmp_path)
    r = run_cli("replay", short[0], "--model", model, "--runtime", "micro", "--fast",
                "--headless", "--out", tmp_path / "s", timeout=600)
    assert r.returncode == 2 and "Traceback" not in r.stderr, r.stderr[-3000:]
    assert str(model) in sentence(r)[-1]
    r = run_cli("budget", "--model", model, timeout=600)
    assert r.returncode == 2 and "Traceback" not in r.stderr, r.stderr[-3000:]


def test_a_features_file_declaring_a_huge_shape_is_refused_before_reading(tmp_path, short):
    npy = tmp_path / "f.npy"
    header = "{'descr': '<f4', 'fortran_order': False, 'shape': (100000, 100000, 100), }"
    header = header.ljust(118) + "\n"
    npy.write_bytes(b"\x93NUMPY\x01\x00" + len(header).to_bytes(2, "little")
                    + header.encode() + b"\0" * 64)
    r = cli("card", "check", MODELS / "demo.toml", short[0], npy)
    assert_refused(r, "f.npy")


# --- the next command names a path a person can type -----------------------------------------
def test_the_next_command_hint_has_no_dot_dot_parts(monkeypatch, tmp_path):
    # a venv outside the repository, its program typed with ".." in it: the hint shows the
    # same file as a normalised path (os.path.normpath), which works from any folder
    from monitor.assembly.assemble import invocation

    exe = Path(sys.executable).parent / "scenemon"
    typed = os.path.join(str(exe.parent), "..", exe.parent.name, "scenemon")
    monkeypatch.setenv("PATH", "/usr/bin:/bin")
    monkeypatch.setattr(sys, "argv", [typed, "replay"])
    shown = invocation()
    assert ".." not in Path(shown).parts and Path(shown).resolve() == exe.resolve(), shown
    py = os.path.join(os.path.dirname(sys.executable), "..",
                      os.path.basename(os.path.dirname(sys.executable)),
                      os.path.basename(sys.executable))
    monkeypatch.setattr(sys, "argv", ["-m", "replay"])
    monkeypatch.setattr(sys, "executable", py)
    monkeypatch.chdir(tmp_path)
    shown = invocation().split(" -m ")[0]
    assert ".." not in Path(shown).parts, shown


# --- control characters never reach the terminal raw ----------------------------------------
ESC_CARD = (MODELS / "demo.toml").read_text().replace(
    'classes = ["quiet_room", "voices", "traffic", "machinery"]',
    'classes = ["quiet\\u001b[2J", "voices\\u0007", "traffic\\u001b]0;x\\u0007", "machinery"]')


def test_decision_change_lines_show_control_characters_escaped(tmp_path, short):
    assert ESC_CARD != (MODELS / "demo.toml").read_text()
    model = model_copy(tmp_path / "m", card_text=ESC_CARD)
    r = cli("replay", short[0], "--model", model, "--fast", "--out", tmp_path / "s")
    assert r.returncode == 0, r.stderr
    assert "quiet" in r.stdout + r.stderr
    assert "\x1b" not in r.stdout + r.stderr and "\x07" not in r.stdout + r.stderr


def test_the_vectors_summary_shows_control_characters_escaped(tmp_path, short):
    model = model_copy(tmp_path / "m", card_text=ESC_CARD)
    r = cli("vectors", short[0], "--model", model, "--out", tmp_path / "v")
    assert r.returncode == 0, r.stderr
    assert "\x1b" not in r.stdout + r.stderr and "\x07" not in r.stdout + r.stderr


def test_a_window_line_with_a_non_finite_figure_is_written_flagged():
    # JSON (RFC 8259) has no NaN or infinity: the figure becomes null, the line says why
    from monitor.decisions.contract import WindowResult

    r = WindowResult(i=3, start=0, t0=0.0, t1=1.0, probs=np.array([0.5, np.nan]),
                     smoothed=np.array([0.5, 0.5]), top="a", decision=None, truth=None,
                     level_dbfs=float("-inf"), clipped=0.0, gap=0, ms=0.1,
                     novelty=float("inf"), unfamiliar=False)
    rec = json.loads(r.json_line())
    assert rec["i"] == 3 and rec["probs"] == [0.5, None] and rec["novelty"] is None
    assert rec["level_dbfs"] is None and rec["fault"] == "non-finite figure"


@pytest.mark.slow
@pytest.mark.parametrize("seed", [1, 6])  # flips that leave a tensor name that is not UTF-8
def test_budget_of_a_model_with_a_few_flipped_bytes_is_one_sentence(tmp_path, seed):
    data = bytearray((MODELS / "demo.int8.tflite").read_bytes())
    rng = np.random.default_rng(seed)
    for k in rng.integers(8, len(data), int(rng.integers(1, 4))):
        data[k] ^= int(rng.integers(1, 256))
    folder = tmp_path / "m"
    folder.mkdir()
    (folder / "m.tflite").write_bytes(bytes(data))
    shutil.copy(MODELS / "demo.int8.toml", folder / "m.toml")
    r = cli("budget", "--model", folder / "m.tflite")
    assert_refused(r, str(folder / "m.tflite"))


def test_a_relabel_whose_file_left_the_set_is_copied_again(tmp_path, captured):
    # someone deleted a harvested file by hand; the snippet is relabelled since: the next
    # harvest puts its verified audio under the new label (it stopped with an error)
    from monitor.session import snippets as S

    s = tmp_path / "s"
    shutil.copytree(captured, s)
    out = tmp_path / "set"
    assert cli("harvest", s, "--out", out).returncode == 0
    sn = S.iter_snippets(s)[0]
    row = next(r for r in _manifest(out) if r["path"].endswith(sn.wav.stem + ".wav"))
    (out / row["path"]).unlink()
    new = next(c for c in ("quiet_room", "voices", "traffic", "machinery") if c != sn.label)
    S.relabel(sn, s, new, ["quiet_room", "voices", "traffic", "machinery"])
    r = cli("harvest", s, "--out", out)
    assert r.returncode == 0, r.stderr
    moved = next(r_ for r_ in _manifest(out) if r_["audio_sha256"] == row["audio_sha256"])
    assert moved["label"] == new and (out / moved["path"]).is_file()
