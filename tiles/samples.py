"""Values of a step's input at given pixels, gathered tile by tile (the fit phase of trained steps).

Each sample is taken from the one tile whose core holds it, so it is counted once whatever the
tiling; the merged result is sorted by sample index, so it does not depend on the tiling either.
"""
from __future__ import annotations

import numpy as np

from .grid import Tile
from .step import Block
from .store import decode

__all__ = ["in_core", "gather", "merge_gathered", "select_tiles_holding", "select_no_tiles"]


def in_core(tile: Tile, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(indices of the samples in the tile's core, their rows and cols in the padded window)."""
    core, pad = tile.core, tile.padded
    idx = np.flatnonzero((rows >= core.row) & (rows < core.row + core.rows)
                         & (cols >= core.col) & (cols < core.col + core.cols))
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
