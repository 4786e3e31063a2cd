"""The default colours of class maps: one colour-blind-safe palette for every product and figure.

Besides the palette, the codes every class map shares (:data:`UNCLASSIFIED`, :data:`CLASS_NODATA`)
and the colours a GIS shows for them, and a check that a class colour cannot be mistaken for the
background or for nodata (:func:`background_like`): near-white and near-black colours are refused.
"""
from __future__ import annotations

import re

__all__ = [
    "PALETTE_HEX",
    "UNCLASSIFIED",
    "CLASS_NODATA",
    "UNCLASSIFIED_RGB",
    "MAX_CLASSES",
    "BACKGROUND_DELTA_E",
    "hex_to_rgb",
    "rgb_to_hex",
    "srgb_to_lab",
    "background_like",
    "default_class_colors",
]

# Colour-blind-safe default palette for class maps (RGB). First the seven colours of Okabe & Ito,
# "Color Universal Design" (2008), without its black (black reads as nodata); then the nine colours of
# Paul Tol's "muted" qualitative scheme (Tol, "Colour Schemes", SRON technical note EPS/TN/09-002,
# 2021). More than 16 classes cannot all be told apart: colours then repeat.
PALETTE_HEX: tuple[str, ...] = (
    "E69F00", "56B4E9", "009E73", "F0E442", "0072B2", "D55E00", "CC79A7",
    "332288", "88CCEE", "44AA99", "117733", "999933", "DDCC77", "CC6677", "882255", "AA4499",
)

#: Class code of a valid pixel that matched no class (drawn, in :data:`UNCLASSIFIED_RGB`).
UNCLASSIFIED = 0
#: Class code of a pixel outside the mosaic (nodata: transparent in a GIS).
CLASS_NODATA = 255
#: The largest number of classes a uint8 class map holds (codes 1..254).
MAX_CLASSES = CLASS_NODATA - 1
#: Colour of unclassified pixels: a mid grey, visible on white and on black backgrounds.
UNCLASSIFIED_RGB: tuple[int, int, int] = (150, 150, 150)
#: CIELAB distance (Delta E 1976) to white or black under which a colour counts as background-like.
BACKGROUND_DELTA_E = 20.0


def hex_to_rgb(h: str) -> tuple[int, int, int]:
    """``"#E69F00"`` or ``"E69F00"`` to ``(230, 159, 0)``."""
    if not isinstance(h, str) or not re.fullmatch(r"#?[0-9A-Fa-f]{6}", h):
        raise ValueError(f"a colour must be six hexadecimal digits (RRGGBB, optionally after '#'). Got {h!r}")
    h = h.lstrip("#")
    return int(h[0:2], 16), int(h[2:4], 16), int(h[4:6], 16)


def rgb_to_hex(rgb: tuple[int, int, int]) -> str:
    """``(230, 159, 0)`` to ``"#e69f00"``."""
    return "#%02x%02x%02x" % tuple(int(v) for v in rgb)


def srgb_to_lab(rgb: tuple[int, int, int]) -> tuple[float, float, float]:
    """CIELAB (L*, a*, b*) of an 8-bit sRGB colour, D65 white.

    sRGB decoding and the linear-RGB to XYZ matrix of IEC 61966-2-1; XYZ to L*a*b* of CIE 15 (1976
    formulas with the linear segment below (6/29)^3).
    """
    lin = []
    for v in rgb:
        c = float(v) / 255.0
        lin.append(c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4)
    r, g, b = lin
    x = 0.4124 * r + 0.3576 * g + 0.1805 * b
    y = 0.2126 * r + 0.7152 * g + 0.0722 * b
    z = 0.0193 * r + 0.1192 * g + 0.9505 * b
    # white point: the same matrix applied to (1, 1, 1), so that white is exactly L* = 100, a* = b* = 0
    wx, wy, wz = 0.9505, 1.0, 1.089

    def f(t: float) -> float:
        d = 6.0 / 29.0
        return t ** (1.0 / 3.0) if t > d ** 3 else t / (3 * d * d) + 4.0 / 29.0

    fx, fy, fz = f(x / wx), f(y / wy), f(z / wz)
    return 116.0 * fy - 16.0, 500.0 * (fx - fy), 200.0 * (fy - fz)


def background_like(rgb: tuple[int, int, int]) -> str | None:
    """``"near-white"`` or ``"near-black"`` when a colour lies within :data:`BACKGROUND_DELTA_E` of
    white or black in CIELAB (it would read as background or nodata), else None."""
    L, a, b = srgb_to_lab(rgb)
    if ((100.0 - L) ** 2 + a * a + b * b) ** 0.5 < BACKGROUND_DELTA_E:
        return "near-white"
    if (L * L + a * a + b * b) ** 0.5 < BACKGROUND_DELTA_E:
        return "near-black"
    return None


def default_class_colors(n: int, avoid: tuple[tuple[int, int, int], ...] = ()) -> tuple[tuple[int, int, int], ...]:
    """``n`` RGB colours for classes 1..n from the colour-blind-safe default palette.

    Colours in ``avoid`` (e.g. those a spectral library already gives) are used last; beyond the
    palette's 16 colours they repeat.
    """
    pal = [hex_to_rgb(h) for h in PALETTE_HEX]
    taken = {tuple(int(v) for v in c) for c in avoid}
    order = [c for c in pal if c not in taken] + [c for c in pal if c in taken]
    return tuple(order[k % len(order)] for k in range(n))
