"""The canopy inversion step: its configuration section, its fit (the look-up table) and its kernel.

Fit
    The step's fitted model *is* the look-up table (and the hybrid regressor trained on it), so the
    engine stores it under ``models/<step>-<key>.{json,npz}`` in the run directory and a rerun with the
    same configuration and input reuses it. The table's simulations are shared among the first
    ``min(lut_chunks, tiles)`` tiles of the mosaic (:func:`select_tiles`): the accumulator of the tile
    at row-major position ``p`` among ``n`` simulates entries ``p, p + n, p + 2n, ...``, so the executor
    runs them in parallel. Entry ``j``'s parameters come from one seeded draw of the whole table, so the
    table does not depend on the tiling.

Kernel
    Pixels whose NDVI (bands nearest 670 and 800 nm) is below ``ndvi_threshold`` are flagged in the
    ``vegetation`` mask and not inverted; the others get the table-search estimate and spread, the
    hybrid estimate and spread, and the RMSE of the best table entry.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any, Literal, Mapping, Sequence

import numpy as np
from pydantic import Field, field_validator, model_validator

from swathmill.tiles.grid import Tile, Tiling
from swathmill.tiles.step import Block, Fit, InputMeta, OutputSpec, Step
from swathmill.workflows.params import Section, check_ref
from swathmill.workflows.roles import Role

from .forward import Geometry, RtmError, covered_bands
from .lut import (TARGETS, UNITS, hybrid_from_bytes, hybrid_to_bytes, lut_search, predict_hybrid,
                  sample_parameters, simulate_entries, train_hybrid)

__all__ = ["CAUTION_CANOPY", "GeometryConfig", "ParameterRanges", "HybridConfig", "CanopyConfig", "canopy_step", "build_steps",
           "select_tiles", "MASK_CLASSES", "GEOMETRY_TAGS", "line_geometry_from_tags", "with_line_geometry",
           "geometries"]

CAUTION_CANOPY = ("The leaf and canopy property maps are estimates for research and planning; field checks and "
                  "agronomic advice come before decisions on fertiliser or irrigation. The inversion is ill-posed: "
                  "different combinations of leaf area and chlorophyll (and of the parameters the table varies "
                  "but does not map) give nearly the same spectrum, so chlorophyll in particular is poorly "
                  "constrained; pixels that mix canopy with bare ground, and canopies unlike the model (rows, "
                  "clumps, a soil unlike its soils), are biased. The accuracy shown holds only over the range "
                  "of the plots that measured it: a few plots of similar canopies say little about the rest.")
"""The caution the report adds when a run maps canopy properties."""

MASK_CLASSES = ("inverted", "not_vegetation")  # vegetation mask classes 1 and 2 (0: no data)

_Range = tuple[float, float]


class GeometryConfig(Section):
    """Sun and view angles of the campaign (degrees), used for every simulation of the table."""

    sun_zenith: float = Field(35.0, ge=0.0, lt=90.0, description="sun zenith angle")
    view_zenith: float = Field(0.0, ge=0.0, lt=90.0, description="sensor zenith angle (0: nadir)")
    relative_azimuth: float = Field(0.0, ge=-360.0, le=360.0, description="sun azimuth minus view azimuth")

    def geometry(self) -> Geometry:
        return Geometry(self.sun_zenith, self.view_zenith, self.relative_azimuth)


class ParameterRanges(Section):
    """Uniform sampling ranges (low, high) of the table; low == high fixes a parameter.

    Sources of the defaults (none was looked up while writing this; each is marked):
    - lai 0-7, cab 10-80 ug cm-2, cw 0.002-0.05 g cm-2, cm 0.002-0.015 g cm-2, n 1.2-2.2, car 2-20 ug cm-2:
      within the ranges of green crop and broadleaf canopies reviewed by Jacquemoud et al. (2009,
      Remote Sensing of Environment 113, S56-S66) (from memory).
    - leaf_angle 30-70 degrees, hotspot 0.01-0.3, soil_brightness 0.5-1.5, soil_moisture 0-1 and
      cbrown fixed at 0 (green leaves): common practice for crop look-up tables.
    """

    lai: _Range = (0.0, 7.0)
    cab: _Range = (10.0, 80.0)
    cw: _Range = (0.002, 0.05)
    cm: _Range = (0.002, 0.015)
    n: _Range = (1.2, 2.2)
    car: _Range = (2.0, 20.0)
    cbrown: _Range = (0.0, 0.0)
    leaf_angle: _Range = (30.0, 70.0)
    hotspot: _Range = (0.01, 0.3)
    soil_brightness: _Range = (0.5, 1.5)
    soil_moisture: _Range = (0.0, 1.0)

    @model_validator(mode="after")
    def _ordered(self) -> "ParameterRanges":
        for k, (lo, hi) in self.model_dump().items():
            if not lo <= hi:
                raise ValueError(f"range of {k} must be (low, high) with low <= high. Got ({lo}, {hi})")
        return self


class HybridConfig(Section):
    """The hybrid regressor: a random forest trained on the noisy table."""

    trees: int = Field(50, ge=2, le=1000, description="trees of the forest")
    min_leaf: int = Field(5, ge=1, description="least training entries per leaf")
    training_size: int = Field(20000, ge=10, description="table entries used for training (at most)")
    noise_relative: float = Field(0.02, ge=0.0, le=0.5, description="multiplicative noise std added to the table")
    noise_absolute: float = Field(0.005, ge=0.0, le=0.2, description="additive noise std (reflectance)")


class CanopyConfig(Section):
    """Leaf area index, chlorophyll, water and dry matter by inverting the canopy model, tile by tile."""

    name: str = Field("canopy", min_length=1, description="step name")
    input: str = Field("mosaic/reflectance", description="reflectance cube to invert ('step/output')")
    geometry: GeometryConfig = GeometryConfig()
    ranges: ParameterRanges = ParameterRanges()
    lut_size: int = Field(20000, ge=10, le=1_000_000, description="entries of the look-up table")
    lut_chunks: int = Field(8, ge=1, le=4096, description="parallel parts of the table's simulation")
    seed: int = Field(0, ge=0, description="seed of the table draw, the noise and the forest")
    exclude: list[_Range] = Field(
        default_factory=lambda: [(1330.0, 1480.0), (1770.0, 1980.0), (2400.0, 2600.0)],
        description="wavelength ranges (nm) left out of the inversion (water vapour; common practice)")
    best_fraction: float = Field(0.01, gt=0.0, le=1.0,
                                 description="share of the best table entries averaged by the search")
    methods: list[Literal["lut", "hybrid"]] = Field(default_factory=lambda: ["lut", "hybrid"], min_length=1)
    hybrid: HybridConfig = HybridConfig()
    ndvi_threshold: float = Field(0.3, ge=-1.0, le=1.0,
                                  description="pixels with a lower NDVI (670/800 nm) are flagged, not inverted")
    line_geometry: list[GeometryConfig | None] | None = Field(
        None, description="sun and view angles of each flight line, in the mosaic's line order (None entries "
                          "use 'geometry'); filled from the lines' tags when the pipeline builds the step")
    source: str = Field("mosaic/source", description="the layer naming each pixel's flight line ('step/output'), "
                                                     "read when the lines' geometries differ")
    reference_columns: dict[Literal["lai", "cab", "cw", "cm"], str] = Field(
        default_factory=lambda: {t: t for t in TARGETS},
        description="retrieved property -> numeric column of the ground reference holding its measurements; "
                    "the accuracy report validates each band against its column (absent columns are noted)")

    @field_validator("input", "source")
    @classmethod
    def _ref(cls, v: str, info: Any) -> str:
        return check_ref(v, info.field_name)

    @field_validator("methods")
    @classmethod
    def _unique(cls, v: list[str]) -> list[str]:
        if len(set(v)) != len(v):
            raise ValueError(f"methods repeat. Got {v}")
        return v


# per-line geometry -------------------------------------------------------------------------------
#: dataset tags of a flight line read as its sun and view angles (degrees)
GEOMETRY_TAGS = ("sun_zenith", "view_zenith", "relative_azimuth")


def line_geometry_from_tags(path: str | Path, default: GeometryConfig) -> GeometryConfig | None:
    """The sun and view angles a flight line's dataset tags state, or None when it states none.

    Tags ``sun_zenith`` (required once any is present), ``view_zenith`` and ``relative_azimuth``; a
    missing view tag takes the value of ``default``.
    """
    import rasterio

    with rasterio.open(path) as ds:
        tags = {k.lower(): v for k, v in ds.tags().items()}
    found = {k: tags[k] for k in GEOMETRY_TAGS if k in tags}
    if not found:
        return None
    if "sun_zenith" not in found:
        raise RtmError(f"{path}: tags {sorted(found)} state a view geometry without 'sun_zenith'")
    values = default.model_dump()
    for k, v in found.items():
        try:
            values[k] = float(str(v).strip())
        except ValueError:
            raise RtmError(f"{path}: tag {k}={v!r} is not a number of degrees") from None
    try:
        return GeometryConfig(**values)
    except ValueError as exc:
        raise RtmError(f"{path}: tags {found} are not valid angles: {exc}") from None


def with_line_geometry(cfg: CanopyConfig, lines: Sequence[str | Path]) -> CanopyConfig:
    """``cfg`` with ``line_geometry`` read from the tags of ``lines`` (the mosaic's lines, in order),
    unless the section gives it; lines without geometry tags use ``cfg.geometry``."""
    if cfg.line_geometry is not None:
        if len(cfg.line_geometry) != len(lines):
            raise RtmError(f"canopy.line_geometry has {len(cfg.line_geometry)} entries for {len(lines)} flight "
                           "lines; give one per line (null for the section's geometry)")
        return cfg
    found = [line_geometry_from_tags(p, cfg.geometry) for p in lines]
    if all(g is None for g in found):
        return cfg
    return cfg.model_copy(update={"line_geometry": found})


def geometries(params: CanopyConfig) -> tuple[list[GeometryConfig], np.ndarray]:
    """The distinct geometries the table is simulated for, and the geometry index of each source value
    (0: no line, then the lines in order). Without line geometries: the section's one geometry."""
    if not params.line_geometry:
        return [params.geometry], np.zeros(1, np.int64)
    per_line = [g or params.geometry for g in params.line_geometry]
    distinct: list[GeometryConfig] = []
    for g in per_line:
        if g not in distinct:
            distinct.append(g)
    return distinct, np.array([0, *[distinct.index(g) for g in per_line]], np.int64)


# ------------------------------------------------------------------------------------------------
def _wavelengths(meta: Mapping[str, InputMeta]) -> tuple[np.ndarray, np.ndarray | None]:
    m = meta["cube"]
    wl = m.spec.coords.get("wavelength")
    if wl is None:
        raise RtmError(f"the canopy inversion needs band wavelengths: input {m.ref!r} has no 'wavelength' "
                       "coordinate (use reflectance, not transformed components)")
    try:
        wl = np.array([float(v) for v in wl])
        fw = m.spec.coords.get("fwhm")
        fw = None if fw is None else np.array([np.nan if v is None else float(v) for v in fw])
    except (TypeError, ValueError):
        raise RtmError(f"input {m.ref!r}: 'wavelength' or 'fwhm' coordinate is not numeric") from None
    if not np.isfinite(wl).all():
        raise RtmError(f"input {m.ref!r}: band wavelengths must be finite")
    return wl, fw


def inversion_bands(params: CanopyConfig, meta: Mapping[str, InputMeta]) -> np.ndarray:
    """Indices of the input bands used by the inversion: covered by 400-2500 nm, not excluded."""
    wl, fw = _wavelengths(meta)
    keep = covered_bands(wl, fw)
    for lo, hi in params.exclude:
        keep &= ~((wl >= lo) & (wl <= hi))
    if keep.sum() < 3:
        raise RtmError(f"input {meta['cube'].ref!r}: only {int(keep.sum())} band(s) lie in 400-2500 nm outside "
                       f"the excluded ranges {params.exclude}; the inversion needs at least 3")
    return np.flatnonzero(keep)


def ndvi_bands(meta: Mapping[str, InputMeta]) -> tuple[int, int]:
    """Input bands nearest 670 nm (red) and 800 nm (near infrared), each within 30 nm."""
    wl, _ = _wavelengths(meta)
    out = []
    for target in (670.0, 800.0):
        i = int(np.argmin(np.abs(wl - target)))
        if abs(wl[i] - target) > 30.0:
            raise RtmError(f"input {meta['cube'].ref!r}: the vegetation mask needs a band within 30 nm of "
                           f"{target:g} nm; the nearest is at {wl[i]:g} nm")
        out.append(i)
    return out[0], out[1]


def _ranges(params: CanopyConfig) -> dict[str, tuple[float, float]]:
    return {k: tuple(v) for k, v in params.ranges.model_dump().items()}


def select_tiles(tiles: list[Tile], params: CanopyConfig) -> list[Tile]:
    """The tiles whose accumulators simulate the table: the first ``lut_chunks`` in row-major order."""
    return sorted(tiles, key=lambda t: t.index)[:params.lut_chunks]


def _position(block: Block) -> tuple[int, int]:
    """Row-major position of the block's tile among the selected fit tiles, and their number."""
    grid = block.meta["cube"].grid
    i, j = block.tile.index
    core = block.tile.core
    if i > 0:
        size = core.row // i
    elif j > 0:
        size = core.col // j
    else:  # tile (0, 0): a full tile in some direction, or the only tile
        size = max(core.rows, core.cols)
    tiling = Tiling(grid, size)
    ni, nj = tiling.shape
    return i * nj + j, min(block.params.lut_chunks, ni * nj)


def _accumulate(block: Block) -> dict:
    params: CanopyConfig = block.params
    pos, n = _position(block)
    if pos >= n:
        return {"rows": np.empty(0, np.int64), "spectra": None}
    wl, fw = _wavelengths(block.meta)
    bands = inversion_bands(params, block.meta)
    names, table = sample_parameters(_ranges(params), params.lut_size, params.seed)
    geoms, _ = geometries(params)
    e = params.lut_size
    rows = np.arange(pos, e * len(geoms), n)  # entry j of geometry g is row g * e + j
    parts = [simulate_entries(names, table, rows[rows // e == g] - g * e, geom.geometry(), wl[bands],
                              None if fw is None else fw[bands]) for g, geom in enumerate(geoms)]
    return {"rows": rows, "spectra": np.vstack(parts)}


def _merge(a: dict, b: dict) -> dict:
    parts = [p for p in (a, b) if p["spectra"] is not None]
    if not parts:
        return a
    if len(parts) == 1:
        return parts[0]
    return {"rows": np.concatenate([a["rows"], b["rows"]]), "spectra": np.vstack([a["spectra"], b["spectra"]])}


def _finalize(acc: dict, params: CanopyConfig, meta: dict[str, InputMeta]) -> dict:
    rows = np.asarray(acc["rows"])
    geoms, lookup = geometries(params)
    total = params.lut_size * len(geoms)
    if acc["spectra"] is None or rows.size != total or not np.array_equal(np.sort(rows), np.arange(total)):
        raise RtmError(f"the look-up table's simulation is incomplete: {rows.size} of {total} entries")
    spectra = np.empty((total, acc["spectra"].shape[1]))
    spectra[rows] = acc["spectra"]
    names, table = sample_parameters(_ranges(params), params.lut_size, params.seed)
    targets = np.ascontiguousarray(table[:, [names.index(t) for t in TARGETS]])
    model: dict[str, Any] = {
        "bands": inversion_bands(params, meta).astype(np.int64),
        "spectra": spectra.astype(np.float32),
        "table": table,
        "table_names": names,
        "targets": targets,
        "geometries": np.array([[g.sun_zenith, g.view_zenith, g.relative_azimuth] for g in geoms]),
        "geometry_of_source": lookup,
    }
    if "hybrid" in params.methods:
        h = params.hybrid
        e = params.lut_size
        for g in range(len(geoms)):  # one forest per geometry, each on its own table
            fitted = train_hybrid(spectra[g * e:(g + 1) * e].astype(np.float32).astype(np.float64), targets,
                                  trees=h.trees, min_leaf=h.min_leaf, training_size=h.training_size,
                                  noise_relative=h.noise_relative, noise_absolute=h.noise_absolute, seed=params.seed)
            model[_hybrid_key(g)] = hybrid_to_bytes(fitted)
        model["hybrid_mean"] = fitted["mean"]
        model["hybrid_scale"] = fitted["scale"]
    return model


def _outputs(meta: dict[str, InputMeta], model: dict | None, params: CanopyConfig) -> dict[str, OutputSpec]:
    units = [UNITS[t] for t in TARGETS]
    out: dict[str, OutputSpec] = {}
    for method in params.methods:
        out[method] = OutputSpec(bands=TARGETS, dtype="float32", nodata=float("nan"), role=Role.QUANTITY.value,
                                 attrs={"units": units, "method": method,
                                        "reference_columns": dict(params.reference_columns)})
        out[f"{method}_sd"] = OutputSpec(bands=TARGETS, dtype="float32", nodata=float("nan"),
                                         role=Role.UNCERTAINTY.value,
                                         attrs={"units": units, "method": method, "of": method})
    out["vegetation"] = OutputSpec(bands=("vegetation",), dtype="uint8", nodata=0, kind="categorical",
                                   role=Role.MASK.value, class_names=MASK_CLASSES, colors=((40, 150, 60), (200, 190, 160)),
                                   attrs={"ndvi_threshold": params.ndvi_threshold})
    if "lut" in params.methods:
        out["fit_rmse"] = OutputSpec(bands=("rmse",), dtype="float32", nodata=float("nan"),
                                     role=Role.DIAGNOSTIC.value, attrs={"units": "1",
                                                                        "long_name": "RMSE of the best table entry"})
    return out


_HYBRID_CACHE: dict[str, dict] = {}


def _hybrid_key(g: int) -> str:
    """The model key of geometry ``g``'s forest (``hybrid_skops`` for the first)."""
    return "hybrid_skops" if g == 0 else f"hybrid_skops_{g}"


def _hybrid(model: dict, g: int = 0) -> dict:
    raw = np.asarray(model[_hybrid_key(g)], dtype=np.uint8)
    import hashlib
    key = hashlib.sha256(raw.tobytes()).hexdigest()
    if key not in _HYBRID_CACHE:
        if len(_HYBRID_CACHE) >= 8:
            _HYBRID_CACHE.clear()
        _HYBRID_CACHE[key] = hybrid_from_bytes(raw, model["hybrid_mean"], model["hybrid_scale"])
    return _HYBRID_CACHE[key]


def canopy_kernel(block: Block, model: dict) -> dict[str, np.ndarray]:
    params: CanopyConfig = block.params
    cube = block.data["cube"]
    nb, rows, cols = cube.shape
    flat = cube.reshape(nb, -1)
    red, nir = ndvi_bands(block.meta)
    bands = np.asarray(model["bands"], dtype=np.int64)
    x = flat[bands].T.astype(np.float64)
    ok = block.valid.ravel() & np.isfinite(x).all(axis=1)
    r, n = flat[red].astype(np.float64), flat[nir].astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        ndvi = (n - r) / (n + r)
    ok &= np.isfinite(ndvi)
    veg = ok & (ndvi >= params.ndvi_threshold)
    q = len(TARGETS)
    out: dict[str, np.ndarray] = {}
    mask = np.zeros(rows * cols, np.uint8)
    mask[ok] = 2
    mask[veg] = 1
    out["vegetation"] = mask.reshape(1, rows, cols)
    xv = x[veg]
    e = params.lut_size
    lookup = np.asarray(model.get("geometry_of_source", np.zeros(1, np.int64)), dtype=np.int64)
    if lookup.max() > 0:  # the lines' geometries differ: each pixel is inverted on its line's table
        src = block.data["source"].reshape(-1).astype(np.int64)[veg]
        if (src >= lookup.size).any():
            raise RtmError(f"tile {block.tile.index}: source layer names line {int(src.max())}, but the canopy "
                           f"step knows the geometry of {lookup.size - 1} line(s)")
        gv = lookup[src]
    else:
        gv = np.zeros(xv.shape[0], np.int64)
    groups = [(g, np.flatnonzero(gv == g)) for g in np.unique(gv)]
    if "lut" in params.methods:
        est, spread, best = np.empty((xv.shape[0], q)), np.empty((xv.shape[0], q)), np.empty(xv.shape[0])
        for g, idx in groups:
            est[idx], spread[idx], best[idx] = lut_search(xv[idx], model["spectra"][g * e:(g + 1) * e],
                                                          model["targets"], params.best_fraction)
        for name, vals in (("lut", est), ("lut_sd", spread)):
            a = np.full((q, rows * cols), np.nan, np.float32)
            a[:, veg] = vals.T
            out[name] = a.reshape(q, rows, cols)
        a = np.full(rows * cols, np.nan, np.float32)
        a[veg] = best
        out["fit_rmse"] = a.reshape(1, rows, cols)
    if "hybrid" in params.methods:
        est, spread = np.empty((xv.shape[0], q)), np.empty((xv.shape[0], q))
        for g, idx in groups:
            est[idx], spread[idx] = predict_hybrid(_hybrid(model, int(g)), xv[idx])
        for name, vals in (("hybrid", est), ("hybrid_sd", spread)):
            a = np.full((q, rows * cols), np.nan, np.float32)
            a[:, veg] = vals.T
            out[name] = a.reshape(q, rows, cols)
    return out


def canopy_step(cfg: CanopyConfig) -> Step:
    """The canopy inversion step for a config section (input alias ``cube``)."""
    inputs = {"cube": cfg.input}
    if len(geometries(cfg)[0]) > 1:
        inputs["source"] = cfg.source
    return Step(name=cfg.name, kernel=canopy_kernel, outputs=_outputs, inputs=inputs, params=cfg,
                fit=Fit(accumulate=_accumulate, merge=_merge, finalize=_finalize, select=select_tiles))


def build_steps(section: CanopyConfig | Mapping[str, Any], ctx: Any = None,
                lines: Sequence[str | Path] | None = None) -> list[Step]:
    """The steps of a ``canopy`` config section (one step); ``lines`` (the mosaic's flight lines, in
    order) give per-line sun and view angles from their tags (see :func:`with_line_geometry`)."""
    cfg = section if isinstance(section, CanopyConfig) else CanopyConfig.model_validate(section)
    if lines is not None:
        cfg = with_line_geometry(cfg, lines)
    return [canopy_step(cfg)]
