"""Grid and tiling identities: a tile of the grid is the grid cut at that window, halos clamp at the
edges, crops give the core, tiles cover the grid exactly once; plans that would share shards fail."""
from __future__ import annotations

import numpy as np
import pytest
from affine import Affine

from swathmill.tiles.grid import Grid, Tiling, Window
from swathmill.tiles.run import PlanError, RunOptions, plan_check
from swathmill.tiles.store import StoreError, StoreLayout

GRID = Grid(37, 45, Affine(10.0, 0.0, 400000.0, 0.0, -10.0, 5000000.0), "EPSG:32633")


@pytest.mark.parametrize(("size", "halo"), [(8, 0), (8, 3), (16, 5), (16, 16), (37, 2), (64, 4)])
def test_tiles_cover_the_grid_exactly_once(size: int, halo: int) -> None:
    tiling = Tiling(GRID, size, halo)
    count = np.zeros(GRID.shape, int)
    for tile in tiling:
        count[tile.core.slices] += 1
    assert (count == 1).all()
    ni, nj = tiling.shape
    assert len(tiling) == ni * nj == len(list(tiling))
    assert ni == -(-GRID.rows // size) and nj == -(-GRID.cols // size)


@pytest.mark.parametrize(("size", "halo"), [(8, 3), (16, 5), (10, 10)])
def test_padded_window_is_core_plus_halo_clamped_and_crop_gives_core(size: int, halo: int) -> None:
    tiling = Tiling(GRID, size, halo)
    field = np.arange(GRID.rows * GRID.cols).reshape(GRID.shape)
    for tile in tiling:
        c, p = tile.core, tile.padded
        # halo on each side, except where the grid ends (clamped, never negative or past the edge)
        assert p.row == max(c.row - halo, 0) and p.col == max(c.col - halo, 0)
        assert p.row + p.rows == min(c.row + c.rows + halo, GRID.rows)
        assert p.col + p.cols == min(c.col + c.cols + halo, GRID.cols)
        # the crop of the padded block is the core block
        padded_block = field[p.slices]
        assert np.array_equal(padded_block[tile.crop], field[c.slices])


def test_edge_tiles_are_smaller_and_clamped() -> None:
    tiling = Tiling(GRID, 16, 3)
    last = tiling[2, 2]
    assert last.core == Window(32, 32, 5, 13)
    assert last.padded == Window(29, 29, 8, 16)
    first = tiling[0, 0]
    assert first.padded == Window(0, 0, 19, 19)


def test_tile_grid_equals_grid_cut_at_the_window() -> None:
    tiling = Tiling(GRID, 16, 4)
    xs, ys = np.asarray(GRID.x_coords()), np.asarray(GRID.y_coords())
    for tile in tiling:
        for win in (tile.core, tile.padded):
            sub = GRID.window(win)
            assert sub.shape == win.shape and sub.crs == GRID.crs
            # pixel (0, 0) of the sub-grid is pixel (row, col) of the grid
            assert sub.transform @ (0, 0) == GRID.transform @ (win.col, win.row)
            assert np.allclose(sub.x_coords(), xs[win.slices[1]])
            assert np.allclose(sub.y_coords(), ys[win.slices[0]])
            assert sub.res == GRID.res


def test_grid_round_trips_through_dict() -> None:
    assert Grid.from_dict(GRID.to_dict()) == GRID
    left, bottom, right, top = GRID.bounds
    assert (left, top) == (400000.0, 5000000.0)
    assert (right, bottom) == (400000.0 + 450.0, 5000000.0 - 370.0)


def test_window_relative_and_intersection() -> None:
    outer = Window(10, 20, 30, 40)
    inner = Window(15, 25, 5, 6)
    rs, cs = inner.relative_to(outer)
    assert (rs, cs) == (slice(5, 10), slice(5, 11))
    with pytest.raises(ValueError, match="does not lie inside"):
        Window(5, 20, 10, 10).relative_to(outer)
    assert outer.intersection(Window(0, 0, 12, 22)) == Window(10, 20, 2, 2)
    assert outer.intersection(Window(0, 0, 10, 10)) is None


def test_halo_larger_than_tile_is_refused() -> None:
    with pytest.raises(ValueError, match=r"halo of 9 px is larger than the tile size of 8 px"):
        Tiling(GRID, 8, 9)


@pytest.mark.parametrize(("shard", "chunk"), [(48, 32), (100, 64)])
def test_tile_not_a_multiple_of_chunk_is_refused(shard: int, chunk: int) -> None:
    with pytest.raises(StoreError, match=rf"tile size {shard} px is not a multiple of the chunk size {chunk} px"):
        StoreLayout(shard=shard, chunk=chunk)


def test_plan_with_tiles_sharing_a_shard_is_refused() -> None:
    opts = RunOptions(tile=48, shard=32)
    tiling = Tiling(Grid(96, 96, GRID.transform, GRID.crs), opts.tile, 0)
    with pytest.raises(PlanError, match=r"tiles of 48 px would share shards of 32 px"):
        plan_check(tiling, opts.layout(), "demo")
    # whole numbers of shards per tile are accepted
    plan_check(Tiling(tiling.grid, 64, 0), RunOptions(tile=64, shard=32).layout(), "demo")
    plan_check(tiling, RunOptions(tile=48).layout(), "demo")
