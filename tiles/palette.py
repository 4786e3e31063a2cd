"""The default colours of class maps: one colour-blind-safe palette for every product and figure."""
from __future__ import annotations

import re

__all__ = ["PALETTE_HEX", "hex_to_rgb", "default_class_colors"]

# Colour-blind-safe default palette for class maps (RGB). First the seven colours of Okabe & Ito,
# "Color Universal Design" (2008), without its black (black is kept for class 0, unclassified); then
# the nine colours of Paul Tol's "muted" qualitative scheme (Tol, "Colour Schemes", SRON technical
# note EPS/TN/09-002, 2021). More than 16 classes cannot all be told apart: colours then repeat.
PALETTE_HEX: tuple[str, ...] = (
    "E69F00", "56B4E9", "009E73", "F0E442", "0072B2", "D55E00", "CC79A7",
    "332288", "88CCEE", "44AA99", "117733", "999933", "DDCC77", "CC6677", "882255", "AA4499",
)


def hex_to_rgb(h: str) -> tuple[int, int, int]:
    """``"#E69F00"`` or ``"E69F00"`` to ``(230, 159, 0)``."""
    if not isinstance(h, str) or not re.fullmatch(r"#?[0-9A-Fa-f]{6}", h):
        raise ValueError(f"a colour must be six hexadecimal digits (RRGGBB, optionally after '#'). Got {h!r}")
    h = h.lstrip("#")
    return int(h[0:2], 16), int(h[2:4], 16), int(h[4:6], 16)


def default_class_colors(n: int) -> tuple[tuple[int, int, int], ...]:
    """``n`` RGB colours for classes 1..n from the colour-blind-safe default palette (repeating beyond 16)."""
    pal = [hex_to_rgb(h) for h in PALETTE_HEX]
    return tuple(pal[k % len(pal)] for k in range(n))
