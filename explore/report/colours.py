"""The report's own colours: ink on warm paper, teal for consumer photos,
ochre for owned photos, a rust/teal diverging scale for indices.

Categorical colours are spaced around the hue circle by the golden angle
(about 137.5 degrees), a common way to get many distinguishable hues, with
lightness alternating so neighbours in the list differ twice over.
"""

from __future__ import annotations

import colorsys
import math

INK = "#1e2a36"
PAPER = "#f7f4ee"
LINE = "#d9d2c5"
MUTED = "#7b7264"
CONSUMER = "#2a7f7a"
OWNED = "#d18b2f"
SURVEY = "#6a4c93"
UNASSIGNED = "#c9c4ba"

# Diverging around index 100: teal below, rust above (log2 scale, clipped at 1/4 and 4x).
_LOW = (42, 111, 143)
_MID = (246, 243, 236)
_HIGH = (184, 67, 43)

# Sequential for probabilities 0..1: pale sand -> amber -> rust -> deep plum.
SEQUENTIAL = ["#f3ecdc", "#ead08f", "#dc9a4e", "#bd5a37", "#86324a", "#3f1d40"]


def categorical(n: int) -> list[str]:
    """``n`` distinguishable colours (hex), the same list for the same ``n``."""
    out = []
    for i in range(n):
        hue = (0.07 + i * 0.381966) % 1.0  # golden-angle step as a fraction of the circle
        light = 0.46 if i % 2 == 0 else 0.62
        sat = 0.55 if i % 3 else 0.68
        r, g, b = colorsys.hls_to_rgb(hue, light, sat)
        out.append("#%02x%02x%02x" % (round(r * 255), round(g * 255), round(b * 255)))
    return out


def _mix(a, b, t):
    return "#%02x%02x%02x" % tuple(round(x + (y - x) * t) for x, y in zip(a, b))


def diverging_index(index: float) -> str:
    """Colour of an index (100 = parity): white at 100, teal below, rust above."""
    if index is None or not math.isfinite(index):
        return "#ebe7df"
    t = max(-2.0, min(2.0, math.log2(max(index, 1e-9) / 100.0))) / 2.0
    return _mix(_MID, _HIGH, t) if t >= 0 else _mix(_MID, _LOW, -t)
