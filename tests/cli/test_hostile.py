"""Hostile and faulty input: wrong overall figures, files copied out through links, lost
recordings, runaway sizes, and one clear sentence with exit code 2 for bad input. Each test
here failed before its fix."""

import csv
import hashlib
import json
import os
import shutil
import struct
import subprocess
import sys
import wave

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, ROOT, cli, run_cli, write_wav


def records(path):
    return [json.loads(x) for x in path.read_text().splitlines()]


def one_line(r):
    return [x for x in r.stderr.splitlines() if x.strip() and "warning" not in x]


@pytest.fixture(scope="module")
def session(tour, tmp_path_factory):
    """A whole tour session with snippets (a copy is made for each test that changes it)."""
    out = tmp_path_factory.mktemp("h") / "s"
    r = run_cli("replay", tour[0], "--model", MODELS / "demo.tflite", "--truth", tour[1],
                "--fast", "--out", out)
    assert r.returncode == 0, r.stderr
    return out


def copy_of(session, tmp_path, name="s"):
    d = tmp_path / name
    shutil.copytree(session, d)
    return d


# --- wrong results ------------------------------------------------------------------------
def test_score_overall_figures_are_sums_over_files(tour, tmp_path):
    # two files: the whole tour and its first 60 s; the overall duration is the files' seconds
    # added up and the decision changes are each file's own, never across the boundary
    arch = tmp_path / "a"
    arch.mkdir()
    x, sr = sf.read(str(tour[0]), dtype="int16")
    sf.write(str(arch / "whole.wav"), x, sr, subtype="PCM_16")
    sf.write(str(arch / "start.wav"), x[: 60 * sr], sr, subtype="PCM_16")
    for name in ("whole", "start"):
        shutil.copy(tour[1], arch / f"{name}.tsv")
    r = cli("score", arch, "--model", MODELS / "demo.tflite", "--out", tmp_path / "o",
            "--workers", "1")
    assert r.returncode == 0, r.stderr
    agg = json.loads((tmp_path / "o" / "aggregate.json").read_text())
    per = {f["file"]: f for f in agg["per_file"]}
    res = {k: records(tmp_path / "o" / "results" / f"{k}.wav.jsonl") for k in ("whole", "start")}
    o = agg["overall"]
    assert o["duration_s"] == pytest.approx(per["whole.wav"]["duration_s"] + per["start.wav"]["duration_s"])
    def switches(labels):  # a change is a switch once a first decision is made
        made = [k for k, x in enumerate(labels) if x is not None]
        rest = labels[made[0]:] if made else []
        return sum(a != b for a, b in zip(rest, rest[1:]))

    changes = sum(switches([x["decision"] for x in w]) for w in res.values())
    assert o["decision_changes"] == changes
    scored = [w for ws in res.values() for w in ws if w["truth"] is not None]
    assert o["accuracy"] == pytest.approx(np.mean([w["decision"] == w["truth"] for w in scored]))
    assert o["switches_per_min"] == pytest.approx(changes / (o["duration_s"] / 60))


def test_score_results_names_are_unique_and_reversible(tmp_path):
    from monitor.review.score import key_of_results, results_name

    arch = tmp_path / "a"
    (arch / "a").mkdir(parents=True)
    x = np.random.default_rng(0).standard_normal(16000 * 3) * 0.05
    write_wav(arch / "a" / "b.wav", x)
    write_wav(arch / "a__b.wav", x * 0.5)
    r = cli("score", arch, "--model", MODELS / "demo.tflite", "--out", tmp_path / "o",
            "--workers", "1")
    assert r.returncode == 0, r.stderr
    names = sorted(p.name for p in (tmp_path / "o" / "results").glob("*.jsonl"))
    assert len(names) == 2 and len(set(names)) == 2
    assert {key_of_results(n[: -len(".jsonl")]) for n in names} == {"a/b.wav", "a__b.wav"}
    for key in ("a/b.wav", "a__b.wav", "x%2Fy.wav", "50%/a.wav"):
        assert key_of_results(results_name(key)) == key
    again = cli("score", arch, "--model", MODELS / "demo.tflite", "--out", tmp_path / "o",
                "--workers", "1")
    assert json.loads((tmp_path / "o" / "aggregate.json").read_text())["skipped_up_to_date"] == 2
    assert again.returncode == 0


def test_score_reads_every_audio_segment_of_a_session(tour, tmp_path):
    out = tmp_path / "arch" / "seg"
    r = cli("replay", tour[0], "--model", MODELS / "demo.tflite", "--truth", tour[1], "--fast",
            "--out", out, "--segment-min", "1", "--capture", "none")
    assert r.returncode == 0, r.stderr
    assert len(json.loads((out / "session.json").read_text())["audio_segments"]) > 1
    r = cli("score", tmp_path / "arch", "--model", MODELS / "demo.tflite", "--out",
            tmp_path / "o", "--workers", "1")
    assert r.returncode == 0, r.stderr
    scored = records(tmp_path / "o" / "results" / "seg.jsonl")
    assert [w["probs"] for w in scored] == [w["probs"] for w in records(out / "windows.jsonl")]


@pytest.mark.parametrize("line,why", [
    ("nan\t2.0\tvoices", "not finite"), ("0\tinf\tvoices", "not finite"),
    ("5\t6\tvoices\n1\t2\ttraffic", "in time order")])
def test_truth_times_must_be_finite_and_in_order(tmp_path, line, why):
    t = tmp_path / "t.tsv"
    t.write_text(line + "\n")
    wav = write_wav(tmp_path / "n.wav", np.zeros(16000 * 8))
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--truth", t, "--fast", "--out",
            tmp_path / "s")
    assert r.returncode == 2 and len(one_line(r)) == 1
    assert "t.tsv: line" in r.stderr and why in r.stderr
    assert not (tmp_path / "s").exists()


def test_a_truth_file_with_a_byte_order_mark_is_read_and_a_fifo_is_named(tmp_path, tour):
    # spreadsheet programs save UTF-8 with a byte-order mark: read as without one (the card
    # reader does the same); a FIFO is not a regular file, not "not found"
    wav = write_wav(tmp_path / "n.wav", sf.read(str(tour[0]), dtype="float32")[0][: 16000 * 6])
    t = tmp_path / "bom.tsv"
    t.write_bytes(b"\xef\xbb\xbf0.000\t6.000\tquiet_room\n")
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--truth", t, "--fast", "--out",
            tmp_path / "s")
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "s" / "truth.tsv").read_text() == "0.000\t6.000\tquiet_room\n"
    fifo = tmp_path / "fifo.tsv"
    os.mkfifo(fifo)
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--truth", fifo, "--fast",
            "--out", tmp_path / "s2")
    assert r.returncode == 2 and "fifo.tsv: not a regular file" in r.stderr, r.stderr
    assert not (tmp_path / "s2").exists()


def test_replay_never_overwrites_a_truth_file_in_out(tmp_path, tour):
    out = tmp_path / "d"
    out.mkdir()
    mine = "# my notes\n0.000\t5.000\tquiet_room\n"
    (out / "truth.tsv").write_text(mine)
    wav = write_wav(tmp_path / "n.wav", sf.read(str(tour[0]), dtype="float32")[0][: 16000 * 6])
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--fast", "--out", out)
    assert r.returncode == 2 and "already holds a truth.tsv" in r.stderr
    assert (out / "truth.tsv").read_text() == mine
    # replaying with that very file as the truth keeps it as it is
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--truth", out / "truth.tsv",
            "--fast", "--out", out)
    assert r.returncode == 0, r.stderr
    assert (out / "truth.tsv").read_text() == mine and (out / "summary.json").is_file()


# --- security -----------------------------------------------------------------------------
def _poison(d):
    """Replace the session's snippet WAVs with a link to a local secret, a FIFO, and a WAV
    that does not match its sidecar; return the secret's text."""
    secret = d.parent / "secret.txt"
    secret.write_text("root:x:0:0:the password file's stand-in\n")
    wavs = sorted((d / "snippets").glob("*/*.wav"))
    assert len(wavs) >= 3
    wavs[0].unlink()
    os.symlink(secret, wavs[0])
    side = wavs[0].with_suffix(".json")  # a hostile sidecar vouches for the linked file
    meta = json.loads(side.read_text())
    meta["audio_sha256"] = hashlib.sha256(secret.read_bytes()).hexdigest()
    side.write_text(json.dumps(meta))
    wavs[1].unlink()
    os.mkfifo(wavs[1])
    data = bytearray(wavs[2].read_bytes())
    data[-1] ^= 0xFF
    wavs[2].write_bytes(bytes(data))
    return secret.read_text(), len(wavs)


def test_harvest_copies_no_link_fifo_or_mismatched_audio(session, tmp_path):
    d = copy_of(session, tmp_path)
    secret, n = _poison(d)
    r = cli("harvest", d, "--out", tmp_path / "set")
    assert r.returncode == 0, r.stderr
    assert "3 snippet(s) with untrusted or broken audio skipped" in r.stdout
    copied = list((tmp_path / "set").rglob("*.wav"))
    assert len(copied) == n - 3
    for p in copied:
        assert not p.is_symlink() and secret.encode() not in p.read_bytes()
    # a sidecar that is itself a link is not read, and is counted as skipped too
    e = copy_of(session, tmp_path, "e")
    side = sorted((e / "snippets").glob("*/*.json"))[0]
    side.unlink()
    side.symlink_to(sorted((e / "snippets").glob("*/*.json"))[-1])
    r = cli("harvest", e, "--out", tmp_path / "set2")
    assert r.returncode == 0 and "1 unreadable or linked sidecar(s) skipped" in r.stdout


def test_report_embeds_no_link_fifo_or_mismatched_audio(session, tmp_path):
    import base64

    d = copy_of(session, tmp_path)
    secret, n = _poison(d)
    r = cli("report", d, "--html", tmp_path / "r.html")
    assert r.returncode == 0, r.stderr
    page = (tmp_path / "r.html").read_text()
    assert base64.b64encode(secret.encode()).decode()[:24] not in page
    assert page.count("data:audio/wav;base64,") == n - 3
    assert "not embedded" in page


def test_manifest_cells_are_neutralised_against_formulas(session, tmp_path):
    from monitor.session.snippets import iter_snippets, relabel

    d = copy_of(session, tmp_path)
    hostile = ["=HYPERLINK(\"http://x\")", "+1+2", "-3", "@SUM(A1)"]
    for snip, label in zip(iter_snippets(d), hostile):
        relabel(snip, d, label, ["quiet_room"])
    r = cli("harvest", d, "--out", tmp_path / "set")
    assert r.returncode == 0, r.stderr
    with open(tmp_path / "set" / "manifest.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    labels = {row["label"] for row in rows}
    for h in hostile:  # OWASP CSV injection guidance: a leading quote makes it text
        assert "'" + h in labels and h not in labels
    assert all(not v.startswith(("=", "+", "-", "@")) for row in rows for v in row.values())


def test_report_writes_over_no_session_file_and_no_foreign_file(session, tmp_path):
    d = copy_of(session, tmp_path)
    audio = (d / "audio.wav").read_bytes()
    r = cli("report", d, "--html", d / "audio.wav")
    assert r.returncode == 2 and "audio.wav" in r.stderr and "session's own files" in r.stderr
    assert (d / "audio.wav").read_bytes() == audio
    notes = tmp_path / "notes.html"
    notes.write_text("<p>my notes</p>")
    r = cli("report", d, "--html", notes)
    assert r.returncode == 2 and "not a report scenemon wrote" in r.stderr
    assert notes.read_text() == "<p>my notes</p>"
    r = cli("report", d, "--html", tmp_path / "r.html")
    assert r.returncode == 0
    r = cli("report", d, "--html", tmp_path / "r.html")  # an earlier report: rewritten
    assert r.returncode == 0, r.stderr


def test_profile_writes_over_no_session_file_and_no_foreign_file(session, tmp_path):
    d = copy_of(session, tmp_path)
    audio = (d / "audio.wav").read_bytes()
    r = cli("profile", "--model", MODELS / "demo.tflite", d, "--out", d / "audio.wav")
    assert r.returncode == 2 and "session's own files" in r.stderr, r.stderr
    assert (d / "audio.wav").read_bytes() == audio
    notes = tmp_path / "notes.txt"
    notes.write_text("my notes")
    r = cli("profile", "--model", MODELS / "demo.tflite", d, "--out", notes)
    assert r.returncode == 2 and "not a profile scenemon wrote" in r.stderr, r.stderr
    assert notes.read_text() == "my notes"
    for _ in range(2):  # a new file, then an earlier profile of ours: written (again)
        r = cli("profile", "--model", MODELS / "demo.tflite", d, "--out", tmp_path / "p.npz")
        assert r.returncode == 0, r.stderr


def test_score_writes_into_no_file_and_over_no_foreign_aggregate(tour, tmp_path):
    archive = tmp_path / "a"
    archive.mkdir()
    shutil.copy(tour[0], archive / "t.wav")
    as_file = tmp_path / "f.txt"
    as_file.write_text("mine")
    r = cli("score", archive, "--model", MODELS / "demo.tflite", "--out", as_file,
            "--workers", "1")
    assert r.returncode == 2 and "is not a folder" in r.stderr and len(one_line(r)) == 1
    assert as_file.read_text() == "mine"
    theirs = tmp_path / "o"
    theirs.mkdir()
    (theirs / "aggregate.json").write_text('{"my": "figures"}')
    r = cli("score", archive, "--model", MODELS / "demo.tflite", "--out", theirs,
            "--workers", "1")
    assert r.returncode == 2 and "not an aggregate scenemon wrote" in r.stderr, r.stderr
    assert (theirs / "aggregate.json").read_text() == '{"my": "figures"}'
    for _ in range(2):  # a new folder, then the same one again (resumed)
        r = cli("score", archive, "--model", MODELS / "demo.tflite", "--out", tmp_path / "s",
                "--workers", "1")
        assert r.returncode == 0, r.stderr


def test_labels_from_a_session_cannot_drive_the_terminal(session, tmp_path):
    # a sidecar's label carrying an escape sequence (clear the screen, recolour it) is
    # printed as text by harvest and report: the ESC character never reaches the terminal
    d = copy_of(session, tmp_path)
    side = next((d / "snippets").glob("*/*.json"))
    meta = json.loads(side.read_text())
    meta["label"] = "\x1b[2J\x1b[31mred"
    side.write_text(json.dumps(meta))
    lines = (d / "windows.jsonl").read_text().splitlines()
    w = json.loads(lines[3])
    w["truth"] = "\x1b]0;title\x07voices"
    lines[3] = json.dumps(w)
    (d / "windows.jsonl").write_text("\n".join(lines) + "\n")
    r = cli("harvest", d, "--out", tmp_path / "set")
    assert r.returncode == 0 and "\x1b" not in r.stdout + r.stderr
    assert "\\x1b[2J\\x1b[31mred" in r.stdout
    r = cli("report", d)
    assert r.returncode == 0 and "\x1b" not in r.stdout + r.stderr and "\x07" not in r.stdout
    # and through the one sentence of an error naming a bad value
    w["gap"] = "\x1b[2J\x1b[31mRED"
    lines[3] = json.dumps(w)
    (d / "windows.jsonl").write_text("\n".join(lines) + "\n")
    r = cli("report", d)
    assert r.returncode == 2 and "\x1b" not in r.stderr and "\\x1b[2J" in r.stderr, r.stderr


def test_model_b_lines_hold_one_value_per_class(tmp_path, tour):
    # windows.b.jsonl is checked against model B's classes (session.json's models) as
    # windows.jsonl is against A's: tune --model-b refused the cut lists instead of tuning
    x = sf.read(str(tour[0]), dtype="float32")[0][: 16000 * 20]
    wav = write_wav(tmp_path / "c.wav", x)
    d = tmp_path / "ab"
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--model",
            MODELS / "demo-mfcc.tflite", "--fast", "--out", d, "--capture", "none")
    assert r.returncode == 0, r.stderr
    lines = (d / "windows.b.jsonl").read_text().splitlines()
    recs = [json.loads(x) for x in lines]
    for w in recs:
        w["probs"], w["smoothed"] = w["probs"][:3], w["smoothed"][:3]
    (d / "windows.b.jsonl").write_text("".join(json.dumps(w) + "\n" for w in recs))
    for command in ("report", "tune"):
        r = cli(command, d)
        assert r.returncode == 2 and "windows.b.jsonl: line 1 has 3 probs values for 4 " \
            "classes" in r.stderr, r.stderr


# --- nothing lost -------------------------------------------------------------------------
def test_a_non_finite_model_output_is_recorded_and_reported(tmp_path, tour, monkeypatch):
    # fault injection: the real LiteRT runner, whose output is replaced by NaN every 7th call
    # (a model cannot be made to give NaN on demand)
    import monitor.assembly.assemble as asm

    real = asm.load_runner

    class Faulty:
        def __init__(self, inner):
            self.inner, self.n = inner, 0
            for k in ("path", "sha256", "model_kind", "runtime", "input_shape", "n_outputs"):
                setattr(self, k, getattr(inner, k))

        def predict(self, feats):
            out = self.inner.predict(feats)
            for i in range(len(out)):
                self.n += 1
                if self.n % 7 == 0:
                    out[i] = np.nan
            return out

    monkeypatch.setattr(asm, "load_runner", lambda *a, **k: Faulty(real(*a, **k)))
    x = sf.read(str(tour[0]), dtype="float32")[0][: 16000 * 20]
    wav = write_wav(tmp_path / "c.wav", x)
    out = tmp_path / "s"
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--fast", "--out", out)
    assert r.returncode == 1
    assert "non-finite model output" in r.stderr and len([x for x in r.stderr.splitlines()
                                                          if x.startswith("scenemon:")]) == 1
    wins = records(out / "windows.jsonl")
    assert len(wins) == 1 + (x.size - 16000) // 8000  # every window kept
    bad = [w for w in wins if w.get("fault")]
    assert bad and all(w["probs"] is None and w["smoothed"] is None for w in bad)
    assert all(w["probs"] is not None for w in wins if not w.get("fault"))
    with wave.open(str(out / "audio.wav")) as w:
        assert w.getnframes() == x.size
    summary = json.loads((out / "summary.json").read_text())
    assert summary["model_faults"] == len(bad)
    # shown wherever the session is read back: report on the terminal, as JSON and as HTML
    r = cli("report", out)
    assert f"faults    {len(bad)} windows with a model output that is not finite" in r.stdout
    r = cli("report", out, "--json")
    assert json.loads(r.stdout)["model_faults"] == len(bad)
    r = cli("report", out, "--html", tmp_path / "r.html")
    assert r.returncode == 0 and "windows with a non-finite model output" in \
        (tmp_path / "r.html").read_text()


def test_the_health_panel_shows_model_faults_and_a_stopped_disk():
    # the UI's health panel at 80 x 24 has 7 rows: the alarms take the rate's and the
    # latency's rows, and nothing is cut
    from monitor.ui.draw import health_text

    t = health_text(source="file tour.wav", rate=16000, ms=0.3, latency_ms=20.0, cpu=0.05,
                    overruns=0, gaps=0, write_error=True, width=18, model_faults=12, height=7)
    lines = t.plain.split("\n")
    assert len(lines) <= 7 and all(len(x) <= 18 for x in lines)
    assert "MODEL FAULTS 12" in lines and "DISK STOPPED" in lines
    assert any(x.startswith("compute") for x in lines) and any(x.startswith("CPU") for x in lines)
    t = health_text(source="file tour.wav", rate=16000, ms=0.3, latency_ms=20.0, cpu=0.05,
                    overruns=0, gaps=0, write_error=False, width=18, model_faults=123_456)
    assert "MODEL FAULTS 123k" in t.plain.split("\n")  # hours of faults still fit


def test_repair_brings_the_header_up_to_every_frame_on_disk(session, tmp_path):
    d = copy_of(session, tmp_path)
    (d / "summary.json").unlink()
    wav = d / "audio.wav"
    with wave.open(str(wav)) as w:
        frames = w.getnframes()
    data = bytearray(wav.read_bytes())
    k = data.index(b"data")
    stale = frames - 16000  # the header one second behind, as after a kill -9
    data[k + 4:k + 8] = struct.pack("<I", 2 * stale)
    data[4:8] = struct.pack("<I", len(data) - 8 - 2 * 16000)
    wav.write_bytes(bytes(data))
    with wave.open(str(wav)) as w:
        assert w.getnframes() == stale
    r = cli("repair", d)
    assert r.returncode == 0, r.stderr
    with wave.open(str(wav)) as w:
        assert w.getnframes() == frames
    assert sf.info(str(wav)).frames == frames


def test_repair_refuses_a_session_still_being_written(session, tmp_path):
    d = copy_of(session, tmp_path)
    (d / "summary.json").unlink()
    holder = subprocess.Popen([sys.executable, "-c",
                               "import sys, time; from monitor.base.files import SessionLock;"
                               f"l = SessionLock({str(d)!r}); l.acquire(); print('held', flush=True);"
                               "time.sleep(30)"], cwd=ROOT, stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        r = cli("repair", d)
        assert r.returncode == 2 and "still being recorded" in r.stderr
        assert not (d / "summary.json").exists()
        from monitor.assembly.assemble import unclosed_sessions

        assert d not in unclosed_sessions(tmp_path)  # not named as "did not close cleanly"
    finally:
        holder.kill()
        holder.wait()
    from monitor.assembly.assemble import unclosed_sessions

    assert d in unclosed_sessions(tmp_path)  # once the writer is gone, it is
    assert cli("repair", d).returncode == 0


def test_two_harvests_at_once_lose_no_rows(session, tour, tmp_path):
    d2 = tmp_path / "s2"  # another recording: 30 s of the tour with a truth wrong on purpose
    x = sf.read(str(tour[0]), dtype="float32")[0][16000 * 40:16000 * 70]
    wav = write_wav(tmp_path / "c.wav", x)
    (tmp_path / "c.tsv").write_text("0\t30\tmachinery\n")
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--truth", tmp_path / "c.tsv",
            "--fast", "--out", d2, "--capture-every", "1")
    assert r.returncode == 0, r.stderr
    target = tmp_path / "set"
    procs = [subprocess.Popen([sys.executable, "-m", "monitor", "harvest", str(s), "--out",
                               str(target)], cwd=ROOT, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for s in (session, d2)]
    for p in procs:
        assert p.wait(120) == 0, p.stderr.read()
    with open(target / "manifest.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    wavs = list(target.rglob("*.wav"))
    assert len(rows) == len(wavs) and {r["path"] for r in rows} == \
        {str(p.relative_to(target)) for p in wavs}
    assert {r["session"] for r in rows} == {session.name, d2.name}


def test_a_harvest_waits_for_one_that_has_only_just_begun(session, tmp_path):
    """The moment another harvest has made the folder and taken its lock but not yet
    written its marker (held here with a real flock on the real file) is not a folder of
    someone else's files: the second harvest waits its turn instead of refusing."""
    import fcntl
    import time

    target = tmp_path / "set"
    target.mkdir()
    fd = os.open(target / ".lock", os.O_RDWR | os.O_CREAT, 0o644)
    fcntl.flock(fd, fcntl.LOCK_EX)
    p = subprocess.Popen([sys.executable, "-m", "monitor", "harvest", str(session), "--out",
                          str(target)], cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         text=True)
    time.sleep(1.5)  # it has loaded the session and waits on the lock (or refused already)
    waited = p.poll() is None
    (target / ".scenemon-harvest").write_bytes(b"scenemon harvest\n")  # the first one's marker
    fcntl.flock(fd, fcntl.LOCK_UN)
    os.close(fd)
    assert p.wait(120) == 0, p.stderr.read()
    assert waited and list(target.rglob("*.wav"))


def test_an_interrupted_harvest_resumes(session, tmp_path):
    target = tmp_path / "set"
    r = cli("harvest", session, "--out", target)
    assert r.returncode == 0
    full = sorted(p.relative_to(target) for p in target.rglob("*.wav"))
    (target / "manifest.csv").unlink()  # killed before the manifest was written
    for p in full[len(full) // 2:]:
        (target / p).unlink()  # and before the second half was copied
    r = cli("harvest", session, "--out", target)
    assert r.returncode == 0, r.stderr
    assert sorted(p.relative_to(target) for p in target.rglob("*.wav")) == full
    with open(target / "manifest.csv", newline="") as f:
        assert len(list(csv.DictReader(f))) == len(full)


# --- bad input: exit 2, one sentence, nothing left behind ---------------------------------
@pytest.mark.parametrize("flags,name", [
    (["--segment-min", "0"], "--segment-min"), (["--segment-min", "-1"], "--segment-min"),
    (["--segment-min", "nan"], "--segment-min"), (["--min-hold", "inf"], "--min-hold"),
    (["--pre-roll", "1e6"], "--pre-roll 1000000"), (["--pre-roll", "nan"], "--pre-roll"),
    (["--max-snippet", "inf"], "--max-snippet"), (["--segment-min", "1e-9"], "--segment-min"),
    (["--segment-min", "1e9"], "--segment-min")])
def test_runaway_and_non_finite_flags(tmp_path, flags, name):
    wav = write_wav(tmp_path / "n.wav", np.zeros(32000))
    r = cli("replay", wav, "--model", MODELS / "demo.tflite", "--fast", "--out",
            tmp_path / "s", *flags)
    assert r.returncode == 2 and len(one_line(r)) == 1 and name in r.stderr, r.stderr
    assert "Traceback" not in r.stderr and not (tmp_path / "s").exists()


@pytest.mark.parametrize("flags,name", [
    (["--latency", "nan"], "--latency"), (["--latency", "-5"], "--latency"),
    (["--latency", "1e9"], "--latency"), (["--latency", "fast"], "--latency"),
    (["--blocksize", "1000000000"], "--blocksize"), (["--blocksize", "-1"], "--blocksize")])
def test_device_flags_are_bounded_before_a_device_opens(tmp_path, flags, name):
    # a NaN latency reached the session file (exit 1, a session left behind); a huge one or
    # a huge block hung past --seconds: refused while parsing, before anything opens
    r = cli("live", "--model", MODELS / "demo.tflite", "--seconds", "1", "--headless",
            "--out", tmp_path / "s", *flags)
    assert r.returncode == 2 and len(one_line(r)) == 1 and name in r.stderr, r.stderr
    assert not (tmp_path / "s").exists()


@pytest.mark.parametrize("line,problem", [
    ('{"i": 0, "t0": 0.0, "probs": [1, 0]}', "line 2 has no t1"),
    ('[1, 2, 3]', "line 2 is a JSON list"),
    ('{"i": 0, "t0": "zero", "t1": 1.0}', "line 2 has t0='zero'"),
    ('{"i": 0, "t0": 0.0, "t1": 1.0, "decision": 3}', "line 2 has decision=3"),
    ('{"i": 0, "t0": 0.0, "t1": 1.0, "probs": [1, 2]}', "line 2 has 2 probs values for 4 "
                                                        "classes"),
    ('{"i": 0, "t0": 0.0, "t1": 1.0, "level_dbfs": "loud"}', "line 2 has level_dbfs=loud"),
    ('{"i": 0, "t0": 0.0, "t1": 1.0, "gap": "x"}', "line 2 has gap=x"),
    ('{"i": 0, "t0": 0.0, "t1": 1.0, "clipped": NaN}', "line 2 has clipped=nan")])
@pytest.mark.parametrize("command", ["report", "tune", "harvest"])
def test_malformed_window_lines_are_named(session, tmp_path, line, problem, command):
    d = copy_of(session, tmp_path)
    lines = (d / "windows.jsonl").read_text().splitlines()
    (d / "windows.jsonl").write_text("\n".join([lines[0], line] + lines[2:]) + "\n")
    extra = ["--out", tmp_path / "set"] if command == "harvest" else []
    r = cli(command, d, *extra)
    assert r.returncode == 2 and len(one_line(r)) == 1, r.stderr
    assert "windows.jsonl: " + problem in r.stderr


def test_a_truth_file_that_is_not_utf8_is_named(session, tmp_path):
    d = copy_of(session, tmp_path)
    (d / "truth.tsv").write_bytes(b"0\t1\tvoices\xff\xfe\n")
    for command in ("report", "tune"):
        r = cli(command, d)
        assert r.returncode == 2 and "truth.tsv: truth file is not UTF-8 text" in r.stderr


def test_a_fifo_is_not_a_regular_file(tmp_path):
    os.mkfifo(tmp_path / "pipe.wav")
    r = cli("replay", tmp_path / "pipe.wav", "--model", MODELS / "demo.tflite", "--fast",
            "--out", tmp_path / "s")
    assert r.returncode == 2 and "pipe.wav: not a regular file" in r.stderr


def test_vectors_out_is_an_existing_file(tmp_path):
    (tmp_path / "f").write_text("x")
    wav = write_wav(tmp_path / "n.wav", np.zeros(32000))
    r = cli("vectors", "--model", MODELS / "demo.tflite", wav, "--out", tmp_path / "f",
            "--runtime", "litert")
    assert r.returncode == 2 and "is not a folder" in r.stderr
    assert (tmp_path / "f").read_text() == "x"


def test_a_missing_model_is_named_as_missing(tmp_path):
    wav = write_wav(tmp_path / "n.wav", np.zeros(32000))
    r = cli("replay", wav, "--model", tmp_path / "gone.tflite", "--fast", "--out", tmp_path / "s")
    assert r.returncode == 2 and "gone.tflite: model file not found" in r.stderr
    assert "card" not in r.stderr


def test_a_text_file_named_keras(tmp_path):
    (tmp_path / "m.keras").write_text("hello")
    shutil.copy(MODELS / "demo.toml", tmp_path / "m.toml")
    wav = write_wav(tmp_path / "n.wav", np.zeros(32000))
    r = cli("replay", wav, "--model", tmp_path / "m.keras", "--fast", "--out", tmp_path / "s")
    assert r.returncode == 2 and "m.keras: not a Keras model file" in r.stderr


@pytest.mark.slow
def test_trust_model_with_a_lambda_saved_by_name(tmp_path):
    # a Lambda whose function is a named one (saved by name, not as code): with
    # --trust-model the message says that function cannot be restored, not "pass --trust-model"
    mod = tmp_path / "helpers_for_lambda.py"
    mod.write_text("def double(t):\n    return t * 2.0\n")
    code = (f"import sys; sys.path.insert(0, {str(tmp_path)!r}); import keras; from keras import layers;"
            "from helpers_for_lambda import double;"
            "inp = keras.Input((98, 40, 1)); x = layers.GlobalAveragePooling2D()(inp);"
            "x = layers.Lambda(double)(x);"
            "keras.Model(inp, layers.Dense(4, activation='softmax')(x))"
            f".save({str(tmp_path / 'm.keras')!r})")
    assert subprocess.run([sys.executable, "-c", code], capture_output=True).returncode == 0
    mod.unlink()
    shutil.copy(MODELS / "demo.toml", tmp_path / "m.toml")
    wav = write_wav(tmp_path / "n.wav", np.zeros(32000))
    r = run_cli("replay", wav, "--model", tmp_path / "m.keras", "--trust-model", "--fast",
                "--out", tmp_path / "s")
    assert r.returncode == 2 and "--trust-model was given" in r.stderr
    assert "cannot be restored" in r.stderr and "pass --trust-model only" not in r.stderr


def test_relabel_without_a_terminal_says_it_needs_one(session):
    r = run_cli("relabel", session, timeout=30)
    assert r.returncode == 2 and "needs a terminal" in r.stderr


@pytest.mark.parametrize("seconds", ["-5", "0"])
def test_bench_refuses_non_positive_seconds(seconds):
    r = cli("bench", "--seconds", seconds)
    assert r.returncode == 2 and "--seconds" in r.stderr


def test_harvest_skips_what_is_not_a_session(session, tmp_path):
    (tmp_path / "README.md").write_text("notes")
    r = cli("harvest", session, tmp_path / "README.md", tmp_path / "nothing", "--out",
            tmp_path / "set")
    assert r.returncode == 0, r.stderr
    assert "2 path(s) that are not sessions skipped" in r.stdout

