"""Unfamiliar sounds: the profile's statistics against scikit-learn and scipy, the demo
profile on the demo tour and on invented sounds of no place, and the flag through the chain
(windows, capture, report)."""

import json
import shutil

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, cli, write_wav
from monitor.features.frontend import FrontEnd
from monitor.inference.novelty import (
    fit_profile,
    ledoit_wolf,
    load_profile,
    profile_path_for,
    summarise,
)
from monitor.sound.windower import windows_of

sklearn_cov = pytest.importorskip("sklearn.covariance")
scipy_distance = pytest.importorskip("scipy.spatial.distance")


def test_shrunk_covariance_matches_scikit_learn():
    # Ledoit and Wolf 2004, as sklearn.covariance.LedoitWolf implements it
    rng = np.random.default_rng(3)
    x = rng.standard_normal((150, 12)) @ rng.standard_normal((12, 12)) + 2.0
    cov, a = ledoit_wolf(x)
    lw = sklearn_cov.LedoitWolf().fit(x)
    np.testing.assert_allclose(cov, lw.covariance_, rtol=1e-10, atol=1e-12)
    assert a == pytest.approx(lw.shrinkage_, rel=1e-10)


def test_profile_per_class_covariances_and_distance_against_references(demo_card):
    # each class's covariance is sklearn's LedoitWolf of that class's fitted windows; the
    # novelty is scipy.spatial.distance.mahalanobis to the nearest class
    rng = np.random.default_rng(4)
    feats = rng.standard_normal((400, *demo_card.feature_shape)).astype(np.float32)
    feats[200:] += 1.5
    labels = np.repeat([0, 1], 200)
    groups = np.arange(400) // 20
    prof = fit_profile(feats, demo_card, labels=labels, groups=groups)
    s = summarise(feats, time_axis=0)
    held = (groups % 5) == 4
    for c in (0, 1):
        lw = sklearn_cov.LedoitWolf().fit(s[~held & (labels == c)])
        np.testing.assert_allclose(prof.covariances[c], lw.covariance_, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(prof.means[c], s[~held & (labels == c)].mean(0))
    x = s[:5] + 0.3
    vi = [np.linalg.inv(cv) for cv in prof.covariances]
    ref = [min(scipy_distance.mahalanobis(v, m, p) for m, p in zip(prof.means, vi)) for v in x]
    np.testing.assert_allclose(prof.distance(x), ref, rtol=1e-8)
    # the threshold is the stated quantile of the held-out windows' distances
    assert prof.threshold == pytest.approx(np.quantile(prof.distance(s[held]), 0.995))


def test_profile_file_is_read_without_pickle(tmp_path, demo_card):
    from monitor.inference.novelty import save_profile

    rng = np.random.default_rng(5)
    prof = fit_profile(rng.standard_normal((600, *demo_card.feature_shape)).astype(np.float32),
                       demo_card)
    save_profile(prof, tmp_path / "p.npz")
    with np.load(tmp_path / "p.npz", allow_pickle=False) as z:
        assert z["means"].shape == (1, 80) and z["covariances"].shape == (1, 80, 80)
    again = load_profile(tmp_path / "p.npz", demo_card)
    assert again.threshold == prof.threshold
    (tmp_path / "bad.npz").write_bytes(b"not a zip")
    from monitor.base.errors import ScenemonError

    with pytest.raises(ScenemonError, match="bad.npz: not a readable novelty profile"):
        load_profile(tmp_path / "bad.npz", demo_card)


@pytest.fixture(scope="module")
def demo_profile(demo_card):
    return load_profile(profile_path_for(MODELS / "demo.tflite"), demo_card)


def flagged(prof, feats):
    d = prof.distance(summarise(feats, time_axis=0))
    run, out = 0, []
    for v in d:
        run = run + 1 if v > prof.threshold else 0
        out.append(run >= prof.confirm)
    return np.array(out)


def test_demo_tour_scenes_are_familiar_and_its_alarm_is_not(tour, demo_card, demo_profile):
    # the shipped profile: at most 1% of the tour's windows with a scene truth are
    # unfamiliar (doors, a drill and passing cars included), and the invented alarm, which
    # has no truth, is
    from monitor.session.truth import load_truth

    x, _ = sf.read(str(tour[0]), dtype="float32")
    w = windows_of(x, demo_card.window_samples, demo_card.hop_samples)
    fl = flagged(demo_profile, FrontEnd(demo_card).batch(w))
    truth = load_truth(tour[1])
    has = np.array([truth.label_for(i * demo_card.hop_s, i * demo_card.hop_s + demo_card.window_s)
                    is not None for i in range(len(w))])
    print(f"unfamiliar: {fl[has].mean():.2%} of {has.sum()} scene windows, "
          f"{fl[~has].mean():.0%} of {(~has).sum()} alarm windows")
    assert fl[has].mean() <= 0.01
    assert (~has).sum() > 0 and fl[~has].mean() >= 0.9


def outside_sounds(seconds=20.0, sr=16000):
    """Sounds of none of the four places, invented here."""
    from monitor.demo import synth

    rng = np.random.default_rng(11)
    t = np.arange(int(seconds * sr)) / sr
    return {
        "pure tone 1 kHz": 0.3 * np.sin(2 * np.pi * 1000 * t),
        "pure tone 300 Hz": 0.1 * np.sin(2 * np.pi * 300 * t),
        "linear chirp 100 Hz-7 kHz": 0.3 * np.sin(2 * np.pi * (100 * t + 6900 / (2 * seconds) * t ** 2)),
        "clicks every 0.25 s": np.where(np.arange(t.size) % 4000 < 20, 0.5, 0.0) * rng.standard_normal(t.size),
        "white noise": 0.1 * rng.standard_normal(t.size),
        "silence at -90 dBFS": 10 ** (-90 / 20) / np.sqrt(2) * rng.standard_normal(t.size),
        "the alarm": synth.alarm(seconds, rng),
        "a ring melody": synth.melody(seconds, rng),
    }


def test_sounds_of_no_place_are_unfamiliar(demo_card, demo_profile):
    fe = FrontEnd(demo_card)
    shares = {}
    for name, x in outside_sounds().items():
        w = windows_of(np.asarray(x, np.float32), demo_card.window_samples, demo_card.hop_samples)
        shares[name] = float(flagged(demo_profile, fe.batch(w)).mean())
    print({k: round(v, 2) for k, v in shares.items()})
    assert all(v >= 0.9 for v in shares.values()), shares


def test_profile_command_and_the_flag_through_the_chain(tour, tmp_path):
    # scenemon profile from a session with truth; then a replay with that profile beside the
    # model flags its windows, captures "unfamiliar" snippets labelled unknown, and report
    # gives the unfamiliar share per truth class
    d = tmp_path / "m"
    d.mkdir()
    for f in ("demo.tflite", "demo.toml"):
        shutil.copy(MODELS / f, d / f)
    sess = tmp_path / "s0"
    assert cli("replay", tour[0], "--model", d / "demo.tflite", "--truth", tour[1], "--fast",
               "--out", sess, "--capture", "none").returncode == 0
    r = cli("profile", "--model", d / "demo.tflite", sess)
    assert r.returncode == 0, r.stderr
    assert (d / "demo.profile.npz").is_file() and "threshold" in r.stdout
    beep = np.concatenate([np.zeros(16000 * 4), outside_sounds(6.0)["the alarm"],
                           np.zeros(16000 * 2)]).astype(np.float32)
    x, _ = sf.read(str(tour[0]), dtype="float32")
    clip = write_wav(tmp_path / "c.wav", np.concatenate([x[: 16000 * 20], beep,
                                                         x[16000 * 30:16000 * 40]]))
    out = tmp_path / "s1"
    r = cli("replay", clip, "--model", d / "demo.tflite", "--fast", "--out", out)
    assert r.returncode == 0, r.stderr
    wins = [json.loads(v) for v in (out / "windows.jsonl").read_text().splitlines()]
    assert all("novelty" in w and isinstance(w["unfamiliar"], bool) for w in wins)
    beep_wins = [w for w in wins if 25.0 <= w["t0"] and w["t1"] <= 30.0]
    assert beep_wins and all(w["unfamiliar"] for w in beep_wins[1:])
    sides = [json.loads(p.read_text()) for p in (out / "snippets").glob("*/*.json")]
    unf = [s for s in sides if s["reason"] == "unfamiliar"]
    assert unf and all(s["label"] == "unknown" for s in unf)
    assert any(s["t0"] <= 27.0 <= s["t1"] for s in unf)
    meta = json.loads((out / "session.json").read_text())
    assert meta["models"][0]["profile"]["threshold"] > 0
    r = cli("report", sess, "--json")  # the first session had no profile: no figure
    assert json.loads(r.stdout)["unfamiliar"] is None
    r = cli("report", out, "--json")
    u = json.loads(r.stdout)["unfamiliar"]
    assert u["windows"] == sum(w["unfamiliar"] for w in wins)


def test_a_profile_for_another_card_is_refused(tmp_path, demo_card):
    from monitor.inference.novelty import save_profile

    d = tmp_path / "m"
    d.mkdir()
    for f in ("demo.tflite", "demo.toml"):
        shutil.copy(MODELS / f, d / f)
    prof = fit_profile(np.random.default_rng(0).standard_normal((500, 98, 40)).astype(np.float32),
                       demo_card)
    prof.means = prof.means[:, :40]  # as if made for a card of 20 bands
    prof.covariances = prof.covariances[:, :40, :40]
    save_profile(prof, d / "demo.profile.npz")
    wav = write_wav(tmp_path / "n.wav", np.zeros(32000))
    r = cli("replay", wav, "--model", d / "demo.tflite", "--fast", "--out", tmp_path / "s")
    assert r.returncode == 2 and "demo.profile.npz" in r.stderr and "gives 80" in r.stderr
    assert not (tmp_path / "s").exists()


def test_too_few_windows_are_counted_per_class(demo_card):
    # 39 windows of each of the four classes: too few once every fifth block is held out;
    # the sentence says what each class has and how much audio is needed
    from monitor.base.errors import ScenemonError
    from monitor.inference.novelty import fit_profile

    rng = np.random.default_rng(0)
    x = rng.standard_normal((4 * 39, *demo_card.feature_shape)).astype(np.float32)
    labels = np.repeat(np.arange(4), 39)
    with pytest.raises(ScenemonError) as e:
        fit_profile(x, demo_card, labels=labels)
    text = str(e.value)
    assert "156 windows" in text and "quiet_room " in text and "machinery " in text
    assert "12.5 s of audio" in text  # 25 windows at the demo card's 0.5 s hop
