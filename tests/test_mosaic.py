"""The mosaic step: known answers, tiled versus whole-line warping, overlap policies, brightness matching."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import rasterio
import shapely
from affine import Affine
from rasterio import features
from rasterio.enums import Resampling
from rasterio.warp import reproject

from swathmill.tiles.executors import LocalExecutor
from swathmill.tiles.run import Run, RunOptions
from swathmill.tiles.testing import read_output
from swathmill.workflows.methods.mosaic import (
    MosaicConfig,
    build_mosaic_step,
    merge_overlaps,
    pair_sums,
    plan_mosaic,
    resolve_overlaps,
    sample_mask,
    solve_brightness,
)
from swathmill.workflows.spectral.spectra import resample

CRS = "EPSG:32612"
T0 = Affine(5, 0, 500000, 0, -5, 4000000)


def write_line(path: Path, data: np.ndarray, transform: Affine, wl: np.ndarray, fwhm: np.ndarray | None = None,
               crs: str = CRS) -> Path:
    nb, h, w = data.shape
    with rasterio.open(path, "w", driver="GTiff", width=w, height=h, count=nb, dtype=str(data.dtype), crs=crs,
                       transform=transform, nodata=-9999) as ds:
        ds.write(data)
        for b in range(nb):
            ds.update_tags(b + 1, wavelength=repr(float(wl[b])))
            if fwhm is not None:
                ds.update_tags(b + 1, fwhm=repr(float(fwhm[b])))
    return path


def cut(truth: np.ndarray, mask: np.ndarray, tmp: Path, name: str, wl: np.ndarray, pad: int = 0) -> Path:
    """Write the part of ``truth`` under ``mask`` as a line whose raster is the mask's box (plus ``pad``)."""
    rr = np.flatnonzero(mask.any(axis=1))
    cc = np.flatnonzero(mask.any(axis=0))
    r0, r1 = max(rr[0] - pad, 0), min(rr[-1] + 1 + pad, mask.shape[0])
    c0, c1 = max(cc[0] - pad, 0), min(cc[-1] + 1 + pad, mask.shape[1])
    data = np.where(mask[None], truth, -9999).astype(np.int16)[:, r0:r1, c0:c1]
    return write_line(tmp / f"{name}.tif", data, T0 @ Affine.translation(c0, r0), wl)


def run_step(step, tmp: Path, tile: int, name: str = "run") -> tuple[dict[str, np.ndarray], object, Path]:
    run_dir = tmp / name
    with Run(run_dir, RunOptions(tile=tile, chunk=tile, export=False)) as run:
        result = run.execute([step], LocalExecutor())
    out = {}
    if (run_dir / "stores" / "mosaic.zarr" / "zarr.json").is_file():
        for o in ("reflectance", "source"):
            out[o] = read_output(run_dir, f"mosaic/{o}", raw=True)
    return out, result, run_dir


def outline(mask: np.ndarray) -> shapely.Geometry:
    """The exact pixel-edge outline of a mask, in pixel coordinates (x = column, y = row)."""
    polys = [shapely.geometry.shape(g) for g, v in features.shapes(mask.astype(np.uint8), mask=mask) if v == 1]
    return shapely.union_all(polys)


# --------------------------------------------------------------------------------- known answer


@pytest.fixture
def three_lines(tmp_path, rng):
    h, w, nb = 48, 64, 8
    wl = np.linspace(420, 2400, nb)
    truth = rng.integers(200, 7000, size=(nb, h, w)).astype(np.int16)
    r = np.arange(h)[:, None] + 0.5
    c = np.arange(w)[None, :] + 0.5
    m1 = np.zeros((h, w), bool)
    m1[:, :30] = True
    m2 = np.abs(c - (31 + 0.4 * (r - 24))) <= 12.3
    m3 = np.zeros((h, w), bool)
    m3[10:, 37:] = True
    m3[30:40, 60:] = False  # a bay in the footprint's edge
    paths = [cut(truth, m1, tmp_path, "east0", wl), cut(truth, m2, tmp_path, "diag", wl),
             cut(truth, m3, tmp_path, "south", wl, pad=3)]
    return truth, (m1, m2, m3), paths


@pytest.mark.parametrize("policy", ["first", "last", "nearest_centre"])
def test_known_answer_mosaic_equals_truth_and_source_follows_policy(three_lines, tmp_path, policy):
    truth, masks, paths = three_lines
    step = build_mosaic_step(MosaicConfig(lines=[str(p) for p in paths], overlap=policy, brightness_matching=False))
    out, result, _ = run_step(step, tmp_path, tile=16)
    assert result.ok
    covered = np.any(masks, axis=0)
    refl, src = out["reflectance"], out["source"][0]
    assert refl.shape == truth.shape  # the union of the footprints is the whole truth grid here
    np.testing.assert_array_equal(refl[:, covered], truth[:, covered])  # identical where covered
    assert np.all(refl[:, ~covered] == -9999) and np.all(src[~covered] == 0)
    cover = np.stack(masks)  # (3, h, w)
    if policy == "first":
        expected = np.where(covered, cover.argmax(axis=0) + 1, 0)
        np.testing.assert_array_equal(src, expected)
    elif policy == "last":
        expected = np.where(covered, 3 - cover[::-1].argmax(axis=0), 0)
        np.testing.assert_array_equal(src, expected)
    else:
        # oracle: shapely distance from each pixel centre to each line's exact pixel outline
        yy, xx = np.mgrid[0:truth.shape[1], 0:truth.shape[2]]
        pts = shapely.points(xx.ravel() + 0.5, yy.ravel() + 0.5)
        dist = np.stack([np.where(m.ravel(), shapely.distance(pts, shapely.boundary(outline(m))), -np.inf)
                         for m in masks]).reshape(3, *truth.shape[1:])
        expected = np.where(covered, dist.argmax(axis=0) + 1, 0)
        srt = np.sort(dist, axis=0)
        clear = (srt[-1] - srt[-2] > 1.0) | (cover.sum(axis=0) == 1)  # the footprint is simplified by 0.5 px
        overlap = cover.sum(axis=0) > 1
        assert (clear & overlap).sum() > 0.5 * overlap.sum()  # most overlap pixels are checked
        np.testing.assert_array_equal(src[clear], expected[clear])


def test_feather_and_ties_in_resolve_overlaps():
    a = np.full((2, 1, 4), 0.2, np.float32)
    b = np.full((2, 1, 4), 0.6, np.float32)
    a[:, 0, 3] = np.nan
    ea = np.array([[1.0, 5.0, 30.0, 2.0]], np.float32)
    eb = np.array([[9.0, 5.0, 10.0, 3.0]], np.float32)
    out, src, valid = resolve_overlaps({1: a, 2: b}, {1: ea, 2: eb}, "feather", blend_width=10.0)
    wa, wb = np.clip(ea / 10, 0, 1)[0], np.clip(eb / 10, 0, 1)[0]
    wa[3] = 0.0
    expected = (0.2 * wa + 0.6 * wb) / (wa + wb)  # weighted mean, weights rising over the blend width
    np.testing.assert_allclose(out[0, 0], expected, rtol=1e-6)
    assert src[0].tolist() == [2, 1, 1, 2] and valid.all()  # largest edge distance; tie -> lower number
    out, src, _ = resolve_overlaps({1: a, 2: b}, {1: ea, 2: eb}, "nearest_centre")
    assert src[0].tolist() == [2, 1, 1, 2]
    np.testing.assert_allclose(out[0, 0], [0.6, 0.2, 0.2, 0.6])


# --------------------------------------------------------------------------------- tiled vs whole-line warp


@pytest.mark.parametrize("resampling", ["nearest", "bilinear"])
def test_tiled_mosaic_equals_whole_line_rasterio_warp(tmp_path, rng, resampling):
    """Lines in UTM 12 N at 5 m, mosaicked in UTM 13 N at 6 m: each tile equals the whole-line warp."""
    nb, h, w = 5, 70, 50
    wl = np.linspace(450, 2300, nb)
    paths = []
    for k, (x0, y0) in enumerate([(500000, 4000000), (500160, 3999880)]):
        data = rng.integers(500, 6000, size=(nb, h, w)).astype(np.int16)
        data[:, :, :3] = -9999
        data[:, -5:, :] = -9999
        paths.append(write_line(tmp_path / f"l{k}.tif", data, Affine(5, 0, x0, 0, -5, y0), wl))
    cfg = MosaicConfig(lines=[str(p) for p in paths], crs="EPSG:32613", resolution=6.0, overlap="first",
                       resampling=resampling, brightness_matching=False)
    step = build_mosaic_step(cfg)
    grid = step.grid
    out16, res16, d16 = run_step(step, tmp_path, tile=16, name="t16")
    out48, res48, _ = run_step(step, tmp_path, tile=48, name="t48")
    assert res16.ok and res48.ok
    np.testing.assert_array_equal(out16["source"], out48["source"])
    if resampling == "nearest":
        np.testing.assert_array_equal(out16["reflectance"], out48["reflectance"])
    else:
        # GDAL's bilinear kernel is not bit-stable across warp windows even with an exact transformer
        # and a fixed scale (measured: up to ~1e-5 relative, 0.1 of a stored unit); after rounding to
        # int16 a few values differ by one unit (1e-4 reflectance) and never more.
        d = np.abs(out16["reflectance"].astype(np.int32) - out48["reflectance"])
        assert d.max() <= 1 and (d > 0).mean() < 0.02
    # oracle: plain rasterio warps of each whole line onto the same grid (exact transformer)
    warped = []
    for k, p in enumerate(paths):
        with rasterio.open(p) as ds:
            src = ds.read().astype(np.float32) * np.float32(1e-4)
            src[ds.read() == -9999] = np.nan
            dst = np.full((nb, grid.rows, grid.cols), np.nan, np.float32)
            # bilinear widens its kernel when downsampling, by a scale GDAL would otherwise guess per
            # chunk from the window's shape; both sides fix it at the resolution ratio (about 5 m / 6 m)
            lp = step.params.lines[k]
            # (UTM 13 N stretches this spot, one zone west of its meridian, by about 0.4 %; from memory)
            assert lp.xscale == pytest.approx(5 / 6, rel=1e-2) and lp.yscale == pytest.approx(5 / 6, rel=1e-2)
            reproject(src, dst, src_transform=ds.transform, src_crs=ds.crs, dst_transform=grid.transform,
                      dst_crs=grid.crs, src_nodata=np.nan, dst_nodata=np.nan, tolerance=0.0,
                      XSCALE=lp.xscale, YSCALE=lp.yscale,
                      resampling=Resampling.nearest if resampling == "nearest" else Resampling.bilinear)
        warped.append(dst)
    ok1 = np.all(np.isfinite(warped[0]), axis=0)
    ok2 = np.all(np.isfinite(warped[1]), axis=0)
    expected = np.where(ok1[None], warped[0], warped[1])
    expected_src = np.where(ok1, 1, np.where(ok2, 2, 0))
    got = out16["reflectance"].astype(np.float64) * 1e-4
    got[out16["reflectance"] == -9999] = np.nan
    np.testing.assert_array_equal(out16["source"][0], expected_src)
    both = np.isfinite(expected)
    assert both.sum() > 0.5 * expected.size
    np.testing.assert_array_equal(np.isfinite(got), both)
    if resampling == "nearest":
        np.testing.assert_array_equal(np.rint(got[both] * 1e4), np.rint(expected[both] * 1e4))
    else:  # steps of 1e-4 in the store, plus GDAL's window-dependent bilinear rounding (see above)
        np.testing.assert_allclose(got[both], expected[both], rtol=0, atol=1.5e-4)


def test_lines_on_the_grid_lattice_equal_gdal_warp(tmp_path, rng):
    """Lines on the mosaic's own pixel lattice are copied window by window: the same as GDAL's warp."""
    from swathmill.workflows.inputs.ingest import _aligned_shift, warp_window

    nb = 4
    wl = np.linspace(450, 2300, nb)
    paths = []
    for k, (c0, r0, h, w) in enumerate([(0, 0, 30, 40), (25, 12, 33, 29)]):
        data = rng.integers(-300, 9000, size=(nb, h, w)).astype(np.int16)
        data[:, :2, :] = -9999
        paths.append(write_line(tmp_path / f"g{k}.tif", data, T0 @ Affine.translation(c0, r0), wl))
    step = build_mosaic_step(MosaicConfig(lines=[str(p) for p in paths], brightness_matching=False))
    grid = step.grid
    for line in step.params.lines:
        assert _aligned_shift(line, grid) is not None  # the window-copy path is the one under test
        with rasterio.open(line.path) as ds:
            whole = np.full((nb, grid.rows, grid.cols), -9999, np.int16)
            reproject(rasterio.band(ds, list(line.bands)), whole, dst_transform=grid.transform, dst_crs=grid.crs,
                      src_nodata=-9999, dst_nodata=-9999, resampling=Resampling.nearest, tolerance=0.0)
        expected = np.where(whole == -9999, np.nan, whole.astype(np.float32) * np.float32(1e-4))
        from swathmill.tiles.grid import Tiling

        for tile in Tiling(grid, 13, 2):  # odd tiles with a halo, reaching past the line's raster
            got = warp_window(line, grid.window(tile.padded))
            if got is None:
                assert np.all(np.isnan(expected[(slice(None), *tile.padded.slices)]))
                continue
            np.testing.assert_array_equal(got, expected[(slice(None), *tile.padded.slices)])


# --------------------------------------------------------------------------------- brightness matching


def test_solve_brightness_equals_numpy_lstsq_on_the_raw_samples(rng):
    """The normal equations from pair sums equal a direct least-squares fit on the stacked samples."""
    nb, n_lines, ref = 3, 4, 2
    pairs = [(1, 2), (2, 3), (1, 3), (3, 4)]
    G = rng.uniform(0.9, 1.1, (n_lines + 1, nb))
    O = rng.uniform(-0.01, 0.01, (n_lines + 1, nb))
    samples = {}
    for i, j in pairs:
        n = 50 + 10 * i
        t = rng.uniform(0.05, 0.6, (nb, n))
        samples[(i, j)] = (G[i][:, None] * t + O[i][:, None] + rng.normal(0, 0.01, (nb, n)),
                           G[j][:, None] * t + O[j][:, None] + rng.normal(0, 0.01, (nb, n)))
    sums = {k: pair_sums(x, y) for k, (x, y) in samples.items()}
    gain, offset, unmatched = solve_brightness(sums, n_lines, ref)
    assert unmatched == []
    free = [k for k in range(1, n_lines + 1) if k != ref]
    for b in range(nb):
        rows, rhs = [], []
        for (i, j), (x, y) in samples.items():
            for p in range(x.shape[1]):
                row = np.zeros(2 * len(free))
                r = 0.0
                for line, val, sign in ((i, x[b, p], 1.0), (j, y[b, p], -1.0)):
                    if line == ref:
                        r -= sign * val  # g_ref * value moves to the right-hand side
                    else:
                        row[free.index(line)] = sign * val
                        row[len(free) + free.index(line)] = sign
                rows.append(row)
                rhs.append(r)
        sol = np.linalg.lstsq(np.array(rows), np.array(rhs), rcond=None)[0]  # numpy as the oracle
        for k in free:
            assert gain[k - 1, b] == pytest.approx(sol[free.index(k)], rel=1e-8)
            assert offset[k - 1, b] == pytest.approx(sol[len(free) + free.index(k)], abs=1e-9)
    assert np.all(gain[ref - 1] == 1) and np.all(offset[ref - 1] == 0)


def test_unconnected_line_is_left_alone(rng):
    x, y = rng.uniform(0.1, 0.5, (2, 40)), rng.uniform(0.1, 0.5, (2, 40))
    gain, offset, unmatched = solve_brightness({(1, 2): pair_sums(x, y)}, 3, 1)
    assert unmatched == [3] and np.all(gain[2] == 1) and np.all(offset[2] == 0)


def _brightness_lines(tmp_path, rng, noise: float):
    """Three lines from one smooth truth, lines 2 and 3 with known per-band gains and offsets."""
    from scipy import ndimage

    nb, h, w = 6, 64, 96
    wl = np.linspace(450, 2300, nb)
    base = np.stack([ndimage.gaussian_filter(rng.uniform(0, 1, (h, w)), 4) for _ in range(nb)])
    base = 0.08 + 0.5 * (base - base.min()) / (base.max() - base.min())
    gains = np.array([np.ones(nb), np.linspace(1.06, 1.02, nb), np.linspace(0.93, 0.96, nb)])
    offsets = np.array([np.zeros(nb), np.full(nb, 0.012), np.linspace(-0.01, 0.004, nb)])
    c = np.arange(w)[None, :] + 0.5
    masks = [np.broadcast_to(c < 40, (h, w)), np.broadcast_to((c > 28) & (c < 70), (h, w)),
             np.broadcast_to(c > 56, (h, w))]
    paths = []
    for k, m in enumerate(masks):
        obs = base * gains[k][:, None, None] + offsets[k][:, None, None]
        obs = obs + rng.normal(0, noise, obs.shape)
        paths.append(cut(np.rint(obs * 1e4).astype(np.int16), np.asarray(m), tmp_path, f"b{k + 1}", wl))
    return paths, gains, offsets, masks


def _overlap_differences(paths, masks, gain, offset) -> list[tuple[float, float]]:
    """Per overlap: (mean absolute difference, mean over bands of |mean difference|), read from the files."""
    h, w = masks[0].shape
    cubes = []
    for k, p in enumerate(paths):
        full = np.full((6, h, w), np.nan)
        with rasterio.open(p) as ds:
            a = ds.read().astype(np.float64) * 1e-4
            a[ds.read() == -9999] = np.nan
            c0 = int(round((ds.transform.c - T0.c) / 5))
            full[:, :, c0:c0 + ds.width] = a
        cubes.append(full * gain[k][:, None, None] + offset[k][:, None, None])
    out = []
    for i, j in ((0, 1), (1, 2)):
        both = np.asarray(masks[i]) & np.asarray(masks[j])
        d = cubes[i][:, both] - cubes[j][:, both]
        out.append((float(np.mean(np.abs(d))), float(np.mean(np.abs(d.mean(axis=1))))))
    return out


@pytest.mark.parametrize("noise", [0.0, 0.003])
def test_brightness_matching_recovers_gains_and_offsets(tmp_path, rng, noise):
    paths, gains, offsets, masks = _brightness_lines(tmp_path, rng, noise)
    step = build_mosaic_step(MosaicConfig(lines=[str(p) for p in paths], sample_size=3000, seed=3))
    out, result, run_dir = run_step(step, tmp_path, tile=32)
    assert result.ok and result.steps[0].fit == "fitted"
    import json

    model_json = next((run_dir / "models").glob("mosaic-*.json"))
    model = json.loads(model_json.read_text())
    with np.load(model_json.with_suffix(".npz")) as z:
        gain, offset = z["gain"], z["offset"]
    # the correction undoes the line's brightness: g_k = 1 / G_k, o_k = -O_k / G_k (line 1 is the reference)
    np.testing.assert_allclose(gain, 1.0 / gains, rtol=0.01)
    np.testing.assert_allclose(offset, -offsets / gains, atol=0.01 * 0.3)  # 1% of a mid reflectance
    if noise == 0.0:
        np.testing.assert_allclose(gain, 1.0 / gains, rtol=2e-4)  # only int16 rounding left
    before = _overlap_differences(paths, masks, np.ones_like(gain), np.zeros_like(offset))
    after = _overlap_differences(paths, masks, gain, offset)
    for (mad_b, bias_b), (mad_a, bias_a) in zip(before, after):
        assert bias_a <= 0.1 * bias_b  # the brightness mismatch over each overlap falls by >= 90%
        if noise == 0.0:
            assert mad_a <= 0.1 * mad_b  # and so does the pixel-by-pixel mean absolute difference
    assert [s["pair"] for s in model["summary"]] == [[1, 2], [2, 3]]
    assert all(s["rmsd_after"] < s["rmsd_before"] for s in model["summary"])
    # the mosaic carries the correction: line 2 pixels agree with line 1's brightness
    refl = out["reflectance"].astype(np.float64) * 1e-4
    src = out["source"][0]
    sel = src == 3
    with rasterio.open(paths[2]) as ds:
        raw = ds.read().astype(np.float64) * 1e-4
        c0 = int(round((ds.transform.c - T0.c) / 5))
    expect = raw * gain[2][:, None, None] + offset[2][:, None, None]
    got = refl[:, :, c0:c0 + raw.shape[2]]
    np.testing.assert_allclose(got[:, sel[:, c0:c0 + raw.shape[2]]], expect[:, sel[:, c0:c0 + raw.shape[2]]],
                               atol=0.6e-4)


@pytest.mark.parametrize("block", [1, 3])
def test_fit_is_the_same_for_any_tiling(tmp_path, rng, block):
    paths, *_ = _brightness_lines(tmp_path, rng, 0.003)
    size = 300 if block == 1 else 40
    step = build_mosaic_step(MosaicConfig(lines=[str(p) for p in paths], sample_size=size, seed=11,
                                          match_block=block))
    _, r1, d1 = run_step(step, tmp_path, tile=16, name="a")
    _, r2, d2 = run_step(step, tmp_path, tile=64, name="b")
    z1 = np.load(next((d1 / "models").glob("mosaic-*.npz")))
    z2 = np.load(next((d2 / "models").glob("mosaic-*.npz")))
    np.testing.assert_array_equal(z1["samples"], z2["samples"])
    np.testing.assert_allclose(z1["gain"], z2["gain"], rtol=1e-12)
    np.testing.assert_allclose(z1["offset"], z2["offset"], rtol=1e-9, atol=1e-14)
    # about sample_size per pair: binomial with 5 sd bounds (overlaps of 704 and 832 px here)
    for n, px in zip(z1["samples"], (704, 832)):
        units = px // block ** 2
        rate = min(1.0, size / units)
        assert abs(n - rate * units) <= 5 * np.sqrt(units * rate * (1 - rate)) + 1 + units * 0.1 * (block > 1)


def test_fit_tile_selection_loses_nothing(tmp_path, rng):
    """Accumulating over the selected tiles only gives the same sums as over every tile."""
    from swathmill.tiles.grid import Tiling
    from swathmill.tiles.step import Block
    from swathmill.workflows.inputs.ingest import read_lines
    from swathmill.workflows.methods.mosaic import accumulate_overlaps, select_overlap_tiles

    paths, *_ = _brightness_lines(tmp_path, rng, 0.003)
    step = build_mosaic_step(MosaicConfig(lines=[str(p) for p in paths], sample_size=200, seed=2))
    tiling = Tiling(step.grid, 16, step.fit.halo)
    tiles = list(tiling)
    chosen = select_overlap_tiles(tiles, step.params)
    assert 0 < len(chosen) < len(tiles)

    def acc(ts):
        total = None
        for t in ts:
            sub = step.grid.window(t.padded)
            data, valid = read_lines(sub, t, step.params, step.static)
            total = merge_overlaps(total, accumulate_overlaps(Block(data, valid, t, sub, step.params,
                                                                    step.static, {})))
        return total

    a, b = acc(tiles), acc(chosen)
    assert a.keys() == b.keys() == {"1-2", "2-3"}
    for k in a:
        np.testing.assert_array_equal(a[k], b[k])


def test_sample_mask_depends_only_on_global_pixel(rng):
    rows, cols = np.arange(100, 160), np.arange(30, 110)
    whole = sample_mask(rows, cols, 0.2, 5)
    part = sample_mask(rows[13:41], cols[7:66], 0.2, 5)
    np.testing.assert_array_equal(part, whole[13:41, 7:66])
    n = whole.size
    # binomial: mean 0.2 n, sd sqrt(n 0.2 0.8); 5 sd bounds
    assert abs(whole.sum() - 0.2 * n) < 5 * np.sqrt(n * 0.16)
    assert not np.array_equal(whole, sample_mask(rows, cols, 0.2, 6))


def test_merge_is_associative(rng):
    def acc(keys):
        return {k: rng.uniform(size=(6, 3)) for k in keys}

    a, b, c = acc(["1-2"]), acc(["1-2", "2-3"]), acc(["2-3"])
    left = merge_overlaps(merge_overlaps(a, b), c)
    right = merge_overlaps(a, merge_overlaps(b, c))
    assert left.keys() == right.keys()
    for k in left:
        np.testing.assert_allclose(left[k], right[k], rtol=1e-15)


# --------------------------------------------------------------------------------- spectral resampling


def test_line_with_other_bands_is_resampled_gaussian(tmp_path, rng):
    nb, h, w = 40, 12, 40
    wl = np.linspace(400, 2400, nb)
    fw = np.full(nb, 60.0)
    a = rng.integers(1000, 5000, size=(nb, h, w)).astype(np.int16)
    a[:, :, 20:] = -9999
    b_wl = np.linspace(420, 2380, 36)  # another sensor: fewer, shifted bands inside a's range
    b_fw = np.full(36, 62.0)
    b = rng.integers(1000, 5000, size=(36, h, w)).astype(np.int16)
    b[:, :, :24] = -9999
    pa = write_line(tmp_path / "a.tif", a, T0, wl, fw)
    pb = write_line(tmp_path / "b.tif", b, T0, b_wl, b_fw)
    # with a as the reference, b cannot make a's first band (400 nm lies below 420 nm): said at once
    with pytest.raises(Exception, match=r"'b.tif' cannot be resampled.*not covered"):
        build_mosaic_step(MosaicConfig(lines=[str(pa), str(pb)], brightness_matching=False))
    plan = plan_mosaic(MosaicConfig(lines=[str(pb), str(pa)], brightness_matching=False))
    assert plan.notes and "Gaussian" in plan.notes[0]
    step = build_mosaic_step(MosaicConfig(lines=[str(pb), str(pa)], brightness_matching=False))
    out, result, _ = run_step(step, tmp_path, tile=16)
    assert result.ok
    src = out["source"][0]
    refl = out["reflectance"].astype(np.float64) * 1e-4
    assert np.all(src[:, 24:] == 1) and np.all(src[:, :20] == 2) and np.all(src[:, 20:24] == 0)
    np.testing.assert_array_equal(out["reflectance"][:, :, 24:], b[:, :, 24:])
    # oracle: the spectra module's Gaussian resampling of line a's spectra to the reference bands
    spectra = np.moveaxis(a[:, :, :20].astype(np.float64) * 1e-4, 0, -1)
    expected = np.moveaxis(resample(wl, spectra, b_wl, b_fw), -1, 0)
    np.testing.assert_allclose(refl[:, :, :20], expected, rtol=0, atol=0.51e-4)


# --------------------------------------------------------------------------------- failures


def test_line_broken_after_planning_fails_its_tiles_and_records_none(tmp_path, rng):
    nb, h, w = 4, 32, 32
    wl = np.linspace(500, 2000, nb)
    a = write_line(tmp_path / "a.tif", rng.integers(100, 5000, (nb, h, w)).astype(np.int16), T0, wl)
    b = write_line(tmp_path / "b.tif", rng.integers(100, 5000, (nb, h, w)).astype(np.int16),
                   Affine(5, 0, 500000 + 5 * 32, 0, -5, 4000000), wl)
    step = build_mosaic_step(MosaicConfig(lines=[str(a), str(b)], brightness_matching=False))
    b.write_bytes(b"gone")  # the file is replaced after the plan was made
    _, result, run_dir = run_step(step, tmp_path, tile=16)
    report = result.steps[0]
    assert not result.ok and report.failed
    assert all("b.tif" in str(msg) for msg in report.failed.values())  # each failure names the file
    from swathmill.tiles.ledger import Ledger

    led = Ledger(run_dir / "ledger.sqlite")
    done = led.done("mosaic", report.key)
    led.close()
    every = {(i, j) for i in range(2) for j in range(4)}
    assert not done & set(report.failed)  # a failed tile is never recorded as finished
    assert done | set(report.failed) == every
    assert {(0, 0), (1, 0)} <= done  # tiles that do not touch line b are finished
