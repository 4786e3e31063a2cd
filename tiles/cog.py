"""Product export, part one: Cloud-Optimized GeoTIFFs written window by window.

A product is written in three stages, each with memory bounded by the block size, never by the size
of the product:

1. a tiled, compressed, band-interleaved GeoTIFF written block by block from ``read_window`` (BIGTIFF
   when needed);
2. internal overviews built on it with GDAL (average for continuous outputs, mode for class maps);
3. a copy to GDAL's COG driver that reuses those overviews (``OVERVIEWS=FORCE_USE_EXISTING``).

Temporary files live beside the product (or in ``workdir``) under hidden names and the finished COG
is renamed into place atomically, so a half-written product never appears under its final name.
Before the rename the COG is read back and checked: overviews present and not empty, class values
in overviews all present in the data (categorical), overview values inside the data range
(continuous), free-form tags present. Its STAC description is in :mod:`swathmill.tiles.stac`.

Class maps (``kind="categorical"``) carry a colour table and, beside the file, GDAL's auxiliary
metadata ``<product>.tif.aux.xml`` (the open PAM convention GDAL reads for any raster) with the
category names and a thematic raster attribute table (value, class name, red, green, blue, alpha),
so a GIS shows the class names in its legend. Value 0 is "unclassified" (a valid pixel that matched
no class, drawn in grey) unless 0 is the output's nodata; the nodata value is transparent.
"""
from __future__ import annotations

import json
import math
import os
import re
import uuid
from pathlib import Path
from xml.sax.saxutils import escape
from typing import Any, Callable, Iterable, Mapping

import numpy as np

from .grid import Grid, Window
from .palette import UNCLASSIFIED_RGB, default_class_colors
from .step import OutputSpec, canonical_json
from ..errors import SwathmillError

__all__ = [
    "ExportError",
    "COG_BLOCK",
    "write_cog",
    "overview_factors",
    "default_class_colors",
    "provenance_tags",
    "aux_path",
    "class_entries",
    "category_aux_xml",
]

_NODATA_RGBA = (0, 0, 0, 0)
_UNCLASSIFIED_RGBA = (*UNCLASSIFIED_RGB, 255)
_CLASS_TAG = "class_names"
COG_BLOCK = 512  # internal tile size of the products (px)
_TMP_RE = r"^\.{name}\.[0-9]+-[0-9a-f]{{12}}\.part\.(tif|cog)$"


class ExportError(SwathmillError, ValueError):
    """A product cannot be written or described; the message names the product and what is wrong."""


# --------------------------------------------------------------------------------------------------
# GeoTIFF / COG
# --------------------------------------------------------------------------------------------------


def overview_factors(rows: int, cols: int, block: int) -> list[int]:
    """Decimation factors 2, 4, 8, ... until the coarsest level fits in one block.

    At least one level is made when the product is wider or higher than 512 px, since readers (and
    rio-cogeo's validator) expect overviews on anything larger than that.
    """
    limit = min(block, 512)
    factors: list[int] = []
    f = 2
    while max(rows, cols) > limit and (not factors or -(-max(rows, cols) // factors[-1]) > limit):
        factors.append(f)
        f *= 2
    return factors


def provenance_tags(provenance: Mapping[str, Any]) -> dict[str, str]:
    """GeoTIFF tags (str -> str) from a provenance mapping: strings kept, anything else as JSON."""
    return {str(k): v if isinstance(v, str) else canonical_json(v) for k, v in provenance.items()}


def write_cog(
    path: Path,
    read_window: Callable[[Window], np.ndarray],
    grid: Grid,
    spec: OutputSpec,
    tags: Mapping[str, str],
    block: int = COG_BLOCK,
    workdir: Path | None = None,
    *,
    compress: str = "DEFLATE",
    num_threads: int | str = 1,
    cache_bytes: int | None = None,
) -> Path:
    """Write one product as a Cloud-Optimized GeoTIFF, window by window, and rename it into place.

    Parameters
    ----------
    path
        Final path of the COG. Its directory must exist. An existing file is replaced atomically.
    read_window
        ``read_window(window) -> array (bands, rows, cols)`` of ``spec.dtype`` for a window of
        ``grid``; called once per ``block`` x ``block`` window, in row-major order.
    grid
        The product's grid (shape, transform, CRS).
    spec
        Output description: band names (band descriptions), dtype, nodata, kind (overview
        resampling: average for "continuous", mode for "categorical"), class names and colours,
        per-band coordinates (band tags), attrs ``units``, ``scale_factor``, ``add_offset``.
    tags
        Free-form metadata (str -> str), e.g. :func:`provenance_tags`; stored in the GDAL metadata.
        Tags with an empty value are left out (GDAL does not keep empty metadata items): a missing
        key reads as empty.
    block
        Internal tile size in pixels (multiple of 16); also the reading window. Memory is a few
        blocks of all bands.
    workdir
        Directory for the intermediate GeoTIFF (default: the product's directory). The final COG's
        temporary file is always written beside ``path`` so that the rename is atomic.
    compress
        Compression of the COG (``DEFLATE``, ``ZSTD``, ``LZW``...), with the horizontal predictor
        (floating-point predictor for float outputs).
    num_threads
        GDAL compression threads (``NUM_THREADS``): an int or ``"ALL_CPUS"``.
    cache_bytes
        GDAL block cache for the duration of the write (default: 16 MiB or 4 blocks of all bands,
        the larger). Peak memory is about this cache plus a few blocks.

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    ExportError
        Bad spec, tags or block size; ``read_window`` returned a wrong shape or dtype or raised
        (the window is named); the written COG failed its read-back checks.
    """
    import rasterio
    import rasterio.shutil
    from rasterio.enums import Resampling

    path = Path(path)
    name = path.name
    if not path.parent.is_dir():
        raise ExportError(f"product {name}: directory {path.parent} does not exist")
    workdir = Path(workdir) if workdir is not None else path.parent
    if not workdir.is_dir():
        raise ExportError(f"product {name}: work directory {workdir} does not exist")
    if block < 16 or block % 16:
        raise ExportError(f"product {name}: block size must be a multiple of 16 px. Got {block}")
    tags = _check_tags(name, tags, spec)
    dtype = np.dtype(spec.dtype)
    nb = len(spec.bands)
    categorical = spec.kind == "categorical"
    nodata = _check_nodata(name, spec, dtype)
    colormap = _colormap(name, spec, dtype) if categorical else None
    _band_attrs(name, spec)  # refuses bad units, scales or offsets before anything is written
    factors = overview_factors(grid.rows, grid.cols, block)
    resampling = Resampling.mode if categorical else Resampling.average
    if cache_bytes is None:
        cache_bytes = max(16 << 20, 4 * block * block * nb * dtype.itemsize)

    _remove_stale(path.parent, name)
    if workdir != path.parent:
        _remove_stale(workdir, name)
    token = f"{os.getpid()}-{uuid.uuid4().hex[:12]}"
    tmp_tif = workdir / f".{name}.{token}.part.tif"
    tmp_cog = path.parent / f".{name}.{token}.part.cog"
    predictor = 3 if dtype.kind == "f" else 2
    env = dict(GDAL_CACHEMAX=int(cache_bytes), GDAL_PAM_ENABLED="NO", GDAL_TIFF_OVR_BLOCKSIZE=str(block),
               GDAL_NUM_THREADS=str(num_threads))
    try:
        with rasterio.Env(**env):
            profile = dict(
                driver="GTiff", width=grid.cols, height=grid.rows, count=nb, dtype=dtype.name,
                crs=grid.crs, transform=grid.transform, nodata=nodata, tiled=True, blockxsize=block,
                blockysize=block, compress="DEFLATE", zlevel=1, predictor=predictor, bigtiff="IF_SAFER",
                # one band per block: overviews are built band by band, and with every band in one block
                # (pixel interleaving) each band's pass decompressed every band's data again, hundreds of
                # times over for a cube of hundreds of bands once a row of blocks outgrew GDAL's cache
                interleave="band",
            )
            stats = _write_tiled(name, tmp_tif, profile, read_window, grid, spec, tags, block, colormap)
            if factors:
                with rasterio.open(tmp_tif, "r+") as dst:
                    dst.build_overviews(factors, resampling)
            rasterio.shutil.copy(
                tmp_tif, tmp_cog, driver="COG", BLOCKSIZE=block, COMPRESS=compress, PREDICTOR="YES",
                OVERVIEWS="FORCE_USE_EXISTING" if factors else "NONE", BIGTIFF="IF_SAFER",
                NUM_THREADS=str(num_threads),
            )
            tmp_tif.unlink()
            _check_product(name, tmp_cog, spec, grid, factors, stats, tags, colormap)
        _put_in_place(tmp_cog, path, spec, colormap, token)
    finally:
        for p in (tmp_tif, tmp_cog, path.parent / f".{name}.{token}.part.aux"):
            p.unlink(missing_ok=True)
    return path


def _write_tiled(name: str, tmp_tif: Path, profile: dict, read_window: Callable[[Window], np.ndarray],
                 grid: Grid, spec: OutputSpec, tags: Mapping[str, str], block: int,
                 colormap: dict | None) -> "_Stats":
    """The intermediate tiled GeoTIFF of product ``name``: band descriptions, units, scales, tags, colour
    table, then the pixels window by window (checked as they are read); returns their statistics for
    the read-back checks."""
    import rasterio

    dtype = np.dtype(spec.dtype)
    nb = len(spec.bands)
    categorical = spec.kind == "categorical"
    units, scales, offsets = _band_attrs(name, spec)
    stats = _Stats(nb, categorical, profile["nodata"], dtype)
    with rasterio.open(tmp_tif, "w", **profile) as dst:
        dst.descriptions = tuple(spec.bands)
        if units is not None:
            dst.units = units
        if scales is not None:
            dst.scales = scales
        if offsets is not None:
            dst.offsets = offsets
        dataset_tags = {**tags, "role": spec.role}
        if categorical:
            dataset_tags[_CLASS_TAG] = json.dumps(_class_table(spec))
            dst.write_colormap(1, colormap)
        dst.update_tags(**dataset_tags)
        for b in range(nb):
            btags = {k: _tag_str(v[b]) for k, v in spec.coords.items()}
            btags.update({f"{k}_units": spec.attrs[f"{k}_units"] for k in spec.coords
                          if isinstance(spec.attrs.get(f"{k}_units"), str)})
            if categorical:
                btags[_CLASS_TAG] = json.dumps(_class_table(spec))
            if btags:
                dst.update_tags(b + 1, **btags)
        for win in _windows(grid, block):
            arr = _read_checked(name, read_window, win, nb, dtype)
            stats.add(arr)
            dst.write(arr, window=rasterio.windows.Window(win.col, win.row, win.cols, win.rows))
    return stats


def _put_in_place(tmp_cog: Path, path: Path, spec: OutputSpec, colormap: dict | None, token: str) -> None:
    """Rename the checked COG into place (synced), with a class map's GDAL auxiliary metadata beside it;
    a product that is no class map removes a stale one of its name."""
    _fsync(tmp_cog)
    aux = aux_path(path)
    if spec.kind == "categorical":
        tmp_aux = path.parent / f".{path.name}.{token}.part.aux"
        tmp_aux.write_text(category_aux_xml(spec, colormap), encoding="utf-8")
        os.replace(tmp_aux, aux)
    else:
        aux.unlink(missing_ok=True)  # a class map's metadata must not outlive it under a new product
    os.replace(tmp_cog, path)
    _fsync(path.parent)


def aux_path(path: Path) -> Path:
    """GDAL's auxiliary metadata file beside a product: ``<name>.aux.xml``."""
    path = Path(path)
    return path.with_name(path.name + ".aux.xml")


def class_entries(spec: OutputSpec) -> list[tuple[int, str, tuple[int, int, int, int]]]:
    """(value, name, RGBA) of every value a class map can hold: 0, the classes 1..n and nodata.

    Value 0 is "unclassified" (grey) unless it is the nodata value; nodata is transparent.
    """
    nodata = _nodata_int(spec)
    n = len(spec.class_names or ())
    colors = spec.colors if spec.colors is not None else default_class_colors(n)
    out: list[tuple[int, str, tuple[int, int, int, int]]] = []
    if nodata != 0:
        out.append((0, "unclassified", _UNCLASSIFIED_RGBA))
    for i, (cname, c) in enumerate(zip(spec.class_names or (), colors), start=1):
        out.append((i, str(cname), (int(c[0]), int(c[1]), int(c[2]), 255)))
    if nodata is not None:
        out.append((nodata, "nodata", _NODATA_RGBA))
    return sorted(out)


def category_aux_xml(spec: OutputSpec, colormap: Mapping[int, tuple[int, int, int, int]] | None = None) -> str:
    """The ``.aux.xml`` text of a class map: band 1's category names (one per value 0..max, blank
    between named values) and a thematic raster attribute table (GDAL field types: 0 integer, 2
    string; usages: 5 min-max (the value), 2 name, 6-9 red, green, blue, alpha)."""
    entries = class_entries(spec)
    names = {v: n for v, n, _ in entries}
    top = max(names)
    cats = "".join(f"      <Category>{escape(names.get(v, ''))}</Category>\n" for v in range(top + 1))
    fields = [("Value", 0, 5), ("Class", 2, 2), ("Red", 0, 6), ("Green", 0, 7), ("Blue", 0, 8), ("Alpha", 0, 9)]
    defs = "".join(f'      <FieldDefn index="{i}">\n        <Name>{n}</Name>\n        <Type>{t}</Type>\n'
                   f"        <Usage>{u}</Usage>\n      </FieldDefn>\n" for i, (n, t, u) in enumerate(fields))
    rows = "".join(f'      <Row index="{i}">\n        <F>{v}</F>\n        <F>{escape(n)}</F>\n'
                   + "".join(f"        <F>{int(x)}</F>\n" for x in rgba) + "      </Row>\n"
                   for i, (v, n, rgba) in enumerate(entries))
    return ("<PAMDataset>\n  <PAMRasterBand band=\"1\">\n    <CategoryNames>\n" + cats
            + "    </CategoryNames>\n    <GDALRasterAttributeTable tableType=\"thematic\">\n" + defs + rows
            + "    </GDALRasterAttributeTable>\n  </PAMRasterBand>\n</PAMDataset>\n")


def _nodata_int(spec: OutputSpec) -> int | None:
    nd = spec.nodata
    if nd is None or isinstance(nd, str) or (isinstance(nd, float) and math.isnan(nd)):
        return None
    return int(nd)


def _windows(grid: Grid, block: int) -> Iterable[Window]:
    for r in range(0, grid.rows, block):
        for c in range(0, grid.cols, block):
            yield Window(r, c, min(block, grid.rows - r), min(block, grid.cols - c))


def _read_checked(name: str, read_window: Callable[[Window], np.ndarray], win: Window, nb: int,
                  dtype: np.dtype) -> np.ndarray:
    try:
        arr = read_window(win)
    except Exception as exc:
        raise ExportError(f"product {name}: reading window {win} failed: {type(exc).__name__}: {exc}") from exc
    arr = np.asarray(arr)
    if arr.shape != (nb, win.rows, win.cols):
        raise ExportError(f"product {name}: read_window returned shape {arr.shape} for window {win}; "
                          f"expected {(nb, win.rows, win.cols)} (bands, rows, cols)")
    if arr.dtype != dtype:
        raise ExportError(f"product {name}: read_window returned dtype {arr.dtype} for window {win}; "
                          f"expected the product dtype {dtype}")
    return arr


class _Stats:
    """Per band: valid pixel count and range (continuous) or value counts (categorical)."""

    def __init__(self, nb: int, categorical: bool, nodata: float | int | None, dtype: np.dtype) -> None:
        self.categorical, self.nodata, self.dtype = categorical, nodata, dtype
        self.count = np.zeros(nb, np.int64)
        self.lo = np.full(nb, np.inf)
        self.hi = np.full(nb, -np.inf)
        self.values = [np.zeros(int(np.iinfo(dtype).max) + 1, np.int64) for _ in range(nb)] if categorical else []

    def valid(self, band: np.ndarray) -> np.ndarray:
        ok = np.ones(band.shape, bool)
        if self.dtype.kind == "f":
            ok &= np.isfinite(band)
        if self.nodata is not None and not (isinstance(self.nodata, float) and math.isnan(self.nodata)):
            ok &= band != self.nodata
        return ok

    def add(self, arr: np.ndarray) -> None:
        for b in range(arr.shape[0]):
            ok = self.valid(arr[b])
            v = arr[b][ok]
            if not v.size:
                continue
            self.count[b] += v.size
            if self.categorical:
                self.values[b] += np.bincount(v.ravel(), minlength=self.values[b].size)
            else:
                self.lo[b] = min(self.lo[b], float(v.min()))
                self.hi[b] = max(self.hi[b], float(v.max()))


def _check_product(name: str, cog: Path, spec: OutputSpec, grid: Grid, factors: list[int], stats: _Stats,
                   tags: Mapping[str, str], colormap: dict | None) -> None:
    """Read the written COG back: shape, tags, colour table, overviews present and not empty."""
    import rasterio

    with rasterio.open(cog) as src:
        if (src.height, src.width, src.count) != (grid.rows, grid.cols, len(spec.bands)):
            raise ExportError(f"product {name}: COG has shape {(src.count, src.height, src.width)}; "
                              f"expected {(len(spec.bands), grid.rows, grid.cols)}")
        got = src.tags()
        lost = sorted(k for k, v in tags.items() if got.get(k) != v)
        if lost:
            raise ExportError(f"product {name}: tags {lost} did not survive the COG copy")
        if colormap is not None and not src.colormap(1):
            raise ExportError(f"product {name}: the colour table did not survive the COG copy")
        levels = src.overviews(1)
        if len(levels) != len(factors):
            raise ExportError(f"product {name}: COG has {len(levels)} overview levels {levels}; expected "
                              f"{len(factors)} (factors {factors})")
    if not factors:
        return
    with rasterio.open(cog, overview_level=len(factors) - 1) as ovr:
        data = ovr.read()
    for b, band_name in enumerate(spec.bands):
        if stats.count[b] == 0:
            continue
        ok = stats.valid(data[b])
        if not ok.any():
            raise ExportError(f"product {name}: overview 1/{factors[-1]} of band {band_name!r} is empty although "
                              f"the band holds {stats.count[b]} valid pixels")
        v = data[b][ok]
        if stats.categorical:
            seen = np.flatnonzero(stats.values[b])
            extra = np.setdiff1d(np.unique(v), seen)
            if extra.size:
                raise ExportError(f"product {name}: overview 1/{factors[-1]} of band {band_name!r} holds class "
                                  f"values {extra.tolist()} that are not in the data {seen.tolist()}")
        else:
            tol = 1e-5 * max(1.0, abs(stats.lo[b]), abs(stats.hi[b]))
            if v.min() < stats.lo[b] - tol or v.max() > stats.hi[b] + tol:
                raise ExportError(f"product {name}: overview 1/{factors[-1]} of band {band_name!r} spans "
                                  f"[{v.min()}, {v.max()}], outside the data range [{stats.lo[b]}, {stats.hi[b]}]")


def _check_tags(name: str, tags: Mapping[str, str], spec: OutputSpec) -> dict[str, str]:
    out = {}
    for k, v in tags.items():
        if not isinstance(k, str) or not k or "=" in k or k != k.strip():
            raise ExportError(f"product {name}: tag names must be non-empty strings without '=' or outer "
                              f"spaces. Got {k!r}")
        if not isinstance(v, str):
            raise ExportError(f"product {name}: tag {k!r} must be a string (encode it, e.g. with "
                              f"provenance_tags). Got {type(v).__name__}")
        if v:
            out[k] = v
    if spec.kind == "categorical" and _CLASS_TAG in out:
        raise ExportError(f"product {name}: tag {_CLASS_TAG!r} is reserved for the class names of a class map")
    return out


def _check_nodata(name: str, spec: OutputSpec, dtype: np.dtype) -> float | int | None:
    nd = spec.nodata
    if nd is None:
        return None
    if isinstance(nd, str):  # "NaN" round-tripped through JSON
        nd = float(nd)
    if isinstance(nd, float) and math.isnan(nd):
        if dtype.kind != "f":
            raise ExportError(f"product {name}: nodata NaN needs a float dtype. Got {dtype}")
        return float("nan")
    if dtype.kind in "iu":
        info = np.iinfo(dtype)
        if float(nd) != int(nd) or not info.min <= int(nd) <= info.max:
            raise ExportError(f"product {name}: nodata {nd} does not fit dtype {dtype} "
                              f"([{info.min}, {info.max}])")
        return int(nd)
    return float(nd)


def _class_table(spec: OutputSpec) -> dict[str, str]:
    return {str(v): n for v, n, _ in class_entries(spec)}


def _colormap(name: str, spec: OutputSpec, dtype: np.dtype) -> dict[int, tuple[int, int, int, int]]:
    if dtype not in (np.dtype("uint8"), np.dtype("uint16")):
        raise ExportError(f"product {name}: a class map must be uint8 or uint16 (TIFF colour tables). Got {dtype}")
    n = len(spec.class_names or ())
    if n > int(np.iinfo(dtype).max):
        raise ExportError(f"product {name}: {n} classes do not fit dtype {dtype}")
    colors = spec.colors
    if colors is None:
        colors = default_class_colors(n)
    elif len(colors) != n:
        raise ExportError(f"product {name}: {len(colors)} colours for {n} classes; give one RGB triplet per class")
    for i, c in enumerate(colors, start=1):
        if len(c) != 3 or not all(isinstance(x, (int, np.integer)) and 0 <= x <= 255 for x in c):
            raise ExportError(f"product {name}: colour of class {i} must be 3 integers 0-255. Got {c!r}")
    nodata = _nodata_int(spec)
    if nodata is not None and 1 <= nodata <= n:
        raise ExportError(f"product {name}: nodata {nodata} is also the code of class {spec.class_names[nodata - 1]!r}")
    return {v: rgba for v, _, rgba in class_entries(spec)}


def _per_band(name: str, key: str, v: Any, nb: int, kind: type) -> tuple | None:
    if v is None:
        return None
    if isinstance(v, (str, int, float, np.generic)):
        return tuple(kind(v) for _ in range(nb))
    v = list(v)
    if len(v) != nb:
        raise ExportError(f"product {name}: attr {key!r} has {len(v)} values for {nb} bands")
    return tuple(kind(x) for x in v)


def _band_attrs(name: str, spec: OutputSpec) -> tuple[tuple | None, tuple | None, tuple | None]:
    nb = len(spec.bands)
    a = spec.attrs
    return (_per_band(name, "units", a.get("units"), nb, str),
            _per_band(name, "scale_factor", a.get("scale_factor"), nb, float),
            _per_band(name, "add_offset", a.get("add_offset"), nb, float))


def _tag_str(v: Any) -> str:
    return v if isinstance(v, str) else canonical_json(v)


def _remove_stale(directory: Path, name: str) -> None:
    """Remove temporary files a killed export of the same product left behind."""
    pat = re.compile(_TMP_RE.format(name=re.escape(name)))
    for p in directory.iterdir():
        if pat.match(p.name):
            p.unlink(missing_ok=True)


def _fsync(p: Path) -> None:
    fd = os.open(p, os.O_RDONLY)
    try:
        os.fsync(fd)
    except OSError:  # some file systems refuse fsync on directories
        pass
    finally:
        os.close(fd)
