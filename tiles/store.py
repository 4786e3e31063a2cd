"""Tile stores: one Zarr v3 group per step, one sharded array per output, a valid-pixel mask.

Layout of ``<name>.zarr``::

    <output>      (bands, y, x)   chunks (bands, C, C), shards (bands, S, S), fill = nodata
    valid         (y, x) uint8    1 where the pixel holds data, same shards
    x, y          pixel-centre coordinates in the grid's CRS
    <band dim>    band names, and per-band coordinates (e.g. wavelength) as 1-D arrays
    spatial_ref   CF grid mapping (crs_wkt, GeoTransform) so rioxarray finds the CRS

The arrays carry ``dimension_names`` and CF attributes (``_FillValue`` = nodata, ``scale_factor``,
``units``), and the group has consolidated metadata, so ``xarray.open_zarr`` reads it as a Dataset without
warnings, masks nodata and rioxarray finds the CRS and nodata; :func:`open_dataset` also gives packed
integers as float32. A tile of the engine is always a whole number of shards, so no two tasks write one shard.
"""
from __future__ import annotations

import base64
import json
import math
import os
import struct
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping

import numpy as np
import zarr
from zarr.codecs import ZstdCodec

from .grid import Grid, Window
from .step import OutputSpec
from ..errors import SwathmillError

__all__ = ["StoreLayout", "TileStore", "create_store", "open_store", "band_dim", "StoreError", "decode", "encode",
           "index_runs", "copy_bands", "scale_offset", "consolidate", "open_dataset"]

zarr.config.set({"async.concurrency": 8})


class StoreError(SwathmillError, ValueError):
    """A store is missing, malformed, or does not match what the plan expects."""


@dataclass(frozen=True)
class StoreLayout:
    """Chunking of a store: shards of ``shard`` px (= the tile size), inner chunks of ``chunk`` px."""

    shard: int
    chunk: int
    zstd_level: int = 1
    sharding: bool = True

    def __post_init__(self) -> None:
        if self.chunk <= 0 or self.shard <= 0:
            raise StoreError(f"chunk and shard sizes must be positive. Got chunk={self.chunk}, shard={self.shard}")
        if self.sharding and self.shard % self.chunk:
            raise StoreError(
                f"tile size {self.shard} px is not a multiple of the chunk size {self.chunk} px: "
                f"choose a tile of a multiple of {self.chunk} px, or a chunk that divides {self.shard}")


def band_dim(output: str, first: bool) -> str:
    return "band" if first else f"band_{output}"


def _encoding(layout: StoreLayout, nbands: int | None) -> dict:
    lead = () if nbands is None else (nbands,)
    enc = {"chunks": lead + (layout.chunk, layout.chunk), "compressors": [ZstdCodec(level=layout.zstd_level)]}
    if layout.sharding:
        enc["shards"] = lead + (layout.shard, layout.shard)
    else:
        enc["chunks"] = lead + (layout.shard, layout.shard)
    return enc


def create_store(path: Path, grid: Grid, outputs: Mapping[str, OutputSpec], layout: StoreLayout,
                 attrs: Mapping | None = None) -> "TileStore":
    """Create an empty store for ``outputs`` on ``grid``. An existing store at ``path`` is replaced."""
    from pyproj import CRS

    path = Path(path)
    if path.exists():
        import shutil
        shutil.rmtree(path)
    root = zarr.open_group(str(path), mode="w", zarr_format=3)
    crs = CRS.from_user_input(grid.crs)
    t = grid.transform
    sr = root.create_array("spatial_ref", shape=(), dtype="int32", fill_value=0, dimension_names=())
    sr.attrs.update({"crs_wkt": crs.to_wkt(), "spatial_ref": crs.to_wkt(),
                     "GeoTransform": " ".join(str(v) for v in (t.c, t.a, t.b, t.f, t.d, t.e)),
                     **{k: v for k, v in crs.to_cf().items() if isinstance(v, (str, int, float))}})
    sr[()] = 0
    xa = root.create_array("x", shape=(grid.cols,), dtype="float64", dimension_names=("x",), chunks=(grid.cols,))
    xa[:] = np.asarray(grid.x_coords())
    xa.attrs.update({"standard_name": "projection_x_coordinate", "axis": "X"})
    ya = root.create_array("y", shape=(grid.rows,), dtype="float64", dimension_names=("y",), chunks=(grid.rows,))
    ya[:] = np.asarray(grid.y_coords())
    ya.attrs.update({"standard_name": "projection_y_coordinate", "axis": "Y"})
    for n, (name, spec) in enumerate(outputs.items()):
        if name in ("valid", "x", "y", "spatial_ref") or name.startswith("band"):
            raise StoreError(f"output name {name!r} is reserved: pick another name")
        dim = band_dim(name, n == 0)
        nb = len(spec.bands)
        arr = root.create_array(name, shape=(nb, grid.rows, grid.cols), dtype=spec.dtype,
                                fill_value=spec.nodata, dimension_names=(dim, "y", "x"), **_encoding(layout, nb))
        coord_names = [f"{c}" if n == 0 else f"{c}_{name}" for c in spec.coords]
        arr.attrs.update({"grid_mapping": "spatial_ref", "coordinates": " ".join(["spatial_ref", *coord_names]),
                          **{k: v for k, v in spec.to_dict()["attrs"].items()}})
        if spec.nodata is not None:
            arr.attrs.update({"_FillValue": _fill_value_attr(spec.nodata, spec.dtype)})
        b = root.create_array(dim, shape=(nb,), dtype=str, dimension_names=(dim,), chunks=(nb,))
        b[:] = np.asarray(spec.bands, dtype=str)
        for cname, values in spec.coords.items():
            c = root.create_array(f"{cname}" if n == 0 else f"{cname}_{name}", shape=(nb,), dtype="float64",
                                  dimension_names=(dim,), chunks=(nb,))
            c[:] = np.asarray(values, dtype="float64")
            unit = spec.attrs.get(f"{cname}_units")
            if isinstance(unit, str):
                c.attrs.update({"units": unit})
    v = root.create_array("valid", shape=(grid.rows, grid.cols), dtype="uint8", fill_value=0,
                          dimension_names=("y", "x"), **_encoding(layout, None))
    v.attrs.update({"grid_mapping": "spatial_ref", "coordinates": "spatial_ref", "flag_values": [0, 1], "flag_meanings": "nodata valid"})
    root.attrs.update({"swathmill": {"grid": grid.to_dict(), "outputs": {k: s.to_dict() for k, s in outputs.items()},
                                     "layout": {"shard": layout.shard, "chunk": layout.chunk,
                                                "sharding": layout.sharding, "zstd_level": layout.zstd_level},
                                     **(dict(attrs) if attrs else {})}})
    consolidate(path)
    return TileStore(path)


def consolidate(path: Path) -> None:
    """Write the group's consolidated metadata, so that ``xarray.open_zarr`` opens it in one read, quietly.

    zarr-python warns that consolidated metadata is not (yet) part of the Zarr v3 specification; the
    store stays readable without it (every array keeps its own ``zarr.json``), so that warning is
    dropped here, and only here.
    """
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Consolidated metadata is currently not part",
                                category=UserWarning)
        zarr.consolidate_metadata(str(path), zarr_format=3)


def open_dataset(path: Path) -> "xarray.Dataset":  # noqa: F821
    """A store as a lazy :class:`xarray.Dataset`: nodata masked to NaN, scaled integers as float32.

    ``xarray.open_zarr`` alone decodes the CF ``scale_factor`` of an int16 output to float64 (the
    attribute comes back from JSON as a Python float, and CF asks for the type of the scale); here
    every packed output is cast to float32, the dtype the engine's own decoding gives, and keeps its
    attributes and encoding (``_FillValue``, so ``rio.encoded_nodata`` names the stored nodata).
    """
    import xarray as xr

    path = Path(path)
    if not (path / "zarr.json").is_file():
        raise StoreError(f"no store at {path} (zarr.json missing)")
    ds = xr.open_zarr(str(path), consolidated=True)
    for name, var in ds.data_vars.items():
        if "scale_factor" in var.encoding and var.dtype != np.float32:
            enc = dict(var.encoding)
            cast = var.astype(np.float32)
            cast.encoding = enc
            ds[name] = cast
    return ds


def _fill_value_attr(nodata, dtype: str):
    """The CF ``_FillValue`` attribute as xarray's Zarr backend reads it (so it masks and rioxarray finds nodata).

    Integers are stored as they are; floating-point values as the base64 of their little-endian
    float64 bytes, xarray's convention for Zarr attributes (it keeps NaN out of JSON). None when
    there is no nodata.
    """
    if nodata is None:
        return None
    dt = np.dtype(dtype)
    if dt.kind in "iu":
        return int(nodata)
    if dt.kind == "b":
        return bool(nodata)
    value = float(nodata)
    if dt.kind == "f" or math.isnan(value):
        return base64.standard_b64encode(struct.pack("<d", value)).decode()
    return value


def open_store(path: Path) -> "TileStore":
    return TileStore(Path(path))


def index_runs(index: np.ndarray) -> list[slice]:
    """A sorted band index as runs of consecutive bands (slices), for copies without fancy indexing."""
    index = np.asarray(index, dtype=np.int64)
    if index.size == 0:
        return []
    cut = np.flatnonzero(np.diff(index) != 1) + 1
    return [slice(int(r[0]), int(r[-1]) + 1) for r in np.split(index, cut)]


def copy_bands(flat: np.ndarray, runs: list[slice], cols: slice, out: np.ndarray, nodata=None) -> np.ndarray | None:
    """Copy bands ``runs`` of ``flat[:, cols]`` (bands, pixels) into ``out`` with a cast, run by run.

    Returns a boolean mask of the columns that hold ``nodata`` in any copied band (None when
    ``nodata`` is None or NaN: a cast keeps NaN, so a finiteness check finds those).
    """
    check = nodata is not None and not (isinstance(nodata, float) and np.isnan(nodata))
    value = np.asarray(nodata).astype(flat.dtype) if check else None
    hit = None
    row = 0
    for r in runs:
        k = r.stop - r.start
        src = flat[r, cols]
        np.copyto(out[row:row + k], src, casting="unsafe")
        if check:
            h = (src == value).any(axis=0)
            hit = h if hit is None else hit | h
        row += k
    return hit


def scale_offset(spec: OutputSpec) -> tuple[float | None, float | None]:
    """The CF ``scale_factor`` and ``add_offset`` of an output: physical = stored * scale + offset.

    None where the attribute is absent; an ``add_offset`` of zero is None too (nothing to add).
    """
    scale = spec.attrs.get("scale_factor")
    offset = spec.attrs.get("add_offset")
    return (None if scale is None else float(scale)), (float(offset) if offset else None)


def decode(raw: np.ndarray, spec: OutputSpec) -> np.ndarray:
    """Stored values to float32 physical values (CF scale_factor/add_offset), NaN at nodata."""
    out = raw.astype(np.float32)
    if spec.nodata is not None and not (isinstance(spec.nodata, float) and np.isnan(spec.nodata)):
        out[raw == np.asarray(spec.nodata, dtype=raw.dtype)] = np.nan
    scale, offset = scale_offset(spec)
    if scale is not None:
        out *= np.float32(scale)
    if offset:
        out += np.float32(offset)
    return out


def encode(values: np.ndarray, spec: OutputSpec, valid: np.ndarray, physical: bool = True) -> np.ndarray:
    """Physical values to the stored dtype; nodata wherever ``valid`` is False or the value is not finite.

    ``physical=False``: the values are already stored values (a step with ``decode=False``), so the
    CF scale_factor/add_offset are not applied again. Works band by band with one reused float64
    buffer, so a tile of hundreds of bands needs no tile-sized temporaries.
    """
    dt = np.dtype(spec.dtype)
    v = np.asarray(values)
    scale, offset = scale_offset(spec) if physical else (None, None)
    nodata = np.asarray(spec.nodata).astype(dt)
    invalid = ~np.asarray(valid, dtype=bool)
    any_invalid = bool(invalid.any())
    if not np.issubdtype(v.dtype, np.floating) and scale is None and not offset:
        out = v.astype(dt)  # integers to integers: no per-value mask
        if any_invalid:
            out[..., invalid] = nodata
        return out
    out = np.empty(v.shape, dtype=dt)
    flat_in = v.reshape((-1,) + v.shape[-2:]) if v.ndim >= 2 else v.reshape(1, 1, -1)
    flat_out = out.reshape(flat_in.shape)
    buf = np.empty(flat_in.shape[1:], dtype=np.float64)
    is_int = not np.issubdtype(dt, np.floating)
    info = np.iinfo(dt) if is_int else None
    for b in range(flat_in.shape[0]):
        np.copyto(buf, flat_in[b], casting="unsafe")
        if offset:
            buf -= offset
        if scale is not None:
            buf /= scale
        bad = ~np.isfinite(buf)
        if is_int:
            buf[bad] = 0
            np.rint(buf, out=buf)
            np.clip(buf, info.min, info.max, out=buf)
        with np.errstate(over="ignore", invalid="ignore"):
            np.copyto(flat_out[b], buf, casting="unsafe")
        if bad.any():
            flat_out[b][bad] = nodata
        if any_invalid:
            flat_out[b][invalid] = nodata
    if not is_int:
        # values finite in float64 but not in the stored float dtype (overflow) are nodata too
        over = ~np.isfinite(out)
        if over.any():
            out[over] = nodata
    return out


class TileStore:
    """An opened store: grid, output specs, and window reads and writes."""

    def __init__(self, path: Path):
        self.path = Path(path)
        if not (self.path / "zarr.json").is_file():
            raise StoreError(f"no store at {self.path} (zarr.json missing)")
        self.root = zarr.open_group(str(self.path), mode="r+", zarr_format=3)
        meta = self.root.attrs.get("swathmill")
        if not meta:
            raise StoreError(f"{self.path} is a Zarr group but not a swathmill store (no 'swathmill' attribute)")
        self.meta = meta
        self.grid = Grid.from_dict(meta["grid"])
        self.specs = {k: OutputSpec.from_dict(v) for k, v in meta["outputs"].items()}
        lay = meta["layout"]
        self.layout = StoreLayout(lay["shard"], lay["chunk"], lay.get("zstd_level", 1), lay.get("sharding", True))
        self._arrays: dict[str, zarr.Array] = {}

    def array(self, name: str) -> zarr.Array:
        if name not in self._arrays:
            if name not in self.specs and name != "valid":
                raise StoreError(f"store {self.path.name} has no output {name!r}; it has {sorted(self.specs)}")
            self._arrays[name] = self.root[name]
        return self._arrays[name]

    def read(self, output: str, win: Window) -> np.ndarray:
        rs, cs = win.slices
        return self.array(output)[:, rs, cs]

    def read_valid(self, win: Window) -> np.ndarray:
        rs, cs = win.slices
        return self.array("valid")[rs, cs].astype(bool)

    def write(self, output: str, win: Window, data: np.ndarray) -> None:
        rs, cs = win.slices
        self.array(output)[:, rs, cs] = data

    def write_valid(self, win: Window, valid: np.ndarray) -> None:
        rs, cs = win.slices
        self.array("valid")[rs, cs] = valid.astype(np.uint8)

    def check_readable(self, output: str, win: Window) -> bool:
        """Whether the shards under ``win`` decode (a torn shard after a kill fails here).

        Only windows with a stored object are read: a tile never written has nothing to tear, and
        reading it would only build arrays of fill values (tens of ms per tile, serially, on resume).
        """
        from zarr.core.sync import sync

        if not any(sync(arr.store_path.store.exists(f"{arr.path}/{key}")) for arr, key in self.shard_keys(win)):
            return True
        try:
            self.read(output, win)
            if output != "valid":
                self.read_valid(win)
            return True
        except Exception:
            return False

    def shard_keys(self, win: Window) -> list[tuple[zarr.Array, str]]:
        """The (array, key) of every stored object under ``win`` (a whole number of shards)."""
        keys = []
        for name in [*self.specs, "valid"]:
            arr = self.array(name)
            lead = (0,) if arr.ndim == 3 else ()
            unit = self.layout.shard if self.layout.sharding else self.layout.chunk
            for i in range(win.row // unit, -(-(win.row + win.rows) // unit)):
                for j in range(win.col // unit, -(-(win.col + win.cols) // unit)):
                    keys.append((arr, arr.metadata.encode_chunk_key(lead + (i, j))))
        return keys

    def clear(self, win: Window) -> None:
        """Delete every stored object under ``win`` so that the next write starts from nothing.

        A torn shard (a kill in the middle of its write) fails its checksum on every later partial
        write; deleting it first makes the rewrite whole.
        """
        from zarr.core.sync import sync

        for arr, key in self.shard_keys(win):
            sync(arr.store_path.store.delete(f"{arr.path}/{key}"))

    def remove_partials(self) -> list[Path]:
        """Delete stale ``*.partial`` files that a killed zarr write leaves behind."""
        found = []
        for dirpath, _dirs, files in os.walk(self.path):
            for f in files:
                if f.endswith(".partial") or ".partial" in f:
                    p = Path(dirpath) / f
                    p.unlink(missing_ok=True)
                    found.append(p)
        return found


def store_summary(path: Path) -> str:
    s = open_store(path)
    return json.dumps({"grid": s.grid.to_dict(), "outputs": list(s.specs)})
