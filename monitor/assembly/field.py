"""An unattended run: sessions one after another in a run folder, until the service stops it.

`run_field(plan)` takes the run folder's lock, repairs what a killed or powered-off earlier
process left (as ``scenemon repair`` does), then runs sessions through
`assemble.run_session`, each ``plan.session_s`` of audio long, in numbered folders. A lost
input device ends its session (the source's own reopening failed); the run then waits with
a growing pause (1 s, 2 s, 4 s ... up to ``plan.max_backoff_s``), reopens the device by
name and starts the next session. Every gap (a device lost, the process not running, the
moment between two sessions) goes into the run's log with its start, end and cause.

Threads: the caller's thread runs the sessions (each session's compute thread, see
`engine`); "field-status" rewrites ``status.json`` every ``plan.status_every_s``, watches
the wall clock against the monotonic one (a step is logged, never turned into a
duration), stops the session's audio when the disk has less free space than
``plan.reserve_bytes`` (another program is filling it), and keeps the disk budget (removing
the oldest audio of closed sessions). `FieldWatch`, an observer, runs on the compute thread
and only updates counters under a lock; its histories are bounded.
"""

from __future__ import annotations

import dataclasses
import signal
import sys
import threading
import time
from collections import deque
from pathlib import Path
from typing import Any

from monitor.assembly.plan import FieldPlan, MicInput, OutputPlan
from monitor.base.errors import DeviceError, ExitCode, ScenemonError, SessionError
from monitor.base.files import SessionLock, session_is_live
from monitor.decisions.contract import EngineStatus, ObserverBase, WindowResult
from monitor.session import runfolder as rf

CLOCK_STEP_S = 2.0  # a wall-clock jump larger than this against the monotonic clock is a step
BUDGET_EVERY_S = 60.0  # the budget is checked this often (and when a session starts)
CHANGES_KEPT = 20000  # decision changes remembered for the last hour's count (bounded)


class FieldWatch(ObserverBase):
    """What the status file says about the windows: counters under a lock (compute thread).

    Parameters
    ----------
    hop_s : float
        Seconds between windows (sizes the last hour's window count).
    """

    def __init__(self, hop_s: float) -> None:
        self._lock = threading.Lock()
        self.windows = 0
        self.last: dict[str, Any] | None = None
        self.last_mono: float | None = None
        self.decision: str | None = None
        self._changes: deque[float] = deque(maxlen=CHANGES_KEPT)
        self._minutes: deque[list] = deque(maxlen=61)  # [minute, windows] of the last hour
        self.status: EngineStatus | None = None

    def on_window(self, r: WindowResult) -> None:
        """Count the window, remember the last one, note a decision change."""
        now = time.monotonic()
        minute = int(now // 60)
        with self._lock:
            self.windows += 1
            if r.decision is not None and r.decision != self.decision and self.decision is not None:
                self._changes.append(now)
            self.decision = r.decision
            self.last = {"t1": round(r.t1, 3), "decision": r.decision, "top": r.top}
            self.last_mono = now
            if self._minutes and self._minutes[-1][0] == minute:
                self._minutes[-1][1] += 1
            else:
                self._minutes.append([minute, 1])

    def on_status(self, status: EngineStatus) -> None:
        """Keep the engine's latest snapshot (one reference store)."""
        self.status = status

    def new_session(self) -> None:
        """A new session starts: its last window and snapshot are not yet known."""
        with self._lock:
            self.last, self.last_mono, self.status = None, None, None

    def snapshot(self) -> dict[str, Any]:
        """The figures for the status file, read under the lock (status thread)."""
        now = time.monotonic()
        with self._lock:
            last = dict(self.last) if self.last else None
            if last is not None:
                last["age_s"] = round(now - self.last_mono, 3)
                last["wall"] = round(time.time() - (now - self.last_mono), 3)
            hour = int(now // 60) - 60
            return {"last_window": last, "windows": self.windows,
                    "windows_last_hour": sum(n for m, n in self._minutes if m > hour),
                    "decision_changes_last_hour": sum(1 for t in self._changes if now - t <= 3600),
                    "decision": self.decision}


class _Run:
    """The run's shared state between the session loop and the status thread."""

    def __init__(self, plan: FieldPlan) -> None:
        self.plan = plan
        self.dir = plan.run
        self.lock = threading.Lock()
        self.state = "starting"
        self.state_since = time.time()
        self.handle = None  # the current session's SessionHandle
        self.session: Path | None = None
        self.sessions = len(rf.run_sessions(self.dir))
        self.gap_count = 0
        self.gap_s = 0.0
        self.open_gap: dict[str, Any] | None = None
        self.clock_steps = 0
        self.last_step: dict[str, Any] | None = None
        self.removed_files = 0
        self.removed_bytes = 0
        self.removed_s = 0.0
        self.last_removal: dict[str, Any] | None = None
        self.used_bytes: int | None = None
        self.over_budget: str | None = None
        self.audio_stopped: str | None = None
        self.repaired: list[str] = []
        self.overruns_before = 0  # overruns of the sessions already closed

    def set_state(self, state: str) -> None:
        with self.lock:
            if state != self.state:
                self.state, self.state_since = state, time.time()

    def open_gap_now(self, cause: str, wall_start: float | None = None,
                     mono_start: float | None = None) -> None:
        with self.lock:
            if self.open_gap is None:
                self.open_gap = {"cause": cause,
                                 "wall_start": round(wall_start or time.time(), 3),
                                 "mono_start": round(mono_start or time.monotonic(), 3),
                                 "boot": rf.boot_id()}

    def close_gap(self) -> None:
        with self.lock:
            g, self.open_gap = self.open_gap, None
        if g is None:
            return
        end = rf.clock_now()
        same_boot = g.get("boot") == end["boot"] and g.get("mono_start") is not None
        length = end["mono"] - g["mono_start"] if same_boot else max(0.0, end["wall"] - g["wall_start"])
        with self.lock:
            self.gap_count += 1
            self.gap_s += length
        _log(self.dir, "gap", cause=g["cause"], wall_start=g["wall_start"], wall_end=end["wall"],
             mono_start=g["mono_start"] if same_boot else None, mono_end=end["mono"],
             seconds=round(length, 3),
             measured_by="monotonic clock" if same_boot else "wall clock (across a reboot)")


def _log(run: Path, event: str, **fields: Any) -> None:
    """Append to the run's log; a full disk must not end the run (the status says so)."""
    try:
        rf.append_event(run, event, **fields)
    except OSError as exc:
        sys.stderr.write(f"scenemon: {run}: the run's log cannot be written ({exc.strerror})\n")


def _say(text: str) -> None:
    sys.stderr.write(f"scenemon: {text}\n")
    sys.stderr.flush()


def repair_left_over(run: Path) -> list[str]:
    """Repair every session of the run that a kill or a power cut left open.

    Parameters
    ----------
    run : Path
        The run folder (its lock held by this process).

    Returns
    -------
    list of str
        The sessions repaired.
    """
    from monitor.session.repair import repair

    done = []
    for s in rf.run_sessions(run):
        if (s / "summary.json").exists() or session_is_live(s):
            continue
        try:
            res = repair(s)
        except Exception as exc:  # noqa: BLE001 - one damaged session must not stop the run
            _log(run, "repair_failed", session=s.name, why=str(exc))
            _say(f"{s}: could not be repaired ({exc}); left as it is")
            continue
        if res.get("repaired"):
            done.append(s.name)
            _log(run, "repaired", session=s.name, actions=res.get("actions", []))
    return done


def _last_known(run: Path) -> tuple[float | None, str | None]:
    """Where the last process's audio ended by the wall clock, and its session, from the log
    and the last session's clock (for the gap 'scenemon was not running')."""
    sessions = rf.run_sessions(run)
    if not sessions:
        return None, None
    last = sessions[-1]
    from monitor.session.reader import load_session

    try:
        s = load_session(last)
    except Exception:  # noqa: BLE001
        return None, last.name
    clock = s.meta.get("clock") if isinstance(s.meta.get("clock"), dict) else {}
    wall = clock.get("wall")
    summary = s.summary or {}
    end = summary.get("clock_end") if isinstance(summary.get("clock_end"), dict) else None
    if end and isinstance(end.get("wall"), (int, float)):
        return float(end["wall"]), last.name
    if isinstance(wall, (int, float)):
        dur = s.windows[-1]["t1"] if s.windows else 0.0
        return float(wall) + float(dur), last.name
    return None, last.name


class _StatusThread:
    """The "field-status" thread (see module docstring)."""

    def __init__(self, run: _Run, watch: FieldWatch) -> None:
        self.run, self.watch = run, watch
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._loop, name="field-status", daemon=True)
        self._offset = time.time() - time.monotonic()
        self._last_budget = -1e18
        self._budget_lock = threading.Lock()

    def start(self) -> None:
        self.thread.start()

    def close(self) -> None:
        self.stop.set()
        self.thread.join(timeout=30)
        self.tick(final=True)

    def _loop(self) -> None:
        while not self.stop.wait(self.run.plan.status_every_s):
            try:
                self.tick()
            except Exception as exc:  # noqa: BLE001 - the status must not end the run
                _say(f"the status could not be updated ({exc})")

    def check_clock(self) -> None:
        offset = time.time() - time.monotonic()
        step = offset - self._offset
        if abs(step) > CLOCK_STEP_S:
            now = rf.clock_now()
            rec = {"step_s": round(step, 3), "wall_before": round(now["mono"] + self._offset, 3),
                   "wall_after": now["wall"]}
            with self.run.lock:
                self.run.clock_steps += 1
                self.run.last_step = rec
            _log(self.run.dir, "clock_step", **rec)
        self._offset = offset

    def check_disk(self, handle) -> dict[str, int] | None:
        try:
            disk = rf.disk_of(self.run.dir)
        except OSError:
            return None
        if handle is not None and disk["free_bytes"] < self.run.plan.reserve_bytes \
                and handle.records_audio():
            why = (f"the disk had {disk['free_bytes'] / 1e6:.0f} MB free, below the "
                   f"{self.run.plan.reserve_bytes / 1e6:.0f} MB left to other programs; audio "
                   f"stopped, window lines go on")
            handle.stop_audio(why)
            _log(self.run.dir, "audio_stopped", session=handle.dir.name, why=why)
            _say(f"{handle.dir}: {why}")
        return disk

    def check_budget(self, current: Path | None, force: bool = False) -> None:
        plan = self.run.plan
        if plan.keep.bytes is None and plan.keep.seconds is None:
            return
        with self._budget_lock:  # the session loop (at a start) and this thread both call it
            now = time.monotonic()
            if not force and now - self._last_budget < BUDGET_EVERY_S:
                return
            self._last_budget = now
            try:
                removed = rf.enforce_budget(self.run.dir, plan.keep, current=current)
            except OSError as exc:
                _say(f"{self.run.dir}: the budget could not be kept ({exc})")
                removed = []
        for r in removed:
            _log(self.run.dir, "audio_removed", session=r.session, file=r.file, bytes=r.bytes,
                 seconds=round(r.seconds, 3), reason=r.reason)
        used = rf.folder_bytes(self.run.dir)
        over = None
        if plan.keep.bytes is not None and used > plan.keep.bytes:
            over = (f"the run folder holds {used / 1e6:.0f} MB, above its "
                    f"{plan.keep.bytes / 1e6:.0f} MB budget, in files that are kept (window "
                    f"lines, summaries, truth, snippets, the session being written)")
        with self.run.lock:
            for r in removed:
                self.run.removed_files += 1
                self.run.removed_bytes += r.bytes
                self.run.removed_s += r.seconds
                self.run.last_removal = dataclasses.asdict(r)
            self.run.used_bytes = used
            self.run.over_budget = over

    def tick(self, final: bool = False) -> None:
        run = self.run
        self.check_clock()
        with run.lock:
            handle = run.handle
        disk = self.check_disk(handle)
        if not final:
            self.check_budget(handle.dir if handle is not None else None)
        elif run.plan.keep.bytes is not None:  # the last word: what the folder holds now
            used = rf.folder_bytes(run.dir)
            with run.lock:
                run.used_bytes = used
        snap = self.watch.snapshot()
        engine = self.watch.status
        now = rf.clock_now()
        with run.lock:
            gap = dict(run.open_gap) if run.open_gap else None
            if gap is not None:
                gap["since"] = rf.iso_utc(gap["wall_start"])
            stopped = handle.audio_stopped() if handle is not None else run.audio_stopped
            status = {
                "tool": "scenemon", "run": str(run.dir), "pid": _pid(),
                "state": run.state, "state_since": rf.iso_utc(run.state_since),
                "written_at": rf.iso_utc(now["wall"]), "written_wall": now["wall"],
                "written_mono": now["mono"], "boot_id": now["boot"],
                "interval_s": run.plan.status_every_s,
                "session": run.session.name if run.session else None, "sessions": run.sessions,
                **snap,
                "overruns": run.overruns_before + (engine.overruns if engine else 0),
                "dropped_samples": engine.dropped_samples if engine else 0,
                "gaps": {"count": run.gap_count + (1 if gap else 0),
                         "seconds": round(run.gap_s, 3), "open": gap},
                "clock_steps": run.clock_steps, "last_clock_step": run.last_step,
                "disk": disk,
                "audio": {"recording": bool(handle is not None and handle.records_audio()),
                          "stopped": stopped},
                "budget": {**run.plan.keep.describe(), "used_bytes": run.used_bytes,
                           "removed_files": run.removed_files,
                           "removed_bytes": run.removed_bytes,
                           "removed_s": round(run.removed_s, 3),
                           "last_removal": run.last_removal, "over_budget": run.over_budget},
                "repaired_at_start": run.repaired,
            }
        try:
            rf.write_status(run.dir, status)
        except OSError:
            pass  # the disk is full: the last whole status stays, its age tells


def _summary_on_disk(d: Path) -> dict[str, Any]:
    import json

    try:
        s = json.loads((d / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return s if isinstance(s, dict) else {}


def _pid() -> int:
    import os

    return os.getpid()


def run_field(plan: FieldPlan) -> int:
    """Run sessions in the run folder until stopped (SIGTERM, SIGINT) or `plan.sessions` end.

    Parameters
    ----------
    plan : FieldPlan
        The run.

    Returns
    -------
    int
        The exit code: 0 after a stop.

    Raises
    ------
    SessionError
        Not a run folder (or one that cannot be made), or another process runs it.
    ScenemonError
        Bad input found before the first session (card, model, flags).
    """
    from monitor.assembly.assemble import card_of, run_session

    card = card_of(plan.session.models[0])  # a bad card: exit 2 before anything is made
    if plan.session_s < 4 * card.window_s:
        raise ScenemonError(f"--session-hours {plan.session_s / 3600:g}: a session must hold "
                            f"at least four {card.window_s:g} s windows of {card.name}")
    run_dir = rf.make_run(plan.run)
    lock = SessionLock(run_dir)
    try:
        lock.acquire()
    except OSError as exc:
        raise SessionError(f"{run_dir}: another process is running this folder "
                           f"({exc.strerror})") from None
    plan = dataclasses.replace(plan, run=run_dir)
    stop = threading.Event()
    handlers = {}
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGTERM, signal.SIGINT):
            handlers[sig] = signal.signal(sig, lambda *_: stop.set())
    run = _Run(plan)
    watch = FieldWatch(card.hop_s)
    status = _StatusThread(run, watch)
    try:
        wall_end, last_name = _last_known(run_dir)
        run.repaired = repair_left_over(run_dir)
        _log(run_dir, "process_start", pid=_pid(), keep=plan.keep.describe(),
             repaired=run.repaired)
        if wall_end is not None:  # the time the last process was not running
            now = time.time()
            if now >= wall_end:
                run.open_gap_now("scenemon was not running (stopped, killed or a power cut) "
                                 f"after session {last_name}", wall_start=wall_end,
                                 mono_start=time.monotonic() - (now - wall_end))
            else:  # the wall clock went back since: the length is unknown, not negative
                run.open_gap_now(f"scenemon was not running after session {last_name} (the "
                                 f"wall clock is behind that session's end: length unknown)")
        status.start()
        status.tick()
        _loop(plan, run, watch, status, stop, run_session)
    finally:
        run.set_state("stopped")
        with run.lock:
            run.handle = None
        status.close()
        _log(run_dir, "process_stop", pid=_pid())
        for sig, old in handlers.items():
            signal.signal(sig, old)
        lock.release()
    return ExitCode.OK


def _loop(plan: FieldPlan, run: _Run, watch: FieldWatch, status: _StatusThread,
          stop: threading.Event, run_session) -> None:
    backoff = 1.0
    started = 0
    while not stop.is_set() and (plan.sessions is None or started < plan.sessions):
        d = rf.next_session_dir(run.dir)
        src = plan.session.source
        if isinstance(src, MicInput):
            src = dataclasses.replace(src, seconds=plan.session_s)
        audio = plan.session.output.audio
        why_no_audio = None
        try:
            if audio and rf.disk_of(run.dir)["free_bytes"] < plan.reserve_bytes:
                audio, why_no_audio = False, (
                    f"the disk had less than {plan.reserve_bytes / 1e6:.0f} MB free at the "
                    f"start; audio is not recorded in this session, window lines are")
        except OSError:
            pass
        with run.lock:
            run.audio_stopped = why_no_audio
        splan = dataclasses.replace(
            plan.session, source=src,
            output=OutputPlan(d, "field", audio, plan.session.output.segment_s))
        watch.new_session()

        def ready(handle, d=d, audio=audio, why_no_audio=why_no_audio):
            with run.lock:
                run.handle, run.session = handle, d
                run.sessions += 1
            run.close_gap()
            run.set_state("listening")
            _log(run.dir, "session_start", session=d.name, audio=audio,
                 audio_off=why_no_audio, source=handle.source)
            status.check_budget(d, force=True)
            status.tick()

        run.set_state("opening the input device")
        try:
            summary = run_session(splan, stop=stop, on_ready=ready, observers=[watch],
                                  notices=True)
        except DeviceError as exc:  # not there (yet): unplugged, or the server not up
            run.open_gap_now(f"the input device could not be opened: {exc}")
            run.set_state(f"waiting for the input device ({exc})")
            _say(f"{exc}; trying again in {backoff:.0f} s")
            stop.wait(backoff)
            backoff = min(plan.max_backoff_s, backoff * 2)
            continue
        started += 1
        with run.lock:
            run.handle = None
            engine = watch.status
            run.overruns_before += engine.overruns if engine else 0
        gaps = summary.get("input_gaps") or []
        for g in gaps:
            if g.get("end_s") is not None:
                with run.lock:
                    run.gap_count += 1
                    run.gap_s += g["end_s"] - g["start_s"]
        written = _summary_on_disk(d)
        _say(f"{d.name}: {summary.get('windows')} windows over {summary.get('duration_s')} s"
             + (f", audio stopped: {written['audio_stopped']}" if written.get("audio_stopped")
                else ""))
        with run.lock:
            run.audio_stopped = written.get("audio_stopped") or summary.get("audio_stopped")
        _log(run.dir, "session_end", session=d.name, windows=summary.get("windows"),
             duration_s=summary.get("duration_s"), audio_frames=written.get("audio_frames"),
             clean=summary.get("clean"), failure=summary.get("source_failure"),
             audio_stopped=summary.get("audio_stopped"), input_gaps=len(gaps))
        failure = summary.get("source_failure")
        if failure:
            open_gaps = [g for g in gaps if g.get("end_s") is None]
            wall = open_gaps[-1]["wall_start"] if open_gaps else None
            run.open_gap_now(failure, wall_start=wall,
                             mono_start=time.monotonic() - (time.time() - wall) if wall else None)
            run.set_state(f"waiting for the input device ({failure})")
            _say(f"{failure}; the next session starts when it is back (trying again in "
                 f"{backoff:.0f} s)")
            stop.wait(backoff)
            backoff = min(plan.max_backoff_s, backoff * 2)
            continue
        backoff = 1.0
        if not stop.is_set() and (plan.sessions is None or started < plan.sessions):
            run.open_gap_now("the next session opens the input device again")


__all__ = ["FieldWatch", "repair_left_over", "run_field"]
