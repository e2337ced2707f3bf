"""The demo "scene tour": a seeded walk through the four places, with what real places have.

Besides cross-faded transitions the walk has short sounds from elsewhere (a door and a
laugh in the quiet room, a drill among voices, a car passing a workshop and a quiet room, a
door among voices),
one long overlap of two scenes (voices fading into traffic over 6 s, a street café), and an
invented alarm that belongs to none of the four places. The truth marks the scene as a
person would: a door does not change the room, the overlap changes hands at its middle, and
the alarm has no truth at all (a gap in ``tour.tsv``).

`ensure_tour(dir)` writes ``tour.wav`` (PCM_16, 16 kHz) and ``tour.tsv`` on first use; the
same code and seed give bit-identical files every time. `TOUR_EVENTS` lists every short
sound with its time, so tests can find them without typing numbers in.
"""

from __future__ import annotations

from pathlib import Path
from typing import NamedTuple

import numpy as np
import soundfile as sf

from monitor.demo.synth import EVENTS, SR, alarm, clip
from monitor.session.truth import Span, format_truth

TOUR_SEED = 20261201
TOUR_VERSION = 2  # part of the file names' content check: an older tour is rebuilt


class Leg(NamedTuple):
    """One leg of the tour: a place (or "alarm") for some seconds, its short sounds, its fade-in."""

    place: str  # one of the four places, or "alarm" (no place: no truth)
    seconds: float
    events: tuple[tuple[str, float], ...] = ()  # (event, seconds from the leg's start)
    fade_in_s: float = 2.0  # cross-fade from the leg before


# a morning of the wearable's owner
TOUR = (
    Leg("quiet_room", 30, (("door", 9.0), ("laugh", 19.0))),
    Leg("voices", 35, (("drill", 20.0),)),
    Leg("traffic", 40, fade_in_s=6.0),  # the street café: voices and traffic overlap
    Leg("machinery", 35, (("passing_car", 14.0),)),
    Leg("alarm", 8, fade_in_s=0.2),  # an alarm of no place: it starts and stops at once
    Leg("voices", 25, (("door", 11.0),), fade_in_s=0.2),
    Leg("traffic", 25),
    Leg("quiet_room", 20, (("passing_car", 8.0),)),
    Leg("machinery", 20),
)


def tour_events(plan=TOUR) -> list[tuple[str, float, str]]:
    """(event, session time in s, the place it happens in) of every short sound.

    Parameters
    ----------
    plan : tuple
        The tour's legs and events.

    Returns
    -------
    list of (str, float, str)
        In time order.
    """
    out, t = [], 0.0
    for leg in plan:
        out += [(name, t + at, leg.place) for name, at in leg.events]
        t += leg.seconds
    return out


TOUR_EVENTS = tour_events()


def tour_audio(seed: int = TOUR_SEED, plan=TOUR) -> tuple[np.ndarray, list[Span]]:
    """The tour's samples (float32, 16 kHz) and its truth spans (boundaries mid-fade).

    Parameters
    ----------
    seed : int
        The tour's seed.
    plan : tuple
        The tour's legs and events.

    Returns
    -------
    audio : numpy.ndarray
        ``(samples,)`` float32 at 16 kHz.
    spans : list of Span
        The truth.
    """
    total = sum(leg.seconds for leg in plan)
    out = np.zeros(int(total * SR), np.float64)
    spans, t = [], 0.0
    for k, leg in enumerate(plan):
        fade_in = int(leg.fade_in_s * SR) if k > 0 else 0
        fade_out = int(plan[k + 1].fade_in_s * SR) if k < len(plan) - 1 else 0
        a = int(t * SR) - fade_in // 2
        n = int(leg.seconds * SR) + fade_in // 2 + fade_out // 2
        rng_seed = seed * 100 + k
        if leg.place == "alarm":
            x = alarm(n / SR, np.random.default_rng(rng_seed)).astype(np.float64)
        else:
            x = clip(leg.place, n / SR, rng_seed).astype(np.float64)
        if fade_in:  # equal-amplitude fades
            x[:fade_in] *= np.sin(0.5 * np.pi * np.linspace(0.0, 1.0, fade_in)) ** 2
        if fade_out:
            x[-fade_out:] *= np.cos(0.5 * np.pi * np.linspace(0.0, 1.0, fade_out)) ** 2
        for j, (name, at) in enumerate(leg.events):
            ev = EVENTS[name](np.random.default_rng([rng_seed, j])).astype(np.float64)
            i = int((t + at) * SR)
            out[i:i + ev.size] += ev[: max(0, out.size - i)]
        lo, hi = max(a, 0), min(a + n, out.size)
        out[lo:hi] += x[lo - a:hi - a]
        if leg.place != "alarm":
            spans.append(Span(t, t + leg.seconds, leg.place))
        t += leg.seconds
    return np.clip(out, -1.0, 32767 / 32768).astype(np.float32), spans


def ensure_tour(directory: str | Path) -> tuple[Path, Path]:
    """Write the tour and its truth under `directory` if absent (or from an older version of
    the tour); return both paths.

    Parameters
    ----------
    directory : str or Path
        The tour's folder (created).

    Returns
    -------
    wav, tsv : Path
        The tour and its truth.
    """
    from monitor.demo import tour_paths

    d = Path(directory)
    wav, tsv = tour_paths(d)
    head = f"# demo scene tour v{TOUR_VERSION}:"
    if wav.is_file() and tsv.is_file() and tsv.read_text().startswith(head):
        return wav, tsv
    d.mkdir(parents=True, exist_ok=True)
    x, spans = tour_audio()
    tmp = d / ".tour.wav.tmp"
    sf.write(str(tmp), x, SR, subtype="PCM_16", format="WAV")
    tmp.replace(wav)
    tsv.write_text(f"{head} onset\toffset\tlabel (seconds); no truth during the alarm\n"
                   + format_truth(spans))
    return wav, tsv
