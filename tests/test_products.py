"""Products keep their bands' identity, carry units and acquisition times, and stores open cleanly in xarray."""
from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pystac
import pytest
import rasterio
import rioxarray  # noqa: F401  (registers the .rio accessor)
import xarray as xr
from affine import Affine

from swathmill.tiles.executors import LocalExecutor
from swathmill.tiles.ops import mean_filter_step
from swathmill.tiles.run import Run, RunOptions
from swathmill.tiles.stac import EO_URI, stac_collection, validate_item_offline
from swathmill.tiles.store import open_dataset
from swathmill.workflows.inputs.ingest import IngestError, acquisition_time, band_metadata_wavelengths
from swathmill.workflows.methods.mosaic import MosaicConfig, build_mosaic_step

CRS = "EPSG:32612"
#: 12 bands across the two usual water-vapour windows (common practice: 1340-1460 and 1790-1960 nm)
WL = np.array([450.0, 650.0, 860.0, 1050.0, 1250.0, 1350.9, 1400.0, 1469.8, 1650.0, 1850.0, 2200.0, 2350.0])
FWHM = np.linspace(9.0, 11.0, WL.size)
BAD = [(1340.0, 1460.0), (1790.0, 1960.0)]
KEPT = [i for i, w in enumerate(WL) if not any(lo <= w <= hi for lo, hi in BAD)]


def write_line(path: Path, col0: int, rng: np.random.Generator, *, when: str | None = None,
               end: str | None = None, hole: bool = False) -> Path:
    """A 32 x 40 int16 line (reflectance x 1e4) whose bands are described the way many sensors' files are."""
    data = rng.integers(500, 5000, size=(WL.size, 32, 40)).astype(np.int16)
    data[:, :, :2] = -9999
    if hole:
        data[:, 10:14, 5:8] = -9999  # a gap inside the swath (grid columns 3-5: the grid starts at column 2)
    prof = {"driver": "GTiff", "width": 40, "height": 32, "count": WL.size, "dtype": "int16", "crs": CRS,
            "nodata": -9999, "transform": Affine(5, 0, 500000 + 5 * col0, 0, -5, 4000000)}
    with rasterio.open(path, "w", **prof) as ds:
        ds.write(data)
        for b in range(WL.size):
            ds.set_band_description(b + 1, f"b{b + 1:03d} ({WL[b]:.1f} nm)")
            ds.update_tags(b + 1, wavelength=repr(float(WL[b])), fwhm=repr(float(FWHM[b])))
        if when is not None:
            ds.update_tags(ACQUISITION_TIME=when)
        if end is not None:
            ds.update_tags(acquisition_end_time=end)
    return path


def run_mosaic(tmp: Path, lines: list[Path], **over) -> Path:
    cfg = MosaicConfig(lines=[str(p) for p in lines], bad_bands=BAD, brightness_matching=False, **over)
    step = build_mosaic_step(cfg)
    smooth = mean_filter_step("smooth", "mosaic/reflectance", size=3)
    run_dir = tmp / "run"
    with Run(run_dir, RunOptions(tile=32, chunk=16)) as run:
        result = run.execute([step, smooth], LocalExecutor())
    assert result.ok, result
    return run_dir


@pytest.fixture(scope="module")
def mosaic_run(tmp_path_factory) -> Path:
    tmp = tmp_path_factory.mktemp("products")
    rng = np.random.default_rng(12)
    a = write_line(tmp / "a.tif", 0, rng, when="2024-06-14T17:42:00Z", hole=True)
    b = write_line(tmp / "b.tif", 30, rng, when="2024-06-14T18:05:30+00:00", end="2024-06-14T18:09:00Z")
    return run_mosaic(tmp, [a, b])


def test_band_names_and_wavelengths_of_a_product_equal_the_inputs_after_bad_band_removal(mosaic_run, tmp_path):
    with rasterio.open(mosaic_run.parent / "a.tif") as src:
        in_desc = [src.descriptions[i] for i in KEPT]
        in_tags = [src.tags(i + 1) for i in KEPT]
    cog = mosaic_run / "products" / "mosaic__reflectance.tif"
    with rasterio.open(cog) as ds:
        assert ds.count == len(KEPT) == 9
        # the band after the first water-vapour window is the input's band 8 at 1469.8 nm, not a renumbered b006
        assert list(ds.descriptions) == in_desc
        assert ds.descriptions[5] == "b008 (1469.8 nm)"
        for b in range(ds.count):
            tags = ds.tags(b + 1)
            assert float(tags["wavelength"]) == float(in_tags[b]["wavelength"])
            assert float(tags["fwhm"]) == float(in_tags[b]["fwhm"])
            assert int(float(tags["source_band"])) == KEPT[b] + 1
            assert tags["wavelength_units"] == "nm"
        assert ds.units == ("1",) * ds.count
        # the product reads back as a flight line with the same wavelengths (the ingest's own parser)
        wl, fw, _ = band_metadata_wavelengths(ds)
        np.testing.assert_allclose(wl, WL[KEPT])
        np.testing.assert_allclose(fw, FWHM[KEPT])
    # the store's wavelength coordinate, and a step downstream keeps names and wavelengths
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ds = xr.open_zarr(mosaic_run / "stores" / "mosaic.zarr")
        sm = xr.open_zarr(mosaic_run / "stores" / "smooth.zarr")
    assert [str(v) for v in ds["band"].values] == in_desc
    np.testing.assert_array_equal(ds["wavelength"].values, WL[KEPT])
    assert ds["wavelength"].attrs["units"] == "nm"
    assert [str(v) for v in sm["band"].values] == in_desc
    np.testing.assert_array_equal(sm["wavelength"].values, WL[KEPT])
    # eo extension v2.0.0: band centre and FWHM in micrometres
    item = json.loads((mosaic_run / "products" / "mosaic__reflectance.tif.json").read_text())
    assert EO_URI in item["stac_extensions"]
    bands = item["assets"]["data"]["bands"]
    assert [b["name"] for b in bands] == in_desc
    np.testing.assert_allclose([b["eo:center_wavelength"] for b in bands], WL[KEPT] / 1000)
    np.testing.assert_allclose([b["eo:full_width_half_max"] for b in bands], FWHM[KEPT] / 1000)


def test_store_opens_in_xarray_without_warnings_with_float32_and_nodata(mosaic_run):
    path = mosaic_run / "stores" / "mosaic.zarr"
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ds = xr.open_zarr(path)
        refl = ds["reflectance"]
        assert refl.rio.crs is not None and refl.rio.crs.to_epsg() == 32612
        # the stored nodata is visible to rioxarray, and masked to NaN (CF _FillValue, read by xarray)
        assert refl.rio.encoded_nodata == -9999
        valid = ds["valid"].values.astype(bool)
        assert (~valid).sum() == 12  # the gap of line a, which line b does not reach
        values = refl.isel(band=0).values
        assert np.array_equal(np.isnan(values), ~valid)
        typed = open_dataset(path)
        r32 = typed["reflectance"]
        assert r32.dtype == np.float32 and r32.rio.encoded_nodata == -9999
    with rasterio.open(mosaic_run.parent / "a.tif") as src:
        raw = src.read(KEPT[0] + 1, window=rasterio.windows.Window(2, 0, 5, 3))
    # decoded: stored int16 * scale_factor (CF conventions 1.11, section 8.1), rounded to float32 (the
    # line's pixels: nearest neighbour on the same grid)
    got = r32.isel(band=0, y=slice(0, 3), x=slice(0, 5)).values
    np.testing.assert_array_equal(got, (raw.astype(np.float64) * 1e-4).astype(np.float32))
    # the float store of the filter step opens quietly too
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        sm = xr.open_zarr(mosaic_run / "stores" / "smooth.zarr")
        assert sm["output"].dtype == np.float32 and np.isnan(sm["output"].rio.encoded_nodata)


def test_stac_datetime_is_the_acquisition_range_of_the_lines(mosaic_run):
    products = mosaic_run / "products"
    items = {}
    for name in ("mosaic__reflectance", "mosaic__source", "smooth__output"):
        d = json.loads((products / f"{name}.tif.json").read_text())
        validate_item_offline(pystac.Item.from_dict(d))
        p = d["properties"]
        # STAC core: a range has a null datetime and start/end (STAC 1.1 item spec, common metadata)
        assert p["datetime"] is None, name
        assert p["start_datetime"] == "2024-06-14T17:42:00Z", name
        assert p["end_datetime"] == "2024-06-14T18:09:00Z", name
        assert p["swathmill:datetime_from"] == "acquisition"
        # the processing time lives in the processing fields, not in datetime
        assert p["processing:datetime"] == p["created"]
        assert p["created"] > "2025"
        items[name] = pystac.Item.from_dict(d)
        items[name].set_self_href(str(products / f"{name}.tif.json"))
    col = stac_collection(list(items.values()), products, "c", "test")
    interval = col.extent.temporal.intervals[0]
    assert [t.isoformat() for t in interval] == ["2024-06-14T17:42:00+00:00", "2024-06-14T18:09:00+00:00"]


def test_acquisition_time_from_the_config_where_lines_carry_none(tmp_path):
    rng = np.random.default_rng(3)
    a = write_line(tmp_path / "a.tif", 0, rng)
    run_dir = run_mosaic(tmp_path, [a], acquisition_time="2023-09-01T10:00:00Z")
    p = json.loads((run_dir / "products" / "mosaic__reflectance.tif.json").read_text())["properties"]
    assert p["datetime"] == "2023-09-01T10:00:00Z" and "start_datetime" not in p
    # without any known time the item says that its datetime is the processing time
    b = write_line(tmp_path / "b.tif", 0, rng)
    cfg = MosaicConfig(lines=[str(b)], bad_bands=BAD, brightness_matching=False)
    spec = build_mosaic_step(cfg).resolve_outputs({}, None)["reflectance"]
    assert "acquisition_start" not in spec.attrs


def test_acquisition_tags_and_errors():
    assert acquisition_time({"NC_GLOBAL#time_coverage_start": "2022-05-01T09:00:00",
                             "NC_GLOBAL#time_coverage_end": "2022-05-01T09:20:00"}, "x") == (
        ("2022-05-01T09:00:00Z", "2022-05-01T09:20:00Z"), "tag NC_GLOBAL#time_coverage_start")
    # TIFF's DateTime tag is when the file was written (TIFF 6.0, tag 306), not the flight
    assert acquisition_time({"TIFFTAG_DATETIME": "2025:01:01 00:00:00"}, "x") is None
    with pytest.raises(IngestError, match=r"line 'q.tif': tag 'ACQUISITION_TIME': '14/06/2024' is not an ISO 8601"):
        acquisition_time({"ACQUISITION_TIME": "14/06/2024"}, "line 'q.tif'")
    with pytest.raises(IngestError, match=r"is before its start"):
        acquisition_time({"acquisition_time": "2024-01-02", "acquisition_end_time": "2024-01-01"}, "x")
    with pytest.raises(ValueError, match=r"acquisition_time names lines \['zz'\]"):
        MosaicConfig(lines=["a.tif"], acquisition_time={"zz": "2024-01-01"})


# ------------------------------------------------------------------ a demo-like run: every output


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory) -> Path:
    """The demo's configuration (every step on) on the small invented scenario, one process, no report."""
    import yaml

    from swathmill.workflows.app.demo import demo_config
    from swathmill.workflows.app.pipeline import run_config
    from swathmill.workflows.app.scenario import generate_scenario

    root = tmp_path_factory.mktemp("demo")
    files = generate_scenario(root, size="small", seed=7)
    cfg = demo_config(files, root, "small", executor="local")
    cfg["report"] = {"enabled": False}
    cfg["engine"]["tile"] = 128  # four tiles a step: the same outputs at less scheduling cost
    path = root / "demo.yaml"
    path.write_text(yaml.safe_dump(cfg, sort_keys=False))
    assert run_config(path, plain=True) == 0
    return root / "run"


PLACEHOLDERS = ("units of the input", "unknown", "n/a", "", "input units")


@pytest.mark.slow
def test_units_on_every_output_of_a_demo_like_run(demo_run):
    stores = sorted((demo_run / "stores").glob("*.zarr"))
    assert len(stores) >= 10
    seen = 0
    for store in stores:
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # every store opens quietly (consolidated metadata)
            ds = xr.open_zarr(store)
        meta = ds.attrs["swathmill"]["outputs"]
        for name, spec in meta.items():
            if spec["kind"] == "categorical":
                # class codes have no unit; what they mean is in their class names
                assert spec["class_names"], f"{store.name}/{name}"
                continue
            units = ds[name].attrs.get("units")
            per_band = units if isinstance(units, list) else [units] * len(spec["bands"])
            assert len(per_band) == len(spec["bands"]), f"{store.name}/{name}"
            for u in per_band:
                assert isinstance(u, str) and u.strip().lower() not in PLACEHOLDERS, f"{store.name}/{name}: {u!r}"
            seen += 1
    assert seen >= 12
    # the units the issue names (UDUNITS spellings; "1" is a fraction or reflectance)
    units = {p.name: rasterio.open(p).units for p in (demo_run / "products").glob("*.tif")}
    assert set(units["unmix__abundance.tif"]) == {"1"}
    assert units["unmix__rmse.tif"] == ("1",)  # a residual of reflectance
    assert set(units["sam__angle.tif"]) == {"radian"}
    assert units["clay__quantity.tif"] == ("%",) and units["clay__uncertainty.tif"] == ("%",)
    assert set(units["mosaic__reflectance.tif"]) == {"1"} and set(units["mnf_denoised__reflectance.tif"]) == {"1"}
    for name in ("sff__scale.tif", "sff__rmse.tif", "svm__probability.tif", "mnf__components.tif"):
        if name in units:
            assert all(u for u in units[name]), name


@pytest.mark.slow
def test_demo_products_are_dated_by_the_flights(demo_run):
    import rasterio as rio

    from swathmill.workflows.app.scenario import generate_scenario  # noqa: F401  (the lines are its files)

    lines = sorted((demo_run.parent / "lines").glob("*.tif"))
    times = []
    for p in lines:
        with rio.open(p) as ds:
            times.append(ds.tags()["acquisition_time"])
    for item in (demo_run / "products").glob("*.tif.json"):
        p = json.loads(item.read_text())["properties"]
        assert (p["start_datetime"], p["end_datetime"]) == (min(times), max(times)), item.name
        assert p["datetime"] is None and p["swathmill:datetime_from"] == "acquisition"
    # the denoised cube keeps the mosaic's band names
    with rio.open(demo_run / "products" / "mnf_denoised__reflectance.tif") as a, \
            rio.open(demo_run / "products" / "mosaic__reflectance.tif") as b:
        assert a.descriptions == b.descriptions and a.descriptions[0].endswith(" nm)")
