"""Two models side by side (A/B) on the same windows: A's files as a one-model run writes
them, B's beside them, their comparison in report and score, McNemar's exact test against
scipy, and captures where the two disagree."""

import json
import math
import re
import shutil

import numpy as np
import pytest

from conftest import MODELS, cli, jumpy_copy, run_cli

scipy_stats = pytest.importorskip("scipy.stats")


def records(path):
    return [json.loads(x) for x in path.read_text().splitlines()]


@pytest.fixture(scope="module")
def jumpy_b(tmp_path_factory):
    """Model B: the demo model with a card of its own that decides on every raw window
    (no smoothing, no confirmation), so that its decisions differ from A's at times."""
    return jumpy_copy(tmp_path_factory.mktemp("b"))


@pytest.fixture(scope="module")
def sessions(tour, jumpy_b, tmp_path_factory):
    d = tmp_path_factory.mktemp("ab")
    ab, a1, b1 = d / "ab", d / "a", d / "b"
    base = ["--truth", tour[1], "--fast", "--headless"]
    r = run_cli("replay", tour[0], "--model", MODELS / "demo.tflite", "--model", jumpy_b,
                *base, "--out", ab)
    assert r.returncode == 0, r.stderr
    assert run_cli("replay", tour[0], "--model", MODELS / "demo.tflite", *base,
                   "--out", a1).returncode == 0
    assert run_cli("replay", tour[0], "--model", jumpy_b, *base, "--out", b1,
                   "--capture", "none").returncode == 0
    return ab, a1, b1


def without_ms(path):
    """A window file's bytes with each line's compute time blanked (it is a measurement)."""
    return re.sub(rb'"ms": (?:null|[-0-9.e]+)', b'"ms": -', path.read_bytes())


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_a_is_exactly_a_one_model_run(sessions):
    ab, a1, _ = sessions
    # byte for byte: A's windows (but their compute times), the recording and the truth
    assert without_ms(ab / "windows.jsonl") == without_ms(a1 / "windows.jsonl")
    assert (ab / "audio.wav").read_bytes() == (a1 / "audio.wav").read_bytes()
    assert (ab / "truth.tsv").read_bytes() == (a1 / "truth.tsv").read_bytes()
    meta = json.loads((ab / "session.json").read_text())
    one = json.loads((a1 / "session.json").read_text())
    assert meta["model"] == one["model"] and meta["card"] == one["card"]
    assert [m["path"].rsplit("/", 1)[-1] for m in meta["models"]] == ["demo.tflite", "jumpy.tflite"]
    assert {"path", "sha256", "kind", "card", "runtime"} <= set(meta["models"][1])


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_b_equals_a_one_model_run_of_b(sessions):
    ab, _, b1 = sessions
    wb, w1 = records(ab / "windows.b.jsonl"), records(b1 / "windows.jsonl")
    assert [w["probs"] for w in wb] == [w["probs"] for w in w1]
    assert [w["decision"] for w in wb] == [w["decision"] for w in w1]
    assert [w["t0"] for w in wb] == [w["t0"] for w in records(ab / "windows.jsonl")]


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_the_models_disagree_somewhere_and_it_is_captured(sessions):
    ab, _, _ = sessions
    wa, wb = records(ab / "windows.jsonl"), records(ab / "windows.b.jsonl")
    differ = [a["t1"] for a, b in zip(wa, wb) if a["decision"] != b["decision"]
              and a["decision"] is not None and b["decision"] is not None]
    assert differ
    sides = [json.loads(p.read_text()) for p in (ab / "snippets").glob("*/*.json")]
    md = [s for s in sides if s["reason"] == "models_disagree"]
    assert md, "no models_disagree snippet"
    # where a run of windows in which the two decisions differ (and A agrees with the truth,
    # or there is none: a disagreement with the truth comes first) begins, a snippet may
    # begin, its pre-roll (0.5 s, the default) before that window
    def md_window(a, b):
        return (a["decision"] is not None and b["decision"] is not None
                and a["decision"] != b["decision"]
                and (a["truth"] is None or a["decision"] == a["truth"]))

    flags = [md_window(a, b) for a, b in zip(wa, wb)]
    starts = {round(max(0.0, wa[k]["t0"] - 0.5), 4) for k in range(len(wa))
              if flags[k] and (k == 0 or not flags[k - 1])}
    for s in md:
        assert s["model_b"]["predicted"] != s["predicted"]
        assert len(s["model_b"]["probs"]) == len(s["probs"]) >= 1
        assert s["t0"] in starts, (s["t0"], sorted(starts))


def test_mcnemar_exact_against_scipy_and_a_worked_example():
    from monitor.review.metrics import mcnemar_exact

    # the exact (conditional) McNemar test is the two-sided binomial test of b successes in
    # b + c trials at 1/2 (McNemar 1947; scipy.stats.binomtest)
    for b, c in [(31, 6), (0, 5), (7, 1), (20, 20), (3, 12), (100, 140)]:
        ref = scipy_stats.binomtest(b, b + c, 0.5).pvalue
        assert mcnemar_exact(b, c) == pytest.approx(ref, rel=1e-12)
    # hours of windows: more than 1,023 discordant pairs (2^n overflows a float beyond that)
    for b, c in [(600, 600), (1500, 1700), (20000, 20500)]:
        ref = scipy_stats.binomtest(b, b + c, 0.5).pvalue
        assert mcnemar_exact(b, c) == pytest.approx(ref, rel=1e-9)
    # worked example (from memory: Fagerland, Lydersen and Laake 2013, BMC Medical Research
    # Methodology 13:91, 1 and 7 discordant pairs): exact conditional p = 0.0703,
    # re-derived here as 2 * (C(8,0) + C(8,1)) / 2^8
    assert mcnemar_exact(1, 7) == pytest.approx(2 * (1 + 8) / 256) == pytest.approx(0.0703, abs=1e-4)
    assert mcnemar_exact(0, 0) == 1.0


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_report_compares_both_against_the_windows(sessions):
    ab, _, _ = sessions
    r = cli("report", ab, "--json")
    assert r.returncode == 0, r.stderr
    rep = json.loads(r.stdout)
    wa, wb = records(ab / "windows.jsonl"), records(ab / "windows.b.jsonl")
    scored = [(a, b) for a, b in zip(wa, wb) if a["truth"] is not None]
    acc_a = np.mean([a["decision"] == a["truth"] for a, _ in scored])
    acc_b = np.mean([b["decision"] == a["truth"] for a, b in scored])
    assert rep["accuracy"] == pytest.approx(acc_a) and rep["b"]["accuracy"] == pytest.approx(acc_b)
    agree = np.mean([a["decision"] == b["decision"] for a, b in zip(wa, wb)])
    assert rep["a_vs_b"]["decision_agreement"] == pytest.approx(agree)
    only_a = sum(a["decision"] == a["truth"] != b["decision"] for a, b in scored)
    only_b = sum(b["decision"] == a["truth"] != a["decision"] for a, b in scored)
    assert (rep["a_vs_b"]["only_a_right"], rep["a_vs_b"]["only_b_right"]) == (only_a, only_b)
    assert rep["a_vs_b"]["mcnemar_p"] == pytest.approx(
        scipy_stats.binomtest(only_a, only_a + only_b, 0.5).pvalue if only_a + only_b else 1.0)
    r = cli("report", ab)
    assert "A vs B" in r.stdout and "optimistic" in r.stdout and "B:" in r.stdout
    assert f"B is right on {only_b} windows where A is wrong, A on {only_a}" in r.stdout


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_tune_works_on_model_b(sessions):
    ab, _, _ = sessions
    r = cli("tune", ab, "--model-b", "--grid", "smoothing=none,mean;confirm=1,2;enter=0.6")
    assert r.returncode == 0, r.stderr
    assert "recommended:" in r.stdout
    r = cli("tune", sessions[1], "--model-b")
    assert r.returncode == 2 and "not an A/B session" in r.stderr


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_score_with_two_models(tour, jumpy_b, tmp_path):
    arch = tmp_path / "arch"
    arch.mkdir()
    shutil.copy(tour[0], arch / "walk.wav")
    shutil.copy(tour[1], arch / "walk.tsv")
    r = cli("score", arch, "--model", MODELS / "demo.tflite", "--model", jumpy_b, "--out",
            tmp_path / "sc", "--workers", "1")
    assert r.returncode == 0, r.stderr
    agg = json.loads((tmp_path / "sc" / "aggregate.json").read_text())
    wa = records(tmp_path / "sc" / "results" / "walk.wav.jsonl")
    wb = records(tmp_path / "sc" / "results" / "walk.wav.b.jsonl")
    assert len(wa) == len(wb) > 0
    assert agg["a_vs_b"]["decision_agreement"] == pytest.approx(
        np.mean([a["decision"] == b["decision"] for a, b in zip(wa, wb)]))
    assert agg["b"]["overall"]["accuracy"] is not None and "A vs B" in r.stdout


def test_equal_front_ends_are_computed_once(demo_card, tmp_path):
    from conftest import sine, write_wav
    from monitor.assembly.engine import Engine
    from monitor.features.card import load_card
    from monitor.inference.registry import load_runner
    from monitor.sound.sources import FileSource

    wav = write_wav(tmp_path / "t.wav", sine(440, 3.0))
    b_card = load_card(MODELS / "demo.int8.toml")
    eng = Engine([(demo_card, load_runner(MODELS / "demo.tflite", demo_card)),
                  (b_card, load_runner(MODELS / "demo.int8.tflite", b_card))],
                 FileSource(wav, model_rate=16000, window_samples=16000))
    assert eng.lanes[0].frontend is eng.lanes[1].frontend


def test_two_models_must_share_rate_window_and_hop(tmp_path):
    from conftest import write_wav

    shutil.copy(MODELS / "demo.tflite", tmp_path / "h.tflite")
    (tmp_path / "h.toml").write_text((MODELS / "demo.toml").read_text().replace(
        "hop_s = 0.5", "hop_s = 0.25"))
    wav = write_wav(tmp_path / "n.wav", np.zeros(32000))
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--model", tmp_path / "h.tflite",
            "--fast", "--out", tmp_path / "s")
    assert r.returncode == 2 and "hop_samples" in r.stderr and "same windows" in r.stderr
    assert not (tmp_path / "s").exists()


def test_the_mcnemar_sentence_names_the_counts():
    from monitor.review.metrics import paired

    t = ["a"] * 10
    wa = [{"truth": x, "decision": "a" if i < 8 else "b"} for i, x in enumerate(t)]
    wb = [{"truth": x, "decision": "a" if i >= 3 else "b"} for i, x in enumerate(t)]
    pr = paired(wa, wb)
    # A right on windows 0-7, B on 3-9: A alone on 0-2 (3), B alone on 8-9 (2)
    assert (pr["only_a_right"], pr["only_b_right"]) == (3, 2)
    assert pr["sentence"].startswith("B is right on 2 windows where A is wrong, A on 3")
    assert pr["mcnemar_p"] == pytest.approx(min(1.0, 2 * sum(math.comb(5, i)
                                                             for i in range(3)) / 32))
