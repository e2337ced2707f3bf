"""`scenemon score ARCHIVE`: re-score a folder of recordings with one model and card.

Every input (an audio file, or a session directory standing for its audio and truth) is
one task. A task runs the very chain of `scenemon replay --fast` (file source, ring,
windower, front end, runner, decider) and writes one results file with the `windows.jsonl`
fields, so `report` and `tune` read it like a session. Files are processed whole, not split
into chunks: the smoothing and hysteresis state runs through the whole file, and whole
files keep the results identical to a replay of the same file (all fields but the
per-window timing `ms`, which is left null so that results are the same bytes however and
wherever they ran); an hour of audio is still only seconds of work.

Tasks run on local worker processes (`--workers N`) or on a Dask distributed scheduler
(`--cluster tcp://host:8786`); either way the results are the same bytes. A result whose
audio sha256, model sha256 and card are unchanged is skipped, so an interrupted run
resumes where it stopped. Worker processes are spawned, each loads the model once.
"""

from __future__ import annotations

import fnmatch
import hashlib
import json
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from monitor.errors import ScenemonError
from monitor.session import atomic_write, audio_segments, dumps

AUDIO_EXT = {".wav", ".flac", ".ogg", ".aiff", ".aif"}
RESULTS_VERSION = 1


@dataclass(frozen=True)
class Item:
    key: str  # relative name, also the results file's name
    audio: str
    truth: str | None


def discover(archive: Path, truth_glob: str | None = None) -> list[Item]:
    """Audio files (recursively) and session directories under `archive`."""
    archive = Path(archive)
    if not archive.is_dir():
        raise ScenemonError(f"{archive}: not a folder of recordings")
    items, sessions = [], set()
    for sj in sorted(archive.rglob("session.json")):
        d = sj.parent
        sessions.add(d)
        segs = audio_segments(d)
        if not segs:
            continue
        truth = d / "truth.tsv"
        items.append(Item(str(d.relative_to(archive)), str(segs[0]),
                          str(truth) if truth.is_file() else None))
    for p in sorted(archive.rglob("*")):
        if p.suffix.lower() not in AUDIO_EXT or not p.is_file():
            continue
        if any(s in p.parents for s in sessions):
            continue
        truth = None
        if truth_glob:
            hits = [t for t in p.parent.glob("*") if fnmatch.fnmatch(t.name, truth_glob.replace(
                "{stem}", p.stem))]
            truth = str(hits[0]) if hits else None
        elif p.with_suffix(".tsv").is_file():
            truth = str(p.with_suffix(".tsv"))
        items.append(Item(str(p.relative_to(archive)), str(p), truth))
    return items


def result_paths(out: Path, item: Item) -> tuple[Path, Path]:
    safe = item.key.replace(os.sep, "__")
    return out / "results" / f"{safe}.jsonl", out / "results" / f"{safe}.meta.json"


def fingerprint(item: Item, model_sha: str, card_text: str) -> dict[str, Any]:
    from monitor.runners import file_sha256

    return {"version": RESULTS_VERSION, "audio_sha256": file_sha256(item.audio),
            "truth_sha256": file_sha256(item.truth) if item.truth else None,
            "model_sha256": model_sha,
            "card_sha256": hashlib.sha256(card_text.encode()).hexdigest()}


def up_to_date(out: Path, item: Item, fp: dict) -> bool:
    jl, meta = result_paths(out, item)
    if not (jl.is_file() and meta.is_file()):
        return False
    try:
        old = json.loads(meta.read_text())
    except ValueError:
        return False
    return all(old.get(k) == v for k, v in fp.items())


_RUNNERS: dict = {}


def score_task(item: Item, model: str, spec: str | None, out: str, fp: dict) -> dict:
    """One file through the chain (runs in a worker process); writes its results."""
    from monitor.engine import Engine
    from monitor.runners import load_runner
    from monitor.sources import FileSource
    from monitor.spec import load_card_for_model
    from monitor.truth import load_truth

    key = (model, spec)
    if key not in _RUNNERS:  # each worker loads the model once
        card = load_card_for_model(model, spec)
        _RUNNERS[key] = (card, load_runner(model, card))
    card, runner = _RUNNERS[key]
    truth = load_truth(item.truth, classes=card.classes) if item.truth else None
    lines: list[str] = []

    class Collect:
        def on_window(self, r):
            rec = r.record()
            rec["ms"] = None  # a timing would make results differ run to run: left out
            lines.append(dumps(rec))

    src = FileSource(item.audio, model_rate=card.sample_rate, window_samples=card.window_samples)
    t = time.perf_counter()
    summary = Engine(card, runner, src, truth=truth.label_for if truth else None,
                     observers=[Collect()]).run()
    seconds = time.perf_counter() - t
    jl, meta = result_paths(Path(out), item)
    jl.parent.mkdir(parents=True, exist_ok=True)
    atomic_write(jl, ("\n".join(lines) + "\n").encode())
    atomic_write(meta, dumps({**fp, "key": item.key, "audio": item.audio, "truth": item.truth,
                              "windows": summary["windows"], "duration_s": summary["duration_s"]},
                             indent=2, sort_keys=True).encode())
    return {"key": item.key, "duration_s": summary["duration_s"], "seconds": seconds,
            "pid": os.getpid()}


def _progress(done: int, total: int, audio_s: float, t0: float, stream=sys.stderr) -> None:
    rate = audio_s / 3600.0 / max(1e-9, (time.monotonic() - t0) / 60.0)
    width = 24
    n = int(width * done / max(1, total))
    stream.write(f"\r  [{'#' * n}{'.' * (width - n)}] {done}/{total} files, "
                 f"{audio_s / 3600.0:.2f} h of audio, {rate:.2f} h/min ")
    if done == total:
        stream.write("\n")
    stream.flush()


def run_score(archive: Path, model: str, out: Path, *, spec: str | None = None,
              truth_glob: str | None = None, workers: int | None = None,
              cluster: str | None = None, progress: bool = True) -> dict:
    from monitor.runners import file_sha256
    from monitor.spec import card_path_for, load_card_for_model

    card = load_card_for_model(model, spec)  # bad card: exit 2 before any work
    card_text = Path(spec or card_path_for(model)).read_text(encoding="utf-8")
    model_sha = file_sha256(model)
    items = discover(archive, truth_glob)
    if not items:
        raise ScenemonError(f"{archive}: holds no audio files or sessions")
    out.mkdir(parents=True, exist_ok=True)
    todo, skipped = [], 0
    fps = {}
    for it in items:
        fp = fps[it.key] = fingerprint(it, model_sha, card_text)
        if up_to_date(out, it, fp):
            skipped += 1
        else:
            todo.append(it)
    t0 = time.monotonic()
    state = {"done": skipped, "audio_s": 0.0}
    if progress:
        _progress(skipped, len(items), 0.0, t0)

    def collect(finished) -> None:  # futures of either kind, as they complete
        for f in finished:
            r = f.result()
            state["done"] += 1
            state["audio_s"] += r["duration_s"]
            if progress:
                _progress(state["done"], len(items), state["audio_s"], t0)

    args = (str(Path(model).resolve()), str(Path(spec).resolve()) if spec else None,
            str(out.resolve()))
    if todo and cluster:
        from distributed import Client
        from distributed import as_completed as dask_completed

        with Client(cluster, timeout="20s") as client:
            collect(dask_completed([
                client.submit(score_task, it, *args, fps[it.key], key=f"score-{k}-{it.key}",
                              pure=False, retries=2) for k, it in enumerate(todo)]))
    elif todo:
        import multiprocessing as mp

        n = workers or os.cpu_count() or 1
        with ProcessPoolExecutor(max_workers=n, mp_context=mp.get_context("spawn")) as pool:
            collect(as_completed([pool.submit(score_task, it, *args, fps[it.key])
                                  for it in todo]))
    audio_s = state["audio_s"]
    wall = time.monotonic() - t0
    agg = aggregate(out, items, list(card.classes))
    agg.update({"processed": len(todo), "skipped_up_to_date": skipped,
                "wall_s": round(wall, 3), "audio_h_processed": round(audio_s / 3600.0, 4),
                "audio_h_per_min": round(audio_s / 3600.0 / (wall / 60.0), 3) if wall > 0 else None,
                "mode": "cluster" if cluster else f"{workers or os.cpu_count()} local workers"})
    atomic_write(out / "aggregate.json", dumps(agg, indent=2).encode())
    return agg


def aggregate(out: Path, items: list[Item], classes: list[str]) -> dict:
    from monitor.review.metrics import score

    per_file, pooled = [], []
    for it in items:
        jl, _ = result_paths(out, it)
        wins = [json.loads(x) for x in jl.read_text().splitlines() if x.strip()]
        pooled += wins
        sc = score(wins, classes)
        per_file.append({"file": it.key, "windows": sc.windows, "duration_s": sc.duration_s,
                         "accuracy": sc.accuracy, "switches_per_min": sc.switches_per_min,
                         "latency_s_median": sc.latency_median})
    overall = score(pooled, classes) if pooled else None
    scored = [f for f in per_file if f["accuracy"] is not None]
    worst = sorted(scored, key=lambda f: f["accuracy"])[:10]
    return {"files": len(items), "per_file": per_file,
            "overall": overall.to_dict() if overall else None,
            "worst_files": [{"file": f["file"], "accuracy": f["accuracy"]} for f in worst]}


def aggregate_text(agg: dict) -> str:
    o = agg["overall"] or {}
    acc = o.get("accuracy")
    lines = [f"{agg['files']} files: {agg['processed']} scored, {agg['skipped_up_to_date']} "
             f"up to date; {agg['audio_h_processed']:.3f} h of audio in {agg['wall_s']:.1f} s "
             f"({agg['mode']})",
             "overall   " + (f"accuracy {acc:.1%} of {o.get('windows_with_truth')} windows with "
                            f"truth, balanced {o.get('balanced_accuracy'):.1%}" if acc is not None
                            else "no truth")]
    if agg["worst_files"]:
        lines.append("worst files:")
        lines += [f"  {f['accuracy']:7.1%}  {f['file']}" for f in agg["worst_files"]]
    return "\n".join(lines) + "\n"
