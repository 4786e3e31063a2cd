"""One legend per run: the same code and colour for a material in every class map, nodata distinct from
unclassified, class COGs whose category names GDAL reads from the auxiliary metadata beside them, and
class colours that cannot pass for background or nodata."""
from __future__ import annotations

import ctypes
import glob
import json
import os
from pathlib import Path

import numpy as np
import pytest
import rasterio

from swathmill.tiles.cog import aux_path, write_cog
from swathmill.tiles.grid import Window
from swathmill.tiles.palette import (CLASS_NODATA, PALETTE_HEX, UNCLASSIFIED, UNCLASSIFIED_RGB, background_like,
                                     hex_to_rgb, srgb_to_lab)
from swathmill.tiles.stac import stac_item
from swathmill.tiles.step import OutputSpec
from swathmill.tiles.testing import default_grid, run_on_arrays
from swathmill.workflows.inputs.reference import GroundReference, samples_on_grid
from swathmill.workflows.methods.classify import (ClassifyError, build_legend, read_legend, run_legend, sam_step,
                                                  sff_step, svm_step)
from swathmill.workflows.methods.classify.sam import SamConfig
from swathmill.workflows.methods.classify.svm import SvmConfig
from test_classify import NAMES, SVM_GRID, library, scene

import shapely


# --------------------------------------------------------------------------------------------------
# GDAL itself, through the library rasterio ships (its C API: GDALGetRasterCategoryNames and the
# raster attribute table functions of gdal.h)

def _gdal() -> ctypes.CDLL:
    import rasterio as rio

    libs = sorted(glob.glob(os.path.join(os.path.dirname(rio.__file__), os.pardir, "rasterio.libs", "libgdal*")))
    if not libs:
        pytest.skip("rasterio's bundled GDAL library was not found (a system GDAL build)")
    lib = ctypes.CDLL(libs[0])
    lib.GDALAllRegister()
    lib.GDALOpen.restype = ctypes.c_void_p
    lib.GDALOpen.argtypes = [ctypes.c_char_p, ctypes.c_int]
    lib.GDALGetRasterBand.restype = ctypes.c_void_p
    lib.GDALGetRasterBand.argtypes = [ctypes.c_void_p, ctypes.c_int]
    lib.GDALGetRasterCategoryNames.restype = ctypes.POINTER(ctypes.c_char_p)
    lib.GDALGetRasterCategoryNames.argtypes = [ctypes.c_void_p]
    lib.GDALGetDefaultRAT.restype = ctypes.c_void_p
    lib.GDALGetDefaultRAT.argtypes = [ctypes.c_void_p]
    lib.GDALRATGetRowCount.argtypes = [ctypes.c_void_p]
    lib.GDALRATGetColumnCount.argtypes = [ctypes.c_void_p]
    lib.GDALRATGetUsageOfCol.argtypes = [ctypes.c_void_p, ctypes.c_int]
    lib.GDALRATGetValueAsString.restype = ctypes.c_char_p
    lib.GDALRATGetValueAsString.argtypes = [ctypes.c_void_p, ctypes.c_int, ctypes.c_int]
    lib.GDALRATGetValueAsInt.argtypes = [ctypes.c_void_p, ctypes.c_int, ctypes.c_int]
    lib.GDALClose.argtypes = [ctypes.c_void_p]
    lib.GDALGetGeoTransform.argtypes = [ctypes.c_void_p, ctypes.c_double * 6]
    return lib


def gdal_categories(path: Path) -> tuple[list[str], list[tuple]]:
    """Band 1's category names and its raster attribute table rows (value, name, r, g, b, a) as GDAL reads them."""
    lib = _gdal()
    ds = lib.GDALOpen(str(path).encode(), 0)
    assert ds, f"GDAL cannot open {path}"
    try:
        band = lib.GDALGetRasterBand(ds, 1)
        # the GeoTIFF driver loads the auxiliary metadata on first use of georeferencing or metadata
        # (as gdalinfo and a GIS do on opening); category names alone do not trigger it
        lib.GDALGetGeoTransform(ds, (ctypes.c_double * 6)())
        names, p = [], lib.GDALGetRasterCategoryNames(band)
        i = 0
        while p and p[i] is not None:
            names.append(p[i].decode())
            i += 1
        rows = []
        rat = lib.GDALGetDefaultRAT(band)
        if rat:
            usage = {lib.GDALRATGetUsageOfCol(rat, c): c for c in range(lib.GDALRATGetColumnCount(rat))}
            # gdal.h GDALRATFieldUsage: GFU_Name 2, GFU_MinMax 5, GFU_Red 6 ... GFU_Alpha 9
            for r in range(lib.GDALRATGetRowCount(rat)):
                rows.append((lib.GDALRATGetValueAsInt(rat, r, usage[5]),
                             lib.GDALRATGetValueAsString(rat, r, usage[2]).decode(),
                             *(lib.GDALRATGetValueAsInt(rat, r, usage[u]) for u in (6, 7, 8, 9))))
        return names, rows
    finally:
        lib.GDALClose(ds)


# --------------------------------------------------------------------------------------------------
# colours

def test_lab_of_srgb_primaries_and_white() -> None:
    # CIELAB of sRGB colours, D65 (published conversions, e.g. Lindbloom's calculator; from memory):
    # red (255, 0, 0) -> L* 53.24, a* 80.09, b* 67.20; white -> 100, 0, 0; black -> 0, 0, 0
    assert srgb_to_lab((255, 0, 0)) == pytest.approx((53.24, 80.09, 67.20), abs=0.1)
    assert srgb_to_lab((255, 255, 255)) == pytest.approx((100.0, 0.0, 0.0), abs=0.05)
    assert srgb_to_lab((0, 0, 0)) == pytest.approx((0.0, 0.0, 0.0), abs=1e-9)


def test_default_palette_has_no_background_like_colour() -> None:
    assert [h for h in PALETTE_HEX if background_like(hex_to_rgb(h))] == []
    assert background_like(UNCLASSIFIED_RGB) is None  # unclassified must stay visible
    assert background_like((250, 250, 245)) == "near-white"
    assert background_like((20, 20, 25)) == "near-black"
    assert background_like((255, 255, 0)) is None  # pure yellow is light, but no background


def test_library_colours_kept_background_like_replaced() -> None:
    with pytest.warns(UserWarning, match="'snow'.*near-white"):
        lg = build_legend([("lib.csv", ["rock", "snow", "grass"], [(200, 60, 40), (252, 252, 252), None])])
    assert lg.names == ("rock", "snow", "grass")
    assert lg.colors[0] == (200, 60, 40)  # the library's colour is kept
    assert background_like(lg.colors[1]) is None and background_like(lg.colors[2]) is None
    assert len(set(lg.colors)) == 3


def test_legend_order_libraries_then_reference_and_csv_round_trip(tmp_path: Path) -> None:
    lg = build_legend([("lib a", ["clay", "mica"], [(204, 102, 119), (51, 34, 136)]),
                       ("reference", ["water", "clay", "grass"], None)])
    assert lg.names == ("clay", "mica", "water", "grass")
    assert lg.code("water") == 3
    with pytest.raises(ClassifyError, match="'sand' is not in the run's legend"):
        lg.code("sand", "step 'svm'")
    p = lg.write_csv(tmp_path / "legend.csv")
    lines = p.read_text().splitlines()
    assert lines[0] == "code,name,color,source"
    assert lines[1].startswith(f"{UNCLASSIFIED},unclassified,") and lines[-1].startswith(f"{CLASS_NODATA},nodata,")
    back = read_legend(p)
    assert back.names == lg.names and back.colors == lg.colors


# --------------------------------------------------------------------------------------------------
# class maps of a run

def _samples(classes: list[str], size: int = 48):
    """4 x 4 training squares inside each 12 x 12 patch of :func:`test_classify.scene`, with the
    class list in the order given (an order other than the library's)."""
    grid = default_grid(size, size)
    geoms, labels = [], []
    for pr in range(0, size, 12):
        for pc in range(0, size, 12):
            lab = ((pr // 12) + 2 * (pc // 12)) % 4 + 1
            r0, c0 = pr + 3 + (pc // 12) % 3, pc + 2 + (pr // 12) % 4
            x0, y0 = grid.transform @ (c0, r0)
            x1, y1 = grid.transform @ (c0 + 4, r0 + 4)
            geoms.append(shapely.box(min(x0, x1), min(y0, y1), max(x0, x1), max(y0, y1)))
            labels.append(NAMES[lab - 1])
    ref = GroundReference(np.array(geoms, dtype=object), tuple(labels), grid.crs, tuple(["train"] * len(labels)))
    table, issues = samples_on_grid(ref, grid, classes=classes)
    assert issues == []
    return table


def test_same_code_and_colour_for_a_material_in_every_class_map(tmp_path: Path) -> None:
    cube, spec, labels = scene(noise=0.004)
    # the reference lists its classes in another order than the library (and with an extra class)
    table = _samples(["delta", "gamma", "beta", "alpha", "eta"])
    lib = library()
    legend = run_legend([(SamConfig(references={"library": "lib.csv"}), (lib, None)),
                         (SvmConfig(reference={"path": "ref.gpkg"}), (None, table))])
    assert legend.names == (*NAMES, "eta")
    steps = [sam_step("sam", "src/cube", library=lib, threshold=0.1, legend=legend),
             sff_step("sff", "src/cube", library=lib, wl_range=(2100, 2400), legend=legend),
             sam_step("sam_img", "src/cube", samples=_samples(NAMES[::-1]), threshold=0.1, legend=legend)]
    with pytest.raises(ClassifyError, match="fewer samples"):  # 'eta' has no sample: no SVM on this table
        svm_step("svm", "src/cube", samples=table, legend=legend, **SVM_GRID)
    steps.append(svm_step("svm", "src/cube", samples=_samples(NAMES[::-1]), legend=legend, **SVM_GRID))
    out, _ = run_on_arrays(steps, {"cube": (cube, spec)}, tmp_path, tile=16, raw=True)
    from swathmill.tiles.store import open_store

    for name in ("sam", "sff", "sam_img", "svm"):
        # the codes of the legend, whatever order each step's references or training labels have
        assert float(np.mean(out[f"{name}/classes"][0] == labels)) >= 0.99, name
        s = open_store(tmp_path / "run" / "stores" / f"{name}.zarr").specs["classes"]
        assert s.class_names == legend.names and s.colors == legend.colors, name
        assert s.nodata == CLASS_NODATA
    # the library's colours are the legend's; 'eta', from the reference only, takes a palette colour
    assert legend.colors[:4] == tuple(hex_to_rgb(c) for c in lib.colors)


def test_nodata_distinct_from_unclassified(tmp_path: Path) -> None:
    cube, spec, labels = scene(noise=0.004)
    cube = cube.copy()
    cube[:, 30:36, 5:9] = 0.9 * cube[:, 30:36, 5:9][::-1]  # spectra unlike any reference: unclassified
    valid = np.ones(labels.shape, bool)
    valid[:4, :] = False  # outside the mosaic: nodata
    step = sam_step("sam", "src/cube", library=library(), threshold=0.05)
    out, _ = run_on_arrays([step], {"cube": (cube, spec)}, tmp_path, tile=16, raw=True, valid=valid,
                           export=True)
    cls = out["sam/classes"][0]
    assert (cls[:4] == CLASS_NODATA).all()
    assert (cls[30:36, 5:9] == UNCLASSIFIED).all()
    assert UNCLASSIFIED != CLASS_NODATA
    cog = next((tmp_path / "run" / "products").glob("sam__classes.tif"))
    with rasterio.open(cog) as src:
        assert src.nodata == CLASS_NODATA  # a GIS hides nodata ...
        cmap = src.colormap(1)
        assert cmap[CLASS_NODATA][3] == 0
        assert cmap[UNCLASSIFIED] == (*UNCLASSIFIED_RGB, 255)  # ... and draws unclassified, opaque
        assert json.loads(src.tags()["class_names"])["0"] == "unclassified"
    names, rows = gdal_categories(cog)
    assert names[0] == "unclassified" and names[1:5] == NAMES and names[CLASS_NODATA] == "nodata"


def test_gdal_reads_category_names_and_colours_of_a_class_cog(tmp_path: Path) -> None:
    lg = build_legend([("lib", ["dry grass", "bare rock", "open water"], [(221, 204, 119), None, (0, 114, 178)])])
    spec = OutputSpec(bands=("class",), dtype="uint8", nodata=CLASS_NODATA, kind="categorical", role="class_map",
                      class_names=lg.names, colors=lg.colors)
    arr = np.zeros((1, 40, 40), np.uint8)
    arr[0, :10] = 1
    arr[0, 10:20] = 3
    arr[0, 30:] = CLASS_NODATA
    path = write_cog(tmp_path / "m.tif", lambda w: arr[:, w.row:w.row + w.rows, w.col:w.col + w.cols].copy(),
                     default_grid(40, 40), spec, {})
    assert aux_path(path).is_file()
    names, rows = gdal_categories(path)
    assert names[:4] == ["unclassified", "dry grass", "bare rock", "open water"]
    assert names[CLASS_NODATA] == "nodata" and len(names) == CLASS_NODATA + 1
    assert rows[0] == (0, "unclassified", *UNCLASSIFIED_RGB, 255)
    assert rows[1] == (1, "dry grass", 221, 204, 119, 255)
    assert rows[3] == (3, "open water", 0, 114, 178, 255)
    assert rows[-1] == (CLASS_NODATA, "nodata", 0, 0, 0, 0)
    # the STAC item's classification extension holds the same codes, names and colours
    prov = {"software": "swathmill", "software_version": "0", "config_hash": "c0", "step": "m", "step_key": "k1",
            "parameters": "{}", "inputs": "{}", "input_fingerprints": "{}", "created": "2026-01-01T00:00:00Z"}
    d = stac_item(path, default_grid(40, 40), spec, prov, item_id="m").to_dict(include_self_link=False)
    classes = {c["value"]: c for c in d["assets"]["data"]["classification:classes"]}
    assert classes[0]["title"] == "unclassified" and not classes[0].get("nodata")
    assert classes[0]["color_hint"] == "%02X%02X%02X" % UNCLASSIFIED_RGB
    assert classes[1]["title"] == "dry grass" and classes[1]["color_hint"] == "DDCC77"
    assert classes[CLASS_NODATA]["nodata"] is True
