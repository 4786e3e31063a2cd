"""Ground reference: labelled points and polygons, put on the mosaic's grid as a table of samples.

Reading
-------
:func:`read_reference` reads

- vector files GDAL's OGR opens through pyogrio (GeoJSON, GeoPackage, ...; ``layer`` picks a layer),
  in the CRS the file declares (``crs`` overrides a missing declaration);
- CSV files of points with coordinate columns ``x`` and ``y`` (names configurable) in a CRS that must
  be stated (``crs``, e.g. ``"EPSG:4326"``, x = longitude).

Each feature carries a label (column ``label`` by default), and optionally:

- a split column (``split``): ``train`` or ``validation`` per feature (case-insensitive; an empty
  cell means unassigned);
- numeric property columns (e.g. a measured canopy cover), including ``frac_<material>`` fractions of
  materials within the feature, used by unmixing checks.

Putting on the grid
-------------------
:func:`samples_on_grid` reprojects the features to the grid's CRS (pyproj, x/y order), takes the
pixel under each point and the pixels whose centres fall inside each polygon
(``rasterio.features.rasterize`` in the polygon's own window, so memory follows the polygons, not the
mosaic; ``all_touched`` takes every pixel touched) and returns a :class:`SampleTable` with one row per
pixel, plus a list of :class:`SampleIssue` for everything that could not be used, each also warned:

- a feature wholly or partly outside the grid;
- a polygon too small to cover any pixel centre;
- pixels claimed by features with different labels (left out; same-label overlaps keep the feature
  listed first);
- pixels on nodata (when a validity mask or function is given).

Nothing is dropped without a report.

Groups for blocked cross-validation
-----------------------------------
Every sample carries a group id. With ``group_by="feature"`` (default) it is the feature's id, so
pixels of one polygon are never on both sides of a split. With ``group_by="block"`` it is the id of the
square block of ``block_size`` pixels holding the feature's first pixel: every pixel of a feature
shares one group, and features close together share it too (use this for dense points).
"""
from __future__ import annotations

import csv
import io
import math
import warnings
from enum import IntEnum
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Literal, Mapping, Sequence

import numpy as np
from pydantic import Field

from swathmill.tiles.grid import Grid, Window
from swathmill.tiles.paths import resolve as resolve_path
from swathmill.workflows.params import Section
from swathmill.errors import SwathmillError

__all__ = [
    "GroundReferenceError",
    "GroundReference",
    "SampleTable",
    "SampleIssue",
    "Split",
    "SPLIT_CODES",
    "read_reference",
    "samples_on_grid",
    "label_codes",
    "GroundReferenceConfig",
    "load_samples",
]

class Split(IntEnum):
    """The side of the train/validation split a sample is on, as stored in :attr:`SampleTable.split`."""

    UNASSIGNED = 0
    TRAIN = 1
    VALIDATION = 2


SPLIT_CODES = {"": Split.UNASSIGNED, "train": Split.TRAIN, "validation": Split.VALIDATION}
"""Split codes of the split column's values (see :class:`Split`)."""
_SPLIT_ALIASES = {"": "", "train": "train", "training": "train", "validation": "validation",
                  "valid": "validation", "val": "validation"}


class GroundReferenceError(SwathmillError, ValueError):
    """Ground reference is unreadable or inconsistent; the message names the file and the feature."""


@dataclass(frozen=True, eq=False)
class GroundReference:
    """Labelled features in one CRS.

    Attributes
    ----------
    geometries : (n,) object array of shapely geometries.
    labels : (n,) labels (non-empty strings).
    crs : the CRS of the coordinates (any string pyproj accepts).
    split : (n,) "train", "validation" or "" (unassigned) per feature.
    properties : name -> (n,) float64 values of numeric columns (NaN where empty).
    ids : (n,) feature ids, 1-based positions in the source.
    source : file the features came from (for messages).
    """

    geometries: np.ndarray
    labels: tuple[str, ...]
    crs: str
    split: tuple[str, ...]
    properties: Mapping[str, np.ndarray] = field(default_factory=dict)
    ids: np.ndarray | None = None
    source: str = "<memory>"

    def __post_init__(self) -> None:
        n = len(self.geometries)
        if len(self.labels) != n or len(self.split) != n:
            raise GroundReferenceError(f"{self.source}: {n} geometries, {len(self.labels)} labels, {len(self.split)} splits")
        ids = np.arange(1, n + 1) if self.ids is None else np.asarray(self.ids, dtype=np.int64)
        object.__setattr__(self, "ids", ids)
        for k, v in self.properties.items():
            if len(v) != n:
                raise GroundReferenceError(f"{self.source}: property {k!r} has {len(v)} values for {n} features")

    def __len__(self) -> int:
        return len(self.labels)


@dataclass(frozen=True)
class SampleIssue:
    """One thing that kept reference pixels out of the sample table."""

    feature: int  # feature id (1-based)
    label: str
    reason: Literal["outside", "partly_outside", "no_pixel", "conflict", "nodata"]
    pixels: int  # pixels concerned (0 for features with none)
    detail: str = ""

    def __str__(self) -> str:
        return f"feature {self.feature} ({self.label!r}): {self.reason}, {self.pixels} px{'; ' + self.detail if self.detail else ''}"


@dataclass(frozen=True, eq=False)
class SampleTable:
    """Reference pixels on a grid: one row per pixel.

    row, col : (n,) int64 pixel position on the grid.
    label : (n,) int32 class code, 1..len(class_names).
    group : (n,) int64 group id for blocked cross-validation.
    feature : (n,) int64 id of the feature the pixel came from.
    split : (n,) uint8, see :data:`SPLIT_CODES`.
    class_names : names of classes 1..k.
    extras : name -> (n,) float64 (numeric properties and ``frac_*`` of the pixel's feature).
    """

    row: np.ndarray
    col: np.ndarray
    label: np.ndarray
    group: np.ndarray
    feature: np.ndarray
    split: np.ndarray
    class_names: tuple[str, ...]
    extras: Mapping[str, np.ndarray] = field(default_factory=dict)

    def __post_init__(self) -> None:
        n = len(self.row)
        for k in ("col", "label", "group", "feature", "split"):
            if len(getattr(self, k)) != n:
                raise GroundReferenceError(f"sample table: column {k!r} has {len(getattr(self, k))} rows for {n}")
        if n and (self.label.min() < 1 or self.label.max() > len(self.class_names)):
            raise GroundReferenceError(f"sample table: label codes must lie in 1..{len(self.class_names)}")

    def __len__(self) -> int:
        return len(self.row)

    @property
    def is_validation(self) -> np.ndarray:
        """(n,) bool: the sample is on the validation side of the split."""
        return self.split == Split.VALIDATION

    @property
    def is_training(self) -> np.ndarray:
        """(n,) bool: the sample is on the training side of the split."""
        return self.split == Split.TRAIN

    @property
    def is_unassigned(self) -> np.ndarray:
        """(n,) bool: the sample's feature names no side of the split."""
        return self.split == Split.UNASSIGNED

    _COLS = (("row", np.int64), ("col", np.int64), ("label", np.int32), ("group", np.int64),
             ("feature", np.int64), ("split", np.uint8))

    def to_static(self, prefix: str = "samples") -> dict[str, Any]:
        """Flat dict of arrays and JSON values for a step's ``static`` (hashed by the engine)."""
        out: dict[str, Any] = {f"{prefix}.{k}": np.ascontiguousarray(getattr(self, k), dtype=dt)
                               for k, dt in self._COLS}
        out[f"{prefix}.class_names"] = list(self.class_names)
        out[f"{prefix}.extras"] = sorted(self.extras)
        for k in sorted(self.extras):
            out[f"{prefix}.extra.{k}"] = np.ascontiguousarray(self.extras[k], dtype=np.float64)
        return out

    @classmethod
    def from_static(cls, static: Mapping[str, Any], prefix: str = "samples") -> "SampleTable":
        if f"{prefix}.row" not in static:
            raise GroundReferenceError(f"step static data holds no sample table under {prefix!r}")
        cols = {k: np.asarray(static[f"{prefix}.{k}"], dtype=dt) for k, dt in cls._COLS}
        extras = {k: np.asarray(static[f"{prefix}.extra.{k}"], dtype=np.float64)
                  for k in static.get(f"{prefix}.extras", [])}
        return cls(**cols, class_names=tuple(static[f"{prefix}.class_names"]), extras=extras)

    def subset(self, mask: np.ndarray) -> "SampleTable":
        m = np.asarray(mask)
        return SampleTable(*(getattr(self, k)[m] for k, _ in self._COLS), class_names=self.class_names,
                           extras={k: v[m] for k, v in self.extras.items()})

    def in_window(self, win: Window) -> np.ndarray:
        """Indices of samples inside ``win``."""
        return np.flatnonzero(win.contains(self.row, self.col))

    def counts(self) -> dict[str, int]:
        """Samples per class name."""
        c = np.bincount(self.label, minlength=len(self.class_names) + 1)[1:]
        return {n: int(k) for n, k in zip(self.class_names, c)}


# reading -----------------------------------------------------------------------------------------
def _norm_split(values: Sequence[Any], src: str, ids: np.ndarray) -> tuple[str, ...]:
    out = []
    for i, v in zip(ids, values):
        s = "" if v is None or (isinstance(v, float) and math.isnan(v)) else str(v).strip().lower()
        if s not in _SPLIT_ALIASES:
            raise GroundReferenceError(
                f"{src}: feature {i}: split must be 'train' or 'validation' (or empty). Got {v!r}")
        out.append(_SPLIT_ALIASES[s])
    return tuple(out)


def _labels(values: Sequence[Any], src: str, ids: np.ndarray, column: str) -> tuple[str, ...]:
    labels = []
    empty = []
    for i, v in zip(ids, values):
        s = "" if v is None or (isinstance(v, float) and math.isnan(v)) else str(v).strip()
        if isinstance(v, float) and v.is_integer():
            s = str(int(v))  # numeric label columns: 3.0 -> "3"
        if not s:
            empty.append(int(i))
        labels.append(s)
    if empty:
        raise GroundReferenceError(f"{src}: feature(s) {empty[:10]} have an empty {column!r} label")
    return tuple(labels)


def _numeric_properties(names: Sequence[str], columns: Sequence[np.ndarray], wanted: Sequence[str] | None,
                        skip: set[str], src: str) -> dict[str, np.ndarray]:
    props: dict[str, np.ndarray] = {}
    for name, col in zip(names, columns):
        if name in skip:
            continue
        is_frac = name.startswith("frac_")
        if wanted is not None and name not in wanted and not is_frac:
            continue
        try:
            arr = np.array([np.nan if v is None or (isinstance(v, str) and not v.strip()) else float(v)
                            for v in col], dtype=np.float64)
        except (TypeError, ValueError):
            if wanted is not None and name in wanted or is_frac:
                raise GroundReferenceError(f"{src}: column {name!r} must be numeric") from None
            continue  # other text columns are ignored
        props[name] = arr
    if wanted is not None:
        missing = [w for w in wanted if w not in props]
        if missing:
            raise GroundReferenceError(f"{src}: no numeric column(s) {missing}; columns are {list(names)}")
    return props


def read_reference(
    path: str | Path,
    *,
    label: str = "label",
    split: str | None = "split",
    crs: str | None = None,
    layer: str | int | None = None,
    x: str = "x",
    y: str = "y",
    properties: Sequence[str] | None = None,
) -> GroundReference:
    """Read labelled points or polygons from a vector file or a CSV of points.

    Parameters
    ----------
    path : GeoJSON, GeoPackage (or another OGR vector format), or ``.csv``.
    label : name of the label column.
    split : name of the optional train/validation column (ignored when absent from the file).
    crs : CRS of the coordinates: required for CSV; for vector files, used only when the file
        declares none.
    layer : layer of a multi-layer file.
    x, y : coordinate columns of a CSV.
    properties : numeric columns to keep; None keeps every numeric column. ``frac_*`` columns are
        always kept (and must be numeric).
    """
    path = Path(path)
    src = str(path)
    if not path.is_file():
        raise GroundReferenceError(f"ground reference file {src} does not exist")
    if path.suffix.lower() in (".csv", ".txt"):
        return _read_csv(path, label, split, crs, x, y, properties)
    import pyogrio
    import shapely

    try:
        meta, _fids, geoms, fields = pyogrio.raw.read(path, layer=layer)
    except Exception as exc:  # pyogrio raises its own DataSourceError / DataLayerError
        raise GroundReferenceError(f"cannot read ground reference {src}: {exc}") from None
    names = [str(n) for n in meta["fields"]]
    if label not in names:
        raise GroundReferenceError(f"{src}: no label column {label!r}; columns are {names}")
    n = len(geoms)
    ids = np.arange(1, n + 1)
    if n == 0:
        raise GroundReferenceError(f"{src}: no features")
    missing_geom = [int(i) for i, g in zip(ids, geoms) if g is None]
    if missing_geom:
        raise GroundReferenceError(f"{src}: feature(s) {missing_geom[:10]} have no geometry")
    geometries = shapely.from_wkb(np.asarray(geoms, dtype=object))
    file_crs = meta.get("crs")
    use_crs = file_crs or crs
    if not use_crs:
        raise GroundReferenceError(f"{src} declares no CRS: state it with crs (e.g. 'EPSG:32611')")
    cols = dict(zip(names, fields))
    labels = _labels(cols[label], src, ids, label)
    sp = _norm_split(cols[split], src, ids) if split and split in cols else ("",) * n
    props = _numeric_properties(names, fields, properties, {label, split or ""}, src)
    return GroundReference(geometries, labels, str(use_crs), sp, props, ids, src)


def _read_csv(path: Path, label: str, split: str | None, crs: str | None, x: str, y: str,
              properties: Sequence[str] | None) -> GroundReference:
    import shapely

    src = str(path)
    if not crs:
        raise GroundReferenceError(f"{src}: a CSV of points needs its CRS stated (crs, e.g. 'EPSG:4326')")
    text = path.read_text(encoding="utf-8-sig")
    reader = csv.DictReader(io.StringIO(text))
    if reader.fieldnames is None:
        raise GroundReferenceError(f"{src} is empty")
    names = [f.strip() for f in reader.fieldnames]
    for need in (x, y, label):
        if need not in names:
            raise GroundReferenceError(f"{src}: no column {need!r}; columns are {names}")
    rows = [{k.strip(): (v or "").strip() for k, v in r.items() if k is not None} for r in reader]
    if not rows:
        raise GroundReferenceError(f"{src}: no data rows")
    ids = np.arange(1, len(rows) + 1)
    xs, ys = np.empty(len(rows)), np.empty(len(rows))
    for i, r in enumerate(rows):
        try:
            xs[i], ys[i] = float(r[x]), float(r[y])
        except ValueError:
            raise GroundReferenceError(
                f"{src}, line {i + 2}: coordinates must be numbers. Got {x}={r[x]!r}, {y}={r[y]!r}") from None
        if not (math.isfinite(xs[i]) and math.isfinite(ys[i])):
            raise GroundReferenceError(f"{src}, line {i + 2}: coordinates must be finite")
    labels = _labels([r[label] for r in rows], src, ids, label)
    sp = _norm_split([r.get(split, "") for r in rows], src, ids) if split and split in names else ("",) * len(rows)
    cols = [[r[nm] for r in rows] for nm in names]
    props = _numeric_properties(names, cols, properties, {x, y, label, split or ""}, src)
    return GroundReference(shapely.points(xs, ys), labels, str(crs), sp, props, ids, src)


# on the grid -------------------------------------------------------------------------------------
def label_codes(labels: Sequence[str], classes: Sequence[str] | None, source: str = "ground reference") -> tuple[np.ndarray, tuple[str, ...]]:
    """Class codes 1..k for ``labels`` against ``classes`` (sorted distinct labels when None).

    Raises :class:`GroundReferenceError` listing labels missing from ``classes``.
    """
    if classes is None:
        classes = tuple(sorted(set(labels)))
    else:
        classes = tuple(str(c) for c in classes)
        dup = sorted({c for c in classes if classes.count(c) > 1})
        if dup:
            raise GroundReferenceError(f"class list repeats {dup}")
        missing = sorted(set(labels) - set(classes))
        if missing:
            raise GroundReferenceError(
                f"{source}: label(s) {missing} are not in the class list {list(classes)}; add them or "
                "correct the labels")
    idx = {c: i + 1 for i, c in enumerate(classes)}
    return np.array([idx[lab] for lab in labels], dtype=np.int32), classes


def _reproject(geoms: np.ndarray, src_crs: str, dst_crs: str) -> np.ndarray:
    import shapely
    from pyproj import CRS, Transformer

    a, b = CRS.from_user_input(src_crs), CRS.from_user_input(dst_crs)
    if a == b:
        return geoms
    tr = Transformer.from_crs(a, b, always_xy=True)

    def fn(xy: np.ndarray) -> np.ndarray:
        xx, yy = tr.transform(xy[:, 0], xy[:, 1])
        return np.column_stack([xx, yy])

    out = shapely.transform(geoms, fn)
    bad = ~np.isfinite(shapely.bounds(out)).all(axis=1)
    if bad.any():
        raise GroundReferenceError(f"{int(bad.sum())} feature(s) cannot be projected from {src_crs} to {dst_crs}")
    return out


def _feature_pixels(geom, grid: Grid, all_touched: bool) -> tuple[np.ndarray, np.ndarray, bool]:
    """Pixels (rows, cols) of one geometry on the grid and whether part of it lies outside."""
    import shapely
    from rasterio import features

    inv = ~grid.transform
    if shapely.get_type_id(geom) == 0:  # Point
        c, r = inv @ (shapely.get_x(geom), shapely.get_y(geom))
        r, c = math.floor(r), math.floor(c)
        if 0 <= r < grid.rows and 0 <= c < grid.cols:
            return np.array([r]), np.array([c]), False
        return np.empty(0, np.int64), np.empty(0, np.int64), True
    x0, y0, x1, y1 = shapely.bounds(geom)
    corners = [inv @ (xx, yy) for xx in (x0, x1) for yy in (y0, y1)]
    cs = [p[0] for p in corners]
    rs = [p[1] for p in corners]
    r0, r1 = math.floor(min(rs)), math.ceil(max(rs))
    c0, c1 = math.floor(min(cs)), math.ceil(max(cs))
    partly = r0 < 0 or c0 < 0 or r1 > grid.rows or c1 > grid.cols
    r0, c0 = max(r0, 0), max(c0, 0)
    r1, c1 = min(max(r1, r0 + 1), grid.rows), min(max(c1, c0 + 1), grid.cols)
    if r1 <= r0 or c1 <= c0:
        return np.empty(0, np.int64), np.empty(0, np.int64), True
    win = Window(r0, c0, r1 - r0, c1 - c0)
    mask = features.rasterize([(geom, 1)], out_shape=win.shape, transform=grid.window(win).transform,
                              fill=0, all_touched=all_touched, dtype="uint8")
    rr, cc = np.nonzero(mask)
    return rr + r0, cc + c0, partly


def samples_on_grid(
    ref: GroundReference,
    grid: Grid,
    *,
    classes: Sequence[str] | None = None,
    valid: np.ndarray | Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None,
    all_touched: bool = False,
    group_by: Literal["feature", "block"] = "feature",
    block_size: int = 64,
    warn: bool = True,
) -> tuple[SampleTable, list[SampleIssue]]:
    """Reproject ``ref`` to ``grid`` and list its pixels (see the module docstring).

    Parameters
    ----------
    ref : the ground reference.
    grid : the mosaic's grid.
    classes : class names in code order (1..k); labels not in it raise. Default: sorted labels.
    valid : (rows, cols) bool over the grid, or a function (rows, cols) -> bool per sample pixel;
        pixels where it is False are reported as on nodata and left out.
    all_touched : take every pixel a polygon touches, not only those whose centre it contains.
    group_by, block_size : group ids for blocked cross-validation.
    warn : also emit a ``UserWarning`` summarising the issues.

    Returns
    -------
    (table, issues). Rows are ordered by feature, then row, then column.
    """
    if group_by not in ("feature", "block"):
        raise GroundReferenceError(f"group_by must be 'feature' or 'block'. Got {group_by!r}")
    if block_size < 1:
        raise GroundReferenceError(f"block_size must be a positive number of pixels. Got {block_size}")
    codes, class_names = label_codes(ref.labels, classes, ref.source)
    geoms = _reproject(ref.geometries, ref.crs, grid.crs)
    issues: list[SampleIssue] = []
    rows, cols, feat_idx = [], [], []
    for k, g in enumerate(geoms):
        fid, lab = int(ref.ids[k]), ref.labels[k]
        rr, cc, partly = _feature_pixels(g, grid, all_touched)
        if rr.size == 0:
            reason = "outside" if partly else "no_pixel"
            detail = ("lies outside the grid" if partly else
                      "covers no pixel centre (try all_touched)")
            issues.append(SampleIssue(fid, lab, reason, 0, detail))
            continue
        if partly:
            issues.append(SampleIssue(fid, lab, "partly_outside", int(rr.size),
                                      "only the pixels inside the grid are used"))
        rows.append(rr)
        cols.append(cc)
        feat_idx.append(np.full(rr.size, k, dtype=np.int64))
    if rows:
        r = np.concatenate(rows).astype(np.int64)
        c = np.concatenate(cols).astype(np.int64)
        fk = np.concatenate(feat_idx)
    else:
        r = c = fk = np.empty(0, np.int64)

    # overlaps: a pixel claimed by features with different labels is left out
    keep = np.ones(r.size, dtype=bool)
    if r.size:
        flat = r * grid.cols + c
        order = np.lexsort((fk, flat))
        fs, ks = flat[order], fk[order]
        first = np.r_[True, fs[1:] != fs[:-1]]
        start = np.flatnonzero(first)
        lab_of = codes[ks]
        grp = np.cumsum(first) - 1
        lab_min = np.minimum.reduceat(lab_of, start)
        lab_max = np.maximum.reduceat(lab_of, start)
        conflict_px = (lab_min != lab_max)[grp]
        dupe = ~first  # same pixel again: keep only the first feature's copy
        drop = conflict_px | dupe
        keep[order[drop]] = False
        if conflict_px.any():
            bad_feats, counts = np.unique(ks[conflict_px], return_counts=True)
            for kk, nn in zip(bad_feats, counts):
                issues.append(SampleIssue(int(ref.ids[kk]), ref.labels[kk], "conflict", int(nn),
                                          "pixels also inside a feature with another label; left out"))
    # nodata
    if valid is not None and r.size:
        if callable(valid):
            ok = np.asarray(valid(r, c), dtype=bool)
        else:
            v = np.asarray(valid, dtype=bool)
            if v.shape != grid.shape:
                raise GroundReferenceError(f"validity mask has shape {v.shape}; the grid is {grid.shape}")
            ok = v[r, c]
        bad = keep & ~ok
        if bad.any():
            bad_feats, counts = np.unique(fk[bad], return_counts=True)
            for kk, nn in zip(bad_feats, counts):
                issues.append(SampleIssue(int(ref.ids[kk]), ref.labels[kk], "nodata", int(nn),
                                          "pixels on nodata in the mosaic; left out"))
        keep &= ok
    r, c, fk = r[keep], c[keep], fk[keep]
    order = np.lexsort((c, r, fk))
    r, c, fk = r[order], c[order], fk[order]

    if group_by == "feature":
        group = ref.ids[fk].astype(np.int64)
    else:
        nbc = -(-grid.cols // block_size)
        group = np.empty(fk.size, np.int64)
        if fk.size:
            first_of = np.r_[True, fk[1:] != fk[:-1]]
            starts = np.flatnonzero(first_of)
            blk = (r[starts] // block_size) * nbc + (c[starts] // block_size)
            group = np.repeat(blk, np.diff(np.r_[starts, fk.size])).astype(np.int64)
    split = np.array([SPLIT_CODES[ref.split[k]] for k in fk], dtype=np.uint8)
    extras = {name: np.asarray(v, dtype=np.float64)[fk] for name, v in ref.properties.items()}
    table = SampleTable(r, c, codes[fk].astype(np.int32), group, ref.ids[fk].astype(np.int64), split,
                        class_names, extras)
    if warn and issues:
        summary = {}
        for iss in issues:
            summary[iss.reason] = summary.get(iss.reason, 0) + 1
        parts = ", ".join(f"{v} {k}" for k, v in summary.items())
        warnings.warn(f"ground reference {ref.source}: {parts} ({len(issues)} issue(s); first: {issues[0]})",
                      UserWarning, stacklevel=2)
    return table, issues


# configuration -----------------------------------------------------------------------------------
class GroundReferenceConfig(Section):
    """YAML section describing a ground reference file and how to put it on the grid.

    Example::

        reference:
          path: field/plots.gpkg      # relative to the config file
          label: material
          split: split                # optional train/validation column
          classes: [bare soil, grass, water]   # optional: fixes codes 1..k and checks labels
          group_by: feature           # or block (with block_size) for dense points
    """

    path: str = Field(description="GeoJSON, GeoPackage or CSV of points")
    label: str = "label"
    split: str | None = "split"
    crs: str | None = Field(None, description="CRS of a CSV's coordinates, or of a vector file declaring none")
    layer: str | int | None = None
    x: str = "x"
    y: str = "y"
    classes: list[str] | None = Field(None, description="class names in code order (1..k)")
    properties: list[str] | None = None
    all_touched: bool = False
    group_by: Literal["feature", "block"] = "feature"
    block_size: int = Field(64, ge=1)


def load_samples(cfg: GroundReferenceConfig, grid: Grid, *, base_dir: str | Path | None = None,
                 valid: np.ndarray | Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None,
                 classes: Sequence[str] | None = None) -> tuple[SampleTable, list[SampleIssue]]:
    """Read the file of ``cfg`` (relative to ``base_dir``) and put it on ``grid``.

    ``classes`` overrides ``cfg.classes`` (e.g. the class names of a spectral library).
    """
    p = resolve_path(base_dir, cfg.path)
    ref = read_reference(p, label=cfg.label, split=cfg.split, crs=cfg.crs, layer=cfg.layer, x=cfg.x, y=cfg.y,
                         properties=cfg.properties)
    return samples_on_grid(ref, grid, classes=classes if classes is not None else cfg.classes, valid=valid,
                           all_touched=cfg.all_touched, group_by=cfg.group_by, block_size=cfg.block_size)
