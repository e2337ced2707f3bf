"""`scenemon bench`: will this model keep up on this machine?

Measures, for one model: import and load time, per-stage cost per window (resample, front
end, model, decide) as median and p99, the real-time factor of a fast replay, and the time
from the command to the first result of a file. Prints a table and a verdict.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import TYPE_CHECKING

from monitor.base.errors import ScenemonError
from monitor.cli.flags import add_model_flags, model_plans, positive

if TYPE_CHECKING:  # pragma: no cover
    from monitor.assembly.plan import ModelPlan

NAME = 'bench'
HELP = 'will this model keep up on this machine?'
DESCRIPTION = 'Measure start-up, per-window cost and fast-replay speed.'
EXAMPLES = 'examples:\n  scenemon bench\n  scenemon bench --model models/demo.keras --seconds 120'


def _pct(v: list[float]) -> tuple[float, float]:
    import numpy as np

    a = np.asarray(v) * 1000.0
    return float(np.median(a)), float(np.percentile(a, 99))


def chain_import_seconds() -> float:
    """Seconds a fresh interpreter takes to import the chain (NumPy and LiteRT included),
    beyond starting up: the best of three, each against a bare interpreter.

    Returns
    -------
    float
        Seconds.
    """
    def best(code: str) -> float:
        times = []
        for _ in range(3):
            t = time.perf_counter()
            subprocess.run([sys.executable, "-c", code], check=True)
            times.append(time.perf_counter() - t)
        return min(times)

    chain = ("import monitor.assembly.assemble, monitor.features.frontend, "
             "ai_edge_litert.interpreter")
    return max(0.0, best(chain) - best("pass"))


def first_result_seconds(plan: ModelPlan, wav: Path) -> float:
    """Wall time from starting `scenemon replay --fast --headless` to its first JSON line.

    Parameters
    ----------
    plan : ModelPlan
        The model.
    wav : Path
        A recording.

    Returns
    -------
    float
        Seconds.
    """
    with tempfile.TemporaryDirectory() as td:
        cmd = [sys.executable, "-m", "monitor", "replay", str(wav), "--model", str(plan.path),
               "--fast", "--headless", "--out", str(Path(td) / "s"), "--runtime", plan.runtime]
        if plan.card:
            cmd += ["--card", str(plan.card)]
        t = time.perf_counter()
        with subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                              text=True) as p:
            assert p.stdout is not None
            p.stdout.readline()
            dt = time.perf_counter() - t
            p.stdout.read()
        return dt


def run_bench(plan: ModelPlan, *, seconds: float = 240.0, stream=None) -> dict:
    """`scenemon bench`: measure one model on this machine and print a verdict.

    Parameters
    ----------
    plan : ModelPlan
        The model.
    seconds : float
        Seconds of tour audio to replay.
    stream : TextIO
        Where the table goes (standard output by default).

    Returns
    -------
    dict
        The figures.

    Raises
    ------
    ScenemonError
        `seconds` not above 0, or a model or card that cannot be used.
    """
    stream = stream or sys.stdout  # looked up now: a caller may have redirected it
    if not seconds > 0:
        raise ScenemonError(f"--seconds {seconds} must be above 0")
    import numpy as np

    from monitor.assembly.assemble import card_of, load_model, replay_file
    from monitor.decisions.decide import Decider
    from monitor.features.frontend import FrontEnd
    from monitor.sound.sources import StreamResampler

    t_import = chain_import_seconds()
    card = card_of(plan)
    t1 = time.perf_counter()
    loaded = load_model(plan, card)
    runner = loaded.runner
    t_load = time.perf_counter() - t1

    import soundfile as sf

    from monitor.assembly.assemble import recordings_dir
    from monitor.demo.tour import ensure_tour
    from monitor.sound.sources import load_audio
    from monitor.sound.windower import windows_of

    wav, _ = ensure_tour(recordings_dir() / "demo")
    sr = card.sample_rate  # the tour at the card's rate, resampled as replay resamples it
    x = load_audio([wav], model_rate=sr, window_samples=card.window_samples)
    x = x[: int(seconds * sr)]
    hop = card.hop_samples
    windows = windows_of(x, card.window_samples, hop)
    n = len(windows)
    if n < 2:
        raise ScenemonError(f"--seconds {seconds:g} holds fewer than two windows of "
                            f"{card.window_s:g} s; give more")
    fe = FrontEnd(card)
    dec = Decider(card.decision)
    stages: dict[str, list[float]] = {"resample 48k": [], "front end": [], "model": [],
                                      "decide": []}
    rs = StreamResampler(48000, card.sample_rate)
    block48 = np.random.default_rng(0).standard_normal(hop * 3).astype(np.float32) * 0.1
    for i, w in enumerate(windows):
        a = time.perf_counter()
        rs(block48)
        b = time.perf_counter()
        f = fe.single(w)
        c = time.perf_counter()
        p = runner.predict(f[None])[0]
        d = time.perf_counter()
        dec.step(p, (i * hop + card.window_samples) / sr)
        e = time.perf_counter()
        for k, v in zip(stages, (b - a, c - b, d - c, e - d)):
            stages[k].append(v)
    total = [sum(v[i] for k, v in stages.items() if k != "resample 48k") for i in range(n)]

    with tempfile.TemporaryDirectory() as td:
        clip = Path(td) / "clip.wav"
        sf.write(str(clip), x, sr, subtype="PCM_16")
        t = time.perf_counter()
        replay_file([loaded], clip)
        t_fast = time.perf_counter() - t
        short = Path(td) / "short.wav"
        sf.write(str(short), x[: 3 * sr], sr, subtype="PCM_16")
        t_first = first_result_seconds(plan, short)
    rtf = (x.size / sr) / t_fast
    med, p99 = _pct(total)
    budget_ms = card.hop_s * 1000.0
    verdict = ("keeps up" if p99 < 0.5 * budget_ms else
               "keeps up, with little room" if p99 < budget_ms else "falls behind")
    rows = [("python imports (the chain, fresh)", f"{t_import * 1000:.0f} ms"),
            ("model load + warm-up", f"{t_load * 1000:.0f} ms"),
            ("command to first result of a file", f"{t_first:.2f} s")]
    for k, v in stages.items():
        m, q = _pct(v)
        rows.append((f"{k} per window", f"median {m:.3f} ms, p99 {q:.3f} ms"))
    rows.append(("front end + model + decide", f"median {med:.3f} ms, p99 {p99:.3f} ms"))
    rows.append((f"fast replay of {x.size / sr:.0f} s", f"{t_fast:.2f} s = {rtf:.0f}x real time"))
    rows.append(("verdict", f"{verdict} (hop {budget_ms:.0f} ms, {os.cpu_count()} cores)"))
    stream.write(f"scenemon bench: {plan.path} ({runner.model_kind}, {runner.runtime})\n")
    for k, v in rows:
        stream.write(f"  {k:<36} {v}\n")
    return {"import_s": t_import, "load_s": t_load, "first_result_s": t_first,
            "window_ms_median": med, "window_ms_p99": p99, "realtime_factor": rtf,
            "verdict": verdict}


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon bench`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    add_model_flags(p, required=False, default_help=" (default: models/demo.tflite)")
    p.add_argument("--seconds", type=positive, default=240.0, metavar="SECONDS",
                   help="seconds of tour audio to replay (default 240)")


def run(args: argparse.Namespace) -> int:
    """`scenemon bench`: will this model keep up on this machine?

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon bench`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.assembly.assemble import demo_models

    plan = model_plans(args, str(demo_models() / "demo.tflite"))[0]
    run_bench(plan, seconds=args.seconds)
    return 0
