"""Immutable grids, windows and tilings: all index arithmetic of the engine lives here."""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterator

from affine import Affine

__all__ = ["Window", "Grid", "Tile", "Tiling", "anchor_grid", "tile_origin"]


@dataclass(frozen=True, slots=True)
class Window:
    """A rectangle of pixels: first row, first column, and its size."""

    row: int
    col: int
    rows: int
    cols: int

    def __post_init__(self) -> None:
        if self.rows < 0 or self.cols < 0:
            raise ValueError(f"a window cannot have a negative size. Got rows={self.rows}, cols={self.cols}")

    @property
    def slices(self) -> tuple[slice, slice]:
        return slice(self.row, self.row + self.rows), slice(self.col, self.col + self.cols)

    @property
    def shape(self) -> tuple[int, int]:
        return self.rows, self.cols

    def contains(self, rows, cols):
        """Whether pixels ``(rows, cols)`` (numbers or arrays that broadcast) lie in this window."""
        import numpy as np

        rows, cols = np.asarray(rows), np.asarray(cols)
        return (rows >= self.row) & (rows < self.row + self.rows) & (cols >= self.col) & (cols < self.col + self.cols)

    def pad(self, halo: int, rows: int, cols: int) -> "Window":
        """This window grown by ``halo`` pixels on every side, clamped to a ``rows`` x ``cols`` grid."""
        r0, c0 = max(self.row - halo, 0), max(self.col - halo, 0)
        r1, c1 = min(self.row + self.rows + halo, rows), min(self.col + self.cols + halo, cols)
        return Window(r0, c0, r1 - r0, c1 - c0)

    def relative_to(self, outer: "Window") -> tuple[slice, slice]:
        """Slices that cut this window out of an array covering ``outer``."""
        r, c = self.row - outer.row, self.col - outer.col
        if r < 0 or c < 0 or r + self.rows > outer.rows or c + self.cols > outer.cols:
            raise ValueError(f"window {self} does not lie inside {outer}")
        return slice(r, r + self.rows), slice(c, c + self.cols)

    def intersection(self, other: "Window") -> "Window | None":
        r0, c0 = max(self.row, other.row), max(self.col, other.col)
        r1 = min(self.row + self.rows, other.row + other.rows)
        c1 = min(self.col + self.cols, other.col + other.cols)
        if r1 <= r0 or c1 <= c0:
            return None
        return Window(r0, c0, r1 - r0, c1 - c0)


@dataclass(frozen=True, slots=True)
class Grid:
    """A georeferenced raster grid: (rows, cols), the affine transform of pixel corners, and a CRS.

    ``crs`` is any string rasterio/pyproj accept (``"EPSG:32611"`` or WKT). Cutting a grid at a
    window gives a smaller grid whose transform is shifted accordingly.
    """

    rows: int
    cols: int
    transform: Affine
    crs: str

    def __post_init__(self) -> None:
        if self.rows <= 0 or self.cols <= 0:
            raise ValueError(f"a grid needs a positive shape. Got rows={self.rows}, cols={self.cols}")

    @property
    def shape(self) -> tuple[int, int]:
        return self.rows, self.cols

    @property
    def res(self) -> tuple[float, float]:
        return abs(self.transform.a), abs(self.transform.e)

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """(left, bottom, right, top) in the grid's CRS."""
        x0, y0 = self.transform @ (0, 0)
        x1, y1 = self.transform @ (self.cols, self.rows)
        return min(x0, x1), min(y0, y1), max(x0, x1), max(y0, y1)

    @property
    def full(self) -> Window:
        return Window(0, 0, self.rows, self.cols)

    def window(self, win: Window) -> "Grid":
        """The sub-grid covering ``win`` (which may reach past the edges, for warping)."""
        return Grid(win.rows, win.cols, self.transform @ Affine.translation(win.col, win.row), self.crs)

    def x_coords(self) -> "list[float]":
        t = self.transform
        return [t.c + t.a * (c + 0.5) for c in range(self.cols)]

    def y_coords(self) -> "list[float]":
        t = self.transform
        return [t.f + t.e * (r + 0.5) for r in range(self.rows)]

    def to_dict(self) -> dict:
        return {"rows": self.rows, "cols": self.cols, "transform": list(self.transform)[:6], "crs": self.crs}

    @classmethod
    def from_dict(cls, d: dict) -> "Grid":
        return cls(int(d["rows"]), int(d["cols"]), Affine(*d["transform"]), str(d["crs"]))


@dataclass(frozen=True, slots=True)
class Tile:
    """One tile of a tiling: its index, its core window, its padded window and the crop back to the core."""

    index: tuple[int, int]
    core: Window
    padded: Window

    @property
    def crop(self) -> tuple[slice, slice]:
        """Slices taking an array over ``padded`` back to ``core``."""
        return self.core.relative_to(self.padded)

    @property
    def name(self) -> str:
        return f"tile({self.index[0]}, {self.index[1]})"


@dataclass(frozen=True, slots=True)
class Tiling:
    """Square tiles of ``size`` pixels over ``grid`` (the last row/column may be smaller), with a halo."""

    grid: Grid
    size: int
    halo: int = 0

    def __post_init__(self) -> None:
        if self.size <= 0:
            raise ValueError(f"tile size must be positive. Got {self.size}")
        if self.halo < 0:
            raise ValueError(f"halo must be zero or positive. Got {self.halo}")
        if self.halo > self.size:
            raise ValueError(
                f"halo of {self.halo} px is larger than the tile size of {self.size} px: "
                "use a larger tile (tiles must be at least as large as the halo)")

    @property
    def shape(self) -> tuple[int, int]:
        return -(-self.grid.rows // self.size), -(-self.grid.cols // self.size)

    def __len__(self) -> int:
        ni, nj = self.shape
        return ni * nj

    def __getitem__(self, index: tuple[int, int]) -> Tile:
        i, j = index
        ni, nj = self.shape
        if not (0 <= i < ni and 0 <= j < nj):
            raise IndexError(f"tile ({i}, {j}) is outside a tiling of {ni} x {nj} tiles")
        r, c = i * self.size, j * self.size
        core = Window(r, c, min(self.size, self.grid.rows - r), min(self.size, self.grid.cols - c))
        return Tile((i, j), core, core.pad(self.halo, self.grid.rows, self.grid.cols))

    def __iter__(self) -> Iterator[Tile]:
        ni, nj = self.shape
        for i in range(ni):
            for j in range(nj):
                yield self[i, j]

    def with_halo(self, halo: int) -> "Tiling":
        return Tiling(self.grid, self.size, halo)


def anchor_grid(grid: Grid, size: int) -> Grid:
    """``grid`` grown outwards so that its edges lie on multiples of ``size`` pixels in its CRS.

    Tiles of ``size`` pixels over the result then have absolute indices (:func:`tile_origin`) that do
    not move when the extent grows in any direction. Needs a north-up transform (no rotation).
    """
    t = grid.transform
    if t.b != 0 or t.d != 0 or t.a <= 0 or t.e >= 0:
        raise ValueError(f"anchoring needs a north-up grid without rotation. Got transform {tuple(t)[:6]}")
    if size <= 0:
        raise ValueError(f"anchor size must be positive. Got {size}")
    sx, sy = size * t.a, size * -t.e
    eps = 1e-9
    left, bottom, right, top = grid.bounds
    left = math.floor(left / sx + eps) * sx
    top = math.ceil(top / sy - eps) * sy
    right = math.ceil(right / sx - eps) * sx
    bottom = math.floor(bottom / sy + eps) * sy
    cols = max(size, int(round((right - left) / t.a)))
    rows = max(size, int(round((top - bottom) / -t.e)))
    return Grid(rows, cols, Affine(t.a, 0.0, left, 0.0, t.e, top), grid.crs)


def tile_origin(grid: Grid, size: int) -> tuple[int, int]:
    """Absolute (row, col) index of the tile at the grid's top-left corner, for tiles of ``size`` px.

    Absolute tile row ``I`` covers y from ``-I * size * res_y`` downwards, absolute column ``J`` x from
    ``J * size * res_x``; local tile (i, j) is absolute (I0 + i, J0 + j). Raises ``ValueError`` when the
    grid's corner is not on that lattice (see :func:`anchor_grid`).
    """
    t = grid.transform
    sx, sy = size * t.a, size * -t.e
    J0, I0 = t.c / sx, -t.f / sy
    if abs(J0 - round(J0)) > 1e-6 or abs(I0 - round(I0)) > 1e-6 or t.b != 0 or t.d != 0:
        raise ValueError(f"the grid's corner ({t.c}, {t.f}) is not on the lattice of {size} px tiles "
                         f"(multiples of {sx} x {sy} in its CRS); anchor the grid to the tile size")
    return int(round(I0)), int(round(J0))
