"""Flight lines in: inspect rasters, read their wavelengths, plan the target grid, warp tile windows.

This module is the I/O side of the mosaic step. It opens each flight line with rasterio (GeoTIFF,
and any other raster GDAL reads, e.g. NetCDF or HDF5), checks it, and describes it as a
:class:`LineInfo`; it derives the target :class:`~swathmill.tiles.grid.Grid` and each line's footprint; and it
provides the step's ``reader``, :func:`read_lines`, which warps only the window of each line that a
tile needs.

Choices (written down here because the engine relies on them):

- Wavelengths come from a sidecar table named in the config when there is one, else from band
  metadata: band tags ``wavelength`` / ``wavelength_nm`` / ``NETCDF_DIM_wavelength`` (and ``fwhm`` /
  ``fwhm_nm``), else from band descriptions such as ``"b001 (412.5 nm)"``. Values below 30 are taken
  as micrometres (no imaging spectrometer of the reflective range has band centres below 30 nm;
  common practice) unless a unit says otherwise, and converted to nm. They must increase strictly.
- A footprint is the outline of the valid pixels of one band of the line (holes filled), simplified by
  half a pixel, in the target grid's pixel coordinates. It decides which tiles a line meets and gives
  each pixel its distance to the swath edge (the overlap policy "nearest swath centre").
- Tiles are warped with ``rasterio.warp.reproject`` from a source window covering the tile plus a
  margin, with an exact transformer (``tolerance=0``) and a fixed resampling scale
  (``XSCALE``/``YSCALE`` = source over target resolution), so that a tile equals the same window of a
  whole-line warp. Nearest neighbour is warped on the stored integers and decoded after; bilinear is
  warped on decoded float32 with NaN as nodata.
"""
from __future__ import annotations

import csv
import dataclasses
import datetime as _dt
import hashlib
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from swathmill.tiles.grid import Grid, Tile, Window
from swathmill.tiles.step import StepError

__all__ = [
    "IngestError",
    "LineInfo",
    "acquisition_time",
    "parse_time",
    "iso_utc",
    "ACQUISITION_TAGS",
    "ACQUISITION_END_TAGS",
    "LineParams",
    "to_nanometres",
    "read_wavelength_table",
    "band_metadata_wavelengths",
    "inspect_line",
    "bad_band_mask",
    "fingerprint_file",
    "is_gdal_name",
    "target_grid",
    "footprint_to_grid",
    "segments_of",
    "edge_distance",
    "warp_window",
    "read_lines",
    "footprints_geojson",
]

MICROMETRE_LIMIT = 30.0  # band centres below this are micrometres (see the module docstring)
_WL_KEYS = ("wavelength", "wavelength_nm", "center_wavelength", "centre_wavelength", "netcdf_dim_wavelength")
_FWHM_KEYS = ("fwhm", "fwhm_nm", "bandwidth", "netcdf_dim_fwhm")
_UNIT_KEYS = ("wavelength_units", "wavelength_unit", "wavelength_units_name")
_DESC_UNIT_RE = re.compile(
    r"([0-9]+(?:\.[0-9]*)?)\s*(nm|nanometers?|nanometres?|um|µm|micrometers?|micrometres?|microns?)\b", re.IGNORECASE)
_DESC_NUMBER_RE = re.compile(r"^\s*([0-9]+(?:\.[0-9]*)?)\s*$")


@dataclass(frozen=True)
class LineParams:
    """How the mosaic step reads one flight line (part of its parameters, worked out by its plan).

    ``bands`` are the 1-based band indexes read, ``scale`` and ``offset`` decode each of them,
    ``xscale`` and ``yscale`` are the warper's fixed resampling scale (target pixels per source pixel),
    ``bbox_px`` is ``(col0, row0, col1, row1)``: the grid pixels the line's footprint can touch.
    """

    number: int
    name: str
    path: str
    crs: str
    same_crs: bool
    transform: tuple[float, ...]
    width: int
    height: int
    nodata: float | None
    bands: tuple[int, ...]
    scale: tuple[float, ...]
    offset: tuple[float, ...]
    xscale: float
    yscale: float
    bbox_px: tuple[int, int, int, int]

    def __post_init__(self) -> None:
        for k in ("transform", "bands", "scale", "offset", "bbox_px"):
            object.__setattr__(self, k, tuple(getattr(self, k)))
        if len(self.scale) != len(self.bands) or len(self.offset) != len(self.bands):
            raise IngestError(f"flight line {self.name!r}: {len(self.bands)} bands but {len(self.scale)} scales "
                              f"and {len(self.offset)} offsets")


class IngestError(StepError):
    """A flight line or its metadata cannot be used; the message names the file (and band) at fault.

    A :class:`~swathmill.tiles.step.StepError` (a ``ValueError``): the mosaic step cannot be declared from
    these inputs, and nothing has run.
    """


# ---------------------------------------------------------------------------------------------
# wavelengths


def _unit_name(unit: str | None) -> str:
    """Normalise a unit string to "nm", "um" or "auto"."""
    if unit is None:
        return "auto"
    u = str(unit).strip().lower()
    if u in ("", "auto", "unknown"):
        return "auto"
    if u in ("nm", "nanometer", "nanometers", "nanometre", "nanometres"):
        return "nm"
    if u in ("um", "µm", "micrometer", "micrometers", "micrometre", "micrometres", "micron", "microns"):
        return "um"
    raise IngestError(f"unknown wavelength unit {unit!r}: expected nm or um (micrometres)")


def to_nanometres(values: np.ndarray, unit: str | None = "auto", *, what: str = "wavelengths") -> tuple[np.ndarray, str]:
    """Convert wavelengths (or widths) to nanometres.

    Parameters
    ----------
    values : band centres in nm or micrometres.
    unit : "nm", "um" or "auto" (values below 30 are micrometres).
    what : name used in error messages.

    Returns
    -------
    (values in nm as float64, the unit that was applied: "nm" or "um")
    """
    v = np.asarray(values, dtype=np.float64)
    u = _unit_name(unit)
    if u == "auto":
        finite = v[np.isfinite(v)]
        u = "um" if finite.size and np.nanmax(finite) < MICROMETRE_LIMIT else "nm"
    return (v * 1000.0 if u == "um" else v.copy()), u


def _check_increasing(wl: np.ndarray, where: str) -> None:
    if not np.all(np.isfinite(wl)):
        bad = int(np.flatnonzero(~np.isfinite(wl))[0])
        raise IngestError(f"{where}: band {bad + 1} has no valid wavelength (got {wl[bad]!r})")
    d = np.diff(wl)
    if np.any(d <= 0):
        k = int(np.flatnonzero(d <= 0)[0])
        raise IngestError(
            f"{where}: wavelengths must increase from band to band; band {k + 2} is at {wl[k + 1]:g} nm "
            f"after band {k + 1} at {wl[k]:g} nm. Reorder the bands or fix the wavelength table")


def read_wavelength_table(path: str | Path, unit: str | None = "auto") -> tuple[np.ndarray, np.ndarray]:
    """Read a sidecar table of band centres (and widths), one row per band in file order.

    The table is CSV with a header row. The wavelength column is named ``wavelength``,
    ``wavelength_nm`` or ``wavelength_um`` (also ``wl``, ``center``, ``centre``); an optional width column
    ``fwhm``, ``fwhm_nm`` or ``fwhm_um``. Other columns (e.g. ``band``) are ignored. A ``_um`` / ``_nm``
    suffix sets the unit; otherwise ``unit`` applies ("auto": values below 30 are micrometres).

    Returns
    -------
    (wavelength_nm, fwhm_nm) as float64 arrays; FWHM is NaN where unknown.
    """
    p = Path(path)
    try:
        with p.open(newline="", encoding="utf-8") as fh:
            rows = [r for r in csv.reader(fh) if r and any(c.strip() for c in r) and not r[0].lstrip().startswith("#")]
    except OSError as exc:
        raise IngestError(f"wavelength table {str(p)!r} cannot be read: {exc}") from exc
    if len(rows) < 2:
        raise IngestError(f"wavelength table {str(p)!r} needs a header row and one row per band. Got {len(rows)} row(s)")
    header = [h.strip().lower() for h in rows[0]]
    wl_col = fw_col = None
    wl_unit = fw_unit = unit
    for i, h in enumerate(header):
        base, _, suffix = h.partition("_")
        if h in ("wavelength", "wavelength_nm", "wavelength_um", "wl", "wl_nm", "wl_um", "center", "centre",
                 "center_nm", "centre_nm", "center_um", "centre_um") and wl_col is None:
            wl_col = i
            if suffix in ("nm", "um"):
                wl_unit = suffix
        elif h in ("fwhm", "fwhm_nm", "fwhm_um", "bandwidth", "bandwidth_nm", "bandwidth_um") and fw_col is None:
            fw_col = i
            if suffix in ("nm", "um"):
                fw_unit = suffix
    if wl_col is None:
        raise IngestError(f"wavelength table {str(p)!r} has no wavelength column: expected one named "
                          f"'wavelength_nm', 'wavelength_um' or 'wavelength'. Got columns {rows[0]}")
    wl = np.empty(len(rows) - 1)
    fw = np.full(len(rows) - 1, np.nan)
    for k, r in enumerate(rows[1:]):
        try:
            wl[k] = float(r[wl_col])
            if fw_col is not None and fw_col < len(r) and r[fw_col].strip() not in ("", "nan", "NaN", "NA"):
                fw[k] = float(r[fw_col])
        except (ValueError, IndexError) as exc:
            raise IngestError(f"wavelength table {str(p)!r}, row {k + 2}: not a number ({exc}). Got {r}") from exc
    wl_nm, applied = to_nanometres(wl, wl_unit)
    if fw_col is not None:
        fw_nm, _ = to_nanometres(fw, applied if _unit_name(fw_unit) == "auto" else fw_unit)
    else:
        fw_nm = fw
    _check_increasing(wl_nm, f"wavelength table {str(p)!r}")
    return wl_nm, fw_nm


def band_metadata_wavelengths(ds: Any, unit: str = "auto") -> tuple[np.ndarray, np.ndarray, str] | None:
    """Band centres and widths from a rasterio dataset's band tags or descriptions, or None.

    ``unit`` ("auto", "nm", "um") overrides a unit the file states; "auto" uses the file's unit
    (tag ``wavelength_units``) or, without one, the rule of :func:`to_nanometres`.
    Returns (wavelength_nm, fwhm_nm, source description) or None when no band carries a wavelength.
    Raises :class:`IngestError` when some bands carry one and others do not.
    """
    override = _unit_name(unit)
    n = ds.count
    file_unit = None
    dtags = {k.lower(): v for k, v in ds.tags().items()}
    for key in _UNIT_KEYS:
        if key in dtags:
            file_unit = dtags[key]
    wl = np.full(n, np.nan)
    fw = np.full(n, np.nan)
    found = np.zeros(n, dtype=bool)
    for b in range(1, n + 1):
        tags = {k.lower(): v for k, v in ds.tags(b).items()}
        for key in _WL_KEYS:
            if key in tags:
                try:
                    wl[b - 1] = float(str(tags[key]).strip().split()[0])
                except (ValueError, IndexError) as exc:
                    raise IngestError(f"{ds.name}: band {b} tag {key}={tags[key]!r} is not a number") from exc
                found[b - 1] = True
                break
        for key in _FWHM_KEYS:
            if key in tags:
                try:
                    fw[b - 1] = float(str(tags[key]).strip().split()[0])
                except (ValueError, IndexError):
                    raise IngestError(f"{ds.name}: band {b} tag {key}={tags[key]!r} is not a number") from None
                break
        for key in _UNIT_KEYS:
            if key in tags:
                file_unit = tags[key]
    source = "band tags"
    if not found.any():
        descs = ds.descriptions
        parsed = [(_DESC_UNIT_RE.search(d) or _DESC_NUMBER_RE.match(d)) if d else None for d in descs]
        if descs and all(m is not None for m in parsed):
            wl = np.array([float(m.group(1)) for m in parsed])
            units = {((m.group(2) if m.re is _DESC_UNIT_RE else "") or "").lower() for m in parsed}
            units.discard("")
            if len(units) == 1:
                file_unit = units.pop()
            found[:] = True
            source = "band descriptions"
        else:
            return None
    if not found.all():
        missing = (np.flatnonzero(~found) + 1).tolist()
        raise IngestError(f"{ds.name}: band(s) {missing[:10]} have no wavelength tag while others do; "
                          "tag every band or name a wavelength table in the config")
    wl_nm, applied = to_nanometres(wl, file_unit if override == "auto" else override)
    fw_nm, _ = to_nanometres(fw, applied)
    return wl_nm, fw_nm, source


def bad_band_mask(wavelength_nm: np.ndarray, windows: Iterable[Sequence[float]]) -> np.ndarray:
    """True for bands whose centre lies in any of the closed windows ``[(lo, hi), ...]`` in nm."""
    wl = np.asarray(wavelength_nm, dtype=np.float64)
    bad = np.zeros(wl.shape, dtype=bool)
    for w in windows:
        lo, hi = float(w[0]), float(w[1])
        if hi < lo:
            raise IngestError(f"bad-band window must be (low, high) in nm with low <= high. Got {list(w)}")
        bad |= (wl >= lo) & (wl <= hi)
    return bad


# ---------------------------------------------------------------------------------------------
# lines


@dataclass(frozen=True)
class LineInfo:
    """What the mosaic needs to know about one flight line (no pixel data).

    number is 1-based (the value of the ``source`` layer); ``footprint`` is a shapely geometry in
    the line's own CRS; ``scale``/``offset`` are per band (physical = stored * scale + offset).
    """

    path: str
    name: str
    number: int
    crs: str
    transform: tuple[float, ...]
    width: int
    height: int
    count: int
    dtype: str
    nodata: float | None
    scale: np.ndarray
    offset: np.ndarray
    wavelength: np.ndarray
    fwhm: np.ndarray
    wavelength_source: str
    footprint: Any = field(repr=False)
    valid_pixels: int = 0
    fingerprint: str = ""
    scale_source: str = ""
    acquired: tuple[str, str] | None = None
    acquired_source: str = ""

    @property
    def res(self) -> tuple[float, float]:
        a, b, _, d, e, _ = self.transform
        return math.hypot(a, d), math.hypot(b, e)


_GDAL_NAME = re.compile(r"^(?:[A-Za-z][A-Za-z0-9_]+:|/vsi)")


def is_gdal_name(path: str) -> bool:
    """True for GDAL dataset names that are not plain paths (``NETCDF:"f.nc":var``, ``HDF5:...``, ``/vsi...``)."""
    return bool(_GDAL_NAME.match(str(path))) and not re.match(r"^[A-Za-z]:[\\/]", str(path))


def _file_of(path: str) -> Path | None:
    """The file a dataset name refers to: the path itself, or the quoted / colon-separated part that exists."""
    p = Path(path)
    if p.is_file():
        return p
    for part in re.split(r":(?!//)", str(path)):
        q = Path(part.strip('"'))
        if part and q.is_file():
            return q
    return None


def fingerprint_file(path: str | Path, blocks: int = 16, block_size: int = 1 << 16) -> str:
    """A cheap content fingerprint: size plus SHA-256 of ``blocks`` evenly spaced 64 KiB blocks.

    Reading whole multi-gigabyte lines only to name them would double the mosaic's I/O; a sample of
    blocks and the size detect a replaced or rewritten file in practice. Files up to
    ``blocks * block_size`` bytes are hashed whole.
    """
    p = Path(path)
    size = p.stat().st_size
    h = hashlib.sha256(str(size).encode())
    with p.open("rb") as fh:
        if size <= blocks * block_size:
            h.update(fh.read())
        else:
            for k in range(blocks):
                fh.seek((size - block_size) * k // (blocks - 1))
                h.update(fh.read(block_size))
    return h.hexdigest()[:20]


def _scales(ds: Any, scale: float | None, offset: float | None) -> tuple[np.ndarray, np.ndarray, str]:
    n = ds.count
    if scale is not None:
        return np.full(n, float(scale)), np.full(n, float(offset or 0.0)), "config"
    s = np.array([1.0 if v is None else float(v) for v in ds.scales])
    o = np.array([0.0 if v is None else float(v) for v in ds.offsets])
    if np.any(s != 1.0) or np.any(o != 0.0):
        if offset is not None:
            o = np.full(n, float(offset))
        return s, o, "band scale/offset"
    if np.issubdtype(np.dtype(ds.dtypes[0]), np.integer):
        # reflectance x 10000 in integers is common practice
        return np.full(n, 1e-4), np.full(n, float(offset or 0.0)), "default for integers (1e-4)"
    return np.ones(n), np.full(n, float(offset or 0.0)), "default for floats (1)"


def _footprint(mask: np.ndarray, transform: Any, res: float) -> Any:
    """Outline of the valid pixels (holes filled), simplified by half a pixel, in the raster's CRS."""
    import shapely
    from rasterio import features
    from scipy import ndimage

    filled = ndimage.binary_fill_holes(mask)
    polys = [shapely.geometry.shape(g) for g, v in features.shapes(filled.astype(np.uint8), mask=filled,
                                                                    transform=transform, connectivity=4) if v == 1]
    geom = shapely.union_all(polys)
    return geom.simplify(0.5 * res, preserve_topology=True)


def inspect_line(
    path: str | Path,
    *,
    number: int = 1,
    name: str | None = None,
    wavelength_table: str | Path | None = None,
    wavelength_unit: str = "auto",
    nodata: float | None = None,
    scale: float | None = None,
    offset: float | None = None,
    footprint_band: int | None = None,
) -> LineInfo:
    """Open one flight line, check it and describe it.

    Parameters
    ----------
    path : raster file any GDAL driver opens (GeoTIFF, NetCDF, HDF5 subdataset names, ...).
    number : 1-based line number (the value in the ``source`` layer).
    name : line name; default the file stem.
    wavelength_table : sidecar CSV of band centres (see :func:`read_wavelength_table`); overrides band
        metadata when given.
    wavelength_unit : "auto", "nm" or "um" for values without a unit.
    nodata : stored nodata value for files that declare none.
    scale, offset : physical = stored * scale + offset; None takes the file's band scales, else 1e-4
        for integer data (reflectance x 10000, common practice) and 1 for floating point.
    footprint_band : 1-based band whose valid pixels outline the footprint; default the band nearest
        the middle of the spectrum.

    Raises
    ------
    IngestError naming the file (and band) for: an unreadable file, no CRS or no transform, missing or
    decreasing wavelengths, a wavelength table whose length does not match the band count, a line
    without a single valid pixel, and data that do not look like reflectance after scaling.
    """
    import rasterio
    from rasterio.errors import RasterioIOError

    p = str(path)
    label = f"flight line {Path(p).name!r}"
    try:
        ds = rasterio.open(p)
    except (RasterioIOError, OSError) as exc:
        raise IngestError(f"{label} ({p}) cannot be opened by GDAL: {exc}") from exc
    with ds:
        if ds.count < 1:
            raise IngestError(f"{label} has no raster bands (for a NetCDF/HDF5 container, name a subdataset)")
        if ds.crs is None:
            raise IngestError(f"{label} has no CRS: a flight line needs a coordinate reference system and "
                              "a geotransform (write them into the file, e.g. with rasterio or GDAL)")
        if ds.transform.is_identity:
            raise IngestError(f"{label} has no geotransform (identity transform)")
        if wavelength_table is not None:
            wl, fw = read_wavelength_table(wavelength_table, wavelength_unit)
            if wl.size != ds.count:
                raise IngestError(f"wavelength table {str(wavelength_table)!r} has {wl.size} rows but {label} "
                                  f"has {ds.count} bands: expected one row per band")
            src = f"table {Path(wavelength_table).name}"
        else:
            meta = band_metadata_wavelengths(ds, wavelength_unit)
            if meta is None:
                raise IngestError(f"{label} carries no wavelengths (no band tag 'wavelength' and no band "
                                  "description with a number): name a wavelength table in the config")
            wl, fw, src = meta
        _check_increasing(wl, label)
        nd = ds.nodata if ds.nodata is not None else nodata
        s, o, scale_src = _scales(ds, scale, offset)
        if footprint_band is None:
            footprint_band = ds.count // 2 + 1
        if not 1 <= footprint_band <= ds.count:
            raise IngestError(f"{label}: footprint band {footprint_band} is outside 1..{ds.count}")
        try:
            band = ds.read(footprint_band)
        except Exception as exc:  # GDAL raises several kinds for corrupt data
            raise IngestError(f"{label}: band {footprint_band} cannot be read: {exc}") from exc
        valid = _valid_stored(band, nd)
        nvalid = int(valid.sum())
        if nvalid == 0:
            raise IngestError(f"{label} is all nodata: band {footprint_band} has no valid pixel "
                              f"(nodata={nd!r}); drop the line or fix its nodata value")
        vals = band[valid].astype(np.float64) * s[footprint_band - 1] + o[footprint_band - 1]
        med = float(np.median(vals))
        if not -1.0 <= med <= 5.0:
            raise IngestError(
                f"{label}: band {footprint_band} has a median of {med:g} after scaling by "
                f"{s[footprint_band - 1]:g}; reflectance lies near 0..1. Set the scale factor in the config")
        res = math.hypot(ds.transform.a, ds.transform.d)
        fp = _footprint(valid, ds.transform, res)
        info = LineInfo(
            path=p if is_gdal_name(p) else os.path.abspath(p), name=name or Path(p).stem, number=int(number), crs=ds.crs.to_wkt(),
            transform=tuple(ds.transform)[:6], width=ds.width, height=ds.height, count=ds.count,
            dtype=ds.dtypes[0], nodata=None if nd is None else float(nd), scale=s, offset=o,
            wavelength=wl, fwhm=fw, wavelength_source=src, footprint=fp, valid_pixels=nvalid,
            fingerprint=fingerprint_file(f) if (f := _file_of(p)) is not None else "", scale_source=scale_src,
        )
        acq = acquisition_time(ds.tags(), label)
        if acq is not None:
            info = dataclasses.replace(info, acquired=acq[0], acquired_source=acq[1])
    return info


#: Dataset tags read as a line's acquisition time (case-insensitive, with or without a GDAL domain
#: prefix such as ``NC_GLOBAL#``): a single time, or the ACDD start and end of the time coverage.
#: TIFF's own ``TIFFTAG_DATETIME`` is the file's creation time (TIFF 6.0, tag 306), not the flight's,
#: and is not read.
ACQUISITION_TAGS: tuple[str, ...] = ("acquisition_time", "acquisition_datetime", "acquisition_start_time",
                                     "datetime", "time_coverage_start")
ACQUISITION_END_TAGS: tuple[str, ...] = ("acquisition_end_time", "time_coverage_end")


def parse_time(value: Any, where: str) -> _dt.datetime:
    """An ISO 8601 date or date-time as an aware UTC datetime (a time without a zone is UTC).

    Raises
    ------
    IngestError naming ``where`` and the value when it is not ISO 8601.
    """
    if isinstance(value, _dt.datetime):
        t = value
    elif isinstance(value, _dt.date):
        t = _dt.datetime(value.year, value.month, value.day)
    else:
        text = str(value).strip()
        try:
            t = _dt.datetime.fromisoformat(text[:-1] + "+00:00" if text.endswith("Z") else text)
        except ValueError as exc:
            raise IngestError(f"{where}: {text!r} is not an ISO 8601 date or date-time "
                              "(expected e.g. 2024-06-14T17:42:00Z)") from exc
    t = t if t.tzinfo else t.replace(tzinfo=_dt.timezone.utc)
    return t.astimezone(_dt.timezone.utc)


def iso_utc(t: _dt.datetime) -> str:
    """``t`` as ``YYYY-MM-DDTHH:MM:SSZ`` (UTC, whole seconds unless it has a fraction)."""
    t = t.astimezone(_dt.timezone.utc)
    return t.strftime("%Y-%m-%dT%H:%M:%S") + (f".{t.microsecond:06d}" if t.microsecond else "") + "Z"


def acquisition_time(tags: Mapping[str, str], label: str) -> tuple[tuple[str, str], str] | None:
    """A line's acquisition (start, end) as ISO 8601 UTC strings from its dataset tags, and the tag used.

    Looks for :data:`ACQUISITION_TAGS` (the start, or the one time) and :data:`ACQUISITION_END_TAGS`
    (the end; default the start). None when no such tag is present.

    Raises
    ------
    IngestError naming the line and the tag when a tag is not an ISO 8601 date-time, or the end is
    before the start.
    """
    plain = {}
    for k, v in tags.items():
        plain.setdefault(str(k).split("#")[-1].strip().lower(), (str(k), v))
    start = next(((plain[k][0], plain[k][1]) for k in ACQUISITION_TAGS if k in plain), None)
    if start is None:
        return None
    t0 = parse_time(start[1], f"{label}: tag {start[0]!r}")
    end = next(((plain[k][0], plain[k][1]) for k in ACQUISITION_END_TAGS if k in plain), None)
    t1 = parse_time(end[1], f"{label}: tag {end[0]!r}") if end is not None else t0
    if t1 < t0:
        raise IngestError(f"{label}: acquisition end {iso_utc(t1)} (tag {end[0]!r}) is before its start "
                          f"{iso_utc(t0)} (tag {start[0]!r})")
    return (iso_utc(t0), iso_utc(t1)), f"tag {start[0]}"



def _valid_stored(raw: np.ndarray, nodata: float | None) -> np.ndarray:
    """Valid pixels of stored values: not the nodata value and finite."""
    if np.issubdtype(raw.dtype, np.floating):
        ok = np.isfinite(raw)
        if nodata is not None and np.isfinite(nodata):
            ok &= raw != nodata
        return ok
    if nodata is None or not np.isfinite(nodata):
        return np.ones(raw.shape, dtype=bool)
    info = np.iinfo(raw.dtype)
    if not info.min <= nodata <= info.max:
        return np.ones(raw.shape, dtype=bool)
    return raw != np.asarray(nodata).astype(raw.dtype)


# ---------------------------------------------------------------------------------------------
# grid and footprints


def _crs_string(crs: Any) -> str:
    from rasterio.crs import CRS

    c = CRS.from_user_input(crs)
    epsg = c.to_epsg()
    return f"EPSG:{epsg}" if epsg is not None and CRS.from_epsg(epsg) == c else c.to_wkt()


def _geom_to_crs(geom: Any, src_crs: str, dst_crs: str, seg: float) -> Any:
    """Reproject a shapely geometry, densifying it first so straight edges may bend."""
    import shapely
    from rasterio.crs import CRS
    from rasterio.warp import transform_geom

    if CRS.from_user_input(src_crs) == CRS.from_user_input(dst_crs):
        return geom
    dense = shapely.segmentize(geom, seg)
    return shapely.geometry.shape(transform_geom(src_crs, dst_crs, shapely.geometry.mapping(dense)))


def target_grid(
    lines: Sequence[LineInfo],
    crs: str | None = None,
    resolution: float | Sequence[float] | None = None,
    bounds: Sequence[float] | None = None,
) -> Grid:
    """The mosaic's grid: CRS, resolution and extent.

    Defaults: the first line's CRS, the finest resolution of the lines (measured in the target CRS),
    and the union of the lines' footprints, snapped outwards to whole pixels (edges at multiples of
    the resolution). An explicit ``bounds`` (left, bottom, right, top) is snapped the same way; every
    line must then overlap it.
    """
    import shapely
    from rasterio.warp import calculate_default_transform

    if not lines:
        raise IngestError("the mosaic needs at least one flight line. Got none")
    dst_crs = _crs_string(crs if crs is not None else lines[0].crs)
    if resolution is None:
        best: tuple[float, float] | None = None
        for ln in lines:
            if _crs_string(ln.crs) == dst_crs:
                r = ln.res
            else:
                tr, _, _ = calculate_default_transform(ln.crs, dst_crs, ln.width, ln.height,
                                                       *_raster_bounds(ln))
                r = (abs(tr.a), abs(tr.e))
            best = r if best is None else (min(best[0], r[0]), min(best[1], r[1]))
        rx, ry = best  # type: ignore[misc]
    elif isinstance(resolution, (int, float)):
        rx = ry = float(resolution)
    else:
        rx, ry = float(resolution[0]), float(resolution[1])
    if not (rx > 0 and ry > 0):
        raise IngestError(f"resolution must be positive. Got {(rx, ry)}")
    fps = [(_geom_to_crs(ln.footprint, ln.crs, dst_crs, 2 * max(ln.res)), ln) for ln in lines]
    if bounds is None:
        union = shapely.union_all([g for g, _ in fps])
        left, bottom, right, top = union.bounds
    else:
        left, bottom, right, top = (float(v) for v in bounds)
        if not (right > left and top > bottom):
            raise IngestError(f"bounds must be (left, bottom, right, top) with right > left and top > bottom. "
                              f"Got {list(bounds)}")
    eps = 1e-9
    left = math.floor(left / rx + eps) * rx
    right = math.ceil(right / rx - eps) * rx
    bottom = math.floor(bottom / ry + eps) * ry
    top = math.ceil(top / ry - eps) * ry
    cols = max(1, int(round((right - left) / rx)))
    rows = max(1, int(round((top - bottom) / ry)))
    from affine import Affine

    grid = Grid(rows, cols, Affine(rx, 0.0, left, 0.0, -ry, top), dst_crs)
    box = shapely.box(*grid.bounds)
    outside = [ln for g, ln in fps if not g.intersects(box) or g.intersection(box).area <= 0]
    if outside:
        raise IngestError(
            "flight line(s) " + ", ".join(f"{Path(ln.path).name!r}" for ln in outside)
            + f" do not overlap the target grid {tuple(round(v, 3) for v in grid.bounds)} in {dst_crs}; "
            "check the bounds and CRS in the config")
    return grid


def _raster_bounds(ln: LineInfo) -> tuple[float, float, float, float]:
    from affine import Affine

    t = Affine(*ln.transform)
    xs, ys = zip(*[t @ (c, r) for c, r in ((0, 0), (ln.width, 0), (0, ln.height), (ln.width, ln.height))])
    return min(xs), min(ys), max(xs), max(ys)


def footprint_to_grid(line: LineInfo, grid: Grid) -> Any:
    """The line's footprint in the grid's pixel coordinates (x = column, y = row, y scaled to x pixels).

    Rows are multiplied by ``res_y / res_x`` so that distances are isotropic in units of x pixels.
    """
    import shapely

    g = _geom_to_crs(line.footprint, line.crs, grid.crs, 2 * max(line.res))
    inv = ~grid.transform
    k = grid.res[1] / grid.res[0]

    def to_px(xy: np.ndarray) -> np.ndarray:
        c = inv.a * xy[:, 0] + inv.b * xy[:, 1] + inv.c
        r = inv.d * xy[:, 0] + inv.e * xy[:, 1] + inv.f
        return np.column_stack([c, r * k])

    return shapely.transform(g, to_px)


def segments_of(geom: Any) -> np.ndarray:
    """All boundary segments of a (multi)polygon as an (n, 4) float64 array x0, y0, x1, y1."""
    import shapely

    out = []
    for ring in shapely.get_parts(shapely.boundary(geom)):
        xy = np.asarray(shapely.get_coordinates(ring), dtype=np.float64)
        if len(xy) >= 2:
            out.append(np.column_stack([xy[:-1], xy[1:]]))
    return np.concatenate(out) if out else np.zeros((0, 4))


def _seg_dist2(px: np.ndarray, py: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Squared distance from points (px, py) to segments s = (x0, y0, x1, y1) (broadcasting)."""
    x0, y0, x1, y1 = s
    dx, dy = x1 - x0, y1 - y0
    ll = dx * dx + dy * dy
    t = ((px - x0) * dx + (py - y0) * dy) / np.where(ll > 0, ll, 1.0)
    t = np.clip(np.where(ll > 0, t, 0.0), 0.0, 1.0)
    ex = px - (x0 + t * dx)
    ey = py - (y0 + t * dy)
    return ex * ex + ey * ey


def edge_distance(segments: np.ndarray, window: Window, yscale: float = 1.0, block: int = 64) -> np.ndarray:
    """Distance (in x pixels) from each pixel centre of ``window`` to the nearest footprint edge.

    ``segments`` are in the grid's pixel coordinates as made by :func:`footprint_to_grid` (rows
    scaled by ``yscale = res_y / res_x``). The result does not depend on how the grid is tiled:
    each pixel's distance is the minimum over the same global segments, computed by the same
    formula. Work is done in blocks of ``block`` pixels; for each block, segments that cannot be the
    nearest for any of its pixels are skipped (an exact pruning: it does not change the result).
    """
    rows, cols = window.shape
    out = np.full((rows, cols), np.inf, dtype=np.float32)
    s = np.asarray(segments, dtype=np.float64).reshape(-1, 4)
    if len(s) == 0 or rows == 0 or cols == 0:
        return out
    sx0, sx1 = np.minimum(s[:, 0], s[:, 2]), np.maximum(s[:, 0], s[:, 2])
    sy0, sy1 = np.minimum(s[:, 1], s[:, 3]), np.maximum(s[:, 1], s[:, 3])
    for i in range(0, rows, block):
        for j in range(0, cols, block):
            c = window.col + j + 0.5 + np.arange(min(block, cols - j), dtype=np.float64)
            r = (window.row + i + 0.5 + np.arange(min(block, rows - i), dtype=np.float64)) * yscale
            wx0, wx1, wy0, wy1 = c[0], c[-1], r[0], r[-1]
            dmax = np.zeros(len(s))
            for cx, cy in ((wx0, wy0), (wx1, wy0), (wx0, wy1), (wx1, wy1)):
                # the distance to a segment is convex, so over the block it peaks at a corner
                dmax = np.maximum(dmax, np.sqrt(_seg_dist2(np.array([cx]), np.array([cy]), s.T)))
            gapx = np.maximum(0.0, np.maximum(sx0 - wx1, wx0 - sx1))
            gapy = np.maximum(0.0, np.maximum(sy0 - wy1, wy0 - sy1))
            keep = np.hypot(gapx, gapy) <= dmax.min() + 1e-9  # bounding-box distance: a lower bound
            best = np.full((r.size, c.size), np.inf)
            px, py = c[None, :], r[:, None]
            for seg in s[keep]:
                np.minimum(best, _seg_dist2(px, py, seg), out=best)
            out[i:i + r.size, j:j + c.size] = np.sqrt(best)
    return out


# ---------------------------------------------------------------------------------------------
# warping a window


def warp_window(line: LineParams, grid: Grid, resampling: str = "nearest") -> np.ndarray | None:
    """Warp the window ``grid`` of one line: float32 (bands, rows, cols) reflectance, NaN outside.

    ``line`` is the description of the line the mosaic step carries (:class:`LineParams`).
    GDAL reads from the file only the source window the grid needs; source pixel coordinates are
    computed from the whole line's transform (not a cut-out's), so every tile does the same arithmetic
    as a whole-line warp. Returns None when the grid lies wholly outside the line's raster.
    """
    import rasterio
    from affine import Affine
    from rasterio.enums import Resampling
    from rasterio.errors import RasterioIOError
    from rasterio.warp import reproject, transform_bounds

    src_t = Affine(*line.transform)
    left, bottom, right, top = grid.bounds
    if line.same_crs:
        lb = (left, bottom, right, top)
    else:
        lb = transform_bounds(grid.crs, line.crs, left, bottom, right, top, densify_pts=21)
    inv = ~src_t
    xs, ys = zip(*[inv @ (x, y) for x, y in ((lb[0], lb[1]), (lb[0], lb[3]), (lb[2], lb[1]), (lb[2], lb[3]))])
    if max(xs) < -2 or min(xs) > line.width + 2 or max(ys) < -2 or min(ys) > line.height + 2:
        return None
    bands = [int(b) for b in line.bands]
    scale = np.asarray(line.scale, dtype=np.float32)[:, None, None]
    offset = np.asarray(line.offset, dtype=np.float32)[:, None, None]
    nodata = line.nodata
    opts = dict(dst_transform=grid.transform, dst_crs=grid.crs, tolerance=0.0,
                XSCALE=line.xscale, YSCALE=line.yscale, num_threads=1, warp_mem_limit=256)
    shift = _aligned_shift(line, grid) if resampling == "nearest" else None
    try:
        with rasterio.open(line.path) as ds:
            src = rasterio.band(ds, bands)
            dtype = np.dtype(ds.dtypes[0])
            integer = np.issubdtype(dtype, np.integer)
            if shift is not None:
                # the grid is the line's own pixel lattice: nearest-neighbour warping is a window copy
                out = _read_aligned(ds, bands, shift, grid.rows, grid.cols, nodata)
            elif resampling == "nearest" and integer and nodata is not None and _in_range(nodata, dtype):
                # nearest on the stored integers, decoded after: exact, and half the memory of float32
                dst = np.empty((len(bands), grid.rows, grid.cols), dtype=dtype)
                reproject(src, dst, src_nodata=nodata, dst_nodata=nodata, resampling=Resampling.nearest, **opts)
                bad = np.any(dst == np.asarray(nodata).astype(dtype), axis=0)
                out = dst.astype(np.float32)
                del dst
                np.copyto(out, np.float32(np.nan), where=bad[None])
            else:
                out = np.empty((len(bands), grid.rows, grid.cols), dtype=np.float32)
                src_nodata = nodata if nodata is not None else (np.nan if not integer else None)
                method = Resampling.nearest if resampling == "nearest" else Resampling.bilinear
                reproject(src, out, src_nodata=src_nodata, dst_nodata=np.nan, resampling=method, **opts)
    except (RasterioIOError, OSError) as exc:
        raise IngestError(f"flight line {Path(line.path).name!r} cannot be read: {exc}") from exc
    out *= scale
    if np.any(offset):
        out += offset
    return out


def _aligned_shift(line: LineParams, grid: Grid) -> tuple[int, int] | None:
    """(row, col) of the grid's first pixel in the line's raster when both share one pixel lattice."""
    if not line.same_crs:
        return None
    a, b, c, d, e, f = line.transform[:6]
    g = grid.transform
    if b != 0 or d != 0 or g.b != 0 or g.d != 0 or a != g.a or e != g.e:
        return None
    col, row = (g.c - c) / a, (g.f - f) / e
    if abs(col - round(col)) > 1e-6 or abs(row - round(row)) > 1e-6:
        return None
    return int(round(row)), int(round(col))


def _read_aligned(ds: Any, bands: list[int], shift: tuple[int, int], rows: int, cols: int,
                  nodata: float | None) -> np.ndarray:
    """The grid's window of a line on the same lattice: float32 stored values, NaN outside or at nodata."""
    from rasterio.windows import Window as RWindow

    out = np.full((len(bands), rows, cols), np.nan, dtype=np.float32)
    r0, c0 = shift
    rr0, cc0 = max(r0, 0), max(c0, 0)
    rr1, cc1 = min(r0 + rows, ds.height), min(c0 + cols, ds.width)
    if rr1 <= rr0 or cc1 <= cc0:
        return out
    raw = ds.read(bands, window=RWindow(cc0, rr0, cc1 - cc0, rr1 - rr0))
    part = out[:, rr0 - r0:rr1 - r0, cc0 - c0:cc1 - c0]
    np.copyto(part, raw, casting="unsafe")
    bad = ~_valid_stored(raw, nodata)
    del raw
    # a pixel with nodata in any band has no data (the reader drops it whole anyway)
    np.copyto(part, np.float32(np.nan), where=bad.any(axis=0)[None])
    return out


def _in_range(v: float, dtype: np.dtype) -> bool:
    info = np.iinfo(dtype)
    return bool(np.isfinite(v) and info.min <= v <= info.max and float(v).is_integer())


def read_lines(grid: Grid, tile: Tile, params: Any, static: Mapping[str, Any]) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """The mosaic step's reader: warp every line that meets the tile's padded window.

    ``params`` is the mosaic step's parameter object: its ``lines`` (:class:`LineParams`), ``yscale``
    and ``resampling`` are read.

    Returns ``({"line_<k>": float32 (bands, rows, cols), "edge_<k>": float32 (1, rows, cols)}, valid)``
    for each line k (1-based) that has a valid pixel in the window. ``line_<k>`` is reflectance on the
    mosaic's bands (spectrally resampled where the line's bands differ), NaN where the line has no
    data; ``edge_<k>`` the distance to the line's footprint edge in pixels, NaN where the line has no
    data; ``valid`` is True where at least one line has data. Files are opened and closed here, once
    per tile.
    """
    win = tile.padded
    rows, cols = win.shape
    data: dict[str, np.ndarray] = {}
    valid = np.zeros((rows, cols), dtype=bool)
    yscale = float(params.yscale)
    for line in params.lines:
        k = int(line.number)
        c0, r0, c1, r1 = line.bbox_px
        if c1 <= win.col or c0 >= win.col + win.cols or r1 <= win.row or r0 >= win.row + win.rows:
            continue
        arr = warp_window(line, grid, params.resampling)
        if arr is None:
            continue
        matrix = static.get(f"spectral_{k}")
        if matrix is not None:
            arr = _apply_spectral(arr, np.asarray(matrix, dtype=np.float32))
        ok = np.all(np.isfinite(arr), axis=0)
        if not ok.any():
            continue
        np.copyto(arr, np.float32(np.nan), where=~ok[None])
        edge = edge_distance(np.asarray(static[f"segments_{k}"]), win, yscale)
        edge[~ok] = np.nan
        data[f"line_{k}"] = arr
        data[f"edge_{k}"] = edge[None]
        valid |= ok
    return data, valid


def _apply_spectral(arr: np.ndarray, matrix: np.ndarray) -> np.ndarray:
    """(n_src, r, c) cube times an (n_src, n_dst) resampling matrix -> (n_dst, r, c)."""
    nb, r, c = arr.shape
    flat = arr.reshape(nb, r * c)
    out = np.empty((matrix.shape[1], r * c), dtype=np.float32)
    step = 65536
    for s in range(0, r * c, step):  # bounded workspace
        out[:, s:s + step] = matrix.T @ flat[:, s:s + step]
    return out.reshape(matrix.shape[1], r, c)


def footprints_geojson(lines: Sequence[LineInfo], grid: Grid | None = None,
                       overlaps: Sequence[Mapping[str, Any]] = ()) -> dict:
    """A GeoJSON FeatureCollection of the lines' footprints in longitude/latitude (RFC 7946).

    Each feature carries the line's number, name, file, valid pixel count, band count, wavelength
    range, and (when ``grid`` is given) its area in the grid's CRS units squared.
    """
    import shapely
    from rasterio.warp import transform_geom

    feats = []
    for ln in lines:
        dense = shapely.segmentize(ln.footprint, 10 * max(ln.res))
        geom = transform_geom(ln.crs, "EPSG:4326", shapely.geometry.mapping(dense))
        props: dict[str, Any] = {
            "line": ln.number, "name": ln.name, "file": Path(ln.path).name, "valid_pixels": ln.valid_pixels,
            "bands": ln.count, "wavelength_min_nm": float(ln.wavelength.min()),
            "wavelength_max_nm": float(ln.wavelength.max()), "wavelengths_from": ln.wavelength_source,
            "acquired_start": ln.acquired[0] if ln.acquired else None,
            "acquired_end": ln.acquired[1] if ln.acquired else None,
            "scale_factor": float(ln.scale[0]) if np.all(ln.scale == ln.scale[0]) else "per band",
            "scale_from": ln.scale_source,
        }
        if grid is not None:
            props["area"] = float(_geom_to_crs(ln.footprint, ln.crs, grid.crs, 2 * max(ln.res)).area)
            props["area_crs"] = grid.crs if grid.crs.startswith("EPSG:") else "grid CRS"
        feats.append({"type": "Feature", "geometry": geom, "properties": props})
    out: dict[str, Any] = {"type": "FeatureCollection", "features": feats}
    if overlaps:
        out["overlaps"] = [dict(o) for o in overlaps]
    return out
