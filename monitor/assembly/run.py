"""Commands that run a session or the chain and print: the headless session with its
printers and closing summary, and `scenemon profile`.

The exit code of a finished session comes from `errors.summary_failure` (a device lost, a
full disk, a model fault: 1), like every other exit code, from `errors`.
"""

from __future__ import annotations

import sys
import threading
from pathlib import Path

import numpy as np

from monitor.assembly.plan import ModelPlan, SessionPlan
from monitor.base.errors import ExitCode, summary_failure


def finish(summary: dict, stream=None) -> int:
    """Print the closing summary; the exit code of the session.

    Parameters
    ----------
    summary : dict
        The session's summary.
    stream : TextIO, optional
        Where the lines go (stderr).

    Returns
    -------
    int
        0, or 1 for a runtime failure the summary records.
    """
    stream = stream or sys.stderr
    stream.write(summary_text(summary))
    failure = summary_failure(summary)
    if failure:
        stream.write(f"scenemon: {failure}\n")
        return ExitCode.FAILURE
    return ExitCode.OK


def run_printed(plan: SessionPlan, *, json_lines: bool, observers=(), on_ready=None) -> int:
    """A session without a screen: one JSON object per window (`json_lines`) or one line per
    decision change on stdout, the summary on stderr.

    Parameters
    ----------
    plan : SessionPlan
        The session.
    json_lines : bool
        JSON lines (``--headless``) instead of change lines.
    observers : sequence of Observer
        More observers of the session (the stage server's feed).
    on_ready : callable, optional
        Given the `SessionHandle` before the first window.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.assembly.assemble import run_session
    from monitor.assembly.observers import ChangePrinter, HeadlessPrinter

    stop = threading.Event()
    printer = HeadlessPrinter(stop=stop) if json_lines else ChangePrinter(stop=stop)
    summary = run_session(plan, observers=[printer, *observers], stop=stop, on_ready=on_ready)
    if printer.closed:  # the reader went away (| head): the session is closed, end quietly
        return ExitCode.OK
    return finish(summary)


def run_profile(model: ModelPlan, sources: list[Path], *, out: Path | None,
                quantile: float) -> int:
    """`scenemon profile`: fit and write the novelty profile of a model.

    Each window is labelled with its class: the truth of a session that has one (windows
    without truth are left out), else the model's own top class. Windows are held out for the
    threshold in blocks of 20 within each recording, never across recordings.

    Parameters
    ----------
    model : ModelPlan
        The model.
    sources : list of Path
        Recordings or sessions of its own scenes.
    out : Path or None
        Where to write (None: beside the model).
    quantile : float
        The threshold's quantile of held-out distances.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.assembly.assemble import file_windows, load_model
    from monitor.base.files import check_output
    from monitor.features.frontend import FrontEnd
    from monitor.inference.novelty import (
        block_groups,
        fit_profile,
        is_profile_file,
        profile_path_for,
        save_profile,
    )
    from monitor.session.reader import is_session, load_session

    target = out or profile_path_for(model.path)
    check_output(target, "a profile", is_profile_file)  # before the work, not after
    loaded = load_model(model)
    card = loaded.card
    fe = FrontEnd(card)
    feats, labels, groups, notes = [], [], [], []
    for k, src in enumerate(sources):
        f = fe.batch_of_stream(file_windows(src, card))
        lab = None
        if is_session(src):
            s = load_session(src)
            if s.truth is not None or any(w.get("truth") for w in s.windows):
                truth = [w.get("truth") for w in s.windows][:len(f)]
                truth += [None] * (len(f) - len(truth))
                lab = np.array([card.classes.index(t) if t in card.classes else -1
                                for t in truth])
                notes.append(f"{src}: {int((lab >= 0).sum())} of {len(f)} windows have truth")
        if lab is None:  # no truth: the model's own classes
            lab = np.argmax(loaded.runner.predict(f), axis=1)
        feats.append(f)
        labels.append(lab)
        groups.append(k * 10 ** 7 + block_groups(len(f)))
    prof = fit_profile(np.concatenate(feats), card, labels=np.concatenate(labels),
                       groups=np.concatenate(groups), quantile=quantile)
    save_profile(prof, target)
    for n in notes:
        sys.stderr.write(f"scenemon: note: {n}\n")
    sys.stdout.write(f"wrote {target}: {prof.windows} windows in {prof.means.shape[0]} "
                     f"classes, threshold {prof.threshold:.2f} (the {prof.quantile:.1%} quantile "
                     f"of held-out profile windows' distances)\n")
    return ExitCode.OK


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


def summary_text(summary: dict) -> str:
    """The lines printed when a session ends: what happened, and what to run next.

    Parameters
    ----------
    summary : dict
        The session's summary.

    Returns
    -------
    str
        The lines.
    """
    from monitor.assembly.assemble import invocation

    acc = summary.get("accuracy")
    dur = summary.get("duration_s") or 0.0
    changes = summary.get("decision_changes") or 0
    rate = f" ({summary['switches_per_min']:.2f}/min)" \
        if dur >= 60.0 and summary.get("switches_per_min") is not None else ""
    lines = [f"session   {summary.get('session')}",
             f"windows   {summary['windows']} over {dur:.1f} s, "
             f"{_plural(changes, 'decision change')}{rate}"]
    if summary.get("ms_median") is not None:
        lines.append(f"compute   median {summary['ms_median']:.3f} ms, p99 "
                     f"{summary['ms_p99']:.3f} ms per window")
    lines.append(f"losses    {_plural(summary.get('overruns') or 0, 'overrun')}, "
                 f"{summary.get('dropped_samples') or 0} samples dropped")
    if acc is not None:
        lines.append(f"accuracy  {acc:.1%} of {summary['windows_with_truth']} windows with truth")
    b = summary.get("b")
    if b:
        bacc = b.get("accuracy")
        lines.append(f"model B   {_plural(b.get('decision_changes') or 0, 'decision change')}"
                     + (f", accuracy {bacc:.1%}" if bacc is not None else ""))
    silent = summary.get("silent_stretches") or []
    if silent:
        a, z = silent[0]
        stretches = "1 stretch" if len(silent) == 1 else f"{len(silent)} stretches"
        lines.append(f"warning   the input was silent (below -70 dBFS) for "
                     f"{summary.get('silent_s', 0):.1f} s in {stretches}, the first "
                     f"{a:.1f}-{z:.1f} s: a muted or disconnected input?")
    if summary.get("novelty_faults"):
        lines.append(f"warning   {_plural(summary['novelty_faults'], 'window')} had a novelty "
                     f"that is not finite (recorded as null, flagged \"fault\"): is the "
                     f"profile made for this card?")
    clipping = summary.get("clipping_stretches") or []
    if clipping:
        lines.append(f"warning   the input clipped in {summary.get('clipped_windows', 0)} "
                     f"windows, the first at {clipping[0][0]:.1f} s: lower the input gain")
    if summary.get("session") and summary.get("windows"):
        exe = invocation()
        d = summary["session"]
        lines.append(f"next      {exe} report {d} --html {Path(d).name}.html")
        if acc is not None:
            lines.append(f"          {exe} tune {d}")
        if sum((summary.get("snippets") or {}).values()):
            lines.append(f"          {exe} relabel {d}   then   {exe} harvest {d} --out retrain")
    return "\n".join(lines) + "\n"
