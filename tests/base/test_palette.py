"""The shared palette (monitor/base/palette.py): contrast on our ground, and every pair of class
colours apart for normal vision and under simulated deuteranopia and protanopia.

Formulas, each computed here from its published source:
- WCAG 2.x relative luminance and contrast ratio (W3C, Web Content Accessibility Guidelines
  2.1, definitions "relative luminance" and "contrast ratio"): sRGB channels linearised
  with the 0.04045 / 12.92 / 2.4 piecewise curve, L = 0.2126 R + 0.7152 G + 0.0722 B,
  ratio (L1 + 0.05) / (L2 + 0.05).
- Colour-vision deficiency: Machado, Oliveira and Fernandes 2009, "A Physiologically-based
  Model for Simulation of Color Vision Deficiency", IEEE TVCG 15(6), their matrices for
  severity 1.0 (full dichromacy), applied to linear sRGB (from memory of the paper's table;
  the check below that each row sums to 1, so greys stay grey, guards against a typo).
- CIELAB from sRGB (IEC 61966-2-1 matrix, D65 white) and the CIEDE2000 difference
  (Sharma, Wu and Dalal 2005, "The CIEDE2000 color-difference formula: implementation
  notes, supplementary test data, and mathematical observations", Color Res. Appl. 30(1)),
  checked against the first pairs of their test data (from memory).

The threshold: CIEDE2000 >= 10 between any two class colours. A difference of about 1 is
just noticeable side by side; class colours must be told apart at a glance in one-cell
marks of the strip and thin plot lines, so we ask for ten times that (common practice for
categorical palettes puts the floor between 10 and 20; ours is the lower end, met by every
pair under both simulations, and normal vision gets at least 15).
"""

import itertools
import math

import numpy as np
import pytest

from monitor.base import palette as P

MACHADO_2009 = {  # severity 1.0
    "protanopia": np.array([[0.152286, 1.052583, -0.204868],
                            [0.114503, 0.786281, 0.099216],
                            [-0.003882, -0.048116, 1.051998]]),
    "deuteranopia": np.array([[0.367322, 0.860646, -0.227968],
                              [0.280085, 0.672501, 0.047413],
                              [-0.011820, 0.042940, 0.968881]]),
}
DE00_MIN = 10.0
DE00_MIN_NORMAL = 15.0


def linear_srgb(hex_colour):
    c = np.array([int(hex_colour[i:i + 2], 16) / 255.0 for i in (1, 3, 5)])
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def wcag_luminance(hex_colour):
    r, g, b = linear_srgb(hex_colour)
    return 0.2126 * r + 0.7152 * g + 0.0722 * b


def wcag_contrast(a, b):
    hi, lo = sorted((wcag_luminance(a), wcag_luminance(b)), reverse=True)
    return (hi + 0.05) / (lo + 0.05)


def lab(linear_rgb):
    m = np.array([[0.4124564, 0.3575761, 0.1804375],
                  [0.2126729, 0.7151522, 0.0721750],
                  [0.0193339, 0.1191920, 0.9503041]])
    t = m @ np.clip(linear_rgb, 0.0, 1.0) / np.array([0.95047, 1.0, 1.08883])
    d = 6 / 29
    f = np.where(t > d ** 3, np.cbrt(t), t / (3 * d * d) + 4 / 29)
    return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


def ciede2000(lab1, lab2):
    (L1, a1, b1), (L2, a2, b2) = lab1, lab2
    cbar = (math.hypot(a1, b1) + math.hypot(a2, b2)) / 2
    g = 0.5 * (1 - math.sqrt(cbar ** 7 / (cbar ** 7 + 25 ** 7)))
    a1p, a2p = (1 + g) * a1, (1 + g) * a2
    c1p, c2p = math.hypot(a1p, b1), math.hypot(a2p, b2)
    h1 = math.degrees(math.atan2(b1, a1p)) % 360 if c1p else 0.0
    h2 = math.degrees(math.atan2(b2, a2p)) % 360 if c2p else 0.0
    dl, dc = L2 - L1, c2p - c1p
    dh = 0.0
    if c1p * c2p:
        dh = h2 - h1
        dh = dh - 360 if dh > 180 else dh + 360 if dh < -180 else dh
    dH = 2 * math.sqrt(c1p * c2p) * math.sin(math.radians(dh / 2))
    lbar, cbarp = (L1 + L2) / 2, (c1p + c2p) / 2
    if c1p * c2p == 0:
        hbar = h1 + h2
    elif abs(h1 - h2) <= 180:
        hbar = (h1 + h2) / 2
    else:
        hbar = (h1 + h2 + 360) / 2 if h1 + h2 < 360 else (h1 + h2 - 360) / 2
    t = (1 - 0.17 * math.cos(math.radians(hbar - 30)) + 0.24 * math.cos(math.radians(2 * hbar))
         + 0.32 * math.cos(math.radians(3 * hbar + 6)) - 0.20 * math.cos(math.radians(4 * hbar - 63)))
    dtheta = 30 * math.exp(-(((hbar - 275) / 25) ** 2))
    rc = 2 * math.sqrt(cbarp ** 7 / (cbarp ** 7 + 25 ** 7))
    sl = 1 + 0.015 * (lbar - 50) ** 2 / math.sqrt(20 + (lbar - 50) ** 2)
    sc, sh = 1 + 0.045 * cbarp, 1 + 0.015 * cbarp * t
    rt = -math.sin(math.radians(2 * dtheta)) * rc
    return math.sqrt((dl / sl) ** 2 + (dc / sc) ** 2 + (dH / sh) ** 2
                     + rt * (dc / sc) * (dH / sh))


def test_formulas_against_their_sources():
    # WCAG: white on black is 21:1, a colour on itself 1:1 (by the definition)
    assert wcag_contrast("#ffffff", "#000000") == pytest.approx(21.0)
    assert wcag_contrast(P.GROUND, P.GROUND) == pytest.approx(1.0)
    for c in (*P.CLASS_COLOURS, P.TEXT, P.MUTED):  # the palette's own helper agrees
        assert P.contrast_ratio(c, P.GROUND) == pytest.approx(wcag_contrast(c, P.GROUND))
    # Sharma, Wu and Dalal 2005, test data pairs 1-3 (from memory)
    ref = (50.0, 0.0, -82.7485)
    for lab1, want in (((50.0, 2.6772, -79.7751), 2.0425), ((50.0, 3.1571, -77.2803), 2.8615),
                       ((50.0, 2.8361, -74.0200), 3.4412)):
        assert ciede2000(lab1, ref) == pytest.approx(want, abs=1e-4)
    # Machado 2009 matrices keep greys grey: every row sums to 1
    for m in MACHADO_2009.values():
        assert np.allclose(m.sum(axis=1), 1.0, atol=2e-6)


@pytest.mark.parametrize("colour", P.CLASS_COLOURS)
def test_every_class_colour_stands_out_on_the_ground(colour):
    # WCAG 2.x: 3:1 is the floor for graphics (on the ground and on a panel); on the ground
    # ours reach 4.5:1, the floor for text, so the strip's ground-coloured letters on a
    # class colour read as well
    for ground in (P.GROUND, P.PANEL):
        assert wcag_contrast(colour, ground) >= 3.0, (colour, ground)
    assert wcag_contrast(colour, P.GROUND) >= 4.5
    assert wcag_contrast(P.UNKNOWN_COLOUR, P.GROUND) >= 3.0
    assert wcag_contrast(P.ALERT, P.GROUND) >= 3.0


@pytest.mark.parametrize("vision", ["normal", *MACHADO_2009])
def test_class_colours_pairwise_apart(vision):
    m = np.eye(3) if vision == "normal" else MACHADO_2009[vision]
    labs = {c: lab(m @ linear_srgb(c)) for c in P.CLASS_COLOURS}
    floor = DE00_MIN_NORMAL if vision == "normal" else DE00_MIN
    worst = min((ciede2000(labs[a], labs[b]), a, b)
                for a, b in itertools.combinations(P.CLASS_COLOURS, 2))
    assert worst[0] >= floor, worst


def test_heat_ramp_is_ordered_in_lightness():
    # perceptually ordered: CIELAB L* rises at every step, in colour and under both
    # simulations, in near-even steps (so equal steps of the value look equal)
    for m in (np.eye(3), *MACHADO_2009.values()):
        lightness = [lab(m @ linear_srgb(c))[0] for c in P.HEAT]
        steps = np.diff(lightness)
        assert np.all(steps > 4.0), steps
        assert steps.max() / steps.min() < 2.0, steps
    assert P.HEAT[0] == P.GROUND  # the ramp starts at the ground: zero draws nothing


# --- colours that are not a class's ----------------------------------------------------------
NEUTRAL_CHROMA = 10.0  # CIELAB C* below this reads as a grey (common practice, from memory)


def chroma(hex_colour):
    _, a, b = lab(linear_srgb(hex_colour))
    return math.hypot(a, b)


def is_class_colour(colour):
    return colour.lower() in {c.lower() for c in P.CLASS_COLOURS}


@pytest.mark.parametrize("name", list(P.UI_COLOURS))
def test_every_other_colour_is_a_grey_or_apart_from_every_class(name):
    # a colour that means something else than a class must not be taken for one: a near-
    # neutral grey (a class colour a dichromat sees as grey, reddish purple under
    # deuteranopia, is told from it by the class letter), or a hue that keeps the class
    # pairs' distance from every class colour in all three visions
    c = P.UI_COLOURS[name]
    assert not is_class_colour(c)
    if chroma(c) < NEUTRAL_CHROMA:
        return
    for vision in ("normal", *MACHADO_2009):
        m = np.eye(3) if vision == "normal" else MACHADO_2009[vision]
        floor = DE00_MIN_NORMAL if vision == "normal" else DE00_MIN
        for other in (*P.CLASS_COLOURS, *(g for g in P.UI_COLOURS.values()
                                          if chroma(g) < NEUTRAL_CHROMA and g != P.GROUND
                                          and wcag_contrast(g, P.GROUND) >= 3.0)):
            d = ciede2000(lab(m @ linear_srgb(c)), lab(m @ linear_srgb(other)))
            assert d >= floor, (name, other, vision, d)


def test_text_colours_read_on_the_ground():
    # WCAG 2.x: 4.5:1 for text (TEXT, MUTED, ALERT words), 3:1 for marks (UNKNOWN's swatch)
    for c in (P.TEXT, P.MUTED, P.ALERT):
        assert wcag_contrast(c, P.GROUND) >= 4.5 and wcag_contrast(c, P.PANEL) >= 4.5, c
    assert wcag_contrast(P.UNKNOWN_COLOUR, P.GROUND) >= 3.0
    assert wcag_contrast(P.GROUND, P.ALERT) >= 4.5  # ground-coloured words on ALERT
    assert wcag_contrast(P.GROUND, P.TEXT) >= 4.5  # the title and SILENT, reversed
    assert wcag_contrast(P.TEXT, P.LINE) >= 4.5  # the relabel table's cursor row


def _rich_colours(text):
    from rich.style import Style

    out = []
    for style in [text.style, *(span.style for span in text.spans)]:
        style = Style.parse(style) if isinstance(style, str) else style
        for col in (style.color, style.bgcolor):
            if col is not None and col.triplet is not None:
                out.append(col.triplet.hex)
    return out


def test_no_class_colour_means_anything_else():
    """The same colour for a class everywhere, and for nothing else: the UI's theme, the
    level meter in each of its states, the HTML report's style sheet, and no code of the UI
    or the report picks a class colour but through `palette.class_colour`."""
    from pathlib import Path

    from monitor.review.report import CSS
    from monitor.ui import draw as D
    from monitor.ui.app import THEME

    allowed = {c.lower() for c in P.UI_COLOURS.values()}
    theme = [getattr(THEME, k) for k in ("primary", "secondary", "accent", "warning", "error",
                                         "success", "foreground", "background", "surface",
                                         "panel", "boost")]
    theme += [v for v in THEME.variables.values() if str(v).startswith("#")]
    assert theme and all(str(c).lower() in allowed for c in theme), theme
    for level, clipped, quiet in ((-30.0, 0.0, 0.0), (-6.0, 0.0, 0.0), (-1.0, 0.0, 0.0),
                                  (-0.1, 0.01, 0.0), (-90.0, 0.0, 5.0)):
        drawn = _rich_colours(D.level_text(level, clipped, quiet, 30))
        assert drawn and all(c.lower() in allowed for c in drawn), (level, drawn)
    assert not any(c.lower() in CSS.lower() for c in P.CLASS_COLOURS)
    root = Path(D.__file__).resolve().parent.parent
    for path in [*sorted((root / "ui").rglob("*.py")), root / "review" / "report.py"]:
        code = path.read_text()
        assert "CLASS_COLOURS" not in code, path
        assert not any(c.lower() in code.lower() for c in P.CLASS_COLOURS), path
