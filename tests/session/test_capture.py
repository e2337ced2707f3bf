"""Capture policies: merging, rolls, caps, rate limits, uncertainty, manual, safe labels."""

import hashlib
import json

import numpy as np
import pytest

from conftest import MODELS, run_cli
from monitor.decisions.contract import WindowResult
from monitor.session.capture import AudioHistory, CapturePolicy, CaptureSettings
from monitor.session.snippets import safe_label

CLASSES = ("a", "b", "c")


def W(i, truth, decision, smoothed=(0.9, 0.05, 0.05), hop=0.5, **kw):
    """A window result for the policy (the engine's own type)."""
    sm = np.array(smoothed)
    return WindowResult(i=i, start=int(i * hop * 100), t0=i * hop, t1=i * hop + 1.0, probs=sm,
                        smoothed=sm, top=CLASSES[int(np.argmax(sm))], decision=decision,
                        truth=truth, level_dbfs=-20.0, clipped=0.0, gap=0, ms=0.0, **kw)


def drive(seq, settings, seconds=None):
    got = []
    pol = CapturePolicy(settings, classes=CLASSES, sample_rate=100, sink=got.append)
    total = seconds or (len(seq) * 0.5 + 2)
    t_audio = 0.0
    for i, (truth, dec, *sm) in enumerate(seq):
        w = W(i, truth, dec, *(sm or [(0.9, 0.05, 0.05)]))
        while t_audio < w.t1:  # audio arrives before the window that ends there
            pol.on_audio(np.full(50, i, np.float32), 0)
            t_audio += 0.5
        pol.on_window(w)
    while t_audio < total:
        pol.on_audio(np.zeros(50, np.float32), 0)
        t_audio += 0.5
    pol.close()
    return got, pol


def test_consecutive_disagreements_merge_with_rolls():
    seq = [("a", "a")] * 4 + [("a", "b")] * 3 + [("a", "a")] * 4
    got, _ = drive(seq, CaptureSettings(policies=("disagreement",)))
    assert len(got) == 1
    s = got[0]
    assert (s["label"], s["predicted"], s["reason"]) == ("a", "b", "disagreement")
    # windows 4..6 span 2.0-4.0 s; with 0.5 s pre and post roll: 1.5-4.5 s
    assert (s["t0"], s["t1"]) == (1.5, 4.5)
    assert s["audio"].size == 300 and len(s["probs"]) == 3


def test_snippets_are_capped():
    seq = [("a", "b")] * 40
    got, _ = drive(seq, CaptureSettings(policies=("disagreement",), max_s=4.0, every_s=0.0))
    assert len(got) > 1 and all(s["t1"] - s["t0"] <= 4.0 + 1e-9 for s in got)


def test_rate_limit_per_pair():
    seq = ([("a", "b")] * 2 + [("a", "a")] * 2) * 6  # an a/b disagreement every 2 s
    got, pol = drive(seq, CaptureSettings(policies=("disagreement",), every_s=5.0))
    starts = [s["t0"] + 0.5 for s in got]
    assert all(b - a >= 5.0 for a, b in zip(starts, starts[1:]))
    assert pol.limited > 0
    # another pair is not limited by the first
    seq2 = [("a", "b")] * 2 + [("a", "c")] * 2
    got2, _ = drive(seq2, CaptureSettings(policies=("disagreement",), every_s=60.0))
    assert [(s["label"], s["predicted"]) for s in got2] == [("a", "b"), ("a", "c")]


def test_top_class_mode_and_undecided():
    start = [("b", None, (0.9, 0.05, 0.05))] * 3  # before any decision: confirming
    got, _ = drive(start, CaptureSettings(policies=("disagreement",)))
    assert got == []
    got, _ = drive(start, CaptureSettings(policies=("disagreement",), on="top"))
    assert got[0]["predicted"] == "a"
    later = [("b", "b", (0.05, 0.9, 0.05))] * 4 + [("b", None, (0.4, 0.35, 0.25))] * 3
    got, _ = drive(later, CaptureSettings(policies=("disagreement",)))
    assert [s["predicted"] for s in got] == ["undecided"]  # released later: that counts


def test_uncertain_least_confidence_and_margin():
    # Settles 2009: least confidence (top < threshold) and margin (top two close)
    low = (0.4, 0.35, 0.25)
    close = (0.52, 0.46, 0.02)
    sure = (0.9, 0.05, 0.05)
    seq = [(None, "a", sure)] * 3 + [(None, "a", low)] * 2 + [(None, "a", sure)] * 8 + \
          [(None, "a", close)] * 2 + [(None, "a", sure)] * 3
    got, _ = drive(seq, CaptureSettings(policies=("uncertain",), every_s=0.0))
    assert [s["reason"] for s in got] == ["uncertain", "uncertain"]
    assert all(s["label"] == "unknown" and not s["in_classes"] for s in got)
    got, _ = drive(seq, CaptureSettings(policies=("disagreement",)))
    assert got == []  # no truth, nothing disagrees


def test_manual_takes_the_last_seconds():
    got = []
    pol = CapturePolicy(CaptureSettings(), classes=CLASSES, sample_rate=100, sink=got.append)
    for i in range(20):
        pol.on_audio(np.full(50, i, np.float32), 0)
    snip = pol.manual("b", seconds=3.0)
    assert snip["reason"] == "manual" and snip["label"] == "b"
    assert (snip["t0"], snip["t1"]) == (7.0, 10.0)
    assert snip["audio"][0] == 14 and snip["audio"][-1] == 19 and len(got) == 1


def test_audio_history_keeps_the_sample_clock_across_gaps():
    h = AudioHistory(10, 5.0)
    h.add(np.arange(30, dtype=np.float32), 0)
    h.add(np.arange(100, 110, dtype=np.float32), 20)  # 2 s lost
    x, t0, t1 = h.cut(2.5, 6.0)
    assert (t0, t1) == (2.5, 6.0)
    assert x[:5].tolist() == [25, 26, 27, 28, 29] and np.all(x[5:25] == 0)
    assert x[25:].tolist() == list(range(100, 110))


@pytest.mark.parametrize("hostile,expected", [
    ("../../etc/passwd", "etc_passwd"), ("..", "unknown"), (".hidden", "hidden"),
    ("a/b\\c", "a_b_c"), ("x" * 300, "x" * 64), ("", "unknown"), (None, "unknown"),
    ("voices", "voices"), ("<script>", "script"), ("car park", "car_park"),
])
def test_safe_label(hostile, expected):
    out = safe_label(hostile)
    assert out == expected
    assert "/" not in out and "\\" not in out and not out.startswith(".") and len(out) <= 64


def test_replay_captures_snippets_with_sidecars(tmp_path, tour):
    out = tmp_path / "s"
    r = run_cli("replay", tour[0], "--model", MODELS / "demo.int8.tflite", "--truth", tour[1],
                "--fast", "--out", out)
    assert r.returncode == 0, r.stderr
    sides = sorted((out / "snippets").glob("*/*.json"))
    assert sides
    summary = json.loads((out / "summary.json").read_text())
    assert summary["snippets_written"] == len(sides)
    for side in sides:
        m = json.loads(side.read_text())
        wav = side.with_suffix(".wav")
        assert hashlib.sha256(wav.read_bytes()).hexdigest() == m["audio_sha256"]
        assert {"session", "t0", "t1", "sample_rate", "label", "predicted", "probs", "smoothed",
                "reason", "model_sha256", "audio_sha256"} <= set(m)
        assert side.parent.name == m["label"] and m["reason"] in ("disagreement", "uncertain",
                                                                   "unfamiliar")
    r = run_cli("replay", tour[0], "--model", MODELS / "demo.tflite", "--fast", "--out",
                tmp_path / "n", "--capture", "none")
    assert r.returncode == 0 and not (tmp_path / "n" / "snippets").exists()


@pytest.mark.parametrize("models", [("demo.tflite",), ("demo.tflite", "demo-mfcc.tflite")],
                         ids=["one model", "A/B"])
def test_snippets_do_not_depend_on_how_much_audio_arrives_at_once(tour, demo_card, models):
    # fast replay reads up to the ring's length at once, a live stream about a hop: the
    # policy gets a chunk before its windows, so its history must reach back past the whole
    # chunk; both ways give the same snippets, sample for sample (the tour's own truth)
    from monitor.assembly.engine import Engine
    from monitor.features.card import card_for_model
    from monitor.inference.novelty import profile_beside
    from monitor.inference.registry import load_runner
    from monitor.session.truth import load_truth
    from monitor.sound.sources import FileSource

    truth = load_truth(tour[1])
    cards = [card_for_model(MODELS / m) for m in models]
    lanes = [(c, load_runner(MODELS / m, c)) for m, c in zip(models, cards)]
    profiles = [profile_beside(MODELS / m, c) for m, c in zip(models, cards)]
    runs = {}
    for batch in (1, 64):  # 1.5 s a read (a live stream's pace) and up to 16 s (fast replay)
        got = []
        cap = CapturePolicy(CaptureSettings(), classes=demo_card.classes,
                            sample_rate=demo_card.sample_rate, sink=got.append,
                            two_models=len(models) > 1)
        src = FileSource(tour[0], model_rate=16000, window_samples=16000, realtime=False)
        Engine(lanes, src, truth=truth.label_for, observers=[cap], profiles=profiles,
               max_batch=batch).run()
        cap.close()
        assert cap.lost == 0
        runs[batch] = [(s["reason"], s["label"], s["t0"], s["t1"],
                        hashlib.sha256(s["audio"].tobytes()).hexdigest()) for s in got]
    assert runs[1] and runs[1] == runs[64]


def test_a_grown_history_cuts_only_audio_it_held():
    # after a long chunk grows the history, the stretch before what it held is not handed
    # out as silence: a cut starts at the oldest sample still held
    h = AudioHistory(10, 3.0)  # 10 Hz, 3 s held
    for k in range(10):
        h.add(np.full(10, k + 1, np.float32), 0)  # 10 s of audio, one second at a time
    h.add(np.full(60, 99, np.float32), 0)  # a 6 s chunk: more than the room left
    audio, t0, t1 = h.cut(0.0, 16.0)
    assert t1 == 16.0 and t0 == 16.0 - len(audio) / 10
    assert np.all(audio != 0)  # nothing invented
    assert t0 >= 10.0 - 4.0  # what it held before the chunk: its 3 s and its second of room

