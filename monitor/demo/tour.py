"""The demo "scene tour": a seeded walk through the four places with cross-faded transitions.

`ensure_tour(dir)` writes ``tour.wav`` (PCM_16, 16 kHz) and ``tour.tsv`` (its truth) on first
use; the same code and seed give bit-identical files every time.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import soundfile as sf

from monitor.demo.synth import SR, clip
from monitor.truth import Span, format_truth

TOUR_SEED = 20261201
# (place, seconds): a morning of the wearable's owner
TOUR = (("quiet_room", 30), ("voices", 35), ("traffic", 40), ("machinery", 35),
        ("voices", 25), ("traffic", 25), ("quiet_room", 20), ("machinery", 20))
CROSSFADE_S = 2.0


def tour_audio(seed: int = TOUR_SEED, plan=TOUR) -> tuple[np.ndarray, list[Span]]:
    """The tour's samples (float32, 16 kHz) and its truth spans (boundaries mid-fade)."""
    total = sum(s for _, s in plan)
    out = np.zeros(int(total * SR), np.float64)
    xf = int(CROSSFADE_S * SR)
    spans, t = [], 0.0
    for k, (place, secs) in enumerate(plan):
        a = int(t * SR) - xf // 2
        n = int(secs * SR) + xf
        x = clip(place, n / SR, seed * 100 + k).astype(np.float64)
        ramp = np.sin(0.5 * np.pi * np.linspace(0.0, 1.0, xf)) ** 2  # equal-amplitude fade
        if k > 0:
            x[:xf] *= ramp
        if k < len(plan) - 1:
            x[-xf:] *= ramp[::-1]
        lo, hi = max(a, 0), min(a + n, out.size)
        out[lo:hi] += x[lo - a:hi - a]
        spans.append(Span(t, t + secs, place))
        t += secs
    return np.clip(out, -1.0, 32767 / 32768).astype(np.float32), spans


def ensure_tour(directory: str | Path) -> tuple[Path, Path]:
    """Write the tour and its truth under `directory` if absent; return both paths."""
    from monitor.demo import tour_paths

    d = Path(directory)
    wav, tsv = tour_paths(d)
    if wav.is_file() and tsv.is_file():
        return wav, tsv
    d.mkdir(parents=True, exist_ok=True)
    x, spans = tour_audio()
    tmp = d / ".tour.wav.tmp"
    sf.write(str(tmp), x, SR, subtype="PCM_16", format="WAV")
    tmp.replace(wav)
    tsv.write_text("# demo scene tour: onset\toffset\tlabel (seconds)\n" + format_truth(spans))
    return wav, tsv
