"""`scenemon compare`: two models, or one model in two runtimes, on exactly the same windows.

Windows come from real recordings or sessions through each card's front end (computed once
when the two are equal). Reported: top-1 agreement overall and per class, mean / max
probability difference, the A-vs-B table, decision agreement after smoothing and
hysteresis (A's decision settings for both), A's front end's error against a float64
computation of the same card, the largest difference between the two front ends' features
when they differ (B in fixed point against A in float32, say) and have the same shape; and for two int8 runs of one model (LiteRT against the
microcontroller runtime): how many windows are bit-identical and the largest difference in
int8 output steps.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np

from monitor.assembly.plan import ModelPlan
from monitor.base.errors import ExitCode, ScenemonError
from monitor.decisions.decide import decide_sequence
from monitor.features.card import ModelCard


def compare(a, b, sources: list[Path]) -> dict:
    """Compare two `assemble.LoadedModel`s on the windows of `sources` (module docstring).

    Parameters
    ----------
    a, b : LoadedModel
        The two models.
    sources : list of Path
        Recordings or sessions.

    Returns
    -------
    dict
        The figures (agreements, differences, per class, the front end's error).

    Raises
    ------
    ScenemonError
        The two cards cannot see the same windows (another rate, window or hop).
    """
    from monitor.assembly.assemble import file_windows
    from monitor.features.frontend import FrontEnd, reference_features

    card_a, card_b = a.card, b.card
    for key in ("sample_rate", "window_samples", "hop_samples"):
        if getattr(card_a, key) != getattr(card_b, key):
            raise ScenemonError(f"{card_b.name}: {key} {getattr(card_b, key)} differs from "
                                f"{card_a.name}'s {getattr(card_a, key)}; the two models cannot "
                                f"see the same windows")
    fa = FrontEnd(card_a)
    fb = fa if card_a.same_front_end(card_b) else FrontEnd(card_b)
    # two int8 .tflite runners (LiteRT or micro: `runners.TensorRunner`): their int8 tensors
    raw = a.runner.model_kind == b.runner.model_kind == "tflite-int8"
    pa, pb, t1 = [], [], []
    fe_err = fe_err_scaled = 0.0
    same_shape = fb is not fa and card_a.feature_shape == card_b.feature_shape
    ab_unscaled = ab_scaled = 0.0
    identical = steps = 0
    for src in sources:
        w = file_windows(src, card_a)
        xa = fa.batch_of_stream(w)
        xb = xa if fb is fa else fb.batch_of_stream(w)
        pa.append(a.runner.predict(xa))
        pb.append(b.runner.predict(xb))
        if raw:
            for fx, fy in zip(xa, xb):
                qa, qb = a.runner.raw(fx)[1], b.runner.raw(fy)[1]
                d = int(np.max(np.abs(qa.astype(np.int32) - qb.astype(np.int32))))
                identical += d == 0
                steps = max(steps, d)
        t1.append((np.arange(len(w)) * card_a.hop_samples + card_a.window_samples)
                  / card_a.sample_rate)
        ref, ref_scaled = reference_features(card_a, w)
        fe_err = max(fe_err, float(np.max(np.abs(fa.unscaled(w) - ref))))
        fe_err_scaled = max(fe_err_scaled, float(np.max(np.abs(xa - ref_scaled))))
        if same_shape:
            for k in range(0, len(w), 256):  # a few MB at a time
                ab_unscaled = max(ab_unscaled, float(np.max(np.abs(
                    fb.unscaled(w[k:k + 256]) - fa.unscaled(w[k:k + 256])))))
            ab_scaled = max(ab_scaled, float(np.max(np.abs(xb - xa))))
    classes = list(card_a.classes)
    top_a = np.concatenate([np.argmax(p, 1) for p in pa])
    top_b = np.concatenate([np.argmax(p, 1) for p in pb])
    diff = np.abs(np.concatenate(pa) - np.concatenate(pb))
    per_class = {}
    for i, c in enumerate(classes):
        m = top_a == i
        per_class[c] = {"windows": int(m.sum()),
                        "agreement": float(np.mean(top_b[m] == i)) if m.any() else None}
    cm = np.zeros((len(classes), len(classes)), int)
    for x, y in zip(top_a, top_b):
        cm[x, y] += 1
    dec_same = dec_n = 0
    for p_a, p_b, t in zip(pa, pb, t1):
        _, da = decide_sequence(p_a, t, card_a.decision)
        _, db = decide_sequence(p_b, t, card_a.decision)
        dec_same += sum(int(x == y) for x, y in zip(da, db))
        dec_n += len(da)
    res = {
        "a": {"model": a.runner.path.name, "runtime": a.runner.runtime,
              "kind": a.runner.model_kind, "arithmetic": card_a.frontend.pcm.arithmetic},
        "b": {"model": b.runner.path.name, "runtime": b.runner.runtime,
              "kind": b.runner.model_kind, "arithmetic": card_b.frontend.pcm.arithmetic},
        "windows": int(top_a.size), "classes": classes,
        "top1_agreement": float(np.mean(top_a == top_b)),
        "per_class": per_class,
        "prob_diff_mean": float(diff.mean()), "prob_diff_max": float(diff.max()),
        "confusion_a_vs_b": cm.tolist(),
        "decision_agreement": dec_same / dec_n if dec_n else None,
        "frontend_float32_vs_float64_max_abs": fe_err,
        "frontend_scaled_max_abs": fe_err_scaled,
    }
    if same_shape:
        res["frontends_b_vs_a_max_abs"] = ab_unscaled
        res["frontends_b_vs_a_scaled_max_abs"] = ab_scaled
    if raw:
        res["int8_windows_identical"] = identical
        res["int8_max_step_difference"] = steps
    return res


def compare_text(res: dict) -> str:
    """A `compare` result for the terminal.

    Agreements, probability differences, the int8 comparison when there is one, the front
    end's error, the agreement per class of A, and the table of A's against B's top class.

    Parameters
    ----------
    res : dict
        A `compare` result.

    Returns
    -------
    str
        The lines.
    """
    a, b = res["a"], res["b"]
    lines = [f"A = {a['model']} ({a['kind']}, {a['runtime']}, front end {a['arithmetic']})",
             f"B = {b['model']} ({b['kind']}, {b['runtime']}, front end {b['arithmetic']})",
             f"windows            {res['windows']}",
             f"top-1 agreement    {res['top1_agreement']:.2%}",
             f"decision agreement {res['decision_agreement']:.2%} (after smoothing and hysteresis, "
             f"A's card settings)",
             f"probability diff   mean {res['prob_diff_mean']:.5f}, max {res['prob_diff_max']:.5f}"]
    if "int8_windows_identical" in res:
        lines.append(f"int8 outputs       {res['int8_windows_identical']} of {res['windows']} "
                     f"windows bit-identical, largest difference "
                     f"{res['int8_max_step_difference']} step(s)")
    lines += [f"front end A        {a['arithmetic']} vs float64 max abs error "
              f"{res['frontend_float32_vs_float64_max_abs']:.2e} (scaled "
              f"{res['frontend_scaled_max_abs']:.2e})"]
    if "frontends_b_vs_a_max_abs" in res:
        lines.append(f"front ends B vs A  largest feature difference "
                     f"{res['frontends_b_vs_a_max_abs']:.2e} (scaled "
                     f"{res['frontends_b_vs_a_scaled_max_abs']:.2e})")
    lines += ["", "  per class (by A's top class)"]
    for c, m in res["per_class"].items():
        ag = "-" if m["agreement"] is None else f"{m['agreement']:.2%}"
        lines.append(f"    {c:<16} {m['windows']:>6} windows  agreement {ag}")
    lines += ["", "  A (rows) vs B (columns)"]
    cls = res["classes"]
    w = max(8, *(len(c) for c in cls)) + 1
    lines.append("    " + " " * w + "".join(f"{c[:w - 1]:>{w}}" for c in cls))
    for c, row in zip(cls, res["confusion_a_vs_b"]):
        lines.append(f"    {c:<{w}}" + "".join(f"{v:>{w}}" for v in row))
    return "\n".join(lines) + "\n"


def run_compare(plans: tuple[ModelPlan, ...], sources: list[Path], *,
                min_agree: float | None, as_json: bool, b_arithmetic: str | None = None) -> int:
    """`scenemon compare`; exit 1 when the top-1 agreement is below `min_agree`.

    Parameters
    ----------
    plans : tuple of ModelPlan
        A and B.
    sources : list of Path
        Recordings or sessions.
    min_agree : float or None
        The top-1 agreement below which the exit code is 1.
    as_json : bool
        Print JSON.
    b_arithmetic : {"float32", "q15"}, optional
        B's front end in this arithmetic, whatever its card says (`card.with_arithmetic`).

    Returns
    -------
    int
        The exit code.
    """
    from monitor.assembly.assemble import load_model

    a, b = (load_model(p) for p in plans)
    if b_arithmetic is not None:
        import dataclasses

        from monitor.features.card import with_arithmetic

        b = dataclasses.replace(b, card=with_arithmetic(b.card, b_arithmetic))
    res = compare(a, b, sources)
    sys.stdout.write(json.dumps(res, indent=2) + "\n" if as_json else compare_text(res))
    if min_agree is not None and res["top1_agreement"] < min_agree:
        sys.stderr.write(f"scenemon: top-1 agreement {res['top1_agreement']:.2%} is below "
                         f"--min-agree {min_agree:.2%}\n")
        return ExitCode.FAILURE
    return ExitCode.OK


__all__ = ["compare", "compare_text", "run_compare", "ModelCard"]
