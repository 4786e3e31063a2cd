"""COG and STAC export: validity (rio-cogeo, pystac core schema), overviews, provenance, memory, atomicity.

No test here touches the network: an autouse fixture makes any socket connection fail.
"""
from __future__ import annotations

import json
import socket
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pystac
import pytest
import rasterio
from affine import Affine
from rasterio.warp import transform_bounds
from rio_cogeo.cogeo import cog_validate
from scipy import stats

from swathmill.tiles.cog import ExportError, overview_factors, provenance_tags, write_cog
from swathmill.tiles.palette import default_class_colors
from swathmill.tiles.stac import (
    CLASS_URI,
    PROC_URI,
    PROJ_URI,
    RASTER_URI,
    item_path,
    stac_collection,
    stac_item,
    validate_item_offline,
)
from swathmill.tiles.grid import Grid, Window
from swathmill.tiles.step import OutputSpec

ROOT = Path(__file__).resolve().parents[1]
CRS = "EPSG:32611"


@pytest.fixture(autouse=True)
def no_network(monkeypatch):
    """Any attempt to open a network connection fails the test (pystac must not fetch schemas)."""

    def refuse(*args, **kwargs):
        raise AssertionError(f"a test tried to reach the network: {args!r}")

    monkeypatch.setattr(socket.socket, "connect", refuse)
    monkeypatch.setattr(socket, "create_connection", refuse)


def grid(rows: int, cols: int) -> Grid:
    return Grid(rows, cols, Affine(2.0, 0.0, 500000.0, 0.0, -2.0, 4200000.0), CRS)


def reader(arr: np.ndarray, log: list | None = None):
    def read_window(win: Window) -> np.ndarray:
        if log is not None:
            log.append(win)
        rs, cs = win.slices
        return arr[:, rs, cs].copy()
    return read_window


def assert_cog(path: Path) -> None:
    # rio-cogeo's validator: (is_valid, errors, warnings); we require no errors and no warnings
    valid, errors, warnings = cog_validate(str(path), quiet=True)
    assert (valid, errors, warnings) == (True, [], []), (errors, warnings)


PROV = {
    "software": "swathmill",
    "software_version": "0.1.0",
    "config_hash": "c0ffee12",
    "step": "smooth",
    "step_key": "a1b2c3d4",
    "parameters": '{"size":3}',
    "inputs": '{"x":{"key":"99ff","ref":"mosaic/reflectance"}}',
    "input_fingerprints": '{"x":"99ff"}',
    "model_hash": "",
    "created": "2026-03-04T05:06:07Z",
}

CONT_SPEC = OutputSpec(
    bands=("c1", "c2", "c3"), dtype="float32", nodata=float("nan"),
    coords={"center": (1.5, 2.5, 3.5)},
    attrs={"units": "percent", "scale_factor": 0.5, "add_offset": (1.0, 2.0, 3.0)},
)
CLASS_SPEC = OutputSpec(
    bands=("class",), dtype="uint8", nodata=0, kind="categorical",
    class_names=("dry grass", "bare rock", "open water", "shrub", "road"),
    colors=((10, 20, 30), (40, 50, 60), (70, 80, 90), (100, 110, 120), (130, 140, 150)),
)


@pytest.fixture
def continuous(rng):
    a = rng.normal(0.0, 1.0, size=(3, 1000, 1200)).astype(np.float32)
    a[:, :37, :53] = np.nan  # a nodata corner (not aligned with blocks or 2x2 cells)
    a[1, 600:700, 100:300] = np.nan
    return a


@pytest.fixture
def classes(rng):
    """Class map 1000 x 1200 with classes 1, 2, 5 only (3 and 4 are named but absent), nodata 0.

    Every 2x2 cell holds a majority class (3 of 4 pixels) so that the mode is unique; the odd pixel
    is another class. Averaging would make absent values (3, 4) appear: the test can tell.
    """
    present = np.array([1, 2, 5], np.uint8)
    maj = rng.choice(present, size=(500, 600))
    odd = rng.choice(present, size=(500, 600))
    a = np.repeat(np.repeat(maj, 2, 0), 2, 1)
    pos = rng.integers(0, 4, size=(500, 600))
    r, c = np.divmod(pos, 2)
    rr, cc = np.meshgrid(np.arange(500), np.arange(600), indexing="ij")
    a[2 * rr + r, 2 * cc + c] = odd
    a[:200, :200] = 0  # unclassified / nodata corner
    return a[None]


# ------------------------------------------------------------------------------------------ COG


def test_continuous_cog_is_valid_and_lossless(tmp_path, continuous):
    out = tmp_path / "products"
    out.mkdir()
    tags = provenance_tags(PROV)
    p = write_cog(out / "cont.tif", reader(continuous), grid(1000, 1200), CONT_SPEC, tags, block=256)
    assert_cog(p)
    assert sorted(x.name for x in out.iterdir()) == ["cont.tif"]  # no temp or .aux.xml files left
    with rasterio.open(p) as src:
        assert src.profile["blockxsize"] == src.profile["blockysize"] == 256
        assert src.compression is not None
        assert src.crs.to_epsg() == 32611 and src.transform == grid(1000, 1200).transform
        assert np.isnan(src.nodata)
        assert src.descriptions == CONT_SPEC.bands
        assert src.units == ("percent",) * 3
        assert src.scales == (0.5, 0.5, 0.5) and src.offsets == (1.0, 2.0, 3.0)
        assert [src.tags(b)["center"] for b in (1, 2, 3)] == ["1.5", "2.5", "3.5"]
        # provenance tags survive the COG copy
        got = src.tags()
        for k, v in tags.items():
            assert got.get(k, "") == v  # empty values are left out (GDAL keeps no empty items)
        assert got["config_hash"] == "c0ffee12" and got["created"] == PROV["created"]
        assert json.loads(got["parameters"]) == {"size": 3}
        np.testing.assert_array_equal(src.read(), continuous)  # lossless: NaN where NaN
        assert len(src.overviews(1)) == len(overview_factors(1000, 1200, 256)) == 3


def test_continuous_overviews_are_block_averages(tmp_path, continuous):
    p = write_cog(tmp_path / "cont.tif", reader(continuous), grid(1000, 1200), CONT_SPEC, {}, block=256)
    with rasterio.open(p, overview_level=0) as ovr:
        assert ovr.shape == (500, 600)
        got = ovr.read()
    # GDAL "average" resampling at factor 2: the mean of the valid pixels of each 2x2 cell, nodata
    # where none is valid (source: GDAL average resampling; common practice)
    cells = continuous.astype(np.float64).reshape(3, 500, 2, 600, 2)
    with np.errstate(invalid="ignore"):
        with pytest.warns(RuntimeWarning):
            want = np.nanmean(cells, axis=(2, 4))
    np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-6, equal_nan=True)
    full_cells = np.isfinite(cells).all(axis=(2, 4))
    assert full_cells.sum() > 100_000 and np.isnan(want).sum() > 0
    # every level non-empty
    for lvl in range(3):
        with rasterio.open(p, overview_level=lvl) as ovr:
            assert np.isfinite(ovr.read()).all(axis=0).any()


def test_categorical_cog_colours_names_and_mode_overviews(tmp_path, classes):
    tags = provenance_tags(PROV)
    p = write_cog(tmp_path / "classes.tif", reader(classes), grid(1000, 1200), CLASS_SPEC, tags, block=256)
    assert_cog(p)
    with rasterio.open(p) as src:
        assert src.nodata == 0 and src.dtypes[0] == "uint8"
        np.testing.assert_array_equal(src.read(), classes)
        cmap = src.colormap(1)
        assert cmap[0] == (0, 0, 0, 0)
        for i, rgb in enumerate(CLASS_SPEC.colors, start=1):
            assert cmap[i] == (*rgb, 255)
        # 0 is this map's nodata (not "unclassified": a pixel outside the data is not a class outcome)
        names = {"0": "nodata", "1": "dry grass", "2": "bare rock", "3": "open water", "4": "shrub",
                 "5": "road"}
        assert json.loads(src.tags(1)["class_names"]) == names
        assert json.loads(src.tags()["class_names"]) == names
        assert src.tags()["step_key"] == PROV["step_key"]
        levels = src.overviews(1)
    assert len(levels) == 3
    with rasterio.open(p, overview_level=0) as ovr:
        lvl1 = ovr.read(1)
    # mode of each 2x2 cell (reference: scipy.stats.mode); unique by construction outside nodata
    cells = classes[0].reshape(500, 2, 600, 2).transpose(0, 2, 1, 3).reshape(500, 600, 4)
    want = stats.mode(cells, axis=2, keepdims=False).mode
    data_cells = (cells != 0).all(axis=2)
    np.testing.assert_array_equal(lvl1[data_cells], want[data_cells])
    present = set(np.unique(classes).tolist())
    assert present == {0, 1, 2, 5}
    for lvl in range(len(levels)):
        with rasterio.open(p, overview_level=lvl) as ovr:
            vals = set(np.unique(ovr.read(1)).tolist())
        assert vals <= present, f"overview {lvl} holds values {vals - present} absent from the data"
        assert vals - {0}, f"overview {lvl} is empty"


def test_default_palette_is_colour_blind_safe_set(tmp_path, classes):
    spec = OutputSpec(bands=("class",), dtype="uint8", nodata=0, kind="categorical",
                      class_names=tuple(f"k{i}" for i in range(1, 6)))
    p = write_cog(tmp_path / "c.tif", reader(classes), grid(1000, 1200), spec, {}, block=512)
    assert_cog(p)
    with rasterio.open(p) as src:
        cmap = src.colormap(1)
    # Okabe & Ito (2008) colours: orange E69F00, sky blue 56B4E9, bluish green 009E73 (from memory)
    assert [cmap[i][:3] for i in (1, 2, 3)] == [(0xE6, 0x9F, 0x00), (0x56, 0xB4, 0xE9), (0x00, 0x9E, 0x73)]
    assert cmap[0] == (0, 0, 0, 0)
    assert len(set(default_class_colors(16))) == 16


@pytest.mark.parametrize("rows,cols,block,levels", [(777, 1001, 256, 2), (300, 530, 512, 1), (100, 90, 512, 0),
                                                    (1030, 515, 512, 2)])
def test_sizes_not_multiples_of_the_block(tmp_path, rng, rows, cols, block, levels):
    a = rng.integers(-500, 500, size=(2, rows, cols)).astype(np.int16)
    a[:, : rows // 3, : cols // 4] = -9999
    spec = OutputSpec(bands=("x", "y"), dtype="int16", nodata=-9999)
    log: list[Window] = []
    p = write_cog(tmp_path / "odd.tif", reader(a, log), grid(rows, cols), spec, {"k": "v"}, block=block)
    assert_cog(p)
    # windows are at most one block and tile the grid exactly once
    assert all(w.rows <= block and w.cols <= block for w in log)
    assert sum(w.rows * w.cols for w in log) == rows * cols
    with rasterio.open(p) as src:
        np.testing.assert_array_equal(src.read(), a)
        assert len(src.overviews(1)) == levels
        assert src.nodata == -9999


def test_failure_mid_write_leaves_no_file_at_final_path(tmp_path, continuous):
    out = tmp_path / "products"
    out.mkdir()
    target = out / "cont.tif"
    calls = []

    def flaky(win: Window) -> np.ndarray:
        calls.append(win)
        if len(calls) == 7:
            raise RuntimeError("store went away")
        # the product never appears under its final name while being written
        assert not target.exists()
        rs, cs = win.slices
        return continuous[:, rs, cs]

    with pytest.raises(ExportError, match=r"cont.tif.*Window\(row=256, col=256.*store went away"):
        write_cog(target, flaky, grid(1000, 1200), CONT_SPEC, {}, block=256)
    assert not target.exists()
    assert list(out.iterdir()) == []  # temporary files removed too

    # an older product at the final path stays untouched when a rewrite fails
    write_cog(target, reader(continuous), grid(1000, 1200), CONT_SPEC, {"version": "old"}, block=256)
    before = target.read_bytes()
    calls.clear()
    with pytest.raises(ExportError):
        write_cog(target, flaky, grid(1000, 1200), CONT_SPEC, {"version": "new"}, block=256)
    assert target.read_bytes() == before
    assert [x.name for x in out.iterdir()] == ["cont.tif"]


def test_workdir_holds_the_intermediate_and_stale_temp_files_are_cleared(tmp_path, continuous):
    out, work = tmp_path / "products", tmp_path / "work"
    out.mkdir()
    work.mkdir()
    stale = out / ".cont.tif.1234-0123456789ab.part.cog"
    stale.write_bytes(b"half a file from a killed run")
    seen = []

    def spy(win: Window) -> np.ndarray:
        seen.append(sorted(x.name for x in work.iterdir()))
        rs, cs = win.slices
        return continuous[:, rs, cs]

    write_cog(out / "cont.tif", spy, grid(1000, 1200), CONT_SPEC, {}, block=256, workdir=work)
    assert all(len(s) == 1 and s[0].startswith(".cont.tif.") and s[0].endswith(".part.tif") for s in seen)
    assert sorted(x.name for x in out.iterdir()) == ["cont.tif"]
    assert list(work.iterdir()) == []


@pytest.mark.parametrize("case,match", [
    ("dtype", "dtype float64 .* expected the product dtype float32"),
    ("shape", r"shape \(2, .*expected \(3, "),
    ("tag", "tag 'n' must be a string"),
    ("block", "multiple of 16"),
    ("colors", "2 colours for 5 classes"),
    ("nodata", "nodata 300 does not fit dtype uint8"),
    ("classdtype", "class map must be uint8 or uint16"),
])
def test_bad_input_gives_clear_errors(tmp_path, continuous, case, match):
    g = grid(1000, 1200)
    rw, spec, tags, block = reader(continuous), CONT_SPEC, {}, 256
    if case == "dtype":
        rw = lambda w: continuous[:, w.slices[0], w.slices[1]].astype(np.float64)  # noqa: E731
    elif case == "shape":
        rw = lambda w: continuous[:2, w.slices[0], w.slices[1]]  # noqa: E731
    elif case == "tag":
        tags = {"n": 3}
    elif case == "block":
        block = 100
    elif case == "colors":
        spec = OutputSpec(bands=("c",), dtype="uint8", nodata=0, kind="categorical",
                          class_names=CLASS_SPEC.class_names, colors=((1, 2, 3), (4, 5, 6)))
    elif case == "nodata":
        spec = OutputSpec(bands=("c",), dtype="uint8", nodata=300)
    elif case == "classdtype":
        spec = OutputSpec(bands=("c",), dtype="float32", nodata=0, kind="categorical", class_names=("a",))
    with pytest.raises(ExportError, match=match):
        write_cog(tmp_path / "bad.tif", rw, g, spec, tags, block=block)
    assert list(tmp_path.iterdir()) == []


def test_overview_factors():
    assert overview_factors(8000, 8000, 512) == [2, 4, 8, 16]
    assert overview_factors(512, 512, 512) == []
    assert overview_factors(513, 100, 512) == [2]
    assert overview_factors(1000, 1000, 256) == [2, 4]
    assert overview_factors(600, 600, 1024) == [2]  # > 512 px always gets one level


MEMORY_SCRIPT = textwrap.dedent("""
    import json, sys, threading, time, tracemalloc
    from pathlib import Path
    import numpy as np
    import psutil
    from affine import Affine
    from swathmill.tiles.cog import write_cog
    from swathmill.tiles.grid import Grid
    from swathmill.tiles.step import OutputSpec

    n, out = int(sys.argv[1]), Path(sys.argv[2])
    spec = OutputSpec(bands=("a",), dtype="float32", nodata=float("nan"))

    def read_window(w):
        r = np.arange(w.row, w.row + w.rows)[:, None] // 8
        c = np.arange(w.col, w.col + w.cols)[None, :] // 8
        return (((r + c) % 50).astype(np.float32) * 0.25)[None]

    def grid(k):
        return Grid(k, k, Affine(2.0, 0, 500000.0, 0, -2.0, 4200000.0), "EPSG:32611")

    write_cog(out / "warm.tif", read_window, grid(700), spec, {"a": "b"})  # load drivers, warm caches
    proc, peak, done = psutil.Process(), [0], threading.Event()

    def sample():  # resident memory sampled every 2 ms during the export
        while not done.is_set():
            peak[0] = max(peak[0], proc.memory_info().rss)
            time.sleep(0.002)

    base = proc.memory_info().rss
    t = threading.Thread(target=sample)
    t.start()
    tracemalloc.start()
    t0 = time.perf_counter()
    write_cog(out / "big.tif", read_window, grid(n), spec, {"a": "b"})
    seconds = time.perf_counter() - t0
    py_peak = tracemalloc.get_traced_memory()[1]
    done.set()
    t.join()
    print(json.dumps({"rss_growth_mb": (peak[0] - base) / 2**20, "py_peak_mb": py_peak / 2**20,
                      "seconds": seconds}))
""")



@pytest.mark.slow
def test_memory_does_not_scale_with_product_size(tmp_path):
    """Peak resident memory and Python allocations: a 2000^2 vs an 8000^2 float32 product (16x larger).

    Each size runs in a fresh process; resident memory is sampled during the export alone.
    """
    res = {}
    for n in (2000, 8000):
        d = tmp_path / str(n)
        d.mkdir()
        run = subprocess.run([sys.executable, "-c", MEMORY_SCRIPT, str(n), str(d)], capture_output=True,
                             text=True, cwd=ROOT, timeout=300)
        assert run.returncode == 0, run.stderr
        res[n] = json.loads(run.stdout.strip().splitlines()[-1])
        assert_cog(d / "big.tif")
    big_product_mb = 8000 * 8000 * 4 / 2**20  # 244 MB
    small, big = res[2000], res[8000]
    print(f"memory: {res}")
    # numpy/Python allocations: a few blocks, the same for both sizes
    assert big["py_peak_mb"] < 20 and big["py_peak_mb"] < 1.5 * small["py_peak_mb"] + 2
    # resident memory (GDAL cache and buffers included): flat, far below the product size. GDAL's block
    # cache (write_cog sets GDAL_CACHEMAX to 16 MB here) fills up on the large product only: the 15 MB
    # product cannot fill it, so the two may differ by the cache's size, but not by the products' 229 MB
    cache_mb = 16
    assert big["rss_growth_mb"] < small["rss_growth_mb"] + cache_mb + 0.05 * big_product_mb
    assert big["rss_growth_mb"] < 0.25 * big_product_mb


# ----------------------------------------------------------------------------------------- STAC


def _products(tmp_path, continuous, classes):
    """Two small products (300 x 400, one overview level) in ``tmp_path/run/products``."""
    out = tmp_path / "run" / "products"
    out.mkdir(parents=True)
    g = grid(300, 400)
    cont, cls = continuous[:, :300, :400], classes[:, 100:400, 100:500]
    pc = write_cog(out / "smooth__cont.tif", reader(cont), g, CONT_SPEC, provenance_tags(PROV), block=256)
    pk = write_cog(out / "smooth__classes.tif", reader(cls), g, CLASS_SPEC, provenance_tags(PROV), block=256)
    return g, pc, pk


def _core_validate(d: dict, kind) -> None:
    # pystac's JSON-schema validator on the core schemas it bundles (STAC 1.1.0), offline
    from pystac.validation.stac_validator import JsonSchemaSTACValidator

    JsonSchemaSTACValidator().validate_core(json.loads(json.dumps(d)), kind, pystac.get_stac_version())


def test_stac_item_fields_and_offline_validation(tmp_path, continuous, classes):
    g, pc, pk = _products(tmp_path, continuous, classes)
    item = stac_item(pk, g, CLASS_SPEC, PROV, item_id="smooth__classes")
    path = item_path(pk)
    assert path.name == "smooth__classes.tif.json" and path.is_file()
    text = path.read_text()
    assert str(tmp_path) not in text  # self-contained: no absolute paths
    d = json.loads(text)
    _core_validate(d, pystac.STACObjectType.ITEM)
    validate_item_offline(pystac.Item.from_dict(d))

    assert set(d["stac_extensions"]) == {PROJ_URI, RASTER_URI, CLASS_URI, PROC_URI}
    props = d["properties"]
    assert props["proj:code"] == "EPSG:32611"
    assert props["proj:shape"] == [300, 400]
    assert props["proj:transform"] == [2.0, 0.0, 500000.0, 0.0, -2.0, 4200000.0]
    assert props["datetime"] == props["created"] == "2026-03-04T05:06:07Z"
    assert props["processing:software"] == {"swathmill": "0.1.0"}
    assert props["processing:expression"]["expression"] == {"step": "smooth", "parameters": {"size": 3}}
    assert props["swathmill:config_hash"] == "c0ffee12"
    assert props["swathmill:step_key"] == "a1b2c3d4"
    assert props["swathmill:input_fingerprints"] == {"x": "99ff"}
    # footprint: the grid's bounds in EPSG:4326 (reference: rasterio.warp.transform_bounds, densified)
    want = transform_bounds(CRS, "EPSG:4326", *g.bounds, densify_pts=21)
    np.testing.assert_allclose(d["bbox"], want, atol=1e-7)
    ring = np.asarray(d["geometry"]["coordinates"][0])
    assert (ring[0] == ring[-1]).all() and ring.shape[0] > 4

    asset = d["assets"]["data"]
    assert asset["href"] == "./smooth__classes.tif"
    assert asset["type"] == pystac.MediaType.COG
    assert [b["name"] for b in asset["bands"]] == ["class"]
    assert asset["raster:bands"][0]["data_type"] == "uint8" and asset["raster:bands"][0]["nodata"] == 0
    classes_ = asset["classification:classes"]
    assert [c["value"] for c in classes_] == [0, 1, 2, 3, 4, 5]
    assert [c.get("title") for c in classes_[1:]] == list(CLASS_SPEC.class_names)
    assert classes_[1]["name"] == "dry_grass" and classes_[1]["color_hint"] == "0A141E"
    assert classes_[0]["nodata"] is True
    # the saved item resolves its asset to the COG
    back = pystac.Item.from_file(str(path))
    assert Path(back.assets["data"].get_absolute_href()) == pk

    item_c = stac_item(pc, g, CONT_SPEC, PROV, item_id="smooth__cont")
    dc = item_c.to_dict(include_self_link=False)
    rb = dc["assets"]["data"]["raster:bands"]
    assert [b["nodata"] for b in rb] == ["nan"] * 3
    assert [b["scale"] for b in rb] == [0.5] * 3 and [b["offset"] for b in rb] == [1.0, 2.0, 3.0]
    assert [b["unit"] for b in rb] == ["percent"] * 3
    assert CLASS_URI not in dc["stac_extensions"]
    assert item.id == "smooth__classes"


@pytest.mark.parametrize("break_it,match", [
    (lambda d: d["stac_extensions"].remove(PROJ_URI), "proj:.* not in stac_extensions"),
    (lambda d: d["properties"].__setitem__("proj:shape", [1000]), "proj:shape"),
    (lambda d: d["assets"]["data"]["raster:bands"][0].__setitem__("data_type", "float128"), "data_type"),
    (lambda d: d["assets"]["data"]["classification:classes"][1].__setitem__("color_hint", "#0A141E"),
     "color_hint"),
    (lambda d: d["assets"]["data"]["classification:classes"][1].__setitem__("name", "dry grass"), "name"),
    (lambda d: d["properties"].__setitem__("processing:datetime", "2026"), "processing:datetime"),
    (lambda d: d["stac_extensions"].append("https://stac-extensions.github.io/eo/v1.1.0/schema.json"),
     "cannot be checked offline"),
    (lambda d: d.__setitem__("bbox", [1.0, 2.0]), "core schema"),
])
def test_offline_validation_catches_broken_items(tmp_path, continuous, classes, break_it, match):
    g, _, pk = _products(tmp_path, continuous, classes)
    d = stac_item(pk, g, CLASS_SPEC, PROV, item_id="k").to_dict(include_self_link=False)
    break_it(d)
    with pytest.raises(ExportError, match=match):
        validate_item_offline(pystac.Item.from_dict(d, migrate=False))


def test_stac_item_needs_provenance(tmp_path, continuous, classes):
    g, pc, _ = _products(tmp_path, continuous, classes)
    prov = {k: v for k, v in PROV.items() if k != "config_hash"}
    with pytest.raises(ExportError, match=r"provenance lacks \['config_hash'\]"):
        stac_item(pc, g, CONT_SPEC, prov, item_id="x")


def test_stac_collection_is_self_contained(tmp_path, continuous, classes):
    g, pc, pk = _products(tmp_path, continuous, classes)
    items = [stac_item(pc, g, CONT_SPEC, PROV, item_id="smooth__cont"),
             stac_item(pk, g, CLASS_SPEC, PROV, item_id="smooth__classes")]
    run = tmp_path / "run"
    col = stac_collection(items, run, "demo-run", "Products of one run")
    cpath = run / "collection.json"
    assert cpath.is_file()
    d = json.loads(cpath.read_text())
    _core_validate(d, pystac.STACObjectType.COLLECTION)
    assert col.id == "demo-run"
    assert all(not link["href"].startswith("/") for link in d["links"])
    assert not any(link["rel"] == "self" for link in d["links"])
    assert sorted(link["href"] for link in d["links"] if link["rel"] == "item") == [
        "./products/smooth__classes.tif.json", "./products/smooth__cont.tif.json"]
    np.testing.assert_allclose(d["extent"]["spatial"]["bbox"][0], items[0].bbox)
    for p in (pc, pk):
        di = json.loads(item_path(p).read_text())
        _core_validate(di, pystac.STACObjectType.ITEM)
        assert str(tmp_path) not in item_path(p).read_text()
        assert {link["rel"]: link["href"] for link in di["links"]}["collection"] == "../collection.json"
    # read back from disk: the catalog resolves its items and their COGs
    back = pystac.Collection.from_file(str(cpath))
    got = {it.id: Path(it.assets["data"].get_absolute_href()) for it in back.get_items()}
    assert got == {"smooth__cont": pc, "smooth__classes": pk}
    for it in back.get_items():
        validate_item_offline(it)
    with pytest.raises(ExportError, match="outside"):
        stac_collection(items, tmp_path / "elsewhere", "x", "y")
