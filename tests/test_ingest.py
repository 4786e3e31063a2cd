"""Ingest of flight lines: wavelengths and units, the target grid, footprints, and clear errors."""
from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import rasterio
import shapely
from affine import Affine

from swathmill.tiles.grid import Window
from swathmill.workflows.inputs.ingest import (
    IngestError,
    bad_band_mask,
    band_metadata_wavelengths,
    edge_distance,
    footprint_to_grid,
    footprints_geojson,
    inspect_line,
    read_wavelength_table,
    segments_of,
    target_grid,
    to_nanometres,
)
from swathmill.workflows.methods.mosaic import MosaicConfig, build_mosaic_step, plan_mosaic

CRS = "EPSG:32612"


def write_line(path: Path, data: np.ndarray, transform: Affine, *, crs: str | None = CRS, nodata: float | None = -9999,
               wavelengths: np.ndarray | None = None, fwhm: np.ndarray | None = None, unit: str | None = None,
               descriptions: list[str] | None = None) -> Path:
    nb, h, w = data.shape
    prof = {"driver": "GTiff", "width": w, "height": h, "count": nb, "dtype": str(data.dtype), "transform": transform}
    if crs is not None:
        prof["crs"] = crs
    if nodata is not None:
        prof["nodata"] = nodata
    with rasterio.open(path, "w", **prof) as ds:
        ds.write(data)
        if unit:
            ds.update_tags(wavelength_units=unit)
        for b in range(nb):
            if wavelengths is not None:
                ds.update_tags(b + 1, wavelength=repr(float(wavelengths[b])))
            if fwhm is not None:
                ds.update_tags(b + 1, fwhm=repr(float(fwhm[b])))
            if descriptions is not None:
                ds.set_band_description(b + 1, descriptions[b])
    return path


def cube(rng: np.random.Generator, nb: int = 6, h: int = 20, w: int = 30) -> np.ndarray:
    return rng.integers(300, 6000, size=(nb, h, w)).astype(np.int16)


WL = np.array([450.0, 650.0, 860.0, 1250.0, 1650.0, 2200.0])


# --------------------------------------------------------------------------------- wavelengths


def test_micrometres_are_detected_and_converted():
    nm, unit = to_nanometres([0.45, 0.65, 2.2])
    assert unit == "um" and np.allclose(nm, [450, 650, 2200])
    nm, unit = to_nanometres([450, 650, 2200])
    assert unit == "nm" and np.allclose(nm, [450, 650, 2200])
    nm, unit = to_nanometres([450, 650], "um")  # an explicit unit wins over the guess
    assert unit == "um" and np.allclose(nm, [450000, 650000])


def test_wavelength_table_units_and_fwhm(tmp_path):
    p = tmp_path / "wl.csv"
    p.write_text("band,wavelength_um,fwhm_um\n1,0.45,0.010\n2,0.65,0.011\n3,2.2,\n")
    wl, fw = read_wavelength_table(p)
    assert np.allclose(wl, [450, 650, 2200])
    assert np.allclose(fw[:2], [10, 11]) and np.isnan(fw[2])
    q = tmp_path / "wl2.csv"
    q.write_text("wavelength,fwhm\n0.45,0.01\n0.65,0.01\n")
    wl, fw = read_wavelength_table(q)  # no unit: values below 30 are micrometres
    assert np.allclose(wl, [450, 650]) and np.allclose(fw, [10, 10])


def test_band_tags_descriptions_and_netcdf_dimension(tmp_path, rng):
    data = cube(rng)
    p = write_line(tmp_path / "a.tif", data, Affine(5, 0, 500000, 0, -5, 4000000), wavelengths=WL / 1000, unit="um",
                   fwhm=np.full(6, 0.012))
    with rasterio.open(p) as ds:
        wl, fw, src = band_metadata_wavelengths(ds)
    assert np.allclose(wl, WL) and np.allclose(fw, 12) and src == "band tags"
    q = write_line(tmp_path / "b.tif", data, Affine(5, 0, 500000, 0, -5, 4000000),
                   descriptions=[f"b{i + 1:03d} ({w:.1f} nm)" for i, w in enumerate(WL)])
    with rasterio.open(q) as ds:
        wl, fw, src = band_metadata_wavelengths(ds)
    assert np.allclose(wl, WL) and np.all(np.isnan(fw)) and src == "band descriptions"
    r = write_line(tmp_path / "c.tif", data, Affine(5, 0, 500000, 0, -5, 4000000),
                   descriptions=[f"b{i + 1:03d}" for i in range(6)])  # band names only: no wavelengths
    with rasterio.open(r) as ds:
        assert band_metadata_wavelengths(ds) is None


def test_netcdf_line_reads_like_geotiff(tmp_path, rng):
    """A CF NetCDF written by xarray (scipy backend, NetCDF-3) opens through GDAL with its wavelengths."""
    xr = pytest.importorskip("xarray")
    pytest.importorskip("rioxarray")
    data = cube(rng)
    data[:, :, :4] = -9999
    t = Affine(5, 0, 500000, 0, -5, 4000000)
    tif = write_line(tmp_path / "line.tif", data, t, wavelengths=WL)
    nb, h, w = data.shape
    x = t.c + 5 * (np.arange(w) + 0.5)
    y = t.f - 5 * (np.arange(h) + 0.5)
    da = xr.DataArray(data, dims=("wavelength", "y", "x"), coords={"wavelength": WL, "x": x, "y": y},
                      name="reflectance")
    da.attrs["_FillValue"] = -9999
    da = da.rio.write_crs(CRS).rio.write_transform(t)
    da["x"].attrs.update(standard_name="projection_x_coordinate", units="m")
    da["y"].attrs.update(standard_name="projection_y_coordinate", units="m")
    nc = tmp_path / "line.nc"
    da.to_dataset().to_netcdf(nc, engine="scipy")
    a = inspect_line(tif)
    b = inspect_line(nc)
    assert np.allclose(a.wavelength, b.wavelength) and a.valid_pixels == b.valid_pixels
    assert a.footprint.equals(b.footprint)
    # a GDAL dataset name (driver:"file":variable) in the config reaches GDAL unchanged
    plan = plan_mosaic(MosaicConfig(lines=[f'NETCDF:"{nc}":reflectance'], brightness_matching=False))
    assert plan.lines[0].name == "line.nc_reflectance" and plan.lines[0].fingerprint
    assert plan.lines[0].path == f'NETCDF:"{nc}":reflectance'
    from swathmill.tiles.grid import Tiling
    from swathmill.workflows.inputs.ingest import read_lines

    got = []
    for line in (f'NETCDF:"{nc}":reflectance', str(tif)):
        step = build_mosaic_step(MosaicConfig(lines=[line], brightness_matching=False))
        tile = Tiling(step.grid, 4096)[0, 0]
        data, valid = read_lines(step.grid, tile, step.params, step.static)
        got.append((data["line_1"], valid))
    np.testing.assert_array_equal(got[0][0], got[1][0])  # the NetCDF line reads as the GeoTIFF one
    np.testing.assert_array_equal(got[0][1], got[1][1])


def test_bad_band_windows_are_closed_intervals():
    wl = np.array([1300.0, 1340.0, 1400.0, 1460.0, 1500.0, 1790.0, 1960.0, 2000.0])
    bad = bad_band_mask(wl, [(1340, 1460), (1790, 1960)])
    assert bad.tolist() == [False, True, True, True, False, True, True, False]


# --------------------------------------------------------------------------------- grid


def test_target_grid_defaults_first_crs_finest_resolution_union_snapped(tmp_path, rng):
    a = write_line(tmp_path / "a.tif", cube(rng, h=20, w=30), Affine(10, 0, 500003, 0, -10, 4000007), wavelengths=WL)
    b = write_line(tmp_path / "b.tif", cube(rng, h=40, w=40), Affine(5, 0, 500251, 0, -5, 4000102), wavelengths=WL)
    lines = [inspect_line(a, number=1), inspect_line(b, number=2)]
    g = target_grid(lines)
    assert g.crs == CRS and g.res == (5.0, 5.0)
    left, bottom, right, top = g.bounds
    # union of the two rasters (all pixels valid), snapped outwards to multiples of 5 m
    assert left == 500000.0 and right == math.ceil((500251 + 200) / 5) * 5
    assert top == math.ceil(4000102 / 5) * 5 and bottom == math.floor((4000007 - 200) / 5) * 5
    for v in (left, bottom, right, top):
        assert v % 5 == 0
    # explicit CRS and resolution
    g2 = target_grid(lines, crs="EPSG:32613", resolution=7.0)
    assert g2.crs == "EPSG:32613" and g2.res == (7.0, 7.0) and g2.bounds[0] % 7 == 0


def test_footprint_and_edge_distance_against_shapely(tmp_path, rng):
    """Distances from pixel centres to a diagonal swath's edge, checked with shapely's own distance."""
    h, w = 60, 50
    data = cube(rng, h=h, w=w)
    r = np.arange(h)[:, None] + 0.5
    c = np.arange(w)[None, :] + 0.5
    swath = np.abs(c - (25 + 0.3 * (r - 30))) <= 12
    data[:, ~swath] = -9999
    t = Affine(5, 0, 500000, 0, -5, 4000000)
    p = write_line(tmp_path / "diag.tif", data, t, wavelengths=WL)
    ln = inspect_line(p)
    assert ln.valid_pixels == int(swath.sum())
    g = target_grid([ln])
    fp = footprint_to_grid(ln, g)
    seg = segments_of(fp)
    d = edge_distance(seg, g.full)
    yy, xx = np.mgrid[0:g.rows, 0:g.cols]
    pts = shapely.points(xx.ravel() + 0.5, yy.ravel() + 0.5)
    ref = shapely.distance(pts, shapely.boundary(fp)).reshape(g.shape)  # shapely (GEOS) as the oracle
    np.testing.assert_allclose(d, ref, rtol=0, atol=1e-4)
    # the footprint is within half a pixel of the valid pixels (simplified by half a pixel)
    inside = shapely.contains_xy(fp, xx.ravel() + 0.5, yy.ravel() + 0.5).reshape(g.shape)
    c0, r0 = int(round((g.transform.c - t.c) / 5)), int(round((t.f - g.transform.f) / 5))
    assert g.rows == h and g.cols < w  # the grid is the valid data's extent, snapped
    mism = inside != swath[r0:r0 + g.rows, c0:c0 + g.cols]
    assert np.all(ref[mism] <= 0.5 + 1e-9)
    # tile-independence: any window equals the same cut of the whole
    for win in (Window(0, 0, 17, 13), Window(20, g.cols - 19, 17, 19), Window(g.rows - 17, 7, 17, 13)):
        np.testing.assert_array_equal(edge_distance(seg, win), d[win.slices])


def test_footprints_geojson_is_lon_lat_and_contains_the_line(tmp_path, rng):
    t = Affine(5, 0, 512000, 0, -5, 4310000)
    p = write_line(tmp_path / "a.tif", cube(rng), t, wavelengths=WL)
    ln = inspect_line(p)
    doc = footprints_geojson([ln], target_grid([ln]))
    json.dumps(doc)
    f = doc["features"][0]
    assert f["properties"]["line"] == 1 and f["properties"]["file"] == "a.tif"
    geom = shapely.geometry.shape(f["geometry"])
    from rasterio.warp import transform as wt

    lon, lat = wt(CRS, "EPSG:4326", [512000 + 75.0], [4310000 - 50.0])
    assert geom.contains(shapely.Point(lon[0], lat[0]))
    assert -180 <= geom.bounds[0] <= 180 and -90 <= geom.bounds[1] <= 90
    assert f["properties"]["area"] == pytest.approx(30 * 20 * 25.0)


# --------------------------------------------------------------------------------- errors


def _cfg(paths, **kw):
    return MosaicConfig(lines=[str(p) for p in paths], **kw)


def test_error_line_without_crs(tmp_path, rng):
    p = write_line(tmp_path / "nocrs.tif", cube(rng), Affine(5, 0, 500000, 0, -5, 4000000), crs=None, wavelengths=WL)
    with pytest.raises(IngestError, match=r"'nocrs.tif' has no CRS"):
        build_mosaic_step(_cfg([p]))


def test_error_unreadable_file(tmp_path):
    p = tmp_path / "broken.tif"
    p.write_bytes(b"this is not a raster at all" * 10)
    with pytest.raises(IngestError, match=r"'broken.tif'.*cannot be opened"):
        build_mosaic_step(_cfg([p]))
    with pytest.raises(IngestError, match=r"'missing.tif'.*cannot be opened"):
        build_mosaic_step(_cfg([tmp_path / "missing.tif"]))


def test_error_all_nodata_line(tmp_path, rng):
    a = write_line(tmp_path / "good.tif", cube(rng), Affine(5, 0, 500000, 0, -5, 4000000), wavelengths=WL)
    empty = np.full((6, 20, 30), -9999, dtype=np.int16)
    b = write_line(tmp_path / "empty.tif", empty, Affine(5, 0, 500100, 0, -5, 4000000), wavelengths=WL)
    with pytest.raises(IngestError, match=r"'empty.tif' is all nodata"):
        build_mosaic_step(_cfg([a, b]))


def test_error_lines_do_not_overlap_grid(tmp_path, rng):
    a = write_line(tmp_path / "a.tif", cube(rng), Affine(5, 0, 500000, 0, -5, 4000000), wavelengths=WL)
    b = write_line(tmp_path / "far.tif", cube(rng), Affine(5, 0, 600000, 0, -5, 4000000), wavelengths=WL)
    with pytest.raises(IngestError, match=r"'far.tif' do not overlap the target grid"):
        build_mosaic_step(_cfg([a, b], bounds=(500000, 3999900, 500150, 4000000)))


def test_error_band_count_mismatch_when_refusing(tmp_path, rng):
    a = write_line(tmp_path / "a.tif", cube(rng), Affine(5, 0, 500000, 0, -5, 4000000), wavelengths=WL)
    b = write_line(tmp_path / "five.tif", cube(rng, nb=5), Affine(5, 0, 500050, 0, -5, 4000000), wavelengths=WL[:5])
    with pytest.raises(IngestError, match=r"'five.tif' has 5 bands but the reference line 'a.tif' has 6"):
        build_mosaic_step(_cfg([a, b], on_mismatch="refuse"))
    # shifted centres beyond the tolerance are refused too, naming the band
    c = write_line(tmp_path / "shift.tif", cube(rng), Affine(5, 0, 500050, 0, -5, 4000000), wavelengths=WL + 4)
    with pytest.raises(IngestError, match=r"'shift.tif': band 1 is at 454 nm"):
        build_mosaic_step(_cfg([a, c], on_mismatch="refuse"))


def test_error_decreasing_wavelengths(tmp_path, rng):
    wl = WL.copy()
    wl[3], wl[4] = wl[4], wl[3]
    p = write_line(tmp_path / "swap.tif", cube(rng), Affine(5, 0, 500000, 0, -5, 4000000), wavelengths=wl)
    with pytest.raises(IngestError, match=r"'swap.tif': wavelengths must increase.*band 5 is at 1250 nm"):
        build_mosaic_step(_cfg([p]))


def test_error_sidecar_length_mismatch(tmp_path, rng):
    p = write_line(tmp_path / "a.tif", cube(rng), Affine(5, 0, 500000, 0, -5, 4000000))
    table = tmp_path / "bands.csv"
    table.write_text("wavelength_nm\n" + "\n".join(str(v) for v in WL[:5]) + "\n")
    with pytest.raises(IngestError, match=r"'.*bands.csv' has 5 rows but flight line 'a.tif' has 6 bands"):
        build_mosaic_step(_cfg([p], wavelength_table="bands.csv"), base_dir=tmp_path)
    table.write_text("wavelength_nm\n" + "\n".join(str(v) for v in WL) + "\n")
    step = build_mosaic_step(_cfg([p], wavelength_table="bands.csv"), base_dir=tmp_path)
    assert step.resolve_outputs({}, None)["reflectance"].coords["wavelength"] == tuple(WL)


def test_error_no_wavelengths_and_unscaled_data(tmp_path, rng):
    p = write_line(tmp_path / "plain.tif", cube(rng), Affine(5, 0, 500000, 0, -5, 4000000))
    with pytest.raises(IngestError, match=r"'plain.tif' carries no wavelengths"):
        build_mosaic_step(_cfg([p]))
    q = write_line(tmp_path / "q.tif", cube(rng), Affine(5, 0, 500000, 0, -5, 4000000), wavelengths=WL)
    with pytest.raises(IngestError, match=r"'q.tif': band 4 has a median of .* Set the scale factor"):
        build_mosaic_step(_cfg([q], scale_factor=1.0))


def test_bad_bands_are_dropped_from_the_cube(tmp_path, rng):
    wl = np.linspace(1200, 2000, 6)  # 1200, 1360, 1520, 1680, 1840, 2000
    p = write_line(tmp_path / "a.tif", cube(rng), Affine(5, 0, 500000, 0, -5, 4000000), wavelengths=wl)
    plan = plan_mosaic(_cfg([p], bad_bands=[(1340, 1460), (1790, 1960)]))
    assert np.allclose(plan.wavelength, [1200, 1520, 1680, 2000])
    assert plan.line_params[0].bands == (1, 3, 4, 6)
    # bands keep the reference line's numbers and their centres (no renumbering after the drop)
    assert plan.band_names == ("b001 (1200.0 nm)", "b003 (1520.0 nm)", "b004 (1680.0 nm)", "b006 (2000.0 nm)")
    spec = build_mosaic_step(_cfg([p], bad_bands=[(1340, 1460), (1790, 1960)])).resolve_outputs({}, None)["reflectance"]
    assert spec.coords["source_band"] == (1.0, 3.0, 4.0, 6.0)
    assert spec.attrs["units"] == "1" and spec.attrs["wavelength_units"] == "nm"
