"""One palette for every screen and picture: the terminal UI and the HTML report share it.

Class colours: six of the colour-blind-safe set of Okabe and Ito 2008, "Color Universal
Design (CUD): how to make figures and presentations that are friendly to colorblind people"
(J*FLY), without its black and its deep blue (too dark on our ground, and too near the sky
blue once lifted), in an order of our own, plus a pale green of our own; on a dark slate
ground of our own on which every one reaches WCAG 2.x contrast 3:1 (4.5:1 in fact, so dark
text on a class colour reads too). Every pair stays apart under simulated deuteranopia and
protanopia (tests/test_palette.py). Beyond seven classes the colours repeat; every class also
has its own letter, so nothing depends on colour alone.

The heat ramp (log-mel picture, confusion matrix) is our own: from the ground through deep
teal and moss to a pale straw, its relative luminance rising at every step, so it reads in
order in colour and in grey.

A class colour means that class and nothing else. Everything else (text, rules, the title,
the footer's keys, the level meter, warnings, the marks for a difference or an unfamiliar
sound) takes one of `UI_COLOURS`: near-neutral greys, and `ALERT`, a rose red of our own that
stays apart from every class colour for normal vision and under simulated deuteranopia and
protanopia (tests/test_palette.py).
"""

from __future__ import annotations

GROUND = "#15191f"  # page and terminal background
PANEL = "#1c222a"  # a panel on the ground
LINE = "#2f3843"  # rules, grid lines, borders
TEXT = "#e4e8ee"
MUTED = "#8c96a4"
ALERT = "#f8506c"  # a difference, clipping: also said in words, never colour alone

CLASS_COLOURS = ("#56B4E9", "#E69F00", "#009E73", "#CC79A7", "#F0E442", "#D55E00", "#B9E0A5")
CLASS_COLOUR_NAMES = ("sky blue", "orange", "bluish green", "reddish purple", "yellow",
                      "vermillion", "pale green")  # the first six as Okabe and Ito name them

# Lightness (CIELAB L*) rises from 9 to 93 in near-even steps of about 8.4, so the ramp reads
# in order in colour, in grey and under the simulated colour-vision deficiencies.
HEAT = ("#15191f", "#1b2a35", "#1f3d4a", "#23525b", "#2c6866", "#3f7f6a", "#5e9669",
        "#86ac66", "#b4c26a", "#e0d77f", "#f7ecb5")

UNKNOWN_COLOUR = "#7d8591"  # undecided, unknown, a label outside the classes

# every colour that is not a class colour, by name: what the UI's theme, its panels and the
# HTML report may use for anything that is not a class (the heat ramp aside)
UI_COLOURS = {"GROUND": GROUND, "PANEL": PANEL, "LINE": LINE, "TEXT": TEXT, "MUTED": MUTED,
              "ALERT": ALERT, "UNKNOWN_COLOUR": UNKNOWN_COLOUR}


def class_colour(classes, label) -> str:
    """The colour of `label` among `classes` (the same everywhere).

    Parameters
    ----------
    classes : sequence of str
        The model's classes in output order.
    label : str
        One class (any other label gets the colour for "no class").

    Returns
    -------
    str
        ``#rrggbb``.
    """
    classes = list(classes)
    if label in classes:
        return CLASS_COLOURS[classes.index(label) % len(CLASS_COLOURS)]
    return UNKNOWN_COLOUR


def class_keys(classes) -> dict[str, str]:
    """One distinct character per class: its first unused letter, else a digit.

    Parameters
    ----------
    classes : sequence of str
        The model's classes.

    Returns
    -------
    dict
        Class to its character.
    """
    used, out = set(), {}
    for i, c in enumerate(classes):
        key = next((ch for ch in c.lower() if ch.isalnum() and ch not in used), str(i % 10))
        used.add(key)
        out[c] = key
    return out


def heat_index(frac: float) -> int:
    """The step of the heat ramp for `frac` in [0, 1] (clipped).

    Parameters
    ----------
    frac : float
        A fraction; values outside [0, 1] are clipped.

    Returns
    -------
    int
        An index into the heat ramp.
    """
    return int(min(max(frac, 0.0), 0.9999) * len(HEAT))


def heat_colour(frac: float) -> str:
    """The heat ramp at `frac` in [0, 1].

    Parameters
    ----------
    frac : float
        A fraction; values outside [0, 1] are clipped.

    Returns
    -------
    str
        ``#rrggbb``.
    """
    return HEAT[heat_index(frac)]


def relative_luminance(hex_colour: str) -> float:
    """WCAG 2.x relative luminance of an sRGB colour ``#rrggbb``.

    Parameters
    ----------
    hex_colour : str
        ``#rrggbb``.

    Returns
    -------
    float
        From 0 (black) to 1 (white).

    References
    ----------
    W3C, Web Content Accessibility Guidelines (WCAG) 2.1, "relative luminance".
    """
    h = hex_colour.lstrip("#")
    c = [int(h[i:i + 2], 16) / 255.0 for i in (0, 2, 4)]
    c = [v / 12.92 if v <= 0.04045 else ((v + 0.055) / 1.055) ** 2.4 for v in c]
    return 0.2126 * c[0] + 0.7152 * c[1] + 0.0722 * c[2]


def contrast_ratio(a: str, b: str) -> float:
    """WCAG 2.x contrast ratio ``(L1 + 0.05) / (L2 + 0.05)``, lighter over darker.

    Parameters
    ----------
    a, b : str
        Two colours ``#rrggbb``.

    Returns
    -------
    float
        From 1 to 21.

    References
    ----------
    W3C, Web Content Accessibility Guidelines (WCAG) 2.1, "contrast ratio".
    """
    la, lb = relative_luminance(a), relative_luminance(b)
    hi, lo = max(la, lb), min(la, lb)
    return (hi + 0.05) / (lo + 0.05)
