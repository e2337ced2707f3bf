"""`scenemon report SESSION [--html OUT.html] [--json]`: a session's account.

On the terminal: duration, losses, silent and clipping stretches, switches (decisions and
the raw top class), time per decided class and, with truth, accuracy, balanced accuracy,
per-class precision / recall / F1, the confusion matrix and the latency after each truth
change; for an A/B session both models side by side with their agreement and McNemar's test.

As HTML: one self-contained page (figures embedded as SVG, snippets as inline players, every
embedded string escaped, nothing fetched) in the palette the terminal UI uses. Snippet audio
is embedded only after `snippets.verified_audio` accepts it.
"""

from __future__ import annotations

import base64
import html
import io
import json
import sys
from collections.abc import Callable
from pathlib import Path

import numpy as np

from monitor.base import palette as P
from monitor.base.errors import ExitCode, ScenemonError
from monitor.base.files import check_output, starts_with, terminal_safe
from monitor.review.metrics import UNDECIDED, Metrics, paired, window_metrics
from monitor.session.reader import Session, load_session
from monitor.session.snippets import count_unreadable, iter_snippets, verified_audio

MAX_EMBEDDED_SNIPPETS = 200
REPORT_MARK = "<!-- scenemon report -->"


def model_metrics(s: Session) -> list[Metrics]:
    """Metrics of each model of the session (A first).

    Parameters
    ----------
    s : Session
        The session.

    Returns
    -------
    list of Metrics
        One per model, each read with its own classes.
    """
    spans = s.truth.spans if s.truth else None
    return [window_metrics(w, s.classes_of(k), hop_s=s.hop_s, truth_spans=spans)
            for k, w in enumerate(s.model_windows())]


def _fmt(v, spec=".3f", none="-"):
    return none if v is None else format(v, spec)


def _plural(n: int, word: str, plural: str | None = None) -> str:
    return f"{n} {word if n == 1 else plural or word + 's'}"


def _switch_line(m: Metrics) -> str:
    rate = f" ({m.switches_per_min:.2f} per minute)" if m.duration_s >= 60 and \
        m.switches_per_min is not None else ""
    raw = "" if m.raw_changes is None else \
        f"; the raw top class changes {_plural(m.raw_changes, 'time')}"
    return (f"{_plural(m.changes, 'decision change')}{rate}{raw}; the truth changes "
            f"{_plural(m.truth_changes, 'time')}")


def latency_words(m: Metrics) -> str:
    """The latency line's words: median and worst after a truth change, and whether every
    change was reached.

    Parameters
    ----------
    m : Metrics
        One model's figures.

    Returns
    -------
    str
        The words.
    """
    if not m.truth_changes:
        return "no truth change in this session"
    if not m.latencies:
        return f"the decision never reached the new truth ({_plural(m.truth_changes, 'change')})"
    reached = ("reached after every truth change" if not m.never_reached else
               f"not reached after {m.never_reached} of {_plural(m.truth_changes, 'truth change')}")
    return (f"after a truth change: median {m.latency_median:.2f} s, worst "
            f"{m.latency_worst:.2f} s; {reached}")


def text_report(s: Session, ms: list[Metrics]) -> str:
    """A session's account for the terminal (see module docstring).

    Parameters
    ----------
    s : Session
        The session.
    ms : list of Metrics
        Each model's metrics, A first (`model_metrics`); with two, both side by side.

    Returns
    -------
    str
        The lines, ending in a newline.
    """
    m = ms[0]
    lines = [f"session {s.dir}"]
    lines += [f"  note: {n}" for n in s.notes]
    summ = s.summary or {}
    src = s.source
    models = s.models
    names = " vs ".join(f"{'AB'[i]} {x.get('path')} ({x.get('runtime') or x.get('kind')})"
                        for i, x in enumerate(models)) if len(models) > 1 else \
        (f"model {models[0].get('path')}" if models else "model -")
    lines.append(f"source    {src.get('origin')} {src.get('file') or src.get('device') or ''} "
                 f"({src.get('native_rate')} Hz)  {names}")
    losses = []
    for key, word in (("overruns", "overrun"), ("dropped_samples", "sample")):
        v = summ.get(key)
        if isinstance(v, int):
            losses.append(_plural(v, word) + (" dropped" if key == "dropped_samples" else ""))
    gaps = sum(1 for w in s.windows if w.get("gap"))
    lines.append(f"duration  {m.duration_s:.1f} s, {m.windows} windows; "
                 + ", ".join(losses + [f"{gaps} windows after a gap"]))
    lv = m.levels
    if lv.get("silent_stretches"):
        a, z = lv["silent_stretches"][0]
        lines.append(f"level     silent (below -70 dBFS) for {lv['silent_s']:.1f} s in "
                     f"{_plural(len(lv['silent_stretches']), 'stretch', 'stretches')}, the "
                     f"first {a:.1f}-{z:.1f} s: a muted or disconnected input?")
    if lv.get("clipping_stretches"):
        lines.append(f"level     clipping in {lv['clipped_windows']} windows, the first at "
                     f"{lv['clipping_stretches'][0][0]:.1f} s")
    for k, mm in enumerate(ms):
        if mm.model_faults:
            who = "" if len(ms) == 1 else f"{'AB'[k]}: "
            lines.append(f"faults    {who}{_plural(mm.model_faults, 'window')} with a model "
                         f"output that is not finite (NaN or infinite): recorded with null "
                         f"probabilities, the decision held")
        if mm.figure_faults:
            who = "" if len(ms) == 1 else f"{'AB'[k]}: "
            lines.append(f"faults    {who}{_plural(mm.figure_faults, 'window')} with another "
                         f"figure that is not finite (a novelty): recorded as null, flagged")
    for k, mm in enumerate(ms):
        who = "" if len(ms) == 1 else f"{'AB'[k]}: "
        lines.append(f"switches  {who}{_switch_line(mm)}")
    lines.append("decided   " + ", ".join(f"{c} {t:.1f} s" for c, t in m.decided_s.items()))
    for k, mm in enumerate(ms):
        if mm.unfamiliar is not None:  # each model's own profile, its own share
            who = "" if len(ms) == 1 else f"{'AB'[k]}: "
            u = mm.unfamiliar
            per = ", ".join(f"{c} {v:.1%}" for c, v in u["share_per_truth_class"].items())
            lines.append(f"unfamiliar {who}{u['share']:.1%} of windows ({u['windows']})"
                         + (f"; by truth: {per}" if per else ""))
    if m.with_truth:
        for k, mm in enumerate(ms):
            who = "" if len(ms) == 1 else f"{'AB'[k]}: "
            lines.append(f"accuracy  {who}{mm.accuracy:.1%} of {mm.with_truth} windows with truth "
                         f"(undecided counts as wrong); balanced {mm.balanced_accuracy:.1%}")
            lines.append(f"latency   {who}{latency_words(mm)}")
        if len(ms) > 1:
            pr = paired(s.windows, s.windows_b or [])
            lines.append(f"A vs B    decisions agree on {pr['decision_agreement']:.1%} of "
                         f"{pr['windows']} windows; {pr['sentence']}")
        w = max(12, *(len(c) for c in m.classes))
        lines.append("")
        # (heading, width, value of a class): headings and values formatted with one width
        cols: list[tuple[str, int, Callable[[str], object]]] = []
        for k, mm in enumerate(ms):
            who = "" if len(ms) == 1 else f"{'AB'[k]} "
            for key, word, short in (("precision", "precision", "prec"),
                                     ("recall", "recall", "rec"), ("f1", "F1", "F1")):
                head = word if len(ms) == 1 else f"{who}{short}"
                cols.append((head, max(6, len(head)),
                             lambda c, mm=mm, key=key: _fmt(mm.per_class[c][key])))
        cols.append(("windows", 8, lambda c: m.per_class[c]["support"]))
        lines.append(f"  {'class':<{w}}" + "".join(f" {h:>{cw}}" for h, cw, _ in cols))
        for c in m.classes:
            lines.append(f"  {c:<{w}}" + "".join(f" {v(c):>{cw}}" for _, cw, v in cols))
        cols = m.classes + [UNDECIDED]
        cw = max(8, *(len(c) for c in cols)) + 1
        for k, mm in enumerate(ms):
            lines.append("")
            who = "" if len(ms) == 1 else f"model {'AB'[k]}, "
            lines.append(f"  confusion ({who}rows: truth, columns: decision)")
            lines.append("  " + " " * w + "".join(f"{c[:cw - 1]:>{cw}}" for c in cols))
            for c, row in zip(mm.classes, mm.confusion):
                lines.append(f"  {c:<{w}}" + "".join(f"{v:>{cw}}" for v in row))
    else:
        lines.append("accuracy  no truth in this session")
    snips = iter_snippets(s.dir)
    if snips:
        by: dict[str, int] = {}
        for sn in snips:
            by[sn.reason] = by.get(sn.reason, 0) + 1
        states = {st: sum(1 for sn in snips if review_word(sn.state) == st)
                  for st in sorted({review_word(sn.state) for sn in snips})}
        lines.append("")
        lines.append(f"snippets  {len(snips)}: " + ", ".join(f"{k} {v}" for k, v in sorted(by.items()))
                     + "; " + ", ".join(f"{k} {v}" for k, v in states.items()))
    bad = count_unreadable(s.dir)
    if bad:
        lines.append(f"          {bad} unreadable snippet sidecar(s) left out")
    return "\n".join(lines) + "\n"


# --- figures -----------------------------------------------------------------------------------
def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    plt.rcParams.update({
        "figure.facecolor": P.GROUND, "axes.facecolor": P.PANEL, "savefig.facecolor": P.GROUND,
        "axes.edgecolor": P.LINE, "axes.labelcolor": P.TEXT, "text.color": P.TEXT,
        "xtick.color": P.MUTED, "ytick.color": P.MUTED, "grid.color": P.LINE,
        "font.size": 9, "svg.hashsalt": "scenemon", "axes.spines.top": False,
        "axes.spines.right": False,
    })
    return plt


def _svg(fig) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    text = buf.getvalue()
    return text[text.index("<svg"):]


def _runs(windows: list[dict], key: str, hop: float) -> list[tuple[float, float, object]]:
    """Runs of equal values as (start, end, value), each window covering its last hop."""
    runs: list[list] = []
    for w in windows:
        v = w.get(key)
        if runs and runs[-1][2] == v and abs(runs[-1][1] - (w["t1"] - hop)) < 1e-6:
            runs[-1][1] = w["t1"]
        else:
            runs.append([w["t1"] - hop, w["t1"], v])
    return [tuple(r) for r in runs]


def timeline_svg(s: Session, m: Metrics) -> str:
    """The timeline figure (`timeline_figure`) as SVG.

    Parameters
    ----------
    s : Session
        The session.
    m : Metrics
        Model A's figures.

    Returns
    -------
    str
        The SVG text.
    """
    fig = timeline_figure(s, m)
    out = _svg(fig)
    _plt().close(fig)
    return out


def timeline_figure(s: Session, m: Metrics):
    """Smoothed probabilities of model A with its unfamiliar sounds marked (ALERT
    triangles), then one band per model's decisions, then truth, then with two models a row
    marking where they differ (light grey); a matplotlib figure.

    Parameters
    ----------
    s : Session
        The session.
    m : Metrics
        Model A's figures.

    Returns
    -------
    matplotlib.figure.Figure
        The figure.
    """
    plt = _plt()
    classes = m.classes
    ws = s.model_windows()
    t = np.array([w["t1"] for w in s.windows])
    sm = np.array([w["smoothed"] if w.get("smoothed") else [np.nan] * len(classes)
                   for w in s.windows], dtype=float) if s.windows else np.zeros((0, len(classes)))
    bands = [("decision" if len(ws) == 1 else f"{'AB'[k]} decision", k) for k in range(len(ws))]
    extra = 1 if len(ws) > 1 else 0  # a row marking where A and B differ
    n_rows = 2 + len(bands) + extra
    fig, axes = plt.subplots(n_rows, 1, figsize=(11, 3.4 + 0.55 * (n_rows - 1)), sharex=True,
                             gridspec_kw={"height_ratios": [4] + [0.6] * (len(bands) + 1)
                                          + [0.35] * extra})
    ax = axes[0]
    for i, c in enumerate(classes):
        ax.plot(t, sm[:, i] if len(sm) else [], color=P.class_colour(classes, c), lw=1.3,
                label=c)
    enter = s.meta.get("decision", {}).get("enter")
    if enter is not None:
        ax.axhline(enter, color=P.MUTED, lw=0.8, ls="--", label=f"enter threshold {enter:g}")
    unf = [w["t1"] for w in s.windows if w.get("unfamiliar")]
    if unf:
        ax.plot(unf, [1.04] * len(unf), ls="none", marker="v", ms=4, color=P.ALERT,
                label="unfamiliar sound")
    ax.set_ylim(-0.02, 1.08)
    ax.set_ylabel(f"smoothed p{' (A)' if len(ws) > 1 else ''}")
    ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=8, frameon=False)
    hop = (t[1] - t[0]) if len(t) > 1 else 0.5
    rows = [(axes[1 + k], ws[k], "decision", title) for title, k in bands]
    rows.append((axes[1 + len(bands)], s.windows, "truth", "truth"))
    if extra:
        ax = axes[-1]
        differ = [{"t1": a["t1"], "differ": a.get("decision") != b.get("decision")}
                  for a, b in zip(ws[0], ws[1])]
        for start, end, v in _runs(differ, "differ", hop):
            if v:  # light grey: red is the unfamiliar mark's, a class colour a class's
                ax.axvspan(start, end, color=P.TEXT, lw=0)
        ax.set_yticks([])
        ax.set_ylabel("A ≠ B", rotation=0, ha="right", va="center")
    for ax, windows, key, title in rows:
        for start, end, v in _runs(windows, key, hop):
            if v in classes:
                ax.axvspan(start, end, color=P.class_colour(classes, v), lw=0)
        ax.set_yticks([])
        ax.set_ylabel(title, rotation=0, ha="right", va="center")
    axes[-1].set_xlabel("session time (s)")
    fig.subplots_adjust(hspace=0.15)
    return fig


def level_figure(s: Session, m: Metrics):
    """Input level in dBFS per window, silent and clipping stretches shaded, the silence
    threshold dotted (the axis always reaches below it); a matplotlib figure.

    Parameters
    ----------
    s : Session
        The session.
    m : Metrics
        Model A's figures (its level stretches).

    Returns
    -------
    matplotlib.figure.Figure
        The figure.
    """
    plt = _plt()
    from monitor.decisions.tally import SILENT_BELOW_DBFS

    t = np.array([w["t1"] for w in s.windows])
    lv = np.array([w.get("level_dbfs", np.nan) for w in s.windows], dtype=float)
    fig, ax = plt.subplots(figsize=(11, 1.9))
    for a, z in m.levels.get("silent_stretches", []):
        ax.axvspan(a, z, color=P.MUTED, alpha=0.35, lw=0)
    for a, z in m.levels.get("clipping_stretches", []):
        ax.axvspan(a, z, color=P.ALERT, alpha=0.45, lw=0)
    ax.plot(t, lv, color=P.TEXT, lw=0.9)  # not a class colour: the level belongs to no class
    ax.axhline(SILENT_BELOW_DBFS, color=P.MUTED, lw=0.7, ls=":")
    finite = lv[np.isfinite(lv)]
    low = min(float(finite.min()), SILENT_BELOW_DBFS) if finite.size else SILENT_BELOW_DBFS
    ax.set_ylim(max(-165.0, low - 5), 3)  # -160: the windows' floor (digital silence)
    ax.set_ylabel("dBFS")
    ax.set_xlabel("session time (s)")
    return fig


def level_svg(s: Session, m: Metrics) -> str:
    """The input level figure (`level_figure`) as SVG.

    Parameters
    ----------
    s : Session
        The session.
    m : Metrics
        Model A's figures.

    Returns
    -------
    str
        The SVG text.
    """
    fig = level_figure(s, m)
    out = _svg(fig)
    _plt().close(fig)
    return out


def confusion_svg(m: Metrics, title: str = "") -> str:
    """One model's confusion matrix as an SVG figure (rows: truth, columns: decision and undecided).

    Each cell shows its window count; its shade is the share of its row, so classes with few
    windows read as clearly as the common ones.

    Parameters
    ----------
    m : Metrics
        One model's figures.
    title : str
        The figure's title.

    Returns
    -------
    str
        The SVG text.
    """
    plt = _plt()
    from matplotlib.colors import ListedColormap

    cm = np.array(m.confusion, dtype=float)
    rows = cm.sum(axis=1, keepdims=True)
    frac = np.divide(cm, rows, out=np.zeros_like(cm), where=rows > 0)
    cols = m.classes + [UNDECIDED]
    fig, ax = plt.subplots(figsize=(1.2 + 0.9 * len(cols), 1.0 + 0.75 * len(m.classes)))
    ax.imshow(frac, cmap=ListedColormap(P.HEAT), vmin=0, vmax=1, aspect="auto")
    for i in range(cm.shape[0]):
        for j in range(cm.shape[1]):
            ax.text(j, i, f"{int(cm[i, j])}", ha="center", va="center", fontsize=9,
                    color=P.GROUND if frac[i, j] > 0.6 else P.TEXT)
    ax.set_xticks(range(len(cols)), cols, rotation=30, ha="right", fontsize=8)
    ax.set_yticks(range(len(m.classes)), m.classes, fontsize=8)
    ax.set_xlabel("decision (what the model said)")
    ax.set_ylabel("truth (what it was)")
    if title:
        ax.set_title(title, fontsize=9)
    out = _svg(fig)
    plt.close(fig)
    return out


CSS = f"""
:root {{ color-scheme: dark; }}
body {{ font-family: system-ui, sans-serif; margin: 2em auto; max-width: 74em; padding: 0 2em;
       background: {P.GROUND}; color: {P.TEXT}; }}
.kpis {{ display: grid; grid-template-columns: repeat(auto-fill, minmax(10.5em, 1fr));
        gap: 0.6em; margin: 1em 0; }}
.kpis .kpi {{ background: {P.PANEL}; border: 1px solid {P.LINE}; border-radius: 4px;
             padding: 0.5em 0.8em; margin: 0; }}
.confusions {{ display: flex; flex-wrap: wrap; gap: 2em; }}
.state-new {{ color: {P.MUTED}; }}
.state-kept, .state-relabeled {{ color: {P.TEXT}; font-weight: bold; }}
.state-dropped {{ color: {P.MUTED}; }}
h1 {{ font-size: 1.4em; margin-bottom: 0.2em; }} h2 {{ font-size: 1.1em; margin-top: 1.8em; }}
.meta, .legend {{ color: {P.MUTED}; font-size: 0.88em; }}
.note {{ color: {P.TEXT}; border-left: 3px solid {P.ALERT}; padding-left: 0.6em; }}
table {{ border-collapse: collapse; font-size: 0.9em; }}
td, th {{ padding: 0.25em 0.8em; border-bottom: 1px solid {P.LINE}; text-align: right;
         white-space: nowrap; }}
td:first-child, th:first-child {{ text-align: left; }}
.figure svg {{ max-width: 100%; height: auto; }}
.kpi {{ display: inline-block; margin-right: 2.2em; }} .kpi b {{ font-size: 1.3em; display: block; }}
.sw {{ display: inline-block; width: 0.8em; height: 0.8em; margin-right: 0.3em; }}
.dropped {{ color: {P.MUTED}; text-decoration: line-through; }}
audio {{ height: 2em; vertical-align: middle; }}
"""


def review_word(state: str | None) -> str:
    """A snippet's review state in one word (as the relabel view shows it): dropped,
    relabeled, kept or new.

    Parameters
    ----------
    state : str or None
        `SnippetFile.state`.

    Returns
    -------
    str
        The word.
    """
    state = state or ""
    for word in ("dropped", "relabeled", "kept"):
        if word in state:
            return word
    return "new"


def html_report(s: Session, ms: list[Metrics], *, embed_audio: bool = True) -> str:
    """A session's account as one self-contained HTML page (see module docstring).

    Parameters
    ----------
    s : Session
        The session.
    ms : list of Metrics
        Each model's metrics, A first.
    embed_audio : bool
        Embed the first `MAX_EMBEDDED_SNIPPETS` snippets as players, each only after
        `snippets.verified_audio` accepts it.

    Returns
    -------
    str
        The page; every string from the session is escaped.
    """
    e = html.escape
    m = ms[0]

    def swatch(label: str) -> str:
        if label not in m.classes:
            return ""
        return f"<span class='sw' style='background:{P.class_colour(m.classes, label)}'></span>"

    parts = ["<!DOCTYPE html>", REPORT_MARK,
             "<html lang='en'><head><meta charset='utf-8'>",
             f"<title>scenemon session {e(s.dir.name)}</title><style>{CSS}</style></head><body>",
             f"<h1>Session {e(s.dir.name)}</h1>"]
    src = s.source
    models = ", ".join(f"{'AB'[i] + ' ' if len(s.models) > 1 else ''}{e(str(x.get('path')))} "
                       f"({e(str(x.get('kind')))}, {e(str(x.get('runtime', '-')))}, sha256 "
                       f"{e(str(x.get('sha256', ''))[:12])})" for i, x in enumerate(s.models))
    parts.append(f"<p class='meta'>{e(str(s.meta.get('started_at', '')))} &middot; source "
                 f"{e(str(src.get('origin')))} {e(str(src.get('file') or src.get('device') or ''))} "
                 f"({e(str(src.get('native_rate')))} Hz) &middot; model {models}</p>")
    for n in s.notes:
        parts.append(f"<p class='note'>{e(n)}</p>")
    kpis = [("windows", f"{m.windows}"), ("duration", f"{m.duration_s:.1f} s")]
    for k, mm in enumerate(ms):
        who = "" if len(ms) == 1 else f" ({'AB'[k]})"
        kpis += [(f"decision changes{who}", f"{mm.changes}"),
                 (f"raw top-class changes{who}", f"{mm.raw_changes}")]
    if m.with_truth:
        for k, mm in enumerate(ms):
            who = "" if len(ms) == 1 else f" ({'AB'[k]})"
            kpis += [(f"window accuracy{who}", f"{mm.accuracy:.1%}"),
                     (f"balanced accuracy{who}", f"{mm.balanced_accuracy:.1%}")]
        for k, mm in enumerate(ms):
            who = "" if len(ms) == 1 else f" ({'AB'[k]})"
            kpis.append((f"latency median / worst{who}", f"{_fmt(mm.latency_median, '.2f')} / "
                                                        f"{_fmt(mm.latency_worst, '.2f')} s"))
    for k, mm in enumerate(ms):
        if mm.unfamiliar is not None:  # each model's own profile, its own share
            who = "" if len(ms) == 1 else f" ({'AB'[k]})"
            kpis.append((f"unfamiliar windows{who}", f"{mm.unfamiliar['share']:.1%}"))
    for k, mm in enumerate(ms):
        if mm.model_faults:
            who = "" if len(ms) == 1 else f" ({'AB'[k]})"
            kpis.append((f"windows with a non-finite model output{who}", f"{mm.model_faults}"))
    summ = s.summary or {}
    over = summ.get("overruns")
    kpis.append(("overruns", str(over) if isinstance(over, int) else "-"))
    parts.append("<div class='kpis'>" + "".join(f"<span class='kpi'><b>{e(v)}</b>{e(k)}</span>"
                                                for k, v in kpis) + "</div>")
    if len(ms) > 1 and m.with_truth:
        pr = paired(s.windows, s.windows_b or [])
        parts.append(f"<p>Decisions agree on {pr['decision_agreement']:.1%} of the windows. "
                     f"{e(pr['sentence'])}.</p>")
    swatches = " ".join(f"<span><span class='sw' style='background:{P.class_colour(m.classes, c)}'>"
                        f"</span>{e(c)}</span>" for c in m.classes)
    differ = "; the last row marks in light grey where A and B decide differently"
    parts.append("<h2>Timeline</h2><p class='legend'>Top: each class's smoothed probability"
                 f"{' (model A)' if len(ms) > 1 else ''} with the enter threshold dashed"
                 f"{'; red triangles: unfamiliar sounds' if m.unfamiliar else ''}. Below: the "
                 f"decision of each model and the truth, one colour per class ({swatches}); "
                 f"blank where undecided or unknown{differ if len(ms) > 1 else ''}"
                 f".</p><div class='figure' id='timeline'>"
                 + timeline_svg(s, m) + "</div>")
    lv = m.levels
    parts.append("<h2>Input level</h2><p class='legend'>Uncalibrated dBFS per window (AES17: a "
                 "full-scale sine reads 0). Grey stretches: silent (below the dotted -70 dBFS "
                 f"line for 3 s or more; {lv.get('silent_s', 0):.1f} s in all); red: clipping "
                 f"({lv.get('clipped_windows', 0)} windows).</p><div class='figure' id='level'>"
                 + level_svg(s, m) + "</div>")
    if m.with_truth:
        parts.append("<h2>Per class</h2><table><tr><th>class</th>"
                     + "".join(f"<th>precision{w}</th><th>recall{w}</th><th>F1{w}</th>"
                               for w in ([""] if len(ms) == 1 else [" A", " B"]))
                     + "<th>windows</th><th>decided</th></tr>")
        for c in m.classes:
            cells = "".join(f"<td>{_fmt(mm.per_class[c]['precision'])}</td><td>"
                            f"{_fmt(mm.per_class[c]['recall'])}</td><td>"
                            f"{_fmt(mm.per_class[c]['f1'])}</td>" for mm in ms)
            parts.append(f"<tr><td><span class='sw' style='background:"
                         f"{P.class_colour(m.classes, c)}'></span>{e(c)}</td>{cells}<td>"
                         f"{m.per_class[c]['support']}</td><td>{m.decided_s.get(c, 0):.1f} s"
                         f"</td></tr>")
        parts.append("</table>")
        parts.append("<h2>Confusion</h2><p class='legend'>Rows: the truth; columns: the "
                     "decision (the last column: undecided). Each cell: windows; its shade: the "
                     "share of its row.</p>")
        parts.append("<div class='confusions'>")
        for k, mm in enumerate(ms):
            title = "" if len(ms) == 1 else f"model {'AB'[k]}"
            parts.append(f"<div class='figure confusion' id='confusion{'' if k == 0 else '_b'}'>"
                         + confusion_svg(mm, title) + "</div>")
        parts.append("</div>")
    snips = iter_snippets(s.dir)
    parts.append(f"<h2>Snippets ({len(snips)})</h2>")
    skipped = count_unreadable(s.dir)
    two = len(s.models) > 1 or any(sn.predicted_b is not None for sn in snips)
    if snips:
        said = ("what model A said, what model B said (where the two disagreed: "
                "models_disagree)" if two else "what the model said")
        heads = "<th>predicted A</th><th>predicted B</th>" if two else "<th>predicted</th>"
        parts.append("<p class='legend'>Captured sounds: label (what it truly is), "
                     f"{said}, why it was kept, and its review state: new (not reviewed yet), "
                     "kept, dropped (struck through; harvest leaves it out) or relabeled (the "
                     "label it had before in brackets).</p><table><tr><th>label</th>"
                     f"{heads}<th>reason</th>"
                     "<th>from</th><th>length</th><th>confidence</th><th>state</th><th>listen"
                     "</th></tr>")
        for k, sn in enumerate(snips):
            mt = sn.meta
            player = ""
            if embed_audio and k < MAX_EMBEDDED_SNIPPETS:
                data, why = verified_audio(sn, s.dir)
                if data is None:
                    skipped += 1
                    player = "<span class='meta'>not embedded</span>"
                else:
                    player = (f"<audio controls preload='none' src='data:audio/wav;base64,"
                              f"{base64.b64encode(data).decode()}'></audio>")
            relabel = ""
            if mt.get("relabeled_from") is not None:
                relabel = f" (was {e(str(mt.get('relabeled_from')))})"
            dur = mt.get("duration_s")
            word = review_word(sn.state)
            said = f"<td>{swatch(str(mt.get('predicted')))}{e(str(mt.get('predicted')))}</td>"
            if two:
                b = sn.predicted_b
                said += f"<td>{swatch(b) + e(b) if b is not None else ''}</td>"
            parts.append(
                f"<tr class='{'dropped' if sn.dropped else ''}'><td>{swatch(sn.label)}{e(sn.label)}"
                f"{relabel}</td>{said}<td>{e(sn.reason)}</td>"
                f"<td>{_fmt(mt.get('t0') if isinstance(mt.get('t0'), (int, float)) else None, '.1f')} s</td>"
                f"<td>{_fmt(dur if isinstance(dur, (int, float)) else None, '.1f')} s</td>"
                f"<td>{_fmt(mt.get('confidence') if isinstance(mt.get('confidence'), (int, float)) else None, '.2f')}</td>"
                f"<td class='state-{word}'>{word}</td><td>{player}</td></tr>")
        parts.append("</table>")
    if skipped:
        parts.append(f"<p class='note'>{skipped} snippet(s) not shown or not embedded: an "
                     f"unreadable sidecar, or audio that is not a regular WAV file inside the "
                     f"session matching its sidecar.</p>")
    parts.append("<p class='meta'>Written by scenemon report. Levels are uncalibrated dBFS, not "
                 "sound pressure.</p>")
    parts.append("</body></html>")
    return "\n".join(parts)


def write_html(s: Session, ms: list[Metrics], out: Path) -> Path:
    """Write the HTML report to `out`, atomically; returns `out`.

    Parameters
    ----------
    s : Session
        The session.
    ms : list of Metrics
        Each model's figures, A first.
    out : Path
        The page to write; its folder is created when missing.

    Returns
    -------
    Path
        `out`.

    Raises
    ------
    ScenemonError
        `out` is a link or not a regular file, is one of a session's own files, or exists
        and is not an earlier report (`files.check_output`).
    """
    from monitor.base.files import atomic_write

    check_output(out, "a report", starts_with(REPORT_MARK))
    out.parent.mkdir(parents=True, exist_ok=True)
    atomic_write(out, html_report(s, ms).encode("utf-8"))
    return out


def run_report(session: Path, *, html: Path | None = None, as_json: bool = False) -> int:
    """`scenemon report`: print the account; with `html`, also write the page.

    Parameters
    ----------
    session : Path
        The session directory, or a run folder (its account, session by session).
    html : Path, optional
        Also write the HTML page here (one session only).
    as_json : bool
        Print the figures as JSON instead of text.

    Returns
    -------
    int
        The exit code.

    Raises
    ------
    ScenemonError
        Not a readable session, a session without windows, or an HTML target that is not ours.
    """
    from monitor.session.runfolder import is_run

    if is_run(session):  # a run folder: the account of its sessions
        if html is not None:
            raise ScenemonError(f"{session}: is a run folder; --html takes one of its sessions "
                                f"(scenemon report {session}/<session> --html OUT.html)")
        from monitor.review.runreport import run_account, run_account_text

        acc = run_account(session)
        sys.stdout.write(json.dumps(acc, indent=2) + "\n" if as_json
                         else terminal_safe(run_account_text(acc)))
        return ExitCode.OK
    s = load_session(session)
    if not s.windows:
        raise ScenemonError(f"{session}: the session holds no windows")
    if html is not None:
        check_output(html, "a report", starts_with(REPORT_MARK))
    ms = model_metrics(s)
    if as_json:
        out = ms[0].to_dict()
        if len(ms) > 1:
            out["b"] = ms[1].to_dict()
            out["a_vs_b"] = paired(s.windows, s.windows_b or [])
        sys.stdout.write(json.dumps(out, indent=2) + "\n")
    else:
        sys.stdout.write(terminal_safe(text_report(s, ms)))
    if html is not None:
        sys.stderr.write(f"wrote {write_html(s, ms, html)}\n")
    return ExitCode.OK
