"""The demo models' novelty profiles: `python -m monitor.demo.profile [--models models]`.

The profile is fitted on the audio the demo model is meant for: the training clips of the
four places (the training seeds) and walks through them made like the tour (other seeds,
the legs in other orders, with their doors, laughs and passing cars, without the alarm),
each window labelled with its place. `make models` runs it after training; it writes
``<stem>.profile.npz`` beside each demo model.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

from monitor.demo import CLASSES
from monitor.demo.synth import clip
from monitor.features.card import ModelCard, load_card
from monitor.features.frontend import FrontEnd
from monitor.inference.novelty import fit_profile, profile_path_for, save_profile
from monitor.sound.windower import windows_of

WALKS = 10
WALK_SEED0 = 10
CLIP_S = 3.0


def profile_material(card: ModelCard, *, walks: int = WALKS):
    """(features, labels, groups) of the demo profile's windows for `card`.

    Parameters
    ----------
    card : ModelCard
        The demo model's card.
    walks : int
        Seeded walks through the places.

    Returns
    -------
    features : numpy.ndarray
        ``(n, *card.feature_shape)`` scaled features.
    labels : numpy.ndarray
        ``(n,)`` class of each window.
    groups : numpy.ndarray
        ``(n,)`` block of each window, for holding out blocks.
    """
    from monitor.demo.build import TRAIN_SEEDS
    from monitor.demo.tour import TOUR, tour_audio
    from monitor.session.truth import TruthTrack

    fe = FrontEnd(card)
    w_len, hop = card.window_samples, card.hop_samples
    feats, labels, groups = [], [], []
    for seed in TRAIN_SEEDS:
        for k, place in enumerate(CLASSES):
            f = fe.batch(windows_of(clip(place, CLIP_S, seed), w_len, hop))
            feats.append(f)
            labels += [card.classes.index(place)] * len(f)
            groups += [seed * 10 + k] * len(f)
    legs = tuple(leg for leg in TOUR if leg.place in CLASSES)
    for j in range(walks):
        rng = np.random.default_rng(WALK_SEED0 + j)
        plan = tuple(legs[i] for i in rng.permutation(len(legs)))
        x, spans = tour_audio(seed=WALK_SEED0 + j, plan=plan)
        w = windows_of(x, w_len, hop)
        truth = TruthTrack(spans)
        for i in range(len(w)):
            t0 = i * hop / card.sample_rate
            lab = truth.label_for(t0, t0 + w_len / card.sample_rate)
            labels.append(card.classes.index(lab) if lab in card.classes else -1)
            groups.append(10 ** 6 * (j + 1) + i // 20)
        feats.append(fe.batch(w))
    return np.concatenate(feats), np.array(labels), np.array(groups)


def write_profiles(models: Path) -> list[Path]:
    """Fit and write the profile beside every demo model in `models`.

    Parameters
    ----------
    models : Path
        The models folder.

    Returns
    -------
    list of Path
        The profiles written.
    """
    written: list[Path] = []
    fitted: list[tuple[ModelCard, object]] = []  # one fit per distinct front end
    for model in sorted(models.glob("demo*.tflite")) + sorted(models.glob("demo*.keras")):
        card_path = model.with_suffix(".toml")
        target = profile_path_for(model)
        if not card_path.is_file() or target in written:
            continue
        card = load_card(card_path)
        prof = next((p for c, p in fitted if c.same_front_end(card)), None)
        if prof is None:
            feats, labels, groups = profile_material(card)
            prof = fit_profile(feats, card, labels=labels, groups=groups)
            fitted.append((card, prof))
        save_profile(prof, target)
        written.append(target)
        print(f"wrote {target}: {prof.windows} windows, threshold {prof.threshold:.2f}",
              flush=True)
    return written


def main(argv: list[str] | None = None) -> int:
    """`python -m monitor.demo.profile`: write the profile beside every demo model; exit code 0.

    Parameters
    ----------
    argv : list of str, optional
        The arguments (default: the command line's); ``--models DIR`` names the models folder.

    Returns
    -------
    int
        0.
    """
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--models", default="models", help="the models folder (default: models)")
    args = ap.parse_args(argv)
    write_profiles(Path(args.models))
    return 0


if __name__ == "__main__":
    sys.exit(main())
