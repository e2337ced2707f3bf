"""Every reader of a file that a user or another machine hands scenemon, fuzzed with
property-based tests (hypothesis, the general-purpose library for them).

For each reader, over generated and mutated inputs: it returns a valid object or raises
the project's own input error (`ScenemonError`), never another exception; the command that
uses it exits 0 or 2, never 1; nothing outside its output folder changes and a session's
files are unchanged after a refusal. The example counts are bounded so the quick tier stays
quick; `pytest --hypothesis-show-statistics` prints how many cases ran.
"""

from __future__ import annotations

import io
import json
import shutil
import string
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from conftest import MODELS, cli, run_cli
from monitor.base.errors import ScenemonError

QUICK = settings(max_examples=60, deadline=None, derandomize=True,
                 suppress_health_check=[HealthCheck.function_scoped_fixture,
                                        HealthCheck.too_slow])
COMMANDS = settings(max_examples=12, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.function_scoped_fixture,
                                           HealthCheck.too_slow])

# JSON values as other programs write them, hostile ones included (huge ints, deep lists,
# floats outside float64 written as text, control characters)
leaves = st.one_of(st.none(), st.booleans(), st.integers(min_value=-(10 ** 30), max_value=10 ** 30),
                   st.floats(allow_nan=False, allow_infinity=False),
                   st.text(alphabet=string.printable + "\x1b\x00é[]/", max_size=12))
json_values = st.recursive(leaves, lambda kids: st.one_of(
    st.lists(kids, max_size=4), st.dictionaries(st.text(max_size=8), kids, max_size=4)),
    max_leaves=12)


def _tree(d: Path) -> dict[str, bytes]:
    return {str(p.relative_to(d)): p.read_bytes() for p in sorted(d.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def session(tmp_path_factory, tour):
    """A short session with snippets: the first 40 s of the tour."""
    d = tmp_path_factory.mktemp("prop")
    x, sr = sf.read(str(tour[0]), dtype="float32")
    sf.write(str(d / "clip.wav"), x[40 * sr: 80 * sr], sr, subtype="PCM_16")
    out = d / "s"
    r = run_cli("replay", d / "clip.wav", "--model", MODELS / "demo.tflite", "--fast",
                "--headless", "--out", out, "--capture", "uncertain,disagreement,unfamiliar")
    assert r.returncode == 0, r.stderr
    return out


def _fresh(session: Path, tmp: Path) -> Path:
    s = tmp / "s"
    if s.exists():
        shutil.rmtree(s)
    shutil.copytree(session, s)
    return s


# --- cards ----------------------------------------------------------------------------------
def _mutate_table(raw: dict, path: list[str], value):
    t = raw
    for k in path[:-1]:
        t = t.setdefault(k, {}) if isinstance(t.get(k, {}), dict) else {}
    t[path[-1]] = value


CARD_KEYS = [["classes"], ["audio", "sample_rate"], ["audio", "window_s"], ["audio", "hop_s"],
             ["frontend", "kind"], ["frontend", "frame_length"], ["frontend", "fft_length"],
             ["frontend", "mel_bands"], ["frontend", "fmax"], ["frontend", "log_offset"],
             ["frontend", "log_floor"], ["frontend", "top_db"], ["frontend", "mfcc"],
             ["scaling", "mean"], ["scaling", "std"], ["decision", "enter"],
             ["decision", "confirm"], ["decision", "smoothing_windows"], ["output"],
             ["decision", "min_hold_s"], ["frontend", "nonsense"]]
card_values = st.one_of(json_values, st.sampled_from([1e400, -1e400, float("nan"), 1e-50, 0,
                                                      -1, 2 ** 40, "", "logmel", [0.0] * 40]))


@QUICK
@given(changes=st.lists(st.tuples(st.sampled_from(CARD_KEYS), card_values), max_size=3))
def test_a_card_is_read_or_refused_in_one_sentence(tmp_path, changes):
    import tomlkit

    from monitor.features.card import load_card, read_card_table

    raw = read_card_table(MODELS / "demo.toml")
    for path, value in changes:
        if value is None:
            continue  # TOML has no null
        _mutate_table(raw, path, value)
    try:
        text = tomlkit.dumps(raw)
    except Exception:  # noqa: BLE001 - a value TOML cannot hold: nothing to read
        assume(False)
    card = tmp_path / "c.toml"
    card.write_text(text)
    try:
        load_card(card)
    except ScenemonError as exc:
        assert str(card) in str(exc) and "\n" not in str(exc).strip()


@QUICK
@given(text=st.text(alphabet=string.printable + "\x00\x1b\ufeff", max_size=300))
def test_card_text_of_any_shape_is_read_or_refused(tmp_path, text):
    from monitor.features.card import load_card

    card = tmp_path / "c.toml"
    card.write_bytes(text.encode("utf-8", "surrogatepass"))
    try:
        load_card(card)
    except ScenemonError:
        pass


# --- truth files -------------------------------------------------------------------------------
truth_lines = st.lists(st.one_of(
    st.tuples(st.floats(allow_nan=True), st.floats(allow_nan=True),
              st.sampled_from(["quiet_room", "voices", "traffic", "machinery", "", "x y"]))
    .map(lambda t: f"{t[0]}\t{t[1]}\t{t[2]}"),
    st.text(alphabet=string.printable + "\t\x00\ufeff", max_size=30)), max_size=8)


@QUICK
@given(lines=truth_lines)
def test_a_truth_file_is_read_or_refused(lines):
    from monitor.session.truth import parse_truth

    try:
        track = parse_truth("\n".join(lines), where="t.tsv",
                            classes=("quiet_room", "voices", "traffic", "machinery"))
    except ScenemonError:
        return
    spans = track.spans
    assert all(s.onset < s.offset for s in spans)
    assert all(a.offset <= b.onset for a, b in zip(spans, spans[1:]))


# --- windows.jsonl and session.json --------------------------------------------------------------
@QUICK
@given(lines=st.lists(st.one_of(json_values.map(json.dumps), st.text(max_size=40),
                                st.integers(1, 1500).map(lambda n: "[" * n + "]" * n)),
                      min_size=1, max_size=6))
def test_window_lines_are_read_or_skipped(tmp_path, lines):
    from monitor.session.reader import read_windows

    p = tmp_path / "windows.jsonl"
    p.write_text("\n".join(lines) + "\n")
    try:
        windows, skipped = read_windows(p, 4)
    except ScenemonError:
        return
    assert len(windows) + skipped <= len(lines) + 1
    assert all(isinstance(w, dict) for w in windows)


SESSION_KEYS = ["classes", "card", "model", "models", "source", "started_at", "segments",
                "truth_file", "session_id", "decision", "version"]


@COMMANDS
@given(key=st.sampled_from(SESSION_KEYS), value=json_values)
def test_a_session_json_is_reported_or_refused(tmp_path, session, key, value):
    s = _fresh(session, tmp_path)
    meta = json.loads((s / "session.json").read_text())
    meta[key] = value
    (s / "session.json").write_text(json.dumps(meta))
    before = _tree(s)
    for args in (["report", s], ["tune", s]):
        r = cli(*args)
        assert r.returncode in (0, 2) and "Traceback" not in r.stderr, (args, r.stderr[-2000:])
    assert _tree(s) == before


@COMMANDS
@given(line=st.one_of(json_values.map(json.dumps),
                      st.dictionaries(st.sampled_from(["i", "t0", "t1", "probs", "smoothed",
                                                       "top", "decision", "truth", "level_dbfs",
                                                       "gap", "novelty", "fault"]),
                                      json_values, max_size=8).map(json.dumps)))
def test_a_hostile_window_line_is_reported_or_refused(tmp_path, session, line):
    s = _fresh(session, tmp_path)
    with open(s / "windows.jsonl", "a") as f:
        f.write(line + "\n")
    before = _tree(s)
    r = cli("report", s)
    assert r.returncode in (0, 2) and "Traceback" not in r.stderr, r.stderr[-2000:]
    assert _tree(s) == before


# --- snippet sidecars and relabel decisions ----------------------------------------------------
SIDECAR_KEYS = ["label", "predicted", "reason", "t0", "t1", "duration_s", "dropped",
                "reviewed", "relabeled_from", "audio_sha256", "sample_rate", "session",
                "confidence", "predicted_b", "in_classes"]


@COMMANDS
@given(changes=st.dictionaries(st.sampled_from(SIDECAR_KEYS), json_values, min_size=1,
                               max_size=4), which=st.integers(0, 50))
def test_a_sidecar_of_any_content_is_harvested_or_skipped(tmp_path, session, changes, which):
    s = _fresh(session, tmp_path)
    sides = sorted((s / "snippets").glob("*/*.json"))
    assume(sides)
    side = sides[which % len(sides)]
    meta = json.loads(side.read_text())
    meta.update(changes)
    side.write_text(json.dumps(meta))
    before = _tree(s)
    out = tmp_path / "set"
    if out.exists():
        shutil.rmtree(out)
    r = cli("harvest", s, "--out", out)
    assert r.returncode in (0, 2) and "Traceback" not in r.stderr, r.stderr[-2000:]
    assert _tree(s) == before
    if r.returncode == 0:
        assert all(p.resolve().is_relative_to(out.resolve()) for p in out.rglob("*"))


# --- profiles ----------------------------------------------------------------------------------
arrays = st.one_of(
    st.integers(0, 3).flatmap(lambda nd: st.lists(st.integers(0, 5), min_size=nd, max_size=nd))
    .map(lambda shape: np.full(shape, 1.0)),
    st.sampled_from([np.array(np.inf), np.array("text"), np.zeros((4, 80)), np.eye(80)[None],
                     np.zeros((4, 80, 80)), np.full((4, 80, 80), 1e-300), np.array(-1.0)]))


@QUICK
@given(changes=st.dictionaries(st.sampled_from(["means", "covariances", "threshold",
                                                "quantile", "time_axis", "windows",
                                                "shrinkage", "version"]),
                               arrays, min_size=1, max_size=3))
def test_a_profile_is_read_or_refused(tmp_path, demo_card, changes):
    from monitor.inference.novelty import load_profile

    with np.load(MODELS / "demo.profile.npz", allow_pickle=False) as z:
        d = {k: z[k] for k in z.files}
    d.update(changes)
    p = tmp_path / "p.profile.npz"
    np.savez(p, **d)
    try:
        prof = load_profile(p, demo_card)
    except ScenemonError as exc:
        assert str(p) in str(exc)
        return
    x = np.random.default_rng(0).standard_normal((3, *demo_card.feature_shape)).astype(np.float32)
    dist = prof.distances_of(x)
    assert dist.shape == (3,) and np.all(np.isfinite(dist))


# --- .npy features -----------------------------------------------------------------------------
@QUICK
@given(shape=st.lists(st.integers(0, 10 ** 9), min_size=0, max_size=4),
       descr=st.sampled_from(["<f4", "<f8", "|O", "<i2", "|b1", "<c8", "S3", ">f4"]),
       tail=st.binary(max_size=64))
def test_a_features_file_is_read_or_refused(tmp_path, shape, descr, tail):
    from monitor.features.cardcheck import read_features

    header = f"{{'descr': '{descr}', 'fortran_order': False, 'shape': {tuple(shape)}, }}"
    header = header.ljust(118) + "\n"
    p = tmp_path / "f.npy"
    p.write_bytes(b"\x93NUMPY\x01\x00" + len(header).to_bytes(2, "little") + header.encode()
                  + tail)
    try:
        a = read_features(p)
    except ScenemonError:
        return
    assert a.dtype.kind in "fiu" and np.all(np.isfinite(a))


# --- model files ---------------------------------------------------------------------------------
@QUICK
@given(cut=st.integers(0, 20000), flips=st.lists(st.tuples(st.integers(0, 10 ** 6),
                                                            st.integers(1, 255)), max_size=6))
def test_a_truncated_or_bit_flipped_model_loads_or_is_refused(tmp_path, demo_card, cut, flips):
    from monitor.inference.registry import load_runner

    data = bytearray((MODELS / "demo.tflite").read_bytes())
    data = data[: max(0, len(data) - cut)] if cut % 3 == 0 else data
    for at, mask in flips:
        if data:
            data[at % len(data)] ^= mask
    p = tmp_path / "m.tflite"
    p.write_bytes(bytes(data))
    try:
        runner = load_runner(p, demo_card)
    except ScenemonError as exc:
        assert str(p) in str(exc)
        return
    out = runner.predict(np.zeros((1, *demo_card.feature_shape), np.float32))
    assert out.shape == (1, 4)


# --- audio file headers --------------------------------------------------------------------------
def _audio_bytes(fmt: str) -> bytes:
    buf = io.BytesIO()
    x = (0.1 * np.sin(np.arange(16000) / 5.0)).astype(np.float32)
    sf.write(buf, x, 16000, format=fmt, subtype="PCM_16")
    return buf.getvalue()


WAV, FLAC = _audio_bytes("WAV"), _audio_bytes("FLAC")


@QUICK
@given(fmt=st.sampled_from(["wav", "flac"]),
       flips=st.lists(st.tuples(st.integers(0, 79), st.integers(0, 255)), min_size=1,
                      max_size=6))
def test_an_audio_file_with_a_hostile_header_is_read_or_refused(tmp_path, fmt, flips):
    from monitor.sound.sources import load_audio

    data = bytearray(WAV if fmt == "wav" else FLAC)
    for at, value in flips:
        data[at] = value
    p = tmp_path / f"a.{fmt}"
    p.write_bytes(bytes(data))
    try:
        x = load_audio([p], model_rate=16000, window_samples=16000)
    except ScenemonError as exc:
        assert str(p) in str(exc)
        return
    assert x.dtype == np.float32 and x.ndim == 1 and np.all(np.isfinite(x))


STATUS_KEYS = ["state", "written_wall", "written_mono", "boot_id", "interval_s", "last_window",
               "gaps", "disk", "budget", "audio", "session", "sessions", "overruns",
               "windows_last_hour", "clock_steps", "state_since"]


@COMMANDS
@given(changes=st.dictionaries(st.sampled_from(STATUS_KEYS), json_values, max_size=4),
       whole=st.one_of(st.none(), json_values))
def test_a_status_file_of_any_content_is_shown_or_refused(tmp_path, changes, whole):
    from monitor.session.runfolder import make_run

    run = make_run(tmp_path / f"run{len(list(tmp_path.iterdir()))}")
    good = {"state": "listening", "written_wall": 1.0, "last_window": {"t1": 1.0, "age_s": 1.0},
            "gaps": {"count": 0}, "disk": {"free_bytes": 1}, "budget": {}, "audio": {}}
    body = {**good, **changes} if whole is None else whole
    (run / "status.json").write_text(json.dumps(body))
    for args in (("status", run), ("status", run, "--json")):
        r = cli(*args)
        assert r.returncode in (1, 2), r.stderr  # nobody runs it: never healthy
        assert "Traceback" not in r.stderr and "--debug" not in r.stderr, r.stderr  # no crash


@COMMANDS
@given(lines=st.lists(st.one_of(json_values.map(json.dumps),
                                st.dictionaries(st.sampled_from(["event", "cause", "seconds",
                                                                 "wall_start", "wall_end",
                                                                 "step_s", "wall_after"]),
                                                json_values, max_size=5).map(json.dumps),
                                st.text(max_size=30)), max_size=6))
def test_a_run_log_of_any_content_is_accounted_or_refused(tmp_path, lines):
    from monitor.session.runfolder import make_run

    run = make_run(tmp_path / f"run{len(list(tmp_path.iterdir()))}")
    (run / "run.jsonl").write_text("\n".join(lines))
    for args in (("report", run), ("report", run, "--json")):
        r = cli(*args)
        assert r.returncode in (0, 2), r.stderr
        assert "Traceback" not in r.stderr and "--debug" not in r.stderr, r.stderr
