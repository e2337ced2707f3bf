"""Re-scoring an archive: local processes and a real Dask LocalCluster give the same bytes,
a killed worker's task is done elsewhere, and an interrupted run resumes."""

import json
import multiprocessing
import os
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, ROOT, run_cli
from monitor.review.score import _share_out, discover, run_score

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def archive(tour, tmp_path_factory):
    """Eight recordings (pieces of the tour, some with truth) and one session."""
    d = tmp_path_factory.mktemp("archive")
    x, sr = sf.read(str(tour[0]), dtype="int16")
    truth = tour[1].read_text()
    for k in range(8):
        sub = d / ("site-a" if k < 4 else "site-b")
        sub.mkdir(exist_ok=True)
        piece = np.roll(x, -k * 7 * sr)[: (120 + 10 * k) * sr] if k % 2 else x
        sf.write(str(sub / f"walk{k}.wav"), piece, sr, subtype="PCM_16")
        if k % 2 == 0:
            (sub / f"walk{k}.tsv").write_text(truth)
    r = run_cli("replay", d / "site-a" / "walk0.wav", "--model", MODELS / "demo.tflite",
                "--truth", tour[1], "--fast", "--out", d / "sessions" / "s1", "--capture", "none")
    assert r.returncode == 0, r.stderr
    return d


def results(out):
    return {p.name: p.read_bytes() for p in sorted((out / "results").glob("*"))}


@pytest.fixture(scope="module")
def local_run(archive, tmp_path_factory):
    out = tmp_path_factory.mktemp("local")
    agg = run_score(archive, str(MODELS / "demo.tflite"), out, workers=2, progress=False)
    return out, agg


def _sleep_and_say(item, seconds):
    """A stand-in task for `_share_out` (module level: the other worker gets it pickled)."""
    time.sleep(seconds)
    return {"item": item, "pid": os.getpid()}


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="forks a worker")
def test_workers_share_one_queue_to_the_end():
    # eight equal items on this process and one forked worker (a fork starts at once; a
    # spawned worker would start late and rightly get fewer): each takes four, none is done
    # twice or left out; a worker queue holding calls ahead of time left the last two items
    # to one process while the other sat idle
    got = []
    _share_out(list(range(8)), _sleep_and_say, lambda it: (it, 0.25), got.append, 2,
               multiprocessing.get_context("fork"))
    assert sorted(r["item"] for r in got) == list(range(8))
    by_pid = {}
    for r in got:
        by_pid.setdefault(r["pid"], []).append(r["item"])
    assert sorted(len(v) for v in by_pid.values()) == [4, 4], by_pid
    assert sorted(by_pid[os.getpid()]) == [4, 5, 6, 7]  # this process from the back


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="forks a worker")
def test_a_failing_item_stops_the_handing_out():
    # a failure in this process's share: the error comes out, and the other worker is handed
    # nothing more (at most the one item it was running)
    got = []
    with pytest.raises(ZeroDivisionError):
        _share_out(list(range(8)), _sleep_and_say, lambda it: (it, 0.1 if it != 7 else 1 / 0),
                   got.append, 2, multiprocessing.get_context("fork"))
    assert len(got) <= 1


def test_discovery(archive):
    items = discover(archive)
    assert len(items) == 9
    sess = [i for i in items if i.key == "sessions/s1"]
    assert sess and sess[0].truth.endswith("truth.tsv")
    assert sum(1 for i in items if i.truth) == 5


def test_local_results_match_replay_and_aggregate(local_run, archive, tmp_path):
    out, agg = local_run
    assert agg["processed"] == 9 and agg["files"] == 9
    r = run_cli("replay", archive / "site-a" / "walk0.wav", "--model", MODELS / "demo.tflite",
                "--truth", archive / "site-a" / "walk0.tsv", "--fast", "--out", tmp_path / "r",
                "--capture", "none")
    assert r.returncode == 0
    replay = (tmp_path / "r" / "windows.jsonl").read_bytes()
    scored = [json.loads(x) for x in (out / "results" / "site-a%2Fwalk0.wav.jsonl").read_text()
              .splitlines()]
    replayed = [json.loads(x) for x in replay.decode().splitlines()]
    assert [{**w, "ms": None} for w in replayed] == scored  # timing aside, the same records
    assert agg["overall"]["accuracy"] > 0.9 and len(agg["worst_files"]) == 5
    # report and tune read a results file like a session's windows
    from monitor.review.metrics import window_metrics
    from monitor.session.reader import read_windows

    wins, skipped = read_windows(out / "results" / "site-a%2Fwalk0.wav.jsonl")
    assert skipped == 0
    assert window_metrics(wins, ["quiet_room", "voices", "traffic", "machinery"]).windows == len(wins)


@pytest.mark.slow
def test_cluster_gives_the_same_bytes(local_run, archive, tmp_path):
    out_local, _ = local_run
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        agg = run_score(archive, str(MODELS / "demo.tflite"), tmp_path / "c",
                        cluster=cluster.scheduler_address, progress=False)
    assert agg["processed"] == 9
    assert results(tmp_path / "c") == results(out_local)


@pytest.mark.slow
def test_killed_worker_task_is_done_elsewhere(local_run, archive, tmp_path):
    out_local, _ = local_run
    out = tmp_path / "k"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        with distributed.Client(cluster.scheduler_address) as client:
            pids = list(client.run(os.getpid).values())
        box = {}
        t = threading.Thread(target=lambda: box.setdefault("agg", run_score(
            archive, str(MODELS / "demo.tflite"), out, cluster=cluster.scheduler_address,
            progress=False)))
        t.start()
        deadline = time.time() + 60
        while time.time() < deadline and not list((out / "results").glob("*.jsonl")):
            time.sleep(0.01)
        os.kill(pids[0], signal.SIGKILL)  # a worker dies mid-run
        t.join(timeout=180)
    assert "agg" in box and box["agg"]["processed"] == 9
    assert results(out) == results(out_local)


@pytest.mark.slow
def test_interrupted_run_resumes(local_run, archive, tmp_path):
    out_local, _ = local_run
    out = tmp_path / "r"
    p = subprocess.Popen([sys.executable, "-m", "monitor", "score", str(archive), "--model",
                          str(MODELS / "demo.tflite"), "--out", str(out), "--workers", "1"],
                         cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         start_new_session=True)
    deadline = time.time() + 120
    while time.time() < deadline and len(list((out / "results").glob("*.meta.json"))) < 3:
        time.sleep(0.01)
    os.killpg(p.pid, signal.SIGKILL)
    p.wait()
    done_before = {q.name for q in (out / "results").glob("*.meta.json")}
    assert 3 <= len(done_before) < 9
    mtimes = {q.name: q.stat().st_mtime_ns for q in (out / "results").glob("*.meta.json")}
    r = run_cli("score", archive, "--model", MODELS / "demo.tflite", "--out", out,
                "--workers", "1")
    assert r.returncode == 0, r.stderr
    agg = json.loads((out / "aggregate.json").read_text())
    assert agg["skipped_up_to_date"] == len(done_before)
    assert agg["processed"] == 9 - len(done_before)
    for name, m in mtimes.items():  # what was done is not done again
        assert (out / "results" / name).stat().st_mtime_ns == m
    assert results(out) == results(out_local)


def test_a_changed_file_is_scored_again_and_the_rest_skipped(tour, tmp_path):
    # up to date by size and modification time (as make(1) decides); the sha256 of what was
    # scored stays in the meta file
    import hashlib

    x, sr = sf.read(str(tour[0]), dtype="int16")
    arch = tmp_path / "a"
    arch.mkdir()
    for k in range(3):
        sf.write(str(arch / f"w{k}.wav"), x[k * sr:(k + 30) * sr], sr, subtype="PCM_16")
    out = tmp_path / "r"
    first = run_score(arch, str(MODELS / "demo.tflite"), out, workers=1, progress=False)
    assert first["processed"] == 3
    meta = json.loads(next((out / "results").glob("*w1*.meta.json")).read_text())
    assert meta["audio_sha256"] == [hashlib.sha256((arch / "w1.wav").read_bytes()).hexdigest()]
    again = run_score(arch, str(MODELS / "demo.tflite"), out, workers=1, progress=False)
    assert (again["processed"], again["skipped_up_to_date"]) == (0, 3)
    # the same length, other sound: a new size-and-time pair, scored again
    sf.write(str(arch / "w1.wav"), x[40 * sr:70 * sr], sr, subtype="PCM_16")
    third = run_score(arch, str(MODELS / "demo.tflite"), out, workers=1, progress=False)
    assert (third["processed"], third["skipped_up_to_date"]) == (1, 2)
    meta = json.loads(next((out / "results").glob("*w1*.meta.json")).read_text())
    assert meta["audio_sha256"] == [hashlib.sha256((arch / "w1.wav").read_bytes()).hexdigest()]
