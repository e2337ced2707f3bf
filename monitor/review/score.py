"""`scenemon score ARCHIVE`: re-score a folder of recordings with one model, or two (A/B).

Every input (an audio file, or a session directory standing for all its audio segments and
its truth) is one task. A task runs the very chain of `scenemon replay --fast`
(`assemble.replay_file`) and writes one results file per model with the `windows.jsonl`
fields, so `report` and `tune` read it like a session. Files are processed whole: the
smoothing and hysteresis state runs through the whole file and starts afresh in the next
one, and results are the same bytes as a replay of the file (all fields but the per-window
timing `ms`, which is left null so results do not depend on where they ran).

Results names are the input's path below ARCHIVE with ``%`` written ``%25`` and each path
separator ``%2F``: unique and reversible (`results_name`, `key_of_results`).

The aggregate adds the files up: windows, seconds, decision changes and confusion counts
are sums over files; accuracy is correct windows over windows with truth (window-weighted);
the switch rate is the changes over the minutes of all files; latencies are every file's.

Tasks run on local worker processes (`--workers N`: this process is the first of them, the
others are forked where that is safe) or on a Dask distributed scheduler
(`--cluster tcp://host:8786`); either way the results are the same bytes. A result whose
audio, truth, models and cards are unchanged is skipped, so an interrupted run resumes.
"""

from __future__ import annotations

import fnmatch
import glob
import hashlib
import json
import os
import sys
import threading
import time
from collections import deque
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor, wait
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from monitor.assembly.plan import ModelPlan
from monitor.base.errors import ExitCode, ScenemonError
from monitor.base.files import atomic_write, audio_segments, dumps

AUDIO_EXT = {".wav", ".flac", ".ogg", ".aiff", ".aif"}
RESULTS_VERSION = 2


@dataclass(frozen=True)
class Item:
    """One input of the archive: its key, its audio file(s) and its truth file, if any.

    Attributes
    ----------
    key : str
        The input's path below the archive, "/"-separated.
    audio : tuple of str
        One file, or a session's audio segments in order.
    truth : str or None
        Its truth file.
    """

    key: str  # the input's path below the archive ("/"-separated)
    audio: tuple[str, ...]  # one file, or a session's audio segments in order
    truth: str | None


MAX_NAME_BYTES = 200  # leaves room for ".b.jsonl", ".meta.json" and ".<name>.tmp" in 255


def results_name(key: str) -> str:
    """A unique, reversible file name for an input key.

    ``%`` becomes ``%25`` and ``/`` becomes ``%2F``. A name longer than 200 bytes (a deep
    folder tree; file systems allow 255 per name) keeps its first bytes and ends in ``~``
    and 16 hex digits of the key's sha256: still unique, and reversible through the key
    that its ``.meta.json`` holds (`key_of_results` says so by returning None).

    Parameters
    ----------
    key : str
        The input's path below the archive, "/"-separated.

    Returns
    -------
    str
        The file name without extension, at most 200 bytes of UTF-8.
    """
    name = key.replace("%", "%25").replace("/", "%2F")
    if len(name.encode()) <= MAX_NAME_BYTES and "~" not in name:
        return name
    digest = hashlib.sha256(key.encode()).hexdigest()[:16]
    head = name.encode()[: MAX_NAME_BYTES - 17].decode("utf-8", "ignore")
    return f"{head}~{digest}"


def key_of_results(name: str) -> str | None:
    """The input key of a results file name without its extension; the inverse of
    `results_name`.

    Parameters
    ----------
    name : str
        A name `results_name` made.

    Returns
    -------
    str or None
        The key; None for a shortened name (``~`` and a hash), whose key its
        ``.meta.json`` holds.
    """
    if "~" in name:
        return None
    return name.replace("%2F", "/").replace("%25", "%")


def _audio_removed(d: Path) -> bool:
    """True when a run's budget removed audio of session `d` (its summary says so)."""
    try:
        summary = json.loads((d / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(summary, dict) and bool(summary.get("audio_removed"))


def discover(archive: Path, truth_glob: str | None = None) -> list[Item]:
    """Audio files (recursively) and session directories under `archive`.

    Parameters
    ----------
    archive : Path
        The folder.
    truth_glob : str, optional
        The truth file's name beside each audio file, ``{stem}`` standing for its stem.

    Returns
    -------
    list of Item
        Sessions first, then audio files outside sessions, each in path order; a session
        whose audio a run's budget partly removed is left out (its times would shift).

    Raises
    ------
    ScenemonError
        `archive` is not a folder.
    """
    archive = Path(archive)
    if not archive.is_dir():
        raise ScenemonError(f"{archive}: not a folder of recordings")
    items, sessions = [], set()
    for sj in sorted(archive.rglob("session.json")):
        d = sj.parent
        sessions.add(d)
        segs = audio_segments(d)
        if not segs or _audio_removed(d):  # the budget took part of it: times would shift
            continue
        truth = d / "truth.tsv"
        items.append(Item(d.relative_to(archive).as_posix(), tuple(str(s) for s in segs),
                          str(truth) if truth.is_file() else None))
    for p in sorted(archive.rglob("*")):
        if p.suffix.lower() not in AUDIO_EXT or not p.is_file():
            continue
        if any(s in p.parents for s in sessions):
            continue
        truth = None
        if truth_glob:
            # the stem is a name, not a pattern: "take[1]" must not match "take1"
            pattern = truth_glob.replace("{stem}", glob.escape(p.stem))
            hits = sorted(t for t in p.parent.iterdir() if fnmatch.fnmatchcase(t.name, pattern))
            truth = str(hits[0]) if hits else None
        elif p.with_suffix(".tsv").is_file():
            truth = str(p.with_suffix(".tsv"))
        items.append(Item(p.relative_to(archive).as_posix(), (str(p),), truth))
    return items


def result_paths(out: Path, item: Item, model: int = 0) -> tuple[Path, Path]:
    """Where one input's results live under `out`.

    Parameters
    ----------
    out : Path
        The results folder.
    item : Item
        The input.
    model : int
        0 for model A, 1 for model B.

    Returns
    -------
    results : Path
        ``results/<name>.jsonl`` for model A (`model` 0), ``results/<name>.b.jsonl`` for B.
    meta : Path
        ``results/<name>.meta.json``, shared by both models.
    """
    name = results_name(item.key)
    tag = "" if model == 0 else ".b"
    return out / "results" / f"{name}{tag}.jsonl", out / "results" / f"{name}.meta.json"


def fingerprint(item: Item, models: list[dict]) -> dict[str, Any]:
    """What makes a stored result current (compared by `up_to_date`).

    The results version, each audio file's and the truth file's size and modification time
    (nanoseconds), and `models` (path, model and card sha256, and runtime of each). Size and
    time tell a changed file, as make(1) does, without reading an hour of audio before any
    work starts; the worker that scores an input stores its files' sha256 beside them
    (`content_sha256`).

    Parameters
    ----------
    item : Item
        The input.
    models : list of dict
        Each model's path, model and card sha256 and runtime.

    Returns
    -------
    dict
        The fingerprint, as the meta file stores it.
    """
    def stat(path: str) -> list[int]:
        st = os.stat(path)
        return [st.st_size, st.st_mtime_ns]

    return {"version": RESULTS_VERSION, "audio_stat": [stat(a) for a in item.audio],
            "truth_stat": stat(item.truth) if item.truth else None, "models": models}


def content_sha256(item: Item) -> dict[str, Any]:
    """The sha256 of each audio file and of the truth file, for the meta file.

    Parameters
    ----------
    item : Item
        The input.

    Returns
    -------
    dict
        ``audio_sha256`` (a list) and ``truth_sha256`` (None without truth).
    """
    from monitor.inference.base import file_sha256

    return {"audio_sha256": [file_sha256(a) for a in item.audio],
            "truth_sha256": file_sha256(item.truth) if item.truth else None}


def up_to_date(out: Path, item: Item, fp: dict, n_models: int) -> bool:
    """True when each model's results file exists and the meta file holds `fp` unchanged.

    Such an input is skipped, so an interrupted run resumes where it stopped.

    Parameters
    ----------
    out : Path
        The output folder.
    item : Item
        The input.
    fp : dict
        The input's `fingerprint` now.
    n_models : int
        1, or 2 for an A/B run.

    Returns
    -------
    bool
        True when the input can be skipped.
    """
    paths = [result_paths(out, item, m)[0] for m in range(n_models)]
    meta = result_paths(out, item)[1]
    if not (all(p.is_file() for p in paths) and meta.is_file()):
        return False
    try:
        old = json.loads(meta.read_text())
    except ValueError:
        return False
    return all(old.get(k) == v for k, v in fp.items())


_LOADED: dict = {}


def score_task(item: Item, models: tuple[ModelPlan, ...], out: str, fp: dict) -> dict:
    """One input through the chain (runs in a worker process); writes its results.

    Parameters
    ----------
    item : Item
        The input.
    models : tuple of ModelPlan
        The models.
    out : str
        The results folder.
    fp : dict
        The input's fingerprint, stored in its meta file.

    Returns
    -------
    dict
        The input's key, its duration and compute seconds, and the worker's pid.
    """
    from monitor.assembly.assemble import load_model, replay_file
    from monitor.assembly.observers import Collector
    from monitor.session.truth import load_truth

    key = models
    if key not in _LOADED:  # each worker loads the models once
        _LOADED[key] = [load_model(m) for m in models]
    loaded = _LOADED[key]
    card = loaded[0].card
    truth = load_truth(item.truth, classes=card.classes) if item.truth else None
    collect = Collector(timings=False)
    t = time.perf_counter()
    summary = replay_file(loaded, list(item.audio), truth=truth, observers=[collect])
    seconds = time.perf_counter() - t
    streams = [collect.records] + collect.others
    for m, records in enumerate(streams):
        jl, _ = result_paths(Path(out), item, m)
        jl.parent.mkdir(parents=True, exist_ok=True)
        atomic_write(jl, "".join(dumps(r) + "\n" for r in records).encode())
    _, meta = result_paths(Path(out), item)
    atomic_write(meta, dumps({**fp, **content_sha256(item), "key": item.key, "audio": list(item.audio),
                              "truth": item.truth, "windows": summary["windows"],
                              "duration_s": summary["duration_s"]},
                             indent=2, sort_keys=True).encode())
    return {"key": item.key, "duration_s": summary["duration_s"], "seconds": seconds,
            "pid": os.getpid()}


def _warm(models: tuple[ModelPlan, ...]) -> None:
    """Load what `score_task` needs in this process before workers are forked from it.

    Only for LiteRT models: a forked worker then scores its first input at once, where it
    would otherwise import the chain and load the models itself (tens of milliseconds each,
    on the clock of every worker). Other runtimes load in each worker, as before.
    """
    if not all(Path(m.path).suffix == ".tflite" and m.runtime in (None, "litert")
               for m in models):
        return
    from monitor.assembly.assemble import load_model
    from monitor.assembly.observers import Collector  # noqa: F401 - imported for the workers
    from monitor.session.truth import load_truth  # noqa: F401

    if models not in _LOADED:
        _LOADED[models] = [load_model(m) for m in models]


def _progress(done: int, total: int, audio_s: float, t0: float, stream=sys.stderr) -> None:
    rate = audio_s / 3600.0 / max(1e-9, (time.monotonic() - t0) / 60.0)
    width = 24
    n = int(width * done / max(1, total))
    stream.write(f"\r  [{'#' * n}{'.' * (width - n)}] {done}/{total} files, "
                 f"{audio_s / 3600.0:.2f} h of audio, {rate:.2f} h/min ")
    if done == total:
        stream.write("\n")
    stream.flush()


def _describe_models(models: tuple[ModelPlan, ...]) -> tuple[list, list[dict]]:
    from monitor.assembly.assemble import card_of
    from monitor.features.card import card_beside
    from monitor.inference.base import file_sha256

    cards, described = [], []
    for m in models:
        card = card_of(m)  # bad card: exit 2 before any work
        cards.append(card)
        text = Path(m.card or card_beside(m.path)).read_bytes()
        described.append({"path": str(m.path), "sha256": file_sha256(m.path),
                          "card_sha256": hashlib.sha256(text).hexdigest(),
                          "runtime": m.runtime})
    return cards, described


def die_with_parent(parent: int) -> None:
    """Make this worker end when the process that started it ends, however it ends.

    On Linux the kernel sends SIGKILL when the parent dies (``prctl(PR_SET_PDEATHSIG)``,
    prctl(2)); everywhere a daemon thread also checks every half second that the parent is
    still the one that started it, and exits when it is not (a SIGKILL of the parent
    leaves no chance to stop the workers itself).

    Parameters
    ----------
    parent : int
        The process id of the process that started this worker.
    """
    import threading

    if sys.platform.startswith("linux"):
        import ctypes
        import signal

        try:
            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(1, int(signal.SIGKILL), 0, 0, 0)  # 1: PR_SET_PDEATHSIG
        except (OSError, AttributeError):
            pass
    if os.getppid() != parent:  # the parent was gone before the line above
        os._exit(1)

    def watch() -> None:
        while os.getppid() == parent:
            time.sleep(0.5)
        os._exit(1)

    threading.Thread(target=watch, daemon=True, name="parent-watch").start()


def _worker_context():
    """How local workers start: forked from this process where that is safe (Linux, no
    other Python thread, TensorFlow not loaded: a worker then starts in milliseconds, with
    numpy and LiteRT already imported), else spawned afresh (about 0.4 s each here)."""
    import multiprocessing as mp
    import threading
    import warnings

    if ("fork" in mp.get_all_start_methods() and sys.platform.startswith("linux")
            and threading.active_count() == 1 and "tensorflow" not in sys.modules):
        # Python 3.12 warns about fork whenever native threads exist (numpy's BLAS keeps
        # idle ones; it re-creates them in the child itself)
        warnings.filterwarnings("ignore", message=r".*use of fork\(\) may lead to deadlocks",
                                category=DeprecationWarning)
        return mp.get_context("fork")
    return mp.get_context("spawn")


def _share_out(todo: list, task: Callable[..., dict], args_of: Callable[[Any], tuple],
               took: Callable[[dict], None], workers: int, context: Any) -> None:
    """Run ``task(*args_of(item))`` for each item of `todo` on this process and
    ``workers - 1`` others, all taking from one queue.

    This process is one of the workers (its imports, model and heap are warm) and takes
    items from the back; each other worker is handed the item at the front when it finishes
    its last one (a done callback). None is queued in a worker ahead of time:
    `ProcessPoolExecutor` queues a call ahead for each worker and a queued call cannot be
    taken back, which once left the last two inputs of eight to one worker while this
    process sat idle.

    Parameters
    ----------
    todo : list
        The items.
    task : callable
        A module-level function (the others receive it pickled); returns a result.
    args_of : callable
        An item's arguments for `task`.
    took : callable
        Called here with each result.
    workers : int
        Processes in all, this one included (at least 2).
    context : multiprocessing context
        How the others start.
    """
    queue, lock = deque(todo), threading.Lock()
    handed: list = []  # the other workers' futures, in the order they were handed out
    reported: set[int] = set()

    def report_done() -> None:
        for k, f in enumerate(list(handed)):
            if k not in reported and f.done():
                reported.add(k)
                took(f.result())

    with ProcessPoolExecutor(max_workers=workers - 1, mp_context=context,
                             initializer=die_with_parent, initargs=(os.getpid(),)) as pool:
        def hand_over(_done: Any = None) -> None:  # also run by the pool's thread
            with lock:
                if not queue:
                    return
                it = queue.popleft()
                try:
                    future = pool.submit(task, *args_of(it))
                except RuntimeError:  # the pool is broken or closing: this process takes it
                    queue.appendleft(it)
                    return
                handed.append(future)
            future.add_done_callback(hand_over)

        try:
            for _ in range(workers - 1):
                hand_over()
            while True:
                with lock:
                    it = queue.pop() if queue else None
                if it is None:
                    break
                took(task(*args_of(it)))
                report_done()
            wait(list(handed))  # the queue is empty: nothing more is handed out
            report_done()
        finally:  # a failure here or there: hand out nothing more
            with lock:
                queue.clear()


def _is_aggregate(path: Path) -> bool:
    try:
        agg = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError):
        return False
    return isinstance(agg, dict) and {"files", "per_file", "mode"} <= set(agg)


def check_results_folder(out: Path) -> None:
    """Refuse a results folder that is a file, or whose ``aggregate.json`` or ``results`` is
    not an earlier score's (a rerun resumes in a folder of ours and writes over nothing
    else).

    Parameters
    ----------
    out : Path
        The results folder.

    Raises
    ------
    ScenemonError
        `out` or its ``results`` is a link or not a folder, or its ``aggregate.json`` is not
        an earlier score's (`files.check_output`); one sentence naming the path.
    """
    from monitor.base.files import check_output

    if out.is_symlink() or (out.exists() and not out.is_dir()):
        raise ScenemonError(f"{out}: exists and is not a folder; give a folder for the results")
    res = out / "results"
    if res.is_symlink() or (res.exists() and not res.is_dir()):
        raise ScenemonError(f"{res}: exists and is not a folder of results; choose another "
                            f"--out")
    check_output(out / "aggregate.json", "an aggregate", _is_aggregate)


def run_score(archive: Path, models: tuple[ModelPlan, ...] | str, out: Path, *,
              truth_glob: str | None = None, workers: int | None = None,
              cluster: str | None = None, progress: bool = True) -> dict:
    """Score every input under `archive` (see module docstring); returns the aggregate.

    Parameters
    ----------
    archive : Path
        A folder searched recursively for audio files and session directories.
    models : tuple of ModelPlan, or a model path
        One model, or two (A, B) scored on the same windows.
    out : Path
        The results folder: ``results/*.jsonl`` (one per input and model), ``*.meta.json``
        and ``aggregate.json``; results already up to date there are not redone.
    truth_glob : str, optional
        The truth file beside each audio file, with ``{stem}`` (default ``{stem}.tsv``).
    workers : int, optional
        Local worker processes (default: the number of cores).
    cluster : str, optional
        A Dask scheduler's address; the inputs are scored there instead.
    progress : bool
        Draw a progress bar on stderr (`run_score_command` asks for one only when stderr is
        a terminal).

    Returns
    -------
    dict
        The aggregate as written to ``aggregate.json``: per-file and overall figures (sums
        and window-weighted means over files), ``b`` and ``a_vs_b`` for two models.

    Raises
    ------
    ScenemonError
        An archive that is not a folder or holds no inputs, a results folder that is not
        ours, or a bad card, model, truth or audio file.
    """
    if isinstance(models, (str, Path)):
        models = (ModelPlan(Path(models)),)
    models = tuple(ModelPlan(Path(m.path).resolve(), Path(m.card).resolve() if m.card else None,
                             m.runtime, m.trust) for m in models)
    cards, described = _describe_models(models)
    items = discover(archive, truth_glob)
    if not items:
        raise ScenemonError(f"{archive}: holds no audio files or sessions")
    check_results_folder(out)
    out.mkdir(parents=True, exist_ok=True)
    todo, skipped = [], 0
    n = workers or os.cpu_count() or 1
    fps = {it.key: fingerprint(it, described) for it in items}
    for it in items:
        fp = fps[it.key]
        if up_to_date(out, it, fp, len(models)):
            skipped += 1
        else:
            todo.append(it)
    t0 = time.monotonic()
    state = {"done": skipped, "audio_s": 0.0}
    if progress:
        _progress(skipped, len(items), 0.0, t0)

    def took(r: dict) -> None:  # one input's result, as it completes
        state["done"] += 1
        state["audio_s"] += r["duration_s"]
        if progress:
            _progress(state["done"], len(items), state["audio_s"], t0)

    target = str(out.resolve())
    if todo and cluster:
        from distributed import Client
        from distributed import as_completed as dask_completed

        with Client(cluster, timeout="20s") as client:
            for f in dask_completed([
                    client.submit(score_task, it, models, target, fps[it.key],
                                  key=f"score-{k}-{it.key}", pure=False, retries=2)
                    for k, it in enumerate(todo)]):
                took(f.result())
    elif todo and min(n, len(todo)) == 1:  # one worker: this process, no other to start
        for it in todo:
            took(score_task(it, models, target, fps[it.key]))
    elif todo:
        context = _worker_context()
        if context.get_start_method() == "fork":
            _warm(models)  # the forked workers start with the modules and models loaded
        _share_out(todo, score_task, lambda it: (it, models, target, fps[it.key]), took,
                   min(n, len(todo)), context)
    audio_s = state["audio_s"]
    wall = time.monotonic() - t0
    agg = aggregate(out, items, list(cards[0].classes), len(models),
                    [c.hop_s for c in cards])
    mode = "Dask cluster" if cluster else f"{n} local worker{'s' if n != 1 else ''}"
    agg.update({"processed": len(todo), "skipped_up_to_date": skipped,
                "wall_s": round(wall, 3), "audio_h_processed": round(audio_s / 3600.0, 4),
                "audio_h_per_min": round(audio_s / 3600.0 / (wall / 60.0), 3) if wall > 0 else None,
                "mode": mode})
    atomic_write(out / "aggregate.json", dumps(agg, indent=2).encode())
    return agg


def _read_results(path: Path) -> list[dict]:
    return [json.loads(x) for x in path.read_text().splitlines() if x.strip()]


def aggregate(out: Path, items: list[Item], classes: list[str], n_models: int = 1,
              hops: list[float] | None = None) -> dict:
    """Per-file figures and the overall sums over files (see module docstring).

    Parameters
    ----------
    out : Path
        The results folder.
    items : list of Item
        The inputs.
    classes : list of str
        Model A's classes.
    n_models : int
        1, or 2 for A/B.
    hops : list of float, optional
        Each model's hop in seconds.

    Returns
    -------
    dict
        aggregate.json's content.
    """
    from monitor.decisions.tally import Tally, tally_windows
    from monitor.review.metrics import metrics_of_tally, pair_counts, paired_summary
    from monitor.session.truth import load_truth

    # one file at a time: its windows are read, counted and let go (a thousand files do
    # not all sit in memory at once)
    hops = hops or [None] * n_models
    totals = [Tally(classes, hop_s=hops[m]).finish() for m in range(n_models)]
    per_files: list[list[dict]] = [[] for _ in range(n_models)]
    pairs = [0] * 6
    for it in items:
        ws = [_read_results(result_paths(out, it, m)[0]) for m in range(n_models)]
        spans = load_truth(it.truth).spans if it.truth else None
        for m in range(n_models):
            t = tally_windows(ws[m], classes, hop_s=hops[m], spans=spans)
            totals[m].merge(t)
            per_files[m].append({"file": it.key, "windows": t.windows,
                                 "duration_s": round(t.duration_s, 3), "accuracy": t.accuracy,
                                 "switches_per_min": t.switches_per_min,
                                 "latency_s_median": t.latency_median})
        if n_models > 1:  # each file's windows paired with its own
            pairs = [x + y for x, y in zip(pairs, pair_counts(ws[0], ws[1]))]
    per_model: list[dict[str, Any]] = []
    for total, per_file in zip(totals, per_files):
        overall = metrics_of_tally(total).to_dict() if total.windows else None
        scored = [f for f in per_file if f["accuracy"] is not None]
        worst = sorted(scored, key=lambda f: f["accuracy"])[:10]
        per_model.append({"per_file": per_file, "overall": overall,
                          "worst_files": [{"file": f["file"], "accuracy": f["accuracy"]}
                                          for f in worst]})
    agg = {"files": len(items), **per_model[0]}
    if n_models > 1:
        agg["b"] = per_model[1]
        agg["a_vs_b"] = paired_summary(pairs)
    return agg


def aggregate_text(agg: dict) -> str:
    """The aggregate as a few lines for the terminal.

    What was scored and how fast, each model's overall figures, A against B with McNemar's
    exact test in an A/B run, and model A's worst files.

    Parameters
    ----------
    agg : dict
        The aggregate.

    Returns
    -------
    str
        The lines.
    """
    def overall_line(name: str, part: dict) -> str:
        o = part["overall"] or {}
        acc = o.get("accuracy")
        return f"{name:<9} " + (f"accuracy {acc:.1%} of {o.get('windows_with_truth')} windows "
                                f"with truth, balanced {o.get('balanced_accuracy'):.1%}; "
                                f"{o.get('decision_changes')} decision changes in "
                                f"{o.get('duration_s', 0) / 60:.1f} min"
                                if acc is not None else "no truth")

    files = f"{agg['files']} file{'s' if agg['files'] != 1 else ''}"
    lines = [f"{files}: {agg['processed']} scored, {agg['skipped_up_to_date']} "
             f"up to date; {agg['audio_h_processed']:.3f} h of audio in {agg['wall_s']:.1f} s "
             f"({agg['mode']})", overall_line("overall" if "b" not in agg else "A", agg)]
    if "b" in agg:
        lines.append(overall_line("B", agg["b"]))
        ab = agg["a_vs_b"]
        lines.append(f"A vs B    decisions agree on {ab['decision_agreement']:.1%}; B right where "
                     f"A is wrong on {ab['only_b_right']} windows, A where B is wrong on "
                     f"{ab['only_a_right']}; McNemar exact p = {ab['mcnemar_p']:.2g} "
                     f"(optimistic: neighbouring windows are not independent)")
    if agg["worst_files"]:
        lines.append("worst files:")
        lines += [f"  {f['accuracy']:7.1%}  {f['file']}" for f in agg["worst_files"]]
    return "\n".join(lines) + "\n"


def run_score_command(archive: Path, models: tuple[ModelPlan, ...], out: Path, *,
                      truth_glob: str | None, workers: int | None, cluster: str | None) -> int:
    """`scenemon score`: score the archive and print the aggregate; returns the exit code.

    The progress bar is drawn only when stderr is a terminal.

    Parameters
    ----------
    archive : Path
        The folder of recordings and sessions.
    models : tuple of ModelPlan
        One model, or two (A/B).
    out : Path
        The results folder.
    truth_glob : str or None
        The truth file's name beside each audio file.
    workers : int or None
        Local worker processes (None: the number of cores).
    cluster : str or None
        A Dask scheduler's address.

    Returns
    -------
    int
        The exit code.

    Raises
    ------
    ScenemonError
        No ``--model`` given, or bad input found by `run_score`.
    """
    if not models:
        raise ScenemonError("score: give --model")
    agg = run_score(archive, models, out, truth_glob=truth_glob, workers=workers,
                    cluster=cluster, progress=sys.stderr.isatty())
    sys.stdout.write(aggregate_text(agg))
    return ExitCode.OK


__all__ = ["discover", "run_score", "aggregate", "results_name", "key_of_results", "Item"]
