"""The demo scenario: a wearable that adapts to four places.

`synth` makes seeded procedural audio of each place, `tour` a seeded walk through them with
its truth, and `build` trains the small demo model deterministically.

May import: the flow below (base to assembly); not the other tools (review, device, ui).
"""

CLASSES = ("quiet_room", "voices", "traffic", "machinery")
SAMPLE_RATE = 16000


def tour_paths(directory):
    """Where the tour and its truth live (made by `monitor.demo.tour.ensure_tour`).

    Parameters
    ----------
    directory : str or Path
        The tour's folder.

    Returns
    -------
    wav, tsv : Path
        The tour and its truth.
    """
    from pathlib import Path

    d = Path(directory)
    return d / "tour.wav", d / "tour.tsv"
