"""`scenemon report RUN`: the account of a whole run folder, session by session.

For each session: when it started, how it ended (closed, repaired after a kill or a power
cut, its input lost), its windows, the audio captured (what is on disk plus what the budget
removed, with why) and the gaps in its input; for the run: the gaps between sessions (the
process not running, a device waited for, a new session opening the device), wall-clock
steps and the totals. Everything comes from the files the run wrote (`session.runfolder`
owns the run's own files, `session.reader` the sessions').
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from monitor.base.files import audio_segments, session_is_live
from monitor.session import runfolder as rf
from monitor.session.reader import load_session
from monitor.session.repair import wav_layout


def _n(v: Any) -> float:
    """A number a file gave, or 0.0 (the run's files are read as untrusted)."""
    x = rf.number(v)
    return 0.0 if x is None else x


def _audio_s(d: Path) -> float:
    total = 0.0
    for seg in audio_segments(d):
        try:
            lay = wav_layout(seg)
        except OSError:
            continue
        if lay and lay[4]:
            total += lay[2] / lay[4]
    return total


def session_account(d: Path) -> dict[str, Any]:
    """One session of a run: start, end, windows, audio kept and removed, gaps.

    Parameters
    ----------
    d : Path
        The session folder.

    Returns
    -------
    dict
        Its figures (seconds are of audio, from sample counts).

    Raises
    ------
    SessionError
        The session cannot be read (`load_session`).
    """
    s = load_session(d)
    summary = s.summary or {}
    if not isinstance(summary.get("audio_removed", []), list):
        summary = {**summary, "audio_removed": []}
    if not isinstance(summary.get("input_gaps", []), list):
        summary = {**summary, "input_gaps": []}
    removed = [x for x in summary.get("audio_removed") or [] if isinstance(x, dict)]
    removed_s = sum(_n(x.get("seconds")) for x in removed)
    kept_s = _audio_s(d)
    if s.summary is None:
        end = "still being recorded" if session_is_live(d) else "not closed (repair it)"
    elif summary.get("recovered"):
        end = "repaired (killed or a power cut)"
    elif summary.get("source_failure"):
        end = "input lost"
    else:
        end = "closed"
    gaps = [g for g in summary.get("input_gaps") or [] if isinstance(g, dict)]
    after_gap = [w for w in s.windows if w.get("gap")]
    return {
        "session": d.name, "started_at": s.meta.get("started_at"), "end": end,
        "windows": len(s.windows), "last_t1": s.windows[-1]["t1"] if s.windows else 0.0,
        "audio_kept_s": round(kept_s, 3), "audio_removed_s": round(removed_s, 3),
        "audio_captured_s": round(kept_s + removed_s, 3),
        "audio_removed": removed, "audio_stopped": summary.get("audio_stopped"),
        "input_gaps": gaps, "windows_after_gap": len(after_gap),
        "gap_samples": int(sum(w["gap"] for w in after_gap)),
        "failure": summary.get("source_failure"),
        "snippets": summary.get("snippets_written"),
    }


def run_account(run: Path) -> dict[str, Any]:
    """The account of a run folder (see module docstring).

    Parameters
    ----------
    run : Path
        The run folder.

    Returns
    -------
    dict
        ``sessions`` (each `session_account`), ``gaps`` (between sessions, from the log),
        ``clock_steps``, ``process_starts``, ``repaired`` and ``totals``.

    Raises
    ------
    SessionError
        A session of the run cannot be read.
    """
    sessions = [session_account(d) for d in rf.run_sessions(run)]
    events = rf.read_events(run)
    gaps = [{k: e.get(k) for k in ("cause", "wall_start", "wall_end", "seconds", "measured_by")}
            for e in events if e["event"] == "gap"]
    steps = [{k: e.get(k) for k in ("step_s", "wall_before", "wall_after")}
             for e in events if e["event"] == "clock_step"]
    totals = {
        "sessions": len(sessions),
        "windows": sum(x["windows"] for x in sessions),
        "audio_captured_s": round(sum(x["audio_captured_s"] for x in sessions), 3),
        "audio_kept_s": round(sum(x["audio_kept_s"] for x in sessions), 3),
        "audio_removed_s": round(sum(x["audio_removed_s"] for x in sessions), 3),
        # a gap open at a session's end is the same gap the log records between sessions
        "input_gaps": sum(1 for x in sessions for g in x["input_gaps"]
                          if g.get("end_s") is not None) + len(gaps),
        "gap_s_between_sessions": round(sum(_n(g.get("seconds")) for g in gaps), 3),
        "repaired_sessions": sum(1 for x in sessions if x["end"].startswith("repaired")),
    }
    return {"run": str(run), "sessions": sessions, "gaps": gaps, "clock_steps": steps,
            "process_starts": sum(1 for e in events if e["event"] == "process_start"),
            "totals": totals}


def _t(wall: Any) -> str:
    x = rf.number(wall)
    if x is None:
        return "?"
    try:
        return rf.iso_utc(x)
    except (OverflowError, ValueError, OSError):  # a time no calendar holds
        return "?"


def run_account_text(acc: dict[str, Any]) -> str:
    """The run's account for a person.

    Parameters
    ----------
    acc : dict
        `run_account`'s result.

    Returns
    -------
    str
        The lines.
    """
    t = acc["totals"]
    lines = [f"run {acc['run']}: {t['sessions']} sessions, {acc['process_starts']} process "
             f"starts, {t['repaired_sessions']} sessions repaired after a kill or power cut",
             f"{'session':<32} {'started':<21} {'windows':>8} {'captured s':>10} "
             f"{'removed s':>9}  end"]
    for x in acc["sessions"]:
        lines.append(f"{x['session'][:32]:<32} {str(x['started_at'])[:21]:<21} "
                     f"{x['windows']:>8} {x['audio_captured_s']:>10.1f} "
                     f"{x['audio_removed_s']:>9.1f}  {x['end']}")
        for r in x["audio_removed"]:
            lines.append(f"    removed {r.get('file')} ({r.get('seconds')} s): {r.get('reason')}")
        for g in x["input_gaps"]:
            lines.append(f"    input gap {g.get('start_s')}-{g.get('end_s') or 'end'} s: "
                         f"{g.get('cause')}")
        if x["windows_after_gap"]:
            lines.append(f"    {x['windows_after_gap']} windows after lost audio "
                         f"({x['gap_samples']} samples in all; each window's gap field)")
        if x["audio_stopped"]:
            lines.append(f"    audio stopped: {x['audio_stopped']}")
        if x["failure"]:
            lines.append(f"    {x['failure']}")
    for g in acc["gaps"]:
        lines.append(f"gap  {_t(g.get('wall_start'))} to {_t(g.get('wall_end'))} "
                     f"({g.get('seconds')} s): {g.get('cause')}")
    for c in acc["clock_steps"]:
        lines.append(f"clock the wall clock stepped by {c.get('step_s')} s at "
                     f"{_t(c.get('wall_after'))} (durations use the sample count)")
    lines.append(f"total {t['windows']} windows; audio captured {t['audio_captured_s']:.1f} s "
                 f"(kept {t['audio_kept_s']:.1f} s, removed for the budget "
                 f"{t['audio_removed_s']:.1f} s); {t['input_gaps']} gaps, "
                 f"{t['gap_s_between_sessions']:.1f} s between sessions")
    return "\n".join(lines) + "\n"


__all__ = ["run_account", "run_account_text", "session_account"]
