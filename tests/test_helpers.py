"""The engine's shared helpers: pixel windows, tiles touching a shape, paths, CF decoding, the pixel
hash and the default palette."""
from __future__ import annotations

import os

import numpy as np
import pytest
import shapely
import shapely.affinity
from affine import Affine
from rasterio.windows import Window as RioWindow
from rasterio.windows import bounds as rio_bounds

from swathmill.tiles.grid import Grid, Tiling, Window
from swathmill.tiles.ops import BandTransformParams, FilterParams, ModalFilterParams, mean_filter_step
from swathmill.tiles.palette import PALETTE_HEX, default_class_colors, hex_to_rgb
from swathmill.tiles.paths import resolve
from swathmill.tiles.samples import pixel_hash, pixel_sample_mask, tiles_touching
from swathmill.tiles.step import OutputSpec, StepError
from swathmill.tiles.store import decode, scale_offset

M64 = (1 << 64) - 1


def _splitmix64_next(state: int) -> int:
    """One output of SplitMix64 from ``state`` in plain Python integers (Steele, Lea & Flood 2014;
    the reference C code of splitmix64.c by S. Vigna; constants from memory)."""
    x = (state + 0x9E3779B97F4A7C15) & M64
    z = ((x ^ (x >> 30)) * 0xBF58476D1CE4E5B9) & M64
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & M64
    return z ^ (z >> 31)


def test_window_contains_matches_numpy_slicing(rng):
    win = Window(3, 5, 4, 7)
    rows = rng.integers(-2, 12, 500)
    cols = rng.integers(-2, 15, 500)
    mask = np.zeros((12, 15), bool)
    mask[win.slices] = True  # numpy slicing is the reference
    inside = (rows >= 0) & (cols >= 0)
    expected = np.zeros(500, bool)
    expected[inside] = mask[rows[inside], cols[inside]]
    np.testing.assert_array_equal(win.contains(rows, cols), expected)
    assert win.contains(3, 5) and not win.contains(7, 5) and not win.contains(3, 12)
    assert Window(0, 0, 0, 4).contains(np.array([0]), np.array([0])).tolist() == [False]


def test_pixel_hash_is_splitmix64_for_every_seed():
    # the first SplitMix64 output of state 0 is 0xE220A8397B1DCDAF (splitmix64.c; from memory)
    assert int(pixel_hash(0, 0, 0)) == 0xE220A8397B1DCDAF
    for seed in (0, 1, 12345, 2**32 - 1, 2**32, 2**32 + 1, 2**40 + 7, 2**63, -1):
        for r, c in ((0, 0), (1, 0), (0, 1), (7, 123456), (2**20, 2**31 - 1)):
            state = ((r << 32) ^ c ^ ((seed * 0x9E3779B97F4A7C15) % 2**64)) & M64
            assert int(pixel_hash(r, c, seed)) == _splitmix64_next(state), (seed, r, c)


def test_pixel_sample_mask_separates_seeds_at_and_above_2_32():
    rows, cols = np.arange(64)[:, None], np.arange(64)[None, :]
    a = pixel_sample_mask(rows, cols, 0, 0.5)
    b = pixel_sample_mask(rows, cols, 2**32, 0.5)
    c = pixel_sample_mask(rows, cols, 2**33 + 3, 0.5)
    assert not np.array_equal(a, b) and not np.array_equal(b, c)
    # a Bernoulli(0.5) sample of 4096 pixels: within 5 standard deviations (32 pixels each) of 2048
    for m in (a, b, c):
        assert abs(int(m.sum()) - 2048) < 5 * 32
    assert pixel_sample_mask(rows, cols, 2**32, 1.0).all()


def test_pixel_sample_mask_keeps_the_earlier_samples_below_2_32():
    """Below 2**32 the mosaic's sample (which cut seeds to 32 bits) and the MNF's are unchanged."""
    rows, cols = np.arange(40, dtype=np.int64), np.arange(100, 160, dtype=np.int64)

    def old_mosaic(rows, cols, rate, seed):  # the mosaic's former code, for the record
        with np.errstate(over="ignore"):
            r = rows.astype(np.uint64)[:, None]
            c = cols.astype(np.uint64)[None, :]
            z = (r << np.uint64(32)) ^ c ^ (np.uint64(seed & 0xFFFFFFFF) * np.uint64(0x9E3779B97F4A7C15))
            z = z + np.uint64(0x9E3779B97F4A7C15)
            z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
            z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
            z = z ^ (z >> np.uint64(31))
        return (z >> np.uint64(11)).astype(np.float64) * (1.0 / (1 << 53)) < rate

    from swathmill.workflows.methods.mosaic import sample_mask

    for seed in (0, 1, 7919 * 2 + 3, 2**31, 2**32 - 1):
        np.testing.assert_array_equal(sample_mask(rows, cols, 0.3, seed), old_mosaic(rows, cols, 0.3, seed))
    # at 2**32 the old code fell back to seed 0; the shared hash does not
    assert np.array_equal(old_mosaic(rows, cols, 0.3, 2**32), old_mosaic(rows, cols, 0.3, 0))
    assert not np.array_equal(sample_mask(rows, cols, 0.3, 2**32), sample_mask(rows, cols, 0.3, 0))


@pytest.mark.filterwarnings("ignore::PendingDeprecationWarning")  # rasterio's own use of Affine *
def test_tiles_touching_matches_rasterio_window_bounds():
    grid = Grid(50, 70, Affine(5.0, 0, 500000.0, 0, -5.0, 4100000.0), "EPSG:32612")
    tiling = Tiling(grid, 16)
    shape = shapely.Polygon([(500100, 4099900), (500230, 4099850), (500150, 4099760)])
    got = tiles_touching(list(tiling), shape, grid)
    # the reference: each core's bounds from rasterio.windows.bounds, intersected with shapely
    expected = [t for t in tiling if shape.intersects(shapely.box(*rio_bounds(
        RioWindow(t.core.col, t.core.row, t.core.cols, t.core.rows), grid.transform)))]
    assert [t.index for t in got] == [t.index for t in expected] and 0 < len(got) < len(tiling)
    # pixel space with y scaled (the mosaic's overlap shapes): the same tiles
    inv = ~grid.transform
    px = shapely.affinity.affine_transform(shape, [inv.a, inv.b, inv.d, inv.e, inv.c, inv.f])
    assert [t.index for t in tiles_touching(tiling, [px], Affine.identity())] == [t.index for t in expected]
    assert tiles_touching(tiling, [], grid) == []


def test_resolve_joins_relative_paths_only(tmp_path):
    assert resolve(tmp_path, "a/b.csv") == tmp_path / "a" / "b.csv"
    assert resolve(tmp_path, tmp_path / "x.tif") == tmp_path / "x.tif"
    assert resolve(None, "rel.tif").as_posix() == "rel.tif"
    assert str(resolve(tmp_path, "~/f.csv")) == os.path.expanduser("~/f.csv")  # os.path is the reference


def test_scale_offset_and_decode_follow_cf():
    spec = OutputSpec(bands=("a",), dtype="int16", nodata=-9999, attrs={"scale_factor": 1e-4, "add_offset": 0.0})
    assert scale_offset(spec) == (1e-4, None)
    raw = np.array([[[-9999, 0, 5000]]], dtype=np.int16)
    # CF conventions 1.11, section 8.1: unpacked = packed * scale_factor + add_offset
    np.testing.assert_allclose(decode(raw, spec)[0, 0], [np.nan, 0.0, 0.5], rtol=1e-6)
    spec2 = OutputSpec(bands=("a",), dtype="uint8", nodata=0, attrs={"scale_factor": 2, "add_offset": 10})
    assert scale_offset(spec2) == (2.0, 10.0)
    assert scale_offset(OutputSpec(bands=("a",), dtype="float32", nodata=float("nan"))) == (None, None)


def test_palette_is_okabe_ito_then_tol_muted():
    # Okabe & Ito (2008) orange and sky blue; Tol (2021) muted indigo (from memory)
    assert hex_to_rgb(PALETTE_HEX[0]) == (230, 159, 0) and hex_to_rgb("#56B4E9") == (86, 180, 233)
    assert hex_to_rgb("332288") == (51, 34, 136)
    colors = default_class_colors(20)
    assert len(colors) == 20 and len(set(colors[:16])) == 16 and colors[16] == colors[0]
    with pytest.raises(ValueError, match="six hexadecimal"):
        hex_to_rgb("12345")
    with pytest.raises(ValueError, match="six hexadecimal"):
        hex_to_rgb("#GG0000")


def test_ops_parameters_hold_their_bounds():
    with pytest.raises(StepError, match="odd number"):
        FilterParams(size=4)
    with pytest.raises(StepError, match="needs n_classes"):
        ModalFilterParams(size=3)
    with pytest.raises(StepError, match="dtype"):
        BandTransformParams(dtype="nonsense")
    assert BandTransformParams(bands=["b1", "b2"]).bands == ("b1", "b2")
    step = mean_filter_step("smooth", "src/refl", size=5)
    assert step.params == FilterParams(size=5) and step.halo == 2


def test_one_caution_text_says_what_the_project_rules_require():
    from swathmill.workflows.caution import CAUTION

    # the project's rules: products are estimates, confirmed in the field, under local rules and licensed practice
    for words in ("estimate", "in the field", "local rules", "licensed"):
        assert words in CAUTION
