"""`scenemon field` through a file clocked faster than real time (the live path: a paced
source, the engine's live wait, the session writer), in real run folders: the budget
reached in a small folder, the status file and its verdict, a wall-clock step, a disk that
another program fills (a real tmpfs, root only)."""

import json
import os
import shutil
import subprocess
import threading
import time

import numpy as np
import pytest

from conftest import MODELS, cli, write_wav
from monitor.assembly.field import FieldWatch, _Run, _StatusThread, run_field
from monitor.assembly.plan import FieldPlan, FileInput, ModelPlan, OutputPlan, SessionPlan
from monitor.base.errors import ScenemonError
from monitor.base.files import SessionLock
from monitor.session import runfolder as rf
from monitor.session.repair import check_whole

SR = 16000


def _noise(path, seconds, seed=0):
    x = np.random.default_rng(seed).standard_normal(int(seconds * SR)) * 0.05
    return write_wav(path, x)


def _plan(run, wav, *, keep=None, sessions=1, speed=40.0, every=0.2, reserve=0,
          segment_s=3600.0):
    session = SessionPlan(FileInput(wav, realtime=True, speed=speed),
                          (ModelPlan(MODELS / "demo.tflite"),),
                          output=OutputPlan(None, "field", True, segment_s))
    return FieldPlan(run, session, keep or rf.Keep(), status_every_s=every, reserve_bytes=reserve,
                     sessions=sessions)


def test_keep_reads_sizes_and_ages():
    # decimal and binary prefixes as IEC 80000-13 defines them (kB = 1000 B, KiB = 1024 B)
    assert rf.parse_keep(["20GB"]) == rf.Keep(20 * 1000**3, None)
    assert rf.parse_keep(["500MiB"]) == rf.Keep(500 * 1024**2, None)
    assert rf.parse_keep(["14d"]) == rf.Keep(None, 14 * 24 * 3600.0)
    assert rf.parse_keep(["20GB,14d"]) == rf.parse_keep(["14d", "20GB"])
    assert rf.parse_keep(None) == rf.Keep()
    for bad in (["20XB"], ["-1GB"], ["0GB"], ["1GB", "2GB"], ["1d,2h"], ["GB"]):
        with pytest.raises(ScenemonError):
            rf.parse_keep(bad)


@pytest.mark.slow
def test_budget_reached_in_a_small_folder_removes_only_the_oldest_audio(tmp_path):
    wav = _noise(tmp_path / "in.wav", 6.0)
    one = 6 * SR * 2  # bytes of one session's audio (PCM_16 mono)
    run = tmp_path / "run"
    keep = rf.Keep(bytes=int(2.5 * one))
    assert run_field(_plan(run, wav, keep=keep, sessions=4)) == 0
    sessions = rf.run_sessions(run)
    assert [s.name[:4] for s in sessions] == ["0001", "0002", "0003", "0004"]
    removed = []
    for s in sessions:
        summary = json.loads((s / "summary.json").read_text())
        for r in summary.get("audio_removed", []):
            assert r["file"].startswith("audio") and "budget" in r["reason"]
            removed.append((s.name, r["file"]))
        # what is kept whatever the budget: window lines, summaries, snippets
        assert (s / "windows.jsonl").stat().st_size > 0 and (s / "session.json").exists()
        for side in s.glob("snippets/*/*.json"):
            assert side.with_suffix(".wav").exists()
    assert removed, "the budget was reached, so some audio must have gone"
    assert removed[0] == (sessions[0].name, "audio.wav")  # the oldest first
    assert (sessions[-1] / "audio.wav").exists()  # never the session being written
    gone = {n for n, _ in removed}
    kept = [s.name for s in sessions if s.name not in gone]
    assert kept == [s.name for s in sessions[len(gone):]]  # a prefix of the run went
    log = [e for e in rf.read_events(run) if e["event"] == "audio_removed"]
    assert [(e["session"], e["file"]) for e in log] == removed
    status = rf.read_status(run)
    assert status["budget"]["removed_files"] == len(removed)
    assert status["budget"]["keep_bytes"] == keep.bytes
    # the run's account: captured = kept + removed, and covers every window of each session
    r = cli("report", run, "--json")
    assert r.returncode == 0, r.stderr
    acc = json.loads(r.stdout)
    for x in acc["sessions"]:
        assert x["audio_captured_s"] >= x["last_t1"] - 1.0
        assert x["audio_captured_s"] == pytest.approx(x["audio_kept_s"] + x["audio_removed_s"])
    assert acc["totals"]["audio_removed_s"] == pytest.approx(
        sum(x["audio_removed_s"] for x in acc["sessions"]))
    assert acc["totals"]["audio_removed_s"] > 0
    text = cli("report", run)
    assert text.returncode == 0 and "removed audio.wav" in text.stdout


@pytest.mark.slow
def test_age_budget_removes_audio_older_than_it(tmp_path):
    wav = _noise(tmp_path / "in.wav", 3.0)
    run = tmp_path / "run"
    assert run_field(_plan(run, wav, sessions=2)) == 0
    old = rf.run_sessions(run)[0] / "audio.wav"
    t = time.time() - 3 * 86400
    os.utime(old, (t, t))  # three days old, as a file of an earlier week would be
    removed = rf.enforce_budget(run, rf.parse_keep(["2d"]))
    assert [(r.session, r.file) for r in removed] == [(old.parent.name, "audio.wav")]
    assert "older than" in removed[0].reason and not old.exists()
    assert (rf.run_sessions(run)[1] / "audio.wav").exists()


@pytest.mark.slow
def test_review_commands_take_a_run_folder(tmp_path):
    wav = _noise(tmp_path / "in.wav", 4.0)
    run = tmp_path / "run"
    assert run_field(_plan(run, wav, sessions=2)) == 0
    assert rf.expand_runs([run]) == rf.run_sessions(run)
    r = cli("harvest", run, "--out", tmp_path / "set")
    assert r.returncode == 0, r.stderr
    r = cli("score", run, "--model", MODELS / "demo.tflite", "--out", tmp_path / "scores",
            "--workers", "1")
    assert r.returncode == 0, r.stderr
    assert len(list((tmp_path / "scores" / "results").glob("*.jsonl"))) == 2
    r = cli("report", run, "--html", tmp_path / "r.html")
    assert r.returncode == 2 and "is a run folder" in r.stderr


@pytest.mark.slow
def test_status_says_healthy_only_while_a_process_listens(tmp_path):
    wav = _noise(tmp_path / "in.wav", 3.0)
    run = tmp_path / "run"
    assert run_field(_plan(run, wav)) == 0
    r = cli("status", run)
    assert r.returncode == 1 and "no scenemon process is running" in r.stdout
    st = rf.read_status(run)
    assert st["state"] == "stopped" and st["windows"] > 0
    # a listening process: its lock held, a fresh status (as the status thread writes it)
    lock = SessionLock(run)
    lock.acquire()
    try:
        now = rf.clock_now()
        fresh = {**st, "state": "listening", "written_wall": now["wall"],
                 "written_mono": now["mono"], "boot_id": now["boot"],
                 "last_window": {**st["last_window"], "age_s": 0.4},
                 "audio": {"recording": True, "stopped": None}}
        rf.write_status(run, fresh)
        r = cli("status", run, "--json")
        assert r.returncode == 0, r.stdout
        assert json.loads(r.stdout)["healthy"] is True
        for change, problem in (({"state": "waiting for the input device (gone)"},
                                 "not listening"),
                                ({"written_mono": now["mono"] - 600}, "last written"),
                                ({"audio": {"recording": False, "stopped": "disk full"}},
                                 "audio is not recorded"),
                                ({"last_window": {"age_s": 120.0}}, "no window for")):
            rf.write_status(run, {**fresh, **change})
            r = cli("status", run)
            assert r.returncode == 1 and problem in r.stdout, (change, r.stdout)
    finally:
        lock.release()


@pytest.mark.slow
def test_a_wall_clock_step_is_logged_not_made_a_duration(tmp_path, monkeypatch):
    wav = _noise(tmp_path / "in.wav", 3.0)
    run = tmp_path / "run"
    plan = _plan(run, wav)
    assert run_field(plan) == 0
    first = rf.run_sessions(run)[0]
    # Fault injection (the machine's clock is shared and cannot be stepped in a test): the
    # wall clock as the field module reads it jumps one hour ahead, as a board without a
    # battery-backed clock does when it syncs after boot.
    import monitor.assembly.field as field

    real = time.time
    monkeypatch.setattr(field.time, "time", lambda: real() + 3600.0)
    st = _StatusThread(_Run(plan), FieldWatch(0.5))
    st._offset = real() - time.monotonic()
    st.check_clock()
    monkeypatch.undo()
    steps = [e for e in rf.read_events(run) if e["event"] == "clock_step"]
    assert len(steps) == 1 and steps[0]["step_s"] == pytest.approx(3600.0, abs=5.0)
    # the clock now stands *behind* the last session's end: the next start logs a gap of
    # unknown length, never a negative one
    summary = json.loads((first / "summary.json").read_text())
    summary["clock_end"]["wall"] = real() + 7200.0
    (first / "summary.json").write_text(json.dumps(summary))
    assert run_field(plan) == 0
    gaps = [e for e in rf.read_events(run) if e["event"] == "gap"]
    assert any("length unknown" in g["cause"] for g in gaps)
    assert all(g["seconds"] >= 0 for g in gaps)
    for s in rf.run_sessions(run):
        for line in (s / "windows.jsonl").read_text().splitlines():
            w = json.loads(line)
            assert w["t1"] > w["t0"] >= 0  # the session clock counts samples


def test_a_second_process_on_the_same_run_folder_is_refused(tmp_path):
    run = rf.make_run(tmp_path / "run")
    lock = SessionLock(run)
    lock.acquire()
    try:
        r = cli("field", run, "--model", MODELS / "demo.tflite")
        assert r.returncode == 2 and "another process is running this folder" in r.stderr
    finally:
        lock.release()


@pytest.mark.system
@pytest.mark.slow
def test_a_disk_filled_by_another_program_stops_audio_and_windows_go_on(tmp_path):
    if os.geteuid() != 0:
        pytest.skip("mounting a tmpfs needs root")
    disk = tmp_path / "disk"
    disk.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=8m", "tmpfs", str(disk)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {r.stderr.strip()}")
    try:
        wav = _noise(tmp_path / "in.wav", 40.0)
        run = disk / "run"
        plan = _plan(run, wav, speed=4.0, every=0.1, reserve=2 * 10**6)

        def other_program():  # fills the disk once the session has windows
            while True:
                sessions = rf.run_sessions(run) if run.exists() else []
                jl = sessions[0] / "windows.jsonl" if sessions else None
                if jl is not None and jl.exists() and jl.read_text().count("\n") >= 10:
                    break
                time.sleep(0.05)
            free = rf.disk_of(disk)["free_bytes"]
            (disk / "other.bin").write_bytes(b"\0" * (free - 1_000_000))

        t = threading.Thread(target=other_program)
        t.start()
        assert run_field(plan) == 0
        t.join()
        s = rf.run_sessions(run)[0]
        summary = json.loads((s / "summary.json").read_text())
        assert "audio stopped" in summary["audio_stopped"]
        assert summary["write_error"] is None
        windows = [json.loads(x) for x in (s / "windows.jsonl").read_text().splitlines()]
        assert windows[-1]["t1"] > 38.0  # window lines went on to the end of the input
        assert summary["audio_frames"] < 39 * SR  # the audio did not
        assert check_whole(s) == []  # the audio file closed cleanly, readable by any reader
        assert any(e["event"] == "audio_stopped" for e in rf.read_events(run))
        assert rf.read_status(run)["audio"]["stopped"]
    finally:
        subprocess.run(["umount", "-l", str(disk)], check=False)


def test_print_unit_writes_a_service_file_and_installs_nothing(tmp_path):
    r = cli("field", "run-here", "--model", MODELS / "demo.tflite", "--keep", "20GB",
            "--keep", "14d", "--input", "USB mic", "--print-unit", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert not (tmp_path / "run-here").exists()  # printing the unit makes no run folder
    unit = tmp_path / "scenemon-field.service"
    unit.write_text(r.stdout)
    keys = dict(line.split("=", 1) for line in r.stdout.splitlines() if "=" in line)
    # systemd.service(5): Restart=always restarts the service after a crash or a kill;
    # ExecStart= needs an absolute path to the program
    assert keys["Restart"] == "always" and keys["Type"] == "simple"
    exec_start = keys["ExecStart"]
    assert exec_start.startswith("/")
    assert f"field {tmp_path / 'run-here'}" in exec_start
    assert str(MODELS / "demo.tflite") in exec_start
    assert "--keep 20GB --keep 14d" in exec_start and "'USB mic'" in exec_start
    assert "--print-unit" not in exec_start
    assert keys["WantedBy"] == "multi-user.target"
    analyze = shutil.which("systemd-analyze")
    if analyze:  # systemd's own check of the file, where systemd is installed
        v = subprocess.run([analyze, "verify", str(unit)], capture_output=True, text=True)
        assert v.returncode == 0, v.stderr
