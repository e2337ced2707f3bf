"""`scenemon field` on the real live path: the PulseAudio null sink's monitor through
PortAudio, a real process killed with SIGKILL five times and started again, the sink's
module unloaded (the device gone) and loaded again, the budget reached in a small run
folder. Afterwards the run's sessions hold every second of audio captured before each kill
(up to the last second), every gap is in the run's log, and `report RUN` accounts for it.

Skipped with a reason where no audio server runs; failing instead when
SCENEMON_REQUIRE_AUDIO=1 (set by .ci/run)."""

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from conftest import AUDIO_SERVER, MODELS, ROOT, cli, need_audio_server
from monitor.session import runfolder as rf
from monitor.session.repair import check_whole

pytestmark = [pytest.mark.system, pytest.mark.slow]
SERVER = AUDIO_SERVER
SINK = "scenemon_test"


@pytest.fixture(scope="module")
def pulse():
    need_audio_server()
    yield
    _load_sink()


def _sink_module() -> str | None:
    out = subprocess.run(["pactl", "list", "short", "modules"], capture_output=True,
                         text=True).stdout
    for line in out.splitlines():
        parts = line.split("\t")
        if len(parts) > 2 and parts[1] == "module-null-sink" and f"sink_name={SINK}" in parts[2]:
            return parts[0]
    return None


def _load_sink() -> None:
    if _sink_module() is None:
        subprocess.run(["pactl", "load-module", "module-null-sink", f"sink_name={SINK}",
                        "rate=44100"], capture_output=True)
    subprocess.run(["bash", str(SERVER), "start"], capture_output=True)


def _start(run: Path, log: Path, *extra: str) -> subprocess.Popen:
    with open(log, "ab") as err:
        return subprocess.Popen(
            [sys.executable, "-m", "monitor", "field", str(run), "--model",
             str(MODELS / "demo.tflite"), "--input", "pulse", "--status-every", "0.3",
             "--reserve", "1MB", *extra],
            cwd=ROOT, stdout=subprocess.DEVNULL, stderr=err)


def _status(run: Path) -> dict:
    try:
        return rf.read_status(run)
    except Exception:  # noqa: BLE001 - not written yet, or being replaced
        return {}


def _wait(p: subprocess.Popen, what, pred, timeout=90.0) -> dict:
    """Poll the status file until `pred(status)` holds (a failure after `timeout`, never a
    timed assertion about speed)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        assert p.poll() is None, f"scenemon field ended early waiting for {what}"
        st = _status(p.run)
        if st.get("pid") == p.pid and pred(st):
            return st
        time.sleep(0.1)
    pytest.fail(f"scenemon field did not reach: {what}")


def _listening_with(n: int):
    return lambda st: st.get("state") == "listening" and \
        ((st.get("last_window") or {}).get("t1") or 0) >= n * 0.5


def test_killed_five_times_with_the_device_removed_and_the_budget_reached(pulse, tmp_path):
    run, log = tmp_path / "run", tmp_path / "field.log"
    kills = 0
    # short sessions, a small budget, a device given up within the session after 3 tries
    flags = ("--session-hours", "0.002", "--keep", "400kB", "--reopen-tries", "3")
    for k in range(5):
        p = _start(run, log, *flags)
        p.run = run
        try:
            _wait(p, "windows", _listening_with(4))
            if k == 1:  # the device goes away and comes back
                module = _sink_module()
                assert module is not None
                subprocess.run(["pactl", "unload-module", module], check=True)
                _wait(p, "waiting for the device",
                      lambda st: str(st.get("state", "")).startswith("waiting for the input"))
                _load_sink()
                before = _status(run).get("session")
                _wait(p, "a new session after the device came back",
                      lambda st, b=before: st.get("session") != b and _listening_with(4)(st))
            p.send_signal(signal.SIGKILL)
            p.wait(timeout=30)
            kills += 1
        finally:
            if p.poll() is None:
                p.kill()
                p.wait()
            _load_sink()
    assert kills == 5
    # a last start repairs the fifth kill's session; then a clean stop (as systemd stops it)
    p = _start(run, log, *flags)
    p.run = run
    try:
        _wait(p, "windows after the last start", _listening_with(2))
        p.send_signal(signal.SIGTERM)
        assert p.wait(timeout=60) == 0, log.read_text()[-2000:]
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()

    sessions = rf.run_sessions(run)
    events = rf.read_events(run)
    assert sum(e["event"] == "process_start" for e in events) == 6
    repaired = [e["session"] for e in events if e["event"] == "repaired"]
    assert len(repaired) == 5  # each kill left one open session, repaired at the next start
    for s in sessions:
        assert (s / "summary.json").exists(), s
        assert check_whole(s) == [], s  # every file readable by any reader
    # every gap is recorded with its start, end and cause
    gaps = [e for e in events if e["event"] == "gap"]
    not_running = [g for g in gaps if "was not running" in g["cause"]]
    assert len(not_running) == 5
    device = [g for g in gaps if "lost" in g["cause"] or "could not be opened" in g["cause"]]
    assert device, [g["cause"] for g in gaps]
    for g in gaps:
        assert g["wall_end"] >= g["wall_start"] and g["seconds"] >= 0
    # the budget was reached: the oldest audio went, said in the summary and the log
    removed = [e for e in events if e["event"] == "audio_removed"]
    assert removed and removed[0]["session"] == sessions[0].name
    # the account: each session holds (or records as removed) every second captured
    r = cli("report", run, "--json")
    assert r.returncode == 0, r.stderr
    acc = json.loads(r.stdout)
    assert [x["session"] for x in acc["sessions"]] == [s.name for s in sessions]
    for x in acc["sessions"]:
        assert x["audio_captured_s"] >= x["last_t1"] - 1.0, x
    assert acc["totals"]["repaired_sessions"] == 5
    assert acc["totals"]["audio_removed_s"] > 0
    assert acc["totals"]["input_gaps"] >= len(gaps)  # the log's, and any closed inside a session
    assert acc["process_starts"] == 6
    # nobody runs the folder now: status says so, and exits 1
    r = cli("status", run)
    assert r.returncode == 1 and "no scenemon process is running" in r.stdout


def test_a_device_back_within_the_session_leaves_a_recorded_gap_no_window_spans(pulse, tmp_path):
    run, log = tmp_path / "run", tmp_path / "field.log"
    p = _start(run, log)  # the default: about a minute of tries inside the session
    p.run = run
    try:
        _wait(p, "windows", _listening_with(4))
        module = _sink_module()
        assert module is not None
        subprocess.run(["pactl", "unload-module", module], check=True)
        time.sleep(3.0)  # the device stays away a few seconds (a pause, not a measurement)
        _load_sink()
        _wait(p, "windows after the device came back", _listening_with(16))
        p.send_signal(signal.SIGTERM)
        assert p.wait(timeout=60) == 0, log.read_text()[-2000:]
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()
        _load_sink()
    sessions = rf.run_sessions(run)
    assert len(sessions) == 1, "the device came back within the session's tries"
    summary = json.loads((sessions[0] / "summary.json").read_text())
    gaps = summary["input_gaps"]
    assert len(gaps) == 1 and summary["clean"] and summary["reopens"] == 1
    g = gaps[0]
    assert g["end_s"] > g["start_s"] and g["cause"] and g["wall_end"] > g["wall_start"]
    windows = [json.loads(x) for x in (sessions[0] / "windows.jsonl").read_text().splitlines()]
    assert any(w["t0"] >= g["end_s"] for w in windows)  # it went on after the gap
    for w in windows:  # no window is made of audio on both sides of the gap
        assert w["t1"] <= g["start_s"] + 1e-6 or w["t0"] >= g["end_s"] - 1e-6, (w["t0"], g)
    after = [w for w in windows if w["t0"] >= g["end_s"] - 1e-6]
    assert after[0]["gap"] > 0  # the first window after it carries the samples lost
    r = cli("report", run)
    assert r.returncode == 0 and "input gap" in r.stdout
