"""`scenemon harvest`: snippets of many sessions gathered into one retraining set.

``DIR/<label>/<file>.wav`` plus ``DIR/manifest.csv`` (path, label, reason, session, t0,
duration, predicted, confidence, model sha256, audio sha256). The sidecar is the truth about
a snippet: a relabel (the sidecar's ``label``) wins, a dropped snippet (``dropped: true``)
is left out. Duplicates (same audio sha256) appear once. Re-running adds only what is new;
existing files are never rewritten or deleted. A target folder holding anything else than an
earlier harvest is refused.
"""

from __future__ import annotations

import csv
import hashlib
import io
import sys
from dataclasses import dataclass, field
from pathlib import Path

from monitor.capture import safe_label
from monitor.errors import ScenemonError
from monitor.review.report import snippets_of
from monitor.session import atomic_write, load_session

MARKER = ".scenemon-harvest"
FIELDS = ["path", "label", "reason", "session", "t0", "duration", "predicted", "confidence",
          "model_sha256", "audio_sha256"]


@dataclass
class HarvestResult:
    added: dict[str, int] = field(default_factory=dict)
    total: dict[str, int] = field(default_factory=dict)
    duplicates: int = 0
    dropped: int = 0
    unknown_skipped: int = 0
    excluded: int = 0
    broken: int = 0
    notes: list[str] = field(default_factory=list)


def _check_target(out: Path) -> list[dict]:
    if out.exists() and not out.is_dir():
        raise ScenemonError(f"{out}: exists and is not a directory")
    if out.is_dir() and any(out.iterdir()):
        if not (out / MARKER).is_file() or not (out / "manifest.csv").is_file():
            raise ScenemonError(f"{out}: holds other files and is not an earlier harvest; "
                                f"choose an empty or new folder")
        with open(out / "manifest.csv", newline="", encoding="utf-8") as f:
            return list(csv.DictReader(f))
    return []


def harvest(sessions: list[Path], out: Path, *, include: tuple[str, ...],
            drop_unknown: bool = False, progress=None) -> HarvestResult:
    rows = _check_target(out)
    seen = {r["audio_sha256"] for r in rows}
    res = HarvestResult()
    for r in rows:
        res.total[r["label"]] = res.total.get(r["label"], 0) + 1
    candidates = []
    for sp in sessions:
        s = load_session(sp)
        res.notes += [f"{sp}: {n}" for n in s.notes]
        candidates += [(s, m) for m in snippets_of(s)]
    out.mkdir(parents=True, exist_ok=True)
    (out / MARKER).write_text("scenemon harvest\n")
    new_rows = []
    for k, (s, m) in enumerate(candidates):
        if progress:
            progress(k + 1, len(candidates))
        if m.get("dropped"):
            res.dropped += 1
            continue
        if m.get("reason") not in include:
            res.excluded += 1
            continue
        label = str(m.get("label") or "unknown")
        if drop_unknown and label == "unknown":
            res.unknown_skipped += 1
            continue
        wav = m["_wav"]
        try:
            data = wav.read_bytes()
        except OSError:
            res.broken += 1
            continue
        digest = hashlib.sha256(data).hexdigest()
        if m.get("audio_sha256") and m["audio_sha256"] != digest:
            res.broken += 1
            res.notes.append(f"{wav}: audio does not match its sidecar's sha256; skipped")
            continue
        if digest in seen:
            res.duplicates += 1
            continue
        seen.add(digest)
        folder = safe_label(label)
        name = f"{safe_label(str(m.get('session') or s.dir.name))}-{wav.stem}.wav"
        target = out / folder / name
        (out / folder).mkdir(exist_ok=True)
        if target.exists():  # never overwrite: same name, other audio
            name = f"{target.stem}-{digest[:8]}.wav"
            target = out / folder / name
        atomic_write(target, data)
        new_rows.append({
            "path": f"{folder}/{name}", "label": label, "reason": m.get("reason"),
            "session": m.get("session") or s.dir.name, "t0": m.get("t0"),
            "duration": m.get("duration_s"), "predicted": m.get("predicted"),
            "confidence": m.get("confidence"), "model_sha256": m.get("model_sha256"),
            "audio_sha256": digest})
        res.added[label] = res.added.get(label, 0) + 1
        res.total[label] = res.total.get(label, 0) + 1
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=FIELDS, lineterminator="\n")
    w.writeheader()
    for r in rows + new_rows:
        w.writerow({k: r.get(k) for k in FIELDS})
    atomic_write(out / "manifest.csv", buf.getvalue().encode("utf-8"))
    return res


def progress_bar(stream=sys.stderr):
    width = 30

    def show(done: int, total: int) -> None:
        if total < 20 or not stream.isatty():
            return
        n = int(width * done / total)
        stream.write(f"\r  [{'#' * n}{'.' * (width - n)}] {done}/{total} snippets")
        if done == total:
            stream.write("\n")
        stream.flush()
    return show


__all__ = ["harvest", "HarvestResult", "progress_bar"]
