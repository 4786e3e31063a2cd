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

from typing import Any, Literal, Mapping

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
           "select_tiles", "MASK_CLASSES"]

CAUTION_CANOPY = ("The leaf and canopy property maps are estimates for research and planning; field checks and "
                  "agronomic advice come before decisions on fertiliser or irrigation.")
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
    reference_columns: dict[Literal["lai", "cab", "cw", "cm"], str] = Field(
        default_factory=lambda: {t: t for t in TARGETS},
        description="retrieved property -> numeric column of the ground reference holding its measurements; "
                    "the accuracy report validates each band against its column (absent columns are noted)")

    @field_validator("input")
    @classmethod
    def _ref(cls, v: str) -> str:
        return check_ref(v, "input")

    @field_validator("methods")
    @classmethod
    def _unique(cls, v: list[str]) -> list[str]:
        if len(set(v)) != len(v):
            raise ValueError(f"methods repeat. Got {v}")
        return v


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
    rows = np.arange(pos, params.lut_size, n)
    spectra = simulate_entries(names, table, rows, params.geometry.geometry(), wl[bands],
                               None if fw is None else fw[bands])
    return {"rows": rows, "spectra": spectra}


def _merge(a: dict, b: dict) -> dict:
    parts = [p for p in (a, b) if p["spectra"] is not None]
    if not parts:
        return a
    if len(parts) == 1:
        return parts[0]
    return {"rows": np.concatenate([a["rows"], b["rows"]]), "spectra": np.vstack([a["spectra"], b["spectra"]])}


def _finalize(acc: dict, params: CanopyConfig, meta: dict[str, InputMeta]) -> dict:
    rows = np.asarray(acc["rows"])
    if acc["spectra"] is None or rows.size != params.lut_size or not np.array_equal(np.sort(rows),
                                                                                     np.arange(params.lut_size)):
        raise RtmError(f"the look-up table's simulation is incomplete: {rows.size} of {params.lut_size} entries")
    spectra = np.empty((params.lut_size, acc["spectra"].shape[1]))
    spectra[rows] = acc["spectra"]
    names, table = sample_parameters(_ranges(params), params.lut_size, params.seed)
    targets = np.ascontiguousarray(table[:, [names.index(t) for t in TARGETS]])
    model: dict[str, Any] = {
        "bands": inversion_bands(params, meta).astype(np.int64),
        "spectra": spectra.astype(np.float32),
        "table": table,
        "table_names": names,
        "targets": targets,
    }
    if "hybrid" in params.methods:
        h = params.hybrid
        fitted = train_hybrid(spectra.astype(np.float32).astype(np.float64), targets, trees=h.trees,
                              min_leaf=h.min_leaf, training_size=h.training_size, noise_relative=h.noise_relative,
                              noise_absolute=h.noise_absolute, seed=params.seed)
        model["hybrid_skops"] = hybrid_to_bytes(fitted)
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


def _hybrid(model: dict) -> dict:
    raw = np.asarray(model["hybrid_skops"], dtype=np.uint8)
    import hashlib
    key = hashlib.sha256(raw.tobytes()).hexdigest()
    if key not in _HYBRID_CACHE:
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
    if "lut" in params.methods:
        est, spread, best = (np.empty((0, q)), np.empty((0, q)), np.empty(0)) if xv.shape[0] == 0 else \
            lut_search(xv, model["spectra"], model["targets"], params.best_fraction)
        for name, vals in (("lut", est), ("lut_sd", spread)):
            a = np.full((q, rows * cols), np.nan, np.float32)
            a[:, veg] = vals.T
            out[name] = a.reshape(q, rows, cols)
        a = np.full(rows * cols, np.nan, np.float32)
        a[veg] = best
        out["fit_rmse"] = a.reshape(1, rows, cols)
    if "hybrid" in params.methods:
        est, spread = (np.empty((0, q)), np.empty((0, q))) if xv.shape[0] == 0 else predict_hybrid(_hybrid(model), xv)
        for name, vals in (("hybrid", est), ("hybrid_sd", spread)):
            a = np.full((q, rows * cols), np.nan, np.float32)
            a[:, veg] = vals.T
            out[name] = a.reshape(q, rows, cols)
    return out


def canopy_step(cfg: CanopyConfig) -> Step:
    """The canopy inversion step for a config section (input alias ``cube``)."""
    return Step(name=cfg.name, kernel=canopy_kernel, outputs=_outputs, inputs={"cube": cfg.input}, params=cfg,
                fit=Fit(accumulate=_accumulate, merge=_merge, finalize=_finalize, select=select_tiles))


def build_steps(section: CanopyConfig | Mapping[str, Any], ctx: Any = None) -> list[Step]:
    """The steps of a ``canopy`` config section (one step)."""
    cfg = section if isinstance(section, CanopyConfig) else CanopyConfig.model_validate(section)
    return [canopy_step(cfg)]
