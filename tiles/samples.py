"""Values of a step's input at given pixels, gathered tile by tile (the fit phase of trained steps),
and the choice of pixels and tiles such fits use.

Each sample is taken from the one tile whose core holds it, so it is counted once whatever the
tiling; the merged result is sorted by sample index, so it does not depend on the tiling either.
:func:`pixel_sample_mask` picks a seeded pseudo-random subset of pixels by their global position,
the same however the grid is tiled; :func:`tiles_touching` keeps the tiles whose core meets a shape.
"""
from __future__ import annotations

from typing import Any, Iterable, Sequence

import numpy as np
from affine import Affine

from .grid import Grid, Tile
from .step import Block
from .store import decode

__all__ = ["in_core", "gather", "merge_gathered", "select_tiles_holding", "select_no_tiles", "pixel_hash",
           "pixel_sample_mask", "tiles_touching"]

_GOLDEN = 0x9E3779B97F4A7C15  # 2**64 / golden ratio, SplitMix64's increment (Steele et al. 2014; common practice)


def in_core(tile: Tile, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(indices of the samples in the tile's core, their rows and cols in the padded window)."""
    pad = tile.padded
    idx = np.flatnonzero(tile.core.contains(rows, cols))
    return idx, rows[idx] - pad.row, cols[idx] - pad.col


def gather(block: Block, alias: str, rows: np.ndarray, cols: np.ndarray, dtype=np.float32) -> dict:
    """Input ``alias`` at the samples in this tile's core: ``idx`` and ``X`` (n, bands) of the valid
    ones (finite in every band), ``bad``: indices of samples on nodata. Values are decoded (physical)
    also when the step reads stored values."""
    idx, rr, cc = in_core(block.tile, np.asarray(rows), np.asarray(cols))
    x = block.data[alias][:, rr, cc].T
    if not block.decoded:
        x = decode(x, block.meta[alias].spec)
    ok = block.valid[rr, cc] & np.all(np.isfinite(x), axis=1)
    return {"idx": idx[ok].astype(np.int64), "X": np.ascontiguousarray(x[ok], dtype=dtype),
            "bad": idx[~ok].astype(np.int64)}


def merge_gathered(a: dict | None, b: dict | None) -> dict | None:
    """Associative merge of two :func:`gather` results (None is the empty result)."""
    if a is None or b is None:
        return a if b is None else b
    return {k: np.concatenate([a[k], b[k]]) for k in ("idx", "X", "bad")}


def select_tiles_holding(tiles: list[Tile], params, *, rows: np.ndarray, cols: np.ndarray) -> list[Tile]:
    """The tiles whose core holds at least one sample (a Fit.select)."""
    return [t for t in tiles if in_core(t, rows, cols)[0].size]


def select_no_tiles(tiles: list[Tile], params) -> list[Tile]:
    """A Fit.select for fits that need no pixel (e.g. library references)."""
    return []


def pixel_hash(rows: Any, cols: Any, seed: int) -> np.ndarray:
    """A 64-bit hash (uint64) of (seed, global row, global column); ``rows`` and ``cols`` broadcast.

    The row goes to the high and the column to the low 32 bits of one word, XORed with the seed times
    the SplitMix64 increment (modulo 2**64, so every integer seed, also of 2**32 and above or negative,
    gives its own stream), then one SplitMix64 step (Steele, Lea & Flood, "Fast splittable
    pseudorandom number generators", OOPSLA 2014; the finaliser constants from memory).
    """
    r = np.asarray(rows, dtype=np.uint64)
    c = np.asarray(cols, dtype=np.uint64)
    with np.errstate(over="ignore"):
        z = (r << np.uint64(32)) ^ c ^ np.uint64((int(seed) * _GOLDEN) % 2**64)
        z = z + np.uint64(_GOLDEN)
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return z ^ (z >> np.uint64(31))


def pixel_sample_mask(rows: Any, cols: Any, seed: int, fraction: float) -> np.ndarray:
    """A seeded pseudo-random choice of pixels by their global (row, col), independent of the tiling.

    A pixel is kept when :func:`pixel_hash`, as a fraction of 2**64 (its top 53 bits), is below
    ``fraction``; all pixels are kept when ``fraction >= 1``. ``rows`` and ``cols`` broadcast against
    each other (pass ``rows[:, None]`` and ``cols[None, :]`` for a block of pixels).
    """
    if fraction >= 1:
        return np.ones(np.broadcast_shapes(np.shape(rows), np.shape(cols)), dtype=bool)
    z = pixel_hash(rows, cols, seed)
    return (z >> np.uint64(11)).astype(np.float64) * 2.0 ** -53 < fraction


def tiles_touching(tiles: Iterable[Tile], shapes: Any, to: Grid | Affine) -> list[Tile]:
    """The tiles whose core meets at least one of ``shapes`` (a shapely geometry or a sequence of them).

    Parameters
    ----------
    tiles : iterable of Tile
        The candidate tiles; the result keeps their order.
    shapes : shapely geometry or sequence of them
        In the grid's CRS when ``to`` is a :class:`~swathmill.tiles.grid.Grid`, else in the space ``to`` maps
        pixel coordinates into.
    to : Grid or Affine
        A grid (its transform maps pixel (col, row) to its CRS) or an affine map of pixel (col, row)
        coordinates to the shapes' coordinates.

    A tile counts when its core's rectangle (pixel corners) and a shape intersect, touching included.
    """
    import shapely

    t = to.transform if isinstance(to, Grid) else to
    geoms: Sequence[Any] = [shapes] if hasattr(shapes, "geom_type") else list(shapes)
    out = []
    for tile in tiles:
        w = tile.core
        corners = [t @ (w.col, w.row), t @ (w.col + w.cols, w.row), t @ (w.col + w.cols, w.row + w.rows),
                   t @ (w.col, w.row + w.rows)]
        if t.b == 0 and t.d == 0:  # axis-aligned: the box itself
            xs, ys = [p[0] for p in corners], [p[1] for p in corners]
            box = shapely.box(min(xs), min(ys), max(xs), max(ys))
        else:
            box = shapely.Polygon(corners)
        if any(g.intersects(box) for g in geoms):
            out.append(tile)
    return out
