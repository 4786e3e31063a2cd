"""Product export, part two: STAC items and collections of the COG products, and their offline checks.

:func:`stac_item` describes one COG (projection, raster bands, classification classes, processing
provenance) and saves it as ``<cog>.json`` beside it; :func:`stac_collection` gathers items into a
self-contained collection. pystac validates the core STAC schemas offline from the schemas it
bundles, but fetches extension schemas from the web; :func:`validate_item_offline` and
:func:`validate_collection_offline` therefore validate the core offline and check the extension
fields written here with the checks below (mirroring the published extension schemas).
"""
from __future__ import annotations

import datetime as _dt
import json
import math
import os
import re
import uuid
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from .cog import ExportError, _band_attrs, class_entries
from .grid import Grid
from .step import OutputSpec

__all__ = [
    "item_path",
    "stac_item",
    "stac_collection",
    "validate_item_offline",
    "validate_collection_offline",
    "PROVENANCE_REQUIRED",
    "EO_URI",
    "STAC_PREFIX",
]

#: Provenance keys that every product must carry (see :func:`stac_item`).
PROVENANCE_REQUIRED = ("software_version", "config_hash", "step_key", "parameters", "input_fingerprints", "created")
#: Prefix of the provenance fields that no STAC extension covers (plain additional fields).
STAC_PREFIX = "swathmill:"

# Extension schema URIs written into items (versions whose fields the checks below mirror).
PROJ_URI = "https://stac-extensions.github.io/projection/v2.0.0/schema.json"
RASTER_URI = "https://stac-extensions.github.io/raster/v1.1.0/schema.json"
CLASS_URI = "https://stac-extensions.github.io/classification/v2.0.0/schema.json"
PROC_URI = "https://stac-extensions.github.io/processing/v1.2.0/schema.json"
EO_URI = "https://stac-extensions.github.io/eo/v2.0.0/schema.json"

#: Per-band coordinates written as the electro-optical extension's centre wavelength and width (in µm).
_EO_COORDS = {"wavelength": "eo:center_wavelength", "fwhm": "eo:full_width_half_max"}
_TO_MICROMETRES = {"nm": 1e-3, "nanometre": 1e-3, "nanometer": 1e-3, "um": 1.0, "µm": 1.0, "micrometre": 1.0,
                   "micrometer": 1.0}


def item_path(cog_path: Path) -> Path:
    """Where the STAC item of a COG is saved: ``<cog>.json`` beside it."""
    cog_path = Path(cog_path)
    return cog_path.with_name(cog_path.name + ".json")


def _maybe_json(v: Any) -> Any:
    if isinstance(v, str) and v[:1] in "{[":
        try:
            return json.loads(v)
        except ValueError:
            return v
    return v


def _parse_time(v: Any, what: str) -> _dt.datetime:
    if isinstance(v, _dt.datetime):
        t = v
    else:
        try:
            t = _dt.datetime.fromisoformat(str(v))
        except ValueError as exc:
            raise ExportError(f"{what} must be an ISO 8601 date-time. Got {v!r}") from exc
    return t if t.tzinfo else t.replace(tzinfo=_dt.timezone.utc)


def _footprint(grid: Grid, n: int = 16) -> tuple[dict, list[float]]:
    """Grid outline densified to ``n`` points per edge, in EPSG:4326, and its bbox."""
    from rasterio.warp import transform_geom

    t = grid.transform
    edge = np.linspace(0.0, 1.0, n, endpoint=False)
    cols = np.concatenate([edge * grid.cols, np.full(n, grid.cols), (1 - edge) * grid.cols, np.zeros(n)])
    rows = np.concatenate([np.zeros(n), edge * grid.rows, np.full(n, grid.rows), (1 - edge) * grid.rows])
    ring = [tuple(t @ (float(c), float(r))) for c, r in zip(cols, rows)]
    ring.append(ring[0])
    # keep the ring counter-clockwise (GeoJSON, RFC 7946) whatever the sign of the pixel sizes
    area = sum(x0 * y1 - x1 * y0 for (x0, y0), (x1, y1) in zip(ring[:-1], ring[1:]))
    if area < 0:
        ring = ring[::-1]
    geom = transform_geom(grid.crs, "EPSG:4326", {"type": "Polygon", "coordinates": [ring]})
    xy = np.asarray(geom["coordinates"][0], dtype=float)
    geom = {"type": "Polygon", "coordinates": [[[float(x), float(y)] for x, y in xy]]}
    bbox = [float(xy[:, 0].min()), float(xy[:, 1].min()), float(xy[:, 0].max()), float(xy[:, 1].max())]
    return geom, bbox


def _iso(t: _dt.datetime) -> str:
    return t.astimezone(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _eo_fields(spec: OutputSpec, b: int) -> dict[str, float]:
    """``eo:center_wavelength`` and ``eo:full_width_half_max`` (µm) of band ``b`` from its coordinates.

    Only for coordinates whose unit (attribute ``<coord>_units``) is a length the extension can be
    given in; a missing or non-finite value is left out.
    """
    out = {}
    for coord, key in _EO_COORDS.items():
        values = spec.coords.get(coord)
        factor = _TO_MICROMETRES.get(str(spec.attrs.get(f"{coord}_units", "")).strip().lower())
        if values is None or factor is None:
            continue
        v = values[b]
        if v is not None and math.isfinite(float(v)) and float(v) > 0:
            out[key] = round(float(v) * factor, 9)
    return out


def _slug(s: str) -> str:
    slug = re.sub(r"[^0-9A-Za-z_-]+", "_", s.strip()).strip("_")
    return slug or "class"


def stac_item(
    cog_path: Path,
    grid: Grid,
    spec: OutputSpec,
    provenance: Mapping[str, Any],
    item_id: str,
    datetime: _dt.datetime | None = None,
) -> "pystac.Item":  # noqa: F821
    """Describe a COG as a STAC Item, save it as ``<cog>.json`` beside the COG, and return it.

    Parameters
    ----------
    cog_path
        The COG (written by :func:`write_cog`); the asset href in the saved JSON is relative.
    grid, spec
        The product's grid and output description.
    provenance
        Must hold ``software_version``, ``config_hash``, ``step_key``, ``parameters``,
        ``input_fingerprints`` and ``created`` (ISO 8601 processing time); may hold ``software``
        (default "swathmill"), ``step``, ``inputs``, ``model_hash`` and more. Values may be JSON
        strings (decoded) or JSON-able objects. Written as ``processing:software`` and
        ``processing:expression`` (processing extension), ``created`` (common metadata), and
        ``swathmill:<key>`` fields for the rest.
    item_id
        The item's id.
    datetime
        The item's nominal time. Default: the acquisition time the output carries (attributes
        ``acquisition_start`` and ``acquisition_end``: ``datetime`` when they are equal, else
        ``start_datetime`` and ``end_datetime`` with a null ``datetime``, as STAC asks for a range);
        without one, the processing time, said so in ``swathmill:datetime_from``. The processing
        time is always in ``created`` and ``processing:datetime``.

    Returns
    -------
    pystac.Item
        With its self href set to the saved JSON (the JSON itself holds no self link).
    """
    import pystac

    cog_path = Path(cog_path)
    what = f"product {cog_path.name}"
    if not cog_path.is_file():
        raise ExportError(f"{what}: COG {cog_path} does not exist; write it before its STAC item")
    missing = [k for k in PROVENANCE_REQUIRED if k not in provenance]
    if missing:
        raise ExportError(f"{what}: provenance lacks {missing}. Got keys {sorted(provenance)}")
    prov = {k: _maybe_json(v) for k, v in provenance.items()}
    created = _parse_time(prov["created"], f"{what}: provenance 'created'")
    when, props, source = _item_time(spec, datetime, created, what)
    geom, bbox = _footprint(grid)
    item = pystac.Item(id=item_id, geometry=geom, bbox=bbox, datetime=when, properties=props)
    item.common_metadata.created = created
    item.properties[STAC_PREFIX + "datetime_from"] = source
    item.properties["title"] = item_id

    _add_projection(item, grid)

    _add_processing(item, prov, created)

    # the asset, its bands
    asset = pystac.Asset(href=f"./{cog_path.name}", media_type=pystac.MediaType.COG, roles=["data"],
                         title=item_id)
    item.properties[STAC_PREFIX + "role"] = spec.role
    item.add_asset("data", asset)
    asset.common_metadata.created = created
    if _add_bands(asset, spec, grid, what):
        item.stac_extensions.append(EO_URI)

    if spec.kind == "categorical":
        _add_classes(asset, spec)

    out = item_path(cog_path)
    item.set_self_href(str(out))
    validate_item_offline(item)
    _write_json(out, item.to_dict(include_self_link=False, transform_hrefs=True))
    return item


def _item_time(spec: OutputSpec, datetime: Any, created: Any, what: str) -> tuple[Any, dict, str]:
    """An item's time: given, the outputs' acquisition time (one instant or a start/end range), else the
    processing time; and a word on where it came from."""
    props: dict[str, Any] = {}
    start = spec.attrs.get("acquisition_start")
    end = spec.attrs.get("acquisition_end") or start
    if datetime is not None:
        when, source = _parse_time(datetime, f"{what}: datetime"), "given"
    elif start:
        t0 = _parse_time(start, f"{what}: attribute 'acquisition_start'")
        t1 = _parse_time(end, f"{what}: attribute 'acquisition_end'")
        if t1 < t0:
            raise ExportError(f"{what}: acquisition ends ({end}) before it starts ({start})")
        source = "acquisition"
        if t0 == t1:
            when = t0
        else:
            when = None
            props = {"start_datetime": _iso(t0), "end_datetime": _iso(t1)}
    else:
        when, source = created, "processing time: no acquisition time known"

    return when, props, source


def _add_projection(item: Any, grid: Grid) -> None:
    """The projection extension: EPSG code (or WKT2), shape, transform and bounds of the grid."""
    from pyproj import CRS
    from pystac.extensions.projection import ProjectionExtension

    proj = ProjectionExtension.ext(item, add_if_missing=True)
    crs = CRS.from_user_input(grid.crs)
    auth = crs.to_authority()
    if auth is not None:
        proj.code = f"{auth[0]}:{auth[1]}"
    else:
        proj.code = None
        proj.wkt2 = crs.to_wkt()
    proj.shape = [grid.rows, grid.cols]
    proj.transform = [float(x) for x in list(grid.transform)[:6]]
    proj.bbox = [float(x) for x in grid.bounds]



def _add_processing(item: Any, prov: Mapping[str, Any], created: Any) -> None:
    """The processing extension (software, expression, lineage, time) and the provenance fields."""
    software = str(prov.get("software") or "swathmill")
    item.properties["processing:software"] = {software: str(prov["software_version"])}
    item.properties["processing:expression"] = {
        "format": f"{software}-step",
        "expression": {"step": prov.get("step"), "parameters": prov["parameters"]},
    }
    lineage = f"step {prov.get('step', '?')} (key {prov['step_key']}) of run configuration {prov['config_hash']}"
    item.properties["processing:lineage"] = lineage
    item.properties["processing:datetime"] = _iso(created)
    item.stac_extensions.append(PROC_URI)
    for k, v in prov.items():
        if k in ("software", "software_version", "created", "parameters"):
            continue  # already in processing:software, created, processing:expression
        item.properties[STAC_PREFIX + k] = v


def _add_bands(asset: Any, spec: OutputSpec, grid: Grid, what: str) -> bool:
    """The asset's bands (name, type, nodata, unit, centre wavelength and FWHM where known) and their
    raster extension; whether any band carries eo: fields."""
    from pystac.extensions.raster import DataType, RasterBand, RasterExtension, Sampling

    dtype = np.dtype(spec.dtype)
    nodata = spec.nodata
    if isinstance(nodata, str):
        nodata = float(nodata)
    nodata_json: Any = "nan" if isinstance(nodata, float) and math.isnan(nodata) else nodata
    units, scales, offsets = _band_attrs(what, spec)
    res_x, res_y = grid.res
    bands, rbands = [], []
    for b, band_name in enumerate(spec.bands):
        core = {"name": band_name, "data_type": dtype.name}
        if nodata_json is not None:
            core["nodata"] = nodata_json
        if units is not None:
            core["unit"] = units[b]
        core.update(_eo_fields(spec, b))
        bands.append(core)
        rb = RasterBand.create(nodata=nodata_json, sampling=Sampling.AREA, data_type=DataType(dtype.name),
                               unit=units[b] if units else None, scale=scales[b] if scales else None,
                               offset=offsets[b] if offsets else None,
                               spatial_resolution=float(res_x) if math.isclose(res_x, res_y) else None)
        rbands.append(rb)
    asset.extra_fields["bands"] = bands
    RasterExtension.ext(asset, add_if_missing=True).bands = rbands
    return any(k.startswith("eo:") for band in bands for k in band)


def _add_classes(asset: Any, spec: OutputSpec) -> None:
    """The classification extension of a class map: the COG's codes, names and colours."""
    from pystac.extensions.classification import Classification, ClassificationExtension

    classes = []
    for value, cname, rgba in class_entries(spec):  # the same codes, names and colours as the COG
        is_nodata = cname == "nodata" and rgba[3] == 0
        desc = ("outside the mosaic (no data)" if is_nodata else
                "valid pixel that matched no class" if value == 0 else cname)
        classes.append(Classification.create(
            value=value, name=_slug(cname), title=cname, description=desc, nodata=True if is_nodata else None,
            color_hint=None if is_nodata else "%02X%02X%02X" % tuple(rgba[:3])))
    ClassificationExtension.ext(asset, add_if_missing=True).classes = classes


def stac_collection(
    items: Sequence["pystac.Item"],  # noqa: F821
    out_dir: Path,
    collection_id: str,
    description: str,
    *,
    license: str = "other",
    title: str | None = None,
) -> "pystac.Collection":  # noqa: F821
    """Gather items (saved by :func:`stac_item`) into a self-contained collection in ``out_dir``.

    ``out_dir/collection.json`` links to each item by a relative href, and each item's JSON (left
    beside its COG, which must lie under ``out_dir``) is rewritten with relative links to the
    collection. The items are modified in place (links, collection id).
    """
    import pystac
    from pystac.layout import CustomLayoutStrategy

    out_dir = Path(out_dir).resolve()
    if not items:
        raise ExportError(f"collection {collection_id!r}: no items to gather")
    ids = [it.id for it in items]
    if len(set(ids)) != len(ids):
        raise ExportError(f"collection {collection_id!r}: item ids must be unique. Got {ids}")
    col_path = out_dir / "collection.json"
    for it in items:
        href = it.get_self_href()
        if href is None:
            raise ExportError(f"collection {collection_id!r}: item {it.id!r} has no self href; "
                              "create it with stac_item")
        p = Path(href).resolve()
        if out_dir not in p.parents:
            raise ExportError(f"collection {collection_id!r}: item {it.id!r} lies at {p}, outside {out_dir}")
        if p == col_path:
            raise ExportError(f"collection {collection_id!r}: item {it.id!r} would overwrite {col_path}")

    bboxes = np.array([it.bbox for it in items], dtype=float)
    starts = [it.common_metadata.start_datetime or it.datetime for it in items]
    ends = [it.common_metadata.end_datetime or it.datetime for it in items]
    starts = [t for t in starts if t is not None]
    ends = [t for t in ends if t is not None]
    extent = pystac.Extent(
        pystac.SpatialExtent([[float(bboxes[:, 0].min()), float(bboxes[:, 1].min()),
                               float(bboxes[:, 2].max()), float(bboxes[:, 3].max())]]),
        pystac.TemporalExtent([[min(starts), max(ends)]]),
    )
    col = pystac.Collection(id=collection_id, description=description, extent=extent, license=license,
                            title=title, catalog_type=pystac.CatalogType.SELF_CONTAINED)
    col.set_self_href(str(col_path))
    keep = CustomLayoutStrategy(item_func=lambda item, parent_dir: str(Path(item.get_self_href())))
    for it in items:
        col.add_item(it, strategy=keep)
    validate_collection_offline(col)
    for it in items:
        validate_item_offline(it)
        _write_json(Path(it.get_self_href()), it.to_dict(include_self_link=False, transform_hrefs=True))
    _write_json(col_path, col.to_dict(include_self_link=False, transform_hrefs=True))
    return col


def _write_json(path: Path, d: dict) -> None:
    tmp = path.with_name(f".{path.name}.{os.getpid()}-{uuid.uuid4().hex[:12]}.part")
    try:
        tmp.write_text(json.dumps(d, indent=2, allow_nan=False) + "\n")
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


# ------------------------------------------------------------------ offline validation


def _offline_validator():
    import pystac.validation.stac_validator as sv

    class OfflineValidator(sv.JsonSchemaSTACValidator):
        """pystac's JSON-schema validator restricted to the schemas pystac bundles (no network)."""

        def _get_schema(self, schema_uri: str) -> dict:
            if schema_uri not in self.schema_cache:
                raise ExportError(f"STAC schema {schema_uri} is not bundled with pystac; "
                                  "refusing to fetch it from the network")
            return self.schema_cache[schema_uri]

    return OfflineValidator()


def _validate_core(obj: "pystac.STACObject") -> None:  # noqa: F821
    import pystac
    from pystac.errors import STACValidationError

    d = json.loads(json.dumps(obj.to_dict(include_self_link=False, transform_hrefs=False)))
    try:
        _offline_validator().validate_core(d, obj.STAC_OBJECT_TYPE, pystac.get_stac_version())
    except STACValidationError as exc:
        raise ExportError(f"STAC {obj.STAC_OBJECT_TYPE.value} {obj.id!r} fails the core schema: {exc}") from exc


def validate_item_offline(item: "pystac.Item") -> None:  # noqa: F821
    """Validate an item without the network: the core schema with pystac, then our extension checks.

    The extension checks mirror the published JSON schemas of the extension versions this module
    writes (projection v2.0.0, raster v1.1.0, classification v2.0.0, processing v1.2.0, eo v2.0.0) for the
    fields it writes; an extension URI listed in ``stac_extensions`` that is not one of these, or a
    field with an extension prefix whose URI is not listed, is an error.

    Raises
    ------
    ExportError
        Listing every problem found.
    """
    _validate_core(item)
    d = json.loads(json.dumps(item.to_dict(include_self_link=False, transform_hrefs=False)))
    problems = _extension_problems(d)
    if problems:
        raise ExportError(f"STAC item {item.id!r} fails the extension checks: " + "; ".join(problems))


def validate_collection_offline(collection: "pystac.Collection") -> None:  # noqa: F821
    """Validate a collection's core schema offline (the items are checked by the caller)."""
    _validate_core(collection)
    ext = list(collection.stac_extensions)
    if ext:
        raise ExportError(f"collection {collection.id!r} declares extensions {ext} that cannot be checked offline")


_KNOWN_URIS = {"proj:": PROJ_URI, "raster:": RASTER_URI, "classification:": CLASS_URI, "processing:": PROC_URI,
               "eo:": EO_URI}
_DATA_TYPES = {"int8", "int16", "int32", "int64", "uint8", "uint16", "uint32", "uint64", "float16", "float32",
               "float64", "cint16", "cint32", "cfloat32", "cfloat64", "other"}
_PROC_FIELDS = {"processing:expression", "processing:lineage", "processing:level", "processing:facility",
                "processing:software", "processing:datetime", "processing:version"}
_DATE_TIME = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?(Z|[+-]\d{2}:\d{2})$")


def _is_num(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _prefixed(obj: Any, found: set[str], where: str, out: list[tuple[str, str, Any]]) -> None:
    """Collect every field with a known extension prefix, recursively (for URI bookkeeping)."""
    if isinstance(obj, dict):
        for k, v in obj.items():
            for pre in _KNOWN_URIS:
                if isinstance(k, str) and k.startswith(pre):
                    found.add(pre)
                    out.append((f"{where}.{k}", k, v))
            _prefixed(v, found, f"{where}.{k}", out)
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            _prefixed(v, found, f"{where}[{i}]", out)


def _extension_problems(d: dict) -> list[str]:
    p: list[str] = []
    declared = list(d.get("stac_extensions", []))
    unknown = [u for u in declared if u not in _KNOWN_URIS.values()]
    if unknown:
        p.append(f"extensions {unknown} cannot be checked offline")
    found: set[str] = set()
    fields: list[tuple[str, str, Any]] = []
    _prefixed({"properties": d.get("properties", {}), "assets": d.get("assets", {})}, found, "item", fields)
    for pre in found:
        if _KNOWN_URIS[pre] not in declared:
            p.append(f"fields {pre}* used but {_KNOWN_URIS[pre]} is not in stac_extensions")
    for pre, uri in _KNOWN_URIS.items():
        if uri in declared and pre not in found:
            p.append(f"{uri} is declared but no {pre}* field is present")
    for where, key, v in fields:
        p.extend(f"{where}: {msg}" for msg in _field_problems(key, v))
    return p


def _field_problems(key: str, v: Any) -> list[str]:
    """Checks of one field, after the published extension schemas (JSON Schema draft 7)."""
    bad: list[str] = []
    # projection v2.0.0 (stac-extensions/projection json-schema)
    if key == "proj:code":
        if v is not None and not (isinstance(v, str) and re.match(r"^[A-Z]+:.+$", v)):
            bad.append(f"must be null or 'AUTHORITY:CODE'. Got {v!r}")
    elif key == "proj:wkt2":
        if v is not None and not isinstance(v, str):
            bad.append(f"must be a string or null. Got {v!r}")
    elif key == "proj:shape":
        if not (isinstance(v, list) and len(v) == 2 and all(isinstance(x, int) and x > 0 for x in v)):
            bad.append(f"must be [rows, cols] of positive integers. Got {v!r}")
    elif key == "proj:transform":
        if not (isinstance(v, list) and len(v) in (6, 9) and all(_is_num(x) for x in v)):
            bad.append(f"must be 6 or 9 numbers. Got {v!r}")
    elif key == "proj:bbox":
        if not (isinstance(v, list) and len(v) in (4, 6) and all(_is_num(x) for x in v)):
            bad.append(f"must be 4 or 6 numbers. Got {v!r}")
    # raster v1.1.0 (stac-extensions/raster json-schema: bands)
    elif key == "raster:bands":
        if not (isinstance(v, list) and v):
            bad.append("must be a non-empty list of band objects")
        else:
            for i, b in enumerate(v):
                bad.extend(f"band {i}: {m}" for m in _raster_band_problems(b))
    # classification v2.0.0 (stac-extensions/classification json-schema: class_object)
    elif key == "classification:classes":
        if not (isinstance(v, list) and v):
            bad.append("must be a non-empty list of class objects")
        else:
            values = [c.get("value") for c in v if isinstance(c, dict)]
            if len(set(map(str, values))) != len(values):
                bad.append(f"class values must be unique. Got {values}")
            for c in v:
                bad.extend(f"class {c.get('value') if isinstance(c, dict) else c!r}: {m}"
                           for m in _class_problems(c))
    # eo v2.0.0 (stac-extensions/eo json-schema: band fields, numbers; wavelengths in micrometres)
    elif key in ("eo:center_wavelength", "eo:full_width_half_max", "eo:solar_illumination"):
        if not (_is_num(v) and v > 0):
            bad.append(f"must be a positive number (micrometres). Got {v!r}")
    elif key.startswith("eo:") and key not in ("eo:common_name", "eo:cloud_cover", "eo:snow_cover"):
        bad.append("is not a field of the eo extension v2.0.0 written here")
    # processing v1.2.0 (stac-extensions/processing json-schema: fields, additionalProperties false)
    elif key.startswith("processing:"):
        if key not in _PROC_FIELDS:
            bad.append(f"is not a field of the processing extension v1.2.0 ({sorted(_PROC_FIELDS)})")
        elif key == "processing:datetime":
            if not (isinstance(v, str) and _DATE_TIME.match(v)):
                bad.append(f"must be an RFC 3339 date-time. Got {v!r}")
        elif key == "processing:software":
            if not (isinstance(v, dict) and v and all(isinstance(k, str) and k and isinstance(x, str)
                                                        for k, x in v.items())):
                bad.append(f"must be a non-empty map of name -> version strings. Got {v!r}")
        elif key == "processing:expression":
            if not (isinstance(v, dict) and isinstance(v.get("format"), str) and "expression" in v):
                bad.append(f"must be an object with 'format' (string) and 'expression'. Got {v!r}")
        elif not isinstance(v, str):
            bad.append(f"must be a string. Got {v!r}")
    return bad


def _raster_band_problems(b: Any) -> list[str]:
    if not isinstance(b, dict) or not b:
        return [f"must be a non-empty object. Got {b!r}"]
    bad = []
    if "data_type" in b and b["data_type"] not in _DATA_TYPES:
        bad.append(f"data_type {b['data_type']!r} is not one of {sorted(_DATA_TYPES)}")
    if "nodata" in b and not (_is_num(b["nodata"]) or b["nodata"] in ("nan", "inf", "-inf")):
        bad.append(f"nodata must be a number or 'nan', 'inf', '-inf'. Got {b['nodata']!r}")
    if "sampling" in b and b["sampling"] not in ("area", "point"):
        bad.append(f"sampling must be 'area' or 'point'. Got {b['sampling']!r}")
    for k in ("scale", "offset", "spatial_resolution"):
        if k in b and not _is_num(b[k]):
            bad.append(f"{k} must be a number. Got {b[k]!r}")
    if "unit" in b and not isinstance(b["unit"], str):
        bad.append(f"unit must be a string. Got {b['unit']!r}")
    if "bits_per_sample" in b and not isinstance(b["bits_per_sample"], int):
        bad.append(f"bits_per_sample must be an integer. Got {b['bits_per_sample']!r}")
    return bad


def _class_problems(c: Any) -> list[str]:
    if not isinstance(c, dict):
        return [f"must be an object. Got {c!r}"]
    bad = []
    if not isinstance(c.get("value"), int) or isinstance(c.get("value"), bool):
        bad.append(f"value must be an integer. Got {c.get('value')!r}")
    name = c.get("name")
    if not (isinstance(name, str) and re.match(r"^[0-9A-Za-z-_]+$", name)):
        bad.append(f"name is required and must match ^[0-9A-Za-z-_]+$. Got {name!r}")
    for k in ("title", "description"):
        if k in c and not isinstance(c[k], str):
            bad.append(f"{k} must be a string. Got {c[k]!r}")
    if "color_hint" in c and not (isinstance(c["color_hint"], str) and re.match(r"^[0-9A-Fa-f]{6}$", c["color_hint"])):
        bad.append(f"color_hint must be 6 hex digits. Got {c['color_hint']!r}")
    if "nodata" in c and not isinstance(c["nodata"], bool):
        bad.append(f"nodata must be a boolean. Got {c['nodata']!r}")
    return bad
