"""`scenemon report SESSION [--html OUT.html]`: a session's account, on the terminal and as
one self-contained HTML page (plots embedded as SVG, snippets as inline audio players,
every embedded string escaped; no network)."""

from __future__ import annotations

import base64
import html
import io
from pathlib import Path

import numpy as np

from monitor.review.metrics import UNDECIDED, Scores, score
from monitor.session import Session

MAX_EMBEDDED_SNIPPETS = 200


def session_scores(s: Session) -> Scores:
    hop = s.meta.get("card", {}).get("audio", {}).get("hop_s")
    return score(s.windows, s.classes, hop_s=hop, truth_spans=s.truth.spans if s.truth else None)


def _fmt(v, spec=".3f", none="-"):
    return none if v is None else format(v, spec)


def snippets_of(s: Session) -> list[dict]:
    import json

    out = []
    root = s.dir / "snippets"
    if not root.is_dir():
        return out
    for side in sorted(root.glob("*/*.json")):
        try:
            meta = json.loads(side.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        meta["_wav"] = side.with_suffix(".wav")
        meta["_json"] = side
        out.append(meta)
    return sorted(out, key=lambda m: (m.get("t0") or 0.0, str(m.get("label"))))


def text_report(s: Session, sc: Scores) -> str:
    lines = [f"session {s.dir}"]
    lines += [f"  note: {n}" for n in s.notes]
    summ = s.summary or {}
    src = s.meta.get("source", {})
    lines.append(f"source    {src.get('kind')} {src.get('file') or src.get('device') or ''} "
                 f"({src.get('native_rate')} Hz)  model {s.meta.get('model', {}).get('path')}")
    lines.append(f"duration  {sc.duration_s:.1f} s, {sc.windows} windows; overruns "
                 f"{summ.get('overruns', '-')}, samples dropped {summ.get('dropped_samples', '-')}, "
                 f"windows after a gap {sum(1 for w in s.windows if w.get('gap'))}")
    lines.append(f"switches  {sc.changes} decision changes ({_fmt(sc.switches_per_min, '.2f')} per "
                 f"minute; the truth changes {sc.truth_changes} times)")
    lines.append("decided   " + ", ".join(f"{c} {t:.1f} s" for c, t in sc.decided_s.items()))
    if sc.with_truth:
        lines.append(f"accuracy  {sc.accuracy:.1%} of {sc.with_truth} windows with truth "
                     f"(undecided counts as wrong); balanced {sc.balanced_accuracy:.1%}")
        lines.append(f"latency   after a truth change: median {_fmt(sc.latency_median, '.2f')} s, "
                     f"worst {_fmt(sc.latency_worst, '.2f')} s, never reached {sc.never_reached}")
        w = max(12, *(len(c) for c in sc.classes))
        lines.append("")
        lines.append(f"  {'class':<{w}} {'precision':>9} {'recall':>7} {'F1':>6} {'windows':>8}")
        for c, m in sc.per_class.items():
            lines.append(f"  {c:<{w}} {_fmt(m['precision']):>9} {_fmt(m['recall']):>7} "
                         f"{_fmt(m['f1']):>6} {m['support']:>8}")
        lines.append("")
        cols = sc.classes + [UNDECIDED]
        cw = max(8, *(len(c) for c in cols)) + 1
        lines.append("  confusion (rows: truth, columns: decision)")
        lines.append("  " + " " * w + "".join(f"{c[:cw - 1]:>{cw}}" for c in cols))
        for c, row in zip(sc.classes, sc.confusion):
            lines.append(f"  {c:<{w}}" + "".join(f"{v:>{cw}}" for v in row))
    else:
        lines.append("accuracy  no truth in this session")
    snips = snippets_of(s)
    if snips:
        by = {}
        for m in snips:
            by[m.get("reason")] = by.get(m.get("reason"), 0) + 1
        lines.append("")
        lines.append(f"snippets  {len(snips)}: " + ", ".join(f"{k} {v}" for k, v in sorted(by.items())))
    return "\n".join(lines) + "\n"


# --- HTML ----------------------------------------------------------------------------------
def _svg(fig) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    text = buf.getvalue()
    return text[text.index("<svg"):]


def _palette(n: int):
    import matplotlib

    cmap = matplotlib.colormaps["tab10" if n <= 10 else "tab20"]
    return [cmap(i % cmap.N) for i in range(n)]


def _runs(windows: list[dict], key: str, hop: float) -> list[tuple[float, float, str]]:
    """Runs of equal labels as (start, end, label), each window covering its last hop."""
    runs: list[list] = []
    for w in windows:
        v = w.get(key)
        if runs and runs[-1][2] == v and abs(runs[-1][1] - (w["t1"] - hop)) < 1e-6:
            runs[-1][1] = w["t1"]
        else:
            runs.append([w["t1"] - hop, w["t1"], v])
    return [tuple(r) for r in runs]


def timeline_svg(s: Session, sc: Scores) -> str:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    classes = sc.classes
    colors = _palette(len(classes))
    t = np.array([w["t1"] for w in s.windows])
    sm = np.array([w["smoothed"] for w in s.windows]) if s.windows else np.zeros((0, len(classes)))
    fig, axes = plt.subplots(3, 1, figsize=(11, 4.6), sharex=True,
                             gridspec_kw={"height_ratios": [4, 0.6, 0.6]})
    ax = axes[0]
    for i, c in enumerate(classes):
        ax.plot(t, sm[:, i] if len(sm) else [], color=colors[i], lw=1.2, label=c)
    enter = s.meta.get("decision", {}).get("enter")
    if enter is not None:
        ax.axhline(enter, color="0.4", lw=0.8, ls="--", label=f"enter {enter:g}")
    ax.set_ylim(-0.02, 1.02)
    ax.set_ylabel("smoothed p")
    ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=8, frameon=False)
    hop = (t[1] - t[0]) if len(t) > 1 else 0.5
    for ax, key, title in ((axes[1], "decision", "decision"), (axes[2], "truth", "truth")):
        for start, end, v in _runs(s.windows, key, hop):
            if v in classes:
                ax.axvspan(start, end, color=colors[classes.index(v)], lw=0)
        ax.set_yticks([])
        ax.set_ylabel(title, rotation=0, ha="right", va="center")
    axes[2].set_xlabel("session time (s)")
    fig.subplots_adjust(hspace=0.15)
    out = _svg(fig)
    plt.close(fig)
    return out


def confusion_svg(sc: Scores) -> str:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    cm = np.array(sc.confusion, dtype=float)
    rows = cm.sum(axis=1, keepdims=True)
    frac = np.divide(cm, rows, out=np.zeros_like(cm), where=rows > 0)
    cols = sc.classes + [UNDECIDED]
    fig, ax = plt.subplots(figsize=(1.2 + 0.9 * len(cols), 1.0 + 0.75 * len(sc.classes)))
    ax.imshow(frac, cmap="Blues", vmin=0, vmax=1, aspect="auto")
    for i in range(cm.shape[0]):
        for j in range(cm.shape[1]):
            ax.text(j, i, f"{int(cm[i, j])}", ha="center", va="center",
                    color="white" if frac[i, j] > 0.6 else "black", fontsize=9)
    ax.set_xticks(range(len(cols)), cols, rotation=30, ha="right", fontsize=8)
    ax.set_yticks(range(len(sc.classes)), sc.classes, fontsize=8)
    ax.set_xlabel("decision")
    ax.set_ylabel("truth")
    out = _svg(fig)
    plt.close(fig)
    return out


CSS = """
body { font-family: system-ui, sans-serif; margin: 2em auto; max-width: 72em; color: #1d2430; }
h1 { font-size: 1.4em; margin-bottom: 0.2em; } h2 { font-size: 1.1em; margin-top: 1.8em; }
.meta { color: #55606e; font-size: 0.9em; } .note { color: #9a4b00; }
table { border-collapse: collapse; font-size: 0.9em; }
td, th { padding: 0.25em 0.8em; border-bottom: 1px solid #dde2e8; text-align: right; }
td:first-child, th:first-child { text-align: left; }
.figure svg { max-width: 100%; height: auto; }
.kpi { display: inline-block; margin-right: 2.2em; } .kpi b { font-size: 1.3em; display: block; }
audio { height: 2em; vertical-align: middle; }
"""


def html_report(s: Session, sc: Scores, *, embed_audio: bool = True) -> str:
    e = html.escape
    parts = ["<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
             f"<title>scenemon session {e(s.dir.name)}</title><style>{CSS}</style></head><body>",
             f"<h1>Session {e(s.dir.name)}</h1>"]
    src = s.meta.get("source", {})
    model = s.meta.get("model", {})
    parts.append(f"<p class='meta'>{e(str(s.meta.get('started_at', '')))} &middot; source "
                 f"{e(str(src.get('kind')))} {e(str(src.get('file') or src.get('device') or ''))} "
                 f"({e(str(src.get('native_rate')))} Hz) &middot; model "
                 f"{e(str(model.get('path')))} ({e(str(model.get('kind')))}, sha256 "
                 f"{e(str(model.get('sha256', ''))[:12])})</p>")
    for n in s.notes:
        parts.append(f"<p class='note'>{e(n)}</p>")
    kpis = [("windows", f"{sc.windows}"), ("duration", f"{sc.duration_s:.1f} s"),
            ("switches / min", _fmt(sc.switches_per_min, ".2f"))]
    if sc.with_truth:
        kpis += [("window accuracy", f"{sc.accuracy:.1%}"),
                 ("balanced accuracy", f"{sc.balanced_accuracy:.1%}"),
                 ("latency median / worst", f"{_fmt(sc.latency_median, '.2f')} / "
                                            f"{_fmt(sc.latency_worst, '.2f')} s")]
    summ = s.summary or {}
    kpis.append(("overruns", str(summ.get("overruns", "-"))))
    parts.append("<p>" + "".join(f"<span class='kpi'><b>{e(v)}</b>{e(k)}</span>" for k, v in kpis)
                 + "</p>")
    parts.append("<h2>Timeline</h2><div class='figure' id='timeline'>" + timeline_svg(s, sc)
                 + "</div>")
    if sc.with_truth:
        parts.append("<h2>Per class</h2><table><tr><th>class</th><th>precision</th><th>recall"
                     "</th><th>F1</th><th>windows</th><th>decided</th></tr>")
        for c, m in sc.per_class.items():
            parts.append(f"<tr><td>{e(c)}</td><td>{_fmt(m['precision'])}</td><td>"
                         f"{_fmt(m['recall'])}</td><td>{_fmt(m['f1'])}</td><td>{m['support']}"
                         f"</td><td>{sc.decided_s.get(c, 0):.1f} s</td></tr>")
        parts.append("</table>")
        parts.append("<h2>Confusion (rows: truth, columns: decision)</h2><div class='figure' "
                     "id='confusion'>" + confusion_svg(sc) + "</div>")
    snips = snippets_of(s)
    parts.append(f"<h2>Snippets ({len(snips)})</h2>")
    if snips:
        parts.append("<table><tr><th>label</th><th>predicted</th><th>reason</th><th>from</th>"
                     "<th>length</th><th>confidence</th><th>listen</th></tr>")
        for k, m in enumerate(snips):
            player = ""
            if embed_audio and k < MAX_EMBEDDED_SNIPPETS and m["_wav"].is_file():
                data = base64.b64encode(m["_wav"].read_bytes()).decode()
                player = f"<audio controls preload='none' src='data:audio/wav;base64,{data}'></audio>"
            parts.append(f"<tr><td>{e(str(m.get('label')))}</td><td>{e(str(m.get('predicted')))}"
                         f"</td><td>{e(str(m.get('reason')))}</td><td>{_fmt(m.get('t0'), '.1f')} s"
                         f"</td><td>{_fmt(m.get('duration_s'), '.1f')} s</td><td>"
                         f"{_fmt(m.get('confidence'), '.2f')}</td><td>{player}</td></tr>")
        parts.append("</table>")
    parts.append("<p class='meta'>Written by scenemon report. Levels are uncalibrated dBFS.</p>")
    parts.append("</body></html>")
    return "\n".join(parts)


def write_html(s: Session, sc: Scores, out: Path) -> Path:
    from monitor.session import atomic_write

    out.parent.mkdir(parents=True, exist_ok=True)
    atomic_write(out, html_report(s, sc).encode("utf-8"))
    return out
