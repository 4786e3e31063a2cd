"""The mosaic step: many flight lines onto one grid, overlaps resolved, brightness matched.

Pure functions (no I/O) do the science:

- :func:`resolve_overlaps` picks or blends the lines per pixel by a policy: ``nearest_centre`` (the
  line whose footprint edge is farthest, i.e. the pixel is nearest its swath centre; the default),
  ``first``, ``last`` (in config order) or ``feather`` (weights rising linearly from the footprint
  edge to ``blend_width`` pixels inside it).
- :func:`pair_sums` / :func:`solve_brightness` fit the brightness matching: for every pair of
  overlapping lines, sums over a seeded sample of pixels where both are valid; then one least-squares
  adjustment over all lines, per band, of gains and offsets ``g_k x + o_k`` minimising
  ``sum over pairs and samples of (g_i x_i + o_i - g_j x_j - o_j)^2`` with the reference line fixed
  at ``g = 1, o = 0``. Solving all lines at once makes the corrections agree around the overlap graph.
- Overlap statistics before and after matching (mean and RMS difference per pair and band) are
  computed exactly from the same sums, analytically, so no second pass over the data is needed.
  They describe the sampled pixels, not every overlapping pixel.

:class:`MosaicConfig` is the YAML section; :func:`build_mosaic_step` turns it into the engine's
:class:`~swathmill.tiles.step.Step` (named ``mosaic``; outputs ``reflectance`` and ``source``).

Bands keep their identity: bad-band windows drop bands but never renumber the rest. Each band of the
reflectance output is named after the reference line's band number and centre, ``b073 (1350.9 nm)``,
and carries the coordinates ``wavelength``, ``fwhm`` (nm) and ``source_band`` (that number). The outputs
carry the acquisition span of the lines (``acquisition_start`` / ``acquisition_end``, from each line's
own tag or the config's ``acquisition_time``), which every product made from them inherits.
"""
from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, Mapping, Sequence

import numpy as np
from pydantic import Field, field_validator, model_validator

from affine import Affine

from swathmill.tiles.grid import Grid, Tile, Window, anchor_grid
from swathmill.tiles.paths import resolve as resolve_path
from swathmill.tiles.samples import pixel_sample_mask, tiles_touching
from swathmill.workflows.params import Section
from swathmill.workflows.roles import Role
from swathmill.tiles.step import Block, Fit, OutputSpec, Step

from swathmill.workflows.inputs.ingest import (
    IngestError,
    LineInfo,
    LineParams,
    bad_band_mask,
    footprint_to_grid,
    footprints_geojson,
    inspect_line,
    iso_utc,
    parse_time,
    is_gdal_name,
    read_lines,
    segments_of,
    target_grid,
)

__all__ = [
    "MosaicConfig",
    "MosaicParams",
    "MosaicPlan",
    "plan_mosaic",
    "build_mosaic_step",
    "mosaic_step",
    "mosaic_kernel",
    "resolve_overlaps",
    "sample_mask",
    "pair_sums",
    "block_means",
    "accumulate_overlaps",
    "merge_overlaps",
    "finalize_brightness",
    "solve_brightness",
    "extend_brightness",
    "overlap_statistics",
    "select_overlap_tiles",
    "write_footprints",
    "SUGGESTED_BAD_BANDS",
]

#: Usual water-vapour windows (nm), a suggestion for ``bad_bands`` (common practice).
SUGGESTED_BAD_BANDS: tuple[tuple[float, float], ...] = ((1340.0, 1460.0), (1790.0, 1960.0))

Policy = Literal["nearest_centre", "first", "last", "feather"]


class MosaicConfig(Section):
    """The ``mosaic`` section of a run's YAML.

    Paths are relative to the config file's folder (``base_dir``). Example::

        mosaic:
          lines: [lines/line01.tif, lines/line02.tif, lines/line03.tif]
          wavelength_table: lines/wavelengths.csv     # optional; else band tags / descriptions
          bad_bands: [[1340, 1460], [1790, 1960]]     # nm, dropped everywhere
          overlap: nearest_centre                     # or first, last, feather (blend_width px)
          resampling: nearest                         # or bilinear
          brightness_matching: true                   # sample_size blocks of match_block px per pair
          spectral_tolerance: 1.0                     # nm; on_mismatch: resample | refuse
          crs: EPSG:32612                             # default: the first line's CRS
          resolution: 5.0                             # default: the finest line's
    """

    lines: list[str] = Field(min_length=1, description="flight line rasters, in priority order")
    names: list[str] | None = Field(None, description="line names (default: file stems)")
    wavelength_table: str | dict[str, str] | None = Field(
        None, description="sidecar CSV of band centres for every line, or {line file name: table}")
    wavelength_unit: Literal["auto", "nm", "um"] = "auto"
    scale_factor: float | None = Field(None, description="stored -> reflectance; None: file's or 1e-4 for integers")
    add_offset: float | None = None
    nodata: float | None = Field(None, description="stored nodata for lines that declare none")
    bad_bands: list[tuple[float, float]] = Field(default_factory=list, description="windows in nm dropped everywhere")
    crs: str | None = None
    resolution: float | tuple[float, float] | None = None
    bounds: tuple[float, float, float, float] | None = None
    overlap: Policy = "nearest_centre"
    blend_width: float = Field(20.0, gt=0, description="feather width in pixels")
    resampling: Literal["nearest", "bilinear"] = "nearest"
    brightness_matching: bool = True
    reference_line: int | str = Field(1, description="1-based number or name of the line others are matched to")
    sample_size: int = Field(20000, gt=0, description="sampled blocks per overlapping pair")
    match_block: int = Field(3, ge=1, le=16, description="side in pixels of the blocks whose means are matched")
    seed: int = 0
    spectral_tolerance: float = Field(1.0, ge=0, description="nm; larger band-centre differences need resampling")
    on_mismatch: Literal["resample", "refuse"] = "resample"
    output_nodata: int = -9999
    output_scale: float = Field(1e-4, gt=0)
    acquisition_time: str | dict[str, str] | None = Field(
        None, description="ISO 8601 acquisition time (UTC unless it names a zone) for lines whose files carry "
                          "none: one for every line, or {line name: time}; a line's own tag wins")
    anchor: int | None = Field(
        None, ge=1, description="snap the grid's edges outwards to multiples of this many pixels in the CRS "
                                "(the run sets it to the tile size, so tile indices stay put as the campaign grows)")

    @field_validator("bad_bands")
    @classmethod
    def _windows(cls, v: list[tuple[float, float]]) -> list[tuple[float, float]]:
        for w in v:
            if w[1] < w[0]:
                raise ValueError(f"bad_bands window must be (low, high) in nm. Got {list(w)}")
        return v

    @model_validator(mode="after")
    def _names(self) -> "MosaicConfig":
        if self.names is not None and len(self.names) != len(self.lines):
            raise ValueError(f"names has {len(self.names)} entries for {len(self.lines)} lines")
        if not -32768 <= self.output_nodata <= 32767:
            raise ValueError(f"output_nodata must fit int16. Got {self.output_nodata}")
        times = self.acquisition_time
        if isinstance(times, dict):
            names = self.names or [_default_name(str(p)) for p in self.lines]
            unknown = sorted(set(times) - set(names))
            if unknown:
                raise ValueError(f"acquisition_time names lines {unknown} that are not in the run; "
                                 f"line names are {names}")
            for k, v in times.items():
                parse_time(v, f"mosaic.acquisition_time[{k!r}]")
        elif times is not None:
            parse_time(times, "mosaic.acquisition_time")
        return self


@dataclass
class MosaicPlan:
    """Everything the mosaic step needs, worked out before any pixel is warped."""

    config: MosaicConfig
    lines: list[LineInfo]
    grid: Grid
    reference: int
    wavelength: np.ndarray
    fwhm: np.ndarray
    line_params: list[LineParams]
    spectral: dict[int, np.ndarray]
    segments: dict[int, np.ndarray]
    overlaps: list[dict]
    notes: list[str] = field(default_factory=list)
    overlap_shapes: dict[str, str] = field(default_factory=dict)
    source_bands: np.ndarray | None = None
    acquisition: tuple[str, str] | None = None
    acquisition_sources: dict[str, str] = field(default_factory=dict)

    @property
    def band_numbers(self) -> np.ndarray:
        """1-based numbers of the kept bands in the reference line (bad bands leave gaps, never renumber)."""
        if self.source_bands is None:
            return np.arange(1, len(self.wavelength) + 1)
        return np.asarray(self.source_bands, dtype=np.int64)

    @property
    def band_names(self) -> tuple[str, ...]:
        """Band names that keep each band's identity: the reference line's number and the centre wavelength.

        ``b073 (1350.9 nm)`` is band 73 of the reference line, centred at 1350.9 nm, whatever bands the
        bad-band windows dropped before it (the form the line readers parse back, see
        :func:`swathmill.workflows.inputs.ingest.band_metadata_wavelengths`).
        """
        numbers = self.band_numbers
        count = self.lines[self.reference - 1].count if self.lines else int(numbers.max())
        width = max(3, len(str(count)))
        return tuple(f"b{int(n):0{width}d} ({w:.1f} nm)" for n, w in zip(numbers, self.wavelength))


# ---------------------------------------------------------------------------------------------
# planning


def _table_for(cfg: MosaicConfig, path: Path, base: Path) -> Path | None:
    t = cfg.wavelength_table
    if t is None:
        return None
    if isinstance(t, str):
        return resolve_path(base, t).resolve()
    for key in (path.name, str(path), path.stem):
        if key in t:
            return resolve_path(base, t[key]).resolve()
    return None


def _default_name(path: str) -> str:
    """A line's default name: the file stem, or for a GDAL dataset name its last parts, sanitised."""
    if not is_gdal_name(path):
        return Path(path).stem
    tail = "_".join(x for x in re.split(r"[:/\\\"]+", path)[-2:] if x)
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", Path(tail).name if "/" in tail else tail).strip("_") or "line"


def plan_mosaic(cfg: MosaicConfig, base_dir: str | Path = ".") -> MosaicPlan:
    """Inspect the lines, choose the bands and the grid, and describe each line for the reader.

    Raises :class:`~swathmill.workflows.inputs.ingest.IngestError` naming the line (and band) at fault.
    """
    from swathmill.workflows.spectral.spectra import SpectralCoverageError, resample

    base = Path(base_dir)
    # plain paths are relative to the config's folder; GDAL dataset names (NETCDF:..., HDF5:..., /vsi...)
    # are passed to GDAL as written
    paths = [Path(p) if is_gdal_name(p) or Path(p).is_absolute() else resolve_path(base, p).resolve() for p in cfg.lines]
    names = cfg.names or [_default_name(str(p)) for p in paths]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise IngestError(f"line names must be unique; repeated: {dup}. Set 'names' in the mosaic config")
    lines = [
        inspect_line(cfg.lines[k] if is_gdal_name(cfg.lines[k]) else p, number=k + 1, name=names[k],
                     wavelength_table=_table_for(cfg, p, base),
                     wavelength_unit=cfg.wavelength_unit, nodata=cfg.nodata, scale=cfg.scale_factor,
                     offset=cfg.add_offset)
        for k, p in enumerate(paths)
    ]
    if len(lines) > 65535:
        raise IngestError(f"at most 65535 lines fit the source layer. Got {len(lines)}")
    if isinstance(cfg.reference_line, str):
        if cfg.reference_line not in names:
            raise IngestError(f"reference_line {cfg.reference_line!r} is not a line name. Got names {names}")
        reference = names.index(cfg.reference_line) + 1
    else:
        reference = int(cfg.reference_line)
        if not 1 <= reference <= len(lines):
            raise IngestError(f"reference_line must be 1..{len(lines)}. Got {reference}")
    ref = lines[reference - 1]
    keep = ~bad_band_mask(ref.wavelength, cfg.bad_bands)
    if not keep.any():
        raise IngestError(f"the bad-band windows {cfg.bad_bands} drop every band of the reference line "
                          f"{Path(ref.path).name!r} ({ref.wavelength.min():g}-{ref.wavelength.max():g} nm)")
    wl = ref.wavelength[keep]
    fw = ref.fwhm[keep]
    grid = target_grid(lines, cfg.crs, cfg.resolution, cfg.bounds)
    if cfg.anchor:
        grid = anchor_grid(grid, int(cfg.anchor))
    yscale = grid.res[1] / grid.res[0]
    line_params: list[LineParams] = []
    spectral: dict[int, np.ndarray] = {}
    segments: dict[int, np.ndarray] = {}
    fps_px = {}
    notes: list[str] = []
    from rasterio.crs import CRS

    for ln in lines:
        label = f"flight line {Path(ln.path).name!r}"
        same_bands = ln.count == ref.count and np.max(np.abs(ln.wavelength - ref.wavelength)) <= cfg.spectral_tolerance
        if same_bands:
            bands = (np.flatnonzero(keep) + 1).tolist()
        elif cfg.on_mismatch == "refuse":
            if ln.count != ref.count:
                raise IngestError(
                    f"{label} has {ln.count} bands but the reference line {Path(ref.path).name!r} has "
                    f"{ref.count}, and on_mismatch is 'refuse'; set on_mismatch: resample to resample it")
            d = np.abs(ln.wavelength - ref.wavelength)
            b = int(np.argmax(d))
            raise IngestError(
                f"{label}: band {b + 1} is at {ln.wavelength[b]:g} nm, the reference line's at "
                f"{ref.wavelength[b]:g} nm ({d[b]:.3g} nm apart; tolerance {cfg.spectral_tolerance:g} nm) and "
                "on_mismatch is 'refuse'")
        else:
            src_keep = ~bad_band_mask(ln.wavelength, cfg.bad_bands)
            bands = (np.flatnonzero(src_keep) + 1).tolist()
            if len(bands) < 2:
                raise IngestError(f"{label} keeps {len(bands)} band(s) after the bad-band windows: cannot resample")
            try:
                eye = np.eye(len(bands))
                matrix = resample(ln.wavelength[src_keep], eye, wl, fw, on_uncovered="raise")
            except SpectralCoverageError as exc:
                raise IngestError(f"{label} cannot be resampled to the reference bands: {exc}") from exc
            spectral[ln.number] = matrix.astype(np.float32)
            method = "Gaussian" if np.all(np.isfinite(fw)) else ("linear" if not np.any(np.isfinite(fw)) else "Gaussian/linear")
            notes.append(f"{ln.name}: {ln.count} bands resampled to the reference's {len(wl)} ({method})")
        fp = footprint_to_grid(ln, grid)
        minx, miny, maxx, maxy = fp.bounds
        bbox = [max(int(math.floor(minx)) - 1, 0), max(int(math.floor(miny / yscale)) - 1, 0),
                min(int(math.ceil(maxx)) + 1, grid.cols), min(int(math.ceil(maxy / yscale)) + 1, grid.rows)]
        fps_px[ln.number] = fp
        segments[ln.number] = segments_of(fp)
        same_crs = CRS.from_user_input(ln.crs) == CRS.from_user_input(grid.crs)
        xs, ys = _scale_ratio(ln, grid, same_crs)
        line_params.append(LineParams(
            number=ln.number, name=ln.name, path=ln.path, crs=ln.crs, same_crs=bool(same_crs),
            transform=tuple(float(v) for v in ln.transform), width=ln.width, height=ln.height,
            nodata=ln.nodata, bands=tuple(bands),
            scale=tuple(float(ln.scale[b - 1]) for b in bands), offset=tuple(float(ln.offset[b - 1]) for b in bands),
            xscale=xs, yscale=ys, bbox_px=tuple(bbox),
        ))
    overlaps = []
    shapes: dict[str, str] = {}
    for i in range(len(lines)):
        for j in range(i + 1, len(lines)):
            inter = fps_px[i + 1].intersection(fps_px[j + 1])
            a = inter.area / yscale
            if a >= 1.0:
                overlaps.append({"pair": [i + 1, j + 1], "pixels": int(round(a)),
                                 "names": [lines[i].name, lines[j].name]})
                # where the fit must look, grown by a pixel plus the footprints' simplification
                # (half a line pixel each, in grid pixels)
                grow = 1.0 + 0.5 * (max(lines[i].res) + max(lines[j].res)) / grid.res[0]
                shapes[f"{i + 1}-{j + 1}"] = inter.buffer(grow, join_style="mitre").wkt
    acquisition, acq_sources = _acquisition(cfg, lines)
    return MosaicPlan(cfg, lines, grid, reference, wl, fw, line_params, spectral, segments, overlaps, notes,
                      overlap_shapes=shapes, source_bands=np.flatnonzero(keep) + 1, acquisition=acquisition,
                      acquisition_sources=acq_sources)


def _acquisition(cfg: MosaicConfig, lines: list[LineInfo]) -> tuple[tuple[str, str] | None, dict[str, str]]:
    """The acquisition range over the lines: each line's own tag, else the config's ``acquisition_time``.

    Returns ((start, end) as ISO 8601 UTC, {line name: where its time came from}); (None, {...}) when
    some line has no known time (a range over part of the campaign would mislead).
    """
    starts, ends, sources = [], [], {}
    given = cfg.acquisition_time
    for ln in lines:
        if ln.acquired is not None:
            t0, t1 = ln.acquired
            sources[ln.name] = ln.acquired_source
        else:
            value = given.get(ln.name) if isinstance(given, dict) else given
            if value is None:
                sources[ln.name] = "unknown"
                continue
            t0 = t1 = iso_utc(parse_time(value, "mosaic.acquisition_time"))
            sources[ln.name] = "config mosaic.acquisition_time"
        starts.append(t0)
        ends.append(t1)
    if len(starts) < len(lines):
        return None, sources
    key = lambda v: parse_time(v, "acquisition")  # noqa: E731
    return (min(starts, key=key), max(ends, key=key)), sources


def _scale_ratio(ln: LineInfo, grid: Grid, same_crs: bool) -> tuple[float, float]:
    """Target pixels per source pixel along x and y (the warper's fixed resampling scale).

    In another CRS, a source pixel's two sides at the line's centre are transformed into the target
    CRS and measured there.
    """
    rx, ry = ln.res
    if not same_crs:
        from affine import Affine
        from rasterio.warp import transform as warp_transform

        t = Affine(*ln.transform)
        cx, cy = ln.width / 2, ln.height / 2
        pts = [t @ (cx, cy), t @ (cx + 1, cy), t @ (cx, cy + 1)]
        xs, ys = warp_transform(ln.crs, grid.crs, [p[0] for p in pts], [p[1] for p in pts])
        rx = math.hypot(xs[1] - xs[0], ys[1] - ys[0])
        ry = math.hypot(xs[2] - xs[0], ys[2] - ys[0])
    return float(rx / grid.res[0]), float(ry / grid.res[1])


def mosaic_outputs(plan: MosaicPlan) -> dict[str, OutputSpec]:
    """Output descriptions: int16 reflectance (scale 1e-4) with wavelengths, and the source layer."""
    cfg = plan.config
    n = len(plan.lines)
    acq = ({"acquisition_start": plan.acquisition[0], "acquisition_end": plan.acquisition[1]}
           if plan.acquisition else {})
    refl = OutputSpec(
        role=Role.REFLECTANCE,
        bands=plan.band_names, dtype="int16", nodata=cfg.output_nodata,
        coords={"wavelength": tuple(float(v) for v in plan.wavelength),
                "fwhm": tuple(float(v) for v in plan.fwhm),
                "source_band": tuple(float(n) for n in plan.band_numbers)},
        attrs={"scale_factor": cfg.output_scale, "add_offset": 0.0, "units": "1",
               "long_name": "surface reflectance", "wavelength_units": "nm", "fwhm_units": "nm",
               "source_band_units": "1", **acq},
    )
    source = OutputSpec(
        role=Role.SOURCE,
        bands=("source",), dtype="uint8" if n <= 255 else "uint16", nodata=0, kind="categorical",
        class_names=tuple(ln.name for ln in plan.lines),
        attrs={"long_name": "flight line each pixel came from (0 = none)", "policy": cfg.overlap, **acq},
    )
    return {"reflectance": refl, "source": source}


@dataclass(frozen=True)
class MosaicParams:
    """The mosaic step's parameters: its configuration section and what its plan worked out.

    ``lines`` describe how each line is read; ``yscale`` is the grid's pixel height over its width
    (the footprints' and overlap shapes' y unit); ``pairs`` are the overlapping line pairs (1-based),
    ``sample_rates`` the sampled fraction of blocks per pair (``"i-j"``), ``overlap_shapes`` the WKT
    of each pair's overlap in those pixel units, ``grid_shape`` the grid's (rows, cols).
    """

    section: MosaicConfig
    lines: tuple[LineParams, ...]
    n_bands: int
    yscale: float
    matching: bool
    reference: int
    pairs: tuple[tuple[int, int], ...] = ()
    sample_rates: Mapping[str, float] = field(default_factory=dict)
    overlap_shapes: Mapping[str, str] = field(default_factory=dict)
    grid_shape: tuple[int, int] = (0, 0)
    fingerprints: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "lines", tuple(self.lines))
        object.__setattr__(self, "fingerprints", tuple(self.fingerprints))
        object.__setattr__(self, "pairs", tuple(tuple(int(v) for v in p) for p in self.pairs))
        object.__setattr__(self, "grid_shape", tuple(int(v) for v in self.grid_shape))

    @property
    def n_lines(self) -> int:
        return len(self.lines)

    @property
    def resampling(self) -> str:
        return self.section.resampling

    # growing campaigns (see swathmill.tiles.incremental) ---------------------------------------------
    def campaign_free(self) -> dict:
        """What the step's key hashes in an incremental run: every setting that does not name the lines.

        The lines themselves, their number and the extent enter each tile's own key instead
        (:meth:`tile_identity`), so adding a line changes only the keys of the tiles it touches.
        """
        sec = self.section.model_dump(mode="json", exclude={"lines", "names", "bounds"})
        # whether matching is on follows from the section and the lines; its gains enter the tile keys
        return {"section": sec, "n_bands": self.n_bands, "yscale": self.yscale}

    def line_changes(self) -> dict[str, str]:
        """The campaign's lines as name -> content fingerprint (what the run's history records)."""
        return {ln.name: fp for ln, fp in zip(self.lines, self.fingerprints)}

    def tile_identity(self, window: Window, model: Mapping[str, Any] | None) -> list:
        """What a tile whose padded window is ``window`` depends on: the lines the reader reads for it.

        Per line: its number (the source layer's value), name, content fingerprint, how it is read
        (bands, scales, resampling to the reference bands follows from the fingerprint and the step's
        key) and, when brightness matching is on, a hash of its gain and offset rows.
        """
        import hashlib

        out = []
        for k, ln in enumerate(self.lines):
            c0, r0, c1, r1 = ln.bbox_px
            if c1 <= window.col or c0 >= window.col + window.cols or r1 <= window.row or r0 >= window.row + window.rows:
                continue
            entry = [int(ln.number), ln.name, self.fingerprints[k] if k < len(self.fingerprints) else ln.path,
                     list(ln.bands), list(ln.scale), list(ln.offset), ln.nodata]
            if model is not None and "gain" in model:
                g = np.ascontiguousarray(np.asarray(model["gain"])[k], dtype=np.float64)
                o = np.ascontiguousarray(np.asarray(model["offset"])[k], dtype=np.float64)
                # no correction and gain 1, offset 0 give the same bytes (x * 1 + 0 == x in float32)
                if not (np.all(g == 1.0) and np.all(o == 0.0)):
                    entry.append(hashlib.sha256(g.tobytes() + o.tobytes()).hexdigest()[:16])
            out.append(entry)
        return out

    def fit_tile_identity(self, tile: Tile) -> dict:
        """What the brightness fit's accumulator reads on ``tile`` (refit mode keys its kept result on it).

        The lines its padded window reads (as :meth:`tile_identity`, without a model) and the pairs
        among them with their sampling rates (the seeds follow from the pairs' line numbers and the
        section). The grid's size enters through the tile's clamped padded window, which the engine
        hashes with it.
        """
        lines = self.tile_identity(tile.padded, None)
        here = {int(e[0]) for e in lines}
        pairs = [[i, j, float(self.sample_rates[f"{i}-{j}"])] for i, j in self.pairs if i in here and j in here]
        return {"lines": lines, "pairs": pairs}

    def frozen_stale(self, model: Mapping[str, Any]) -> bool:
        """Whether a kept brightness model lacks (or orders differently) any line of this plan."""
        return [str(v) for v in model.get("fingerprints", [])] != list(self.fingerprints)

    def _new_lines(self, model: Mapping[str, Any]) -> set[int]:
        old = {str(v) for v in model.get("fingerprints", [])}
        return {k + 1 for k, fp in enumerate(self.fingerprints) if fp not in old}

    def frozen_select(self, tiles: Sequence[Tile], model: Mapping[str, Any]) -> list[Tile]:
        """Tiles meeting an overlap of a line the kept model does not know (those are all its fit reads)."""
        import shapely

        new = self._new_lines(model)
        shapes = [shapely.from_wkt(w) for key, w in self.overlap_shapes.items()
                  if {int(v) for v in key.split("-")} & new]
        if not shapes:
            return []
        return tiles_touching(tiles, shapes, Affine.scale(1.0, float(self.yscale)))

    def frozen_finalize(self, acc: Mapping[str, np.ndarray] | None, model: Mapping[str, Any], meta: Any) -> dict:
        """The kept model extended to this plan's lines: known lines keep their gains, new ones are fitted.

        Lines are matched by content fingerprint (a re-flown line is a new line; a line no longer in
        the campaign is dropped). The new lines' gains and offsets come from one least-squares
        adjustment over their overlaps with each other and with the known lines, whose corrections are
        held fixed (:func:`solve_brightness` with ``fixed``).
        """
        return extend_brightness(acc, model, self)


def mosaic_step(plan: MosaicPlan) -> Step:
    """The engine step for a plan (see :func:`build_mosaic_step`)."""
    cfg = plan.config
    pairs = [o["pair"] for o in plan.overlaps]
    nblk = cfg.match_block ** 2
    rates = {f"{i}-{j}": min(1.0, cfg.sample_size * nblk / max(o["pixels"], 1)) for o, (i, j) in zip(plan.overlaps, pairs)}
    matching = bool(cfg.brightness_matching and pairs)
    params = MosaicParams(
        section=cfg, lines=tuple(plan.line_params), n_bands=int(len(plan.wavelength)),
        yscale=float(plan.grid.res[1] / plan.grid.res[0]), matching=matching, reference=plan.reference,
        pairs=tuple(tuple(p) for p in pairs), sample_rates=rates, overlap_shapes=dict(plan.overlap_shapes),
        grid_shape=(plan.grid.rows, plan.grid.cols), fingerprints=tuple(ln.fingerprint or f"path:{ln.path}" for ln in plan.lines))
    static: dict[str, Any] = {f"segments_{k}": v for k, v in plan.segments.items()}
    static.update({f"spectral_{k}": v for k, v in plan.spectral.items()})
    static["footprints"] = footprints_geojson(plan.lines, plan.grid, plan.overlaps)
    fit = (Fit(accumulate_overlaps, merge_overlaps, finalize_brightness, select=select_overlap_tiles,
               halo=cfg.match_block - 1) if matching else None)
    return Step(
        name="mosaic", kernel=mosaic_kernel, outputs=mosaic_outputs(plan), params=params, static=static,
        fit=fit, reader=read_lines, grid=plan.grid,
        sources={ln.path: ln.fingerprint for ln in plan.lines},
    )


def build_mosaic_step(cfg: MosaicConfig | Mapping[str, Any], base_dir: str | Path = ".") -> Step:
    """Validate the section, inspect the lines and declare the ``mosaic`` step.

    Parameters
    ----------
    cfg : a :class:`MosaicConfig` or the YAML mapping of the ``mosaic`` section.
    base_dir : folder that relative paths in the section are relative to.
    """
    if not isinstance(cfg, MosaicConfig):
        cfg = MosaicConfig.model_validate(dict(cfg))
    return mosaic_step(plan_mosaic(cfg, base_dir))


def write_footprints(source: Step | MosaicPlan, path: str | Path) -> Path:
    """Write the lines' footprints (GeoJSON, longitude/latitude) with their overlaps; return the path."""
    if isinstance(source, MosaicPlan):
        doc = footprints_geojson(source.lines, source.grid, source.overlaps)
    else:
        doc = source.static.get("footprints")
        if doc is None:
            raise ValueError(f"step {source.name!r} carries no footprints; was it made by build_mosaic_step?")
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(json.dumps(doc, indent=1))
    return p


# ---------------------------------------------------------------------------------------------
# overlaps


def resolve_overlaps(
    lines: Mapping[int, np.ndarray],
    edges: Mapping[int, np.ndarray],
    policy: Policy = "nearest_centre",
    blend_width: float = 20.0,
    gain: np.ndarray | None = None,
    offset: np.ndarray | None = None,
    shape: tuple[int, int, int] | None = None,
    source_dtype: str = "uint8",
    check_data: bool = True,
    in_place: bool = False,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Combine overlapping lines into one cube.

    Parameters
    ----------
    lines : line number (1-based) -> float32 (bands, rows, cols) reflectance, NaN where no data.
    edges : line number -> (rows, cols) distance to that line's footprint edge in pixels, NaN where
        the line has no data.
    policy : "nearest_centre" (largest edge distance wins; ties go to the lower line number),
        "first" / "last" (lowest / highest line number with data), "feather" (weights
        ``min(edge / blend_width, 1)``, weighted mean of the lines with data).
    gain, offset : (n_lines, bands) brightness corrections applied as ``gain * x + offset`` before
        combining (row k-1 for line k); None for none.
    shape : (bands, rows, cols) of the output when ``lines`` is empty.
    check_data : also treat pixels with a NaN in any band as having no data (False when the edges
        already carry NaN there, as the mosaic's reader guarantees).
    in_place : allow the line arrays to be overwritten (saves a copy of each).

    Returns
    -------
    reflectance float32 (bands, rows, cols) NaN where no line has data; source (rows, cols) line
    number (for feather: the line with the largest edge distance), 0 where none; valid (rows, cols).
    """
    if policy not in ("nearest_centre", "first", "last", "feather"):
        raise ValueError(f"overlap policy must be nearest_centre, first, last or feather. Got {policy!r}")
    if shape is None:
        if not lines:
            raise ValueError("resolve_overlaps needs the output shape when no line meets the window")
        shape = next(iter(lines.values())).shape  # type: ignore[assignment]
    nb, rows, cols = shape  # type: ignore[misc]
    feather = policy == "feather"
    out = np.zeros((nb, rows, cols), np.float32) if feather else np.full((nb, rows, cols), np.nan, np.float32)
    source = np.zeros((rows, cols), dtype=source_dtype)
    best = np.full((rows, cols), -np.inf, dtype=np.float32)
    wsum = np.zeros((rows, cols), dtype=np.float32)
    for k in sorted(lines):
        x = lines[k]
        if x.shape != (nb, rows, cols):
            raise ValueError(f"line {k} has shape {x.shape}; expected {(nb, rows, cols)}")
        e = np.asarray(edges[k], dtype=np.float32).reshape(rows, cols)
        ok = np.isfinite(e)
        if check_data:
            ok &= np.all(np.isfinite(x), axis=0)
        if policy == "first":
            sel = ok & (source == 0)
        elif policy == "last":
            sel = ok
        else:
            sel = ok & (e > best)
        if not ok.any():
            continue
        xc = x if in_place else x.copy()
        if gain is not None:
            xc *= np.asarray(gain[k - 1], dtype=np.float32)[:, None, None]
            if offset is not None:
                xc += np.asarray(offset[k - 1], dtype=np.float32)[:, None, None]
        if feather:
            w = np.where(ok, np.clip(e / np.float32(blend_width), 0.0, 1.0), 0.0).astype(np.float32)
            xc[:, ~ok] = 0.0
            xc *= w
            out += xc
            wsum += w
        else:
            np.copyto(out, xc, where=sel[None])
        source[sel] = k
        best[sel] = e[sel]
    if feather:
        has = wsum > 0
        np.divide(out, wsum, out=out, where=has[None])
        np.copyto(out, np.float32(np.nan), where=~has[None])
    valid = source > 0
    return out, source, valid


def _line_arrays(block: Block) -> tuple[dict[int, np.ndarray], dict[int, np.ndarray]]:
    lines, edges = {}, {}
    for key, arr in block.data.items():
        if key.startswith("line_"):
            k = int(key[5:])
            lines[k] = arr
            edges[k] = block.data[f"edge_{k}"][0]
    return lines, edges


def mosaic_kernel(block: Block, model: Mapping[str, Any] | None) -> dict[str, np.ndarray]:
    """The step's kernel: brightness corrections (when fitted) and the overlap policy."""
    p = block.params
    lines, edges = _line_arrays(block)
    gain = offset = None
    if model is not None and "gain" in model:
        gain, offset = np.asarray(model["gain"]), np.asarray(model["offset"])
    rows, cols = block.valid.shape
    # the reader marks a line's missing pixels with NaN edges, and its arrays are this tile's own
    refl, source, valid = resolve_overlaps(
        lines, edges, p.section.overlap, float(p.section.blend_width), gain, offset, shape=(p.n_bands, rows, cols),
        source_dtype="uint8" if p.n_lines <= 255 else "uint16", check_data=False, in_place=True)
    return {"reflectance": refl, "source": source[None], "valid": valid}


# ---------------------------------------------------------------------------------------------
# brightness matching


def sample_mask(rows: np.ndarray, cols: np.ndarray, rate: float, seed: int) -> np.ndarray:
    """A seeded Bernoulli sample of the pixels ``rows`` x ``cols`` that depends only on their global (row, col).

    Each pixel is sampled when its hash (:func:`swathmill.tiles.samples.pixel_sample_mask`) is below
    ``rate``; the sample is the same however the grid is tiled. Returns (rows.size, cols.size) booleans.
    """
    return pixel_sample_mask(np.asarray(rows)[:, None], np.asarray(cols)[None, :], seed, rate)


def pair_sums(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Sums for regressing one line on another: (6, bands) = n, sum x, sum y, sum x^2, sum y^2, sum xy.

    ``x`` and ``y`` are (bands, n) samples of the same pixels in two lines.
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    n = np.full(x.shape[0], x.shape[1], dtype=np.float64)
    return np.stack([n, x.sum(1), y.sum(1), (x * x).sum(1), (y * y).sum(1), (x * y).sum(1)])


def block_means(x: np.ndarray, r0: int, c0: int, nr: int, nc: int, b: int) -> np.ndarray:
    """Means of ``nr`` x ``nc`` blocks of ``b`` x ``b`` pixels starting at local (r0, c0): (..., nr, nc)."""
    sub = x[..., r0:r0 + nr * b, c0:c0 + nc * b]
    return sub.reshape(*sub.shape[:-2], nr, b, nc, b).mean(axis=(-3, -1))


def accumulate_overlaps(block: Block) -> dict[str, np.ndarray]:
    """Per tile: pair sums over sampled blocks where both lines of a pair are valid.

    The sampling unit is a block of ``match_block`` x ``match_block`` pixels on a lattice anchored at
    the grid's origin; its band means are compared. Averaging lowers the noise (and so the bias that
    noise in the regressor puts on a least-squares gain) and the effect of small misregistrations
    between lines. A block belongs to the tile holding its first pixel (the fit's halo holds the rest),
    and blocks that run past the grid's edge are not used, so each block is counted once and the sums
    do not depend on the tiling.
    """
    p: MosaicParams = block.params
    b = int(p.section.match_block)
    rows_g, cols_g = p.grid_shape
    lines, _ = _line_arrays(block)
    core, pad = block.tile.core, block.tile.padded
    R0 = -(-core.row // b) * b
    C0 = -(-core.col // b) * b
    R1 = min(core.row + core.rows, rows_g - b + 1)  # block origins: R0 <= R < R1, multiples of b
    C1 = min(core.col + core.cols, cols_g - b + 1)
    nr, nc = max(0, -(-(R1 - R0) // b)), max(0, -(-(C1 - C0) // b))
    acc: dict[str, np.ndarray] = {}
    if nr == 0 or nc == 0:
        return acc
    if R0 + nr * b > pad.row + pad.rows or C0 + nc * b > pad.col + pad.cols:
        raise ValueError(f"the fit's halo is too small for blocks of {b} px on {block.tile.name}")
    r0, c0 = R0 - pad.row, C0 - pad.col
    # a line's pixel has data where its edge distance is finite (the reader's NaN marks the rest)
    ok = {k: block_means(np.isfinite(block.data[f"edge_{k}"][0]).astype(np.float32), r0, c0, nr, nc, b) == 1.0
          for k in lines}
    brow = np.arange(R0 // b, R0 // b + nr)
    bcol = np.arange(C0 // b, C0 // b + nc)
    off = np.arange(b)
    for i, j in p.pairs:
        if i not in lines or j not in lines:
            continue
        both = ok[i] & ok[j]
        if not both.any():
            continue
        both &= sample_mask(brow, bcol, float(p.sample_rates[f"{i}-{j}"]), int(p.section.seed) + 7919 * i + j)
        if not both.any():
            continue
        bi, bj = np.nonzero(both)  # gather only the sampled blocks: (bands, n, b, b) -> means (bands, n)
        rr = (r0 + bi * b)[:, None, None] + off[None, :, None]
        cc = (c0 + bj * b)[:, None, None] + off[None, None, :]
        xi = lines[i][:, rr, cc].mean(axis=(2, 3), dtype=np.float64)
        xj = lines[j][:, rr, cc].mean(axis=(2, 3), dtype=np.float64)
        acc[f"{i}-{j}"] = pair_sums(xi, xj)
    return acc


def merge_overlaps(a: Mapping[str, np.ndarray] | None, b: Mapping[str, np.ndarray] | None) -> dict[str, np.ndarray]:
    """Add two accumulators key by key (associative and commutative)."""
    out = {k: v.copy() for k, v in (a or {}).items()}
    for k, v in (b or {}).items():
        out[k] = out[k] + v if k in out else v.copy()
    return out


def solve_brightness(
    sums: Mapping[tuple[int, int], np.ndarray],
    n_lines: int,
    reference: int = 1,
    min_samples: int = 10,
    fixed: Mapping[int, tuple[np.ndarray, np.ndarray]] | None = None,
) -> tuple[np.ndarray, np.ndarray, list[int]]:
    """One least-squares adjustment of per-band gains and offsets over all lines.

    Minimises, per band, ``sum over pairs (i, j) and samples p of (g_i x_ip + o_i - g_j x_jp - o_j)^2``
    with ``g_ref = 1, o_ref = 0``. The normal equations are built exactly from the pair sums of
    :func:`pair_sums` (x = line i, y = line j). Lines not connected to the reference through pairs
    with at least ``min_samples`` samples keep ``g = 1, o = 0`` and are returned as unmatched. A
    ridge of 1e-12 times the mean diagonal pulls any direction the data leave free (e.g. a band that
    is constant over an overlap) towards no correction.

    ``fixed`` holds lines whose (gain, offset) per band are known and kept (a growing campaign's
    already-matched lines); they anchor the adjustment as the reference does, and the reference keeps
    ``g = 1, o = 0`` unless it is among them.

    Returns
    -------
    gain (n_lines, bands), offset (n_lines, bands), unmatched line numbers.
    """
    used = {(int(i), int(j)): np.asarray(s, dtype=np.float64) for (i, j), s in sums.items()
            if np.asarray(s)[0].min() >= min_samples}
    nb = next(iter(used.values())).shape[1] if used else 0
    gain = np.ones((n_lines, max(nb, 0)))
    offset = np.zeros((n_lines, max(nb, 0)))
    # connected component of the reference
    adj: dict[int, set[int]] = {k: set() for k in range(1, n_lines + 1)}
    for i, j in used:
        adj[i].add(j)
        adj[j].add(i)
    known: dict[int, tuple[np.ndarray, np.ndarray]] = {reference: (np.ones(max(nb, 0)), np.zeros(max(nb, 0)))}
    for k, (g, o) in (fixed or {}).items():
        known[int(k)] = (np.asarray(g, dtype=np.float64), np.asarray(o, dtype=np.float64))
    comp, todo = set(known), list(known)
    while todo:
        for m in adj[todo.pop()]:
            if m not in comp:
                comp.add(m)
                todo.append(m)
    unmatched = sorted(set(range(1, n_lines + 1)) - comp)
    for k, (g, o) in known.items():
        if k != reference and g.shape == gain[k - 1].shape:
            gain[k - 1], offset[k - 1] = g, o
    if nb == 0 or len(comp) == len(known):
        return gain, offset, unmatched
    free = sorted(comp - set(known))
    idx = {k: n for n, k in enumerate(free)}
    m = len(free)
    N = np.zeros((nb, 2 * m, 2 * m))
    rhs = np.zeros((nb, 2 * m))

    def gi(k: int) -> int | None:
        return idx[k] if k in idx else None

    def oi(k: int) -> int | None:
        return m + idx[k] if k in idx else None

    for (i, j), s in used.items():
        if i not in comp or (i in known and j in known):
            continue
        n, sx, sy, sxx, syy, sxy = s
        # residual r = g_i x + o_i - g_j y - o_j ; coefficient vector entries (variable, value)
        terms_i = [(gi(i), "x"), (oi(i), "1")]
        terms_j = [(gi(j), "y"), (oi(j), "1")]
        # sums of products of the regressors: signs: +x, +1 for line i; -y, -1 for line j
        prod = {("x", "x"): sxx, ("x", "1"): sx, ("1", "1"): n, ("y", "y"): syy, ("y", "1"): sy,
                ("x", "y"): sxy, ("1", "x"): sx, ("1", "y"): sy, ("y", "x"): sxy}
        entries = [(v, a, 1.0, i) for v, a in terms_i] + [(v, a, -1.0, j) for v, a in terms_j]
        for va, a, sa, _ in entries:
            for vb, b, sb, kb in entries:
                val = sa * sb * prod[(a, b)]
                if va is not None and vb is not None:
                    N[:, va, vb] += val
                elif va is not None and vb is None:
                    # a fixed variable moves to the right-hand side with its value (the reference:
                    # g = 1 contributes, o = 0 does not)
                    if kb == reference and kb not in (fixed or {}):
                        if b in ("x", "y"):
                            rhs[:, va] -= val
                    else:
                        rhs[:, va] -= val * known[kb][0 if b in ("x", "y") else 1]
    ridge = 1e-12 * np.maximum(np.einsum("bii->b", N) / (2 * m), 1e-30)
    prior = np.concatenate([np.ones(m), np.zeros(m)])
    A = N + ridge[:, None, None] * np.eye(2 * m)[None]
    b = rhs + ridge[:, None] * prior[None]
    sol = np.linalg.solve(A, b[..., None])[..., 0]
    for k in free:
        gain[k - 1] = sol[:, idx[k]]
        offset[k - 1] = sol[:, m + idx[k]]
    return gain, offset, unmatched


def overlap_statistics(s: np.ndarray, gi: np.ndarray | float = 1.0, oi: np.ndarray | float = 0.0,
                       gj: np.ndarray | float = 1.0, oj: np.ndarray | float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Mean and RMS of ``(gi x + oi) - (gj y + oj)`` over the samples summarised by ``s`` (per band).

    Exact, from the sums of :func:`pair_sums`:
    ``mean = (gi Sx + n oi - gj Sy - n oj) / n`` and
    ``mean square = (gi^2 Sxx + gj^2 Syy - 2 gi gj Sxy + 2 d (gi Sx - gj Sy) + n d^2) / n`` with ``d = oi - oj``.
    """
    n, sx, sy, sxx, syy, sxy = np.asarray(s, dtype=np.float64)
    d = np.asarray(oi) - np.asarray(oj)
    gi, gj = np.asarray(gi, dtype=np.float64), np.asarray(gj, dtype=np.float64)
    mean = (gi * sx - gj * sy) / n + d
    ms = (gi * gi * sxx + gj * gj * syy - 2 * gi * gj * sxy + 2 * d * (gi * sx - gj * sy) + n * d * d) / n
    return mean, np.sqrt(np.maximum(ms, 0.0))


def finalize_brightness(acc: Mapping[str, np.ndarray] | None, params: MosaicParams, meta: Any) -> dict:
    """The brightness model: gains and offsets per line and band, and overlap statistics.

    Model keys: ``gain``, ``offset`` (n_lines, bands); ``pairs`` (P, 2); ``samples`` (P,);
    ``bias_before``, ``rmsd_before``, ``bias_after``, ``rmsd_after`` (P, bands); and JSON values
    ``reference``, ``unmatched_lines``, ``summary`` (per pair, means over bands of the absolute mean
    difference ("bias", the brightness mismatch) and of the RMS difference (which keeps the noise),
    before and after, and their reductions), ``statistics`` (how they were computed).
    """
    n_lines, nb, ref = params.n_lines, params.n_bands, int(params.reference)
    sums = {tuple(int(v) for v in k.split("-")): v for k, v in (acc or {}).items()}
    gain, offset, unmatched = solve_brightness(sums, n_lines, ref)
    if gain.shape[1] != nb:
        gain, offset = np.ones((n_lines, nb)), np.zeros((n_lines, nb))
    keys = sorted(sums)
    P = len(keys)
    pairs = np.array(keys, dtype=np.int64).reshape(P, 2)
    samples = np.array([int(sums[k][0, 0]) for k in keys], dtype=np.int64)
    stats, summary = _pair_stats(keys, sums, gain, offset, nb)
    return {
        "gain": gain, "offset": offset, "pairs": pairs, "samples": samples, **stats,
        "reference": ref, "unmatched_lines": unmatched, "summary": summary,
        "statistics": "exact over the sampled overlap pixels, from the pair sums (no second pass)",
        "fingerprints": list(params.fingerprints),
    }


def _pair_stats(keys, sums, gain, offset, nb):
    P = len(keys)
    stats = {name: np.zeros((P, nb)) for name in ("bias_before", "rmsd_before", "bias_after", "rmsd_after")}
    summary = []
    for p, (i, j) in enumerate(keys):
        s = sums[(i, j)]
        stats["bias_before"][p], stats["rmsd_before"][p] = overlap_statistics(s)
        stats["bias_after"][p], stats["rmsd_after"][p] = overlap_statistics(s, gain[i - 1], offset[i - 1],
                                                                            gain[j - 1], offset[j - 1])
        before, after = float(stats["rmsd_before"][p].mean()), float(stats["rmsd_after"][p].mean())
        bias_b, bias_a = float(np.abs(stats["bias_before"][p]).mean()), float(np.abs(stats["bias_after"][p]).mean())
        summary.append({"pair": [i, j], "samples": int(s[0, 0]),
                        "abs_bias_before": bias_b, "abs_bias_after": bias_a,
                        "bias_reduction": (1.0 - bias_a / bias_b) if bias_b > 0 else 0.0,
                        "rmsd_before": before, "rmsd_after": after,
                        "rmsd_reduction": (1.0 - after / before) if before > 0 else 0.0})
    return stats, summary


def extend_brightness(acc: Mapping[str, np.ndarray] | None, model: Mapping[str, Any], params: "MosaicParams") -> dict:
    """A kept brightness model carried over to ``params``' lines (see :meth:`MosaicParams.frozen_finalize`).

    ``acc`` holds pair sums over the tiles meeting the new lines' overlaps; only pairs with a new line
    are used. Statistics of pairs of known lines are carried over from ``model``; those of pairs with
    a new line come from ``acc``.
    """
    n_lines, nb, ref = params.n_lines, params.n_bands, int(params.reference)
    old_fp = [str(v) for v in model.get("fingerprints", [])]
    old_at = {fp: m for m, fp in enumerate(old_fp)}
    old_gain, old_offset = np.asarray(model["gain"], np.float64), np.asarray(model["offset"], np.float64)
    fixed = {k + 1: (old_gain[old_at[fp]], old_offset[old_at[fp]])
             for k, fp in enumerate(params.fingerprints) if fp in old_at}
    new = {k + 1 for k, fp in enumerate(params.fingerprints) if fp not in old_at}
    sums = {tuple(int(v) for v in k.split("-")): v for k, v in (acc or {}).items()}
    sums = {k: v for k, v in sums.items() if set(k) & new}
    gain, offset, unmatched = solve_brightness(sums, n_lines, ref, fixed=fixed)
    if gain.shape[1] != nb:  # no usable pair at all: known lines keep theirs, new ones none
        gain, offset = np.ones((n_lines, nb)), np.zeros((n_lines, nb))
        for k, (g, o) in fixed.items():
            gain[k - 1], offset[k - 1] = g, o
    # carried-over statistics of pairs of known lines, renumbered
    renum = {old_at[fp] + 1: k + 1 for k, fp in enumerate(params.fingerprints) if fp in old_at}
    carried = {}
    old_pairs = np.asarray(model.get("pairs", np.zeros((0, 2))), dtype=np.int64).reshape(-1, 2)
    for p, (i, j) in enumerate(old_pairs.tolist()):
        if i in renum and j in renum:
            carried[tuple(sorted((renum[i], renum[j])))] = p
    keys = sorted(set(sums) | set(carried))
    stats_new, summary_new = _pair_stats(sorted(sums), sums, gain, offset, nb)
    at_new = {k: n for n, k in enumerate(sorted(sums))}
    P = len(keys)
    stats = {name: np.zeros((P, nb)) for name in ("bias_before", "rmsd_before", "bias_after", "rmsd_after")}
    samples = np.zeros(P, dtype=np.int64)
    summary = []
    old_summary = list(model.get("summary", []))
    for p, key in enumerate(keys):
        if key in at_new:
            n = at_new[key]
            for name in stats:
                stats[name][p] = stats_new[name][n]
            samples[p] = int(sums[key][0, 0])
            summary.append(summary_new[n])
        else:
            q = carried[key]
            for name in stats:
                stats[name][p] = np.asarray(model[name])[q]
            samples[p] = int(np.asarray(model["samples"])[q])
            summary.append({**old_summary[q], "pair": list(key)} if q < len(old_summary) else {"pair": list(key)})
    return {
        "gain": gain, "offset": offset, "pairs": np.array(keys, dtype=np.int64).reshape(P, 2), "samples": samples,
        **stats, "reference": ref, "unmatched_lines": unmatched, "summary": summary,
        "statistics": "exact over the sampled overlap pixels, from the pair sums (no second pass); known "
                      "lines kept their corrections, new lines were matched to them",
        "fingerprints": list(params.fingerprints),
    }


def select_overlap_tiles(tiles: Sequence[Tile], params: MosaicParams) -> list[Tile]:
    """The tiles whose core meets the overlap of at least one pair of lines (the fit reads only those).

    Overlaps are the intersections of the footprints in the grid's pixel coordinates, grown by one
    pixel; a sampled block belongs to the tile holding its first pixel, and a block lies wholly in an
    overlap, so no tile left out could contribute.
    """
    import shapely

    shapes = [shapely.from_wkt(w) for w in params.overlap_shapes.values()]
    # the shapes are in pixel units with y scaled by yscale: (col, row) -> (col, row * yscale)
    return tiles_touching(tiles, shapes, Affine.scale(1.0, float(params.yscale)))
