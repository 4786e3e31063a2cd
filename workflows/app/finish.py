"""After the steps of a run: accuracy assessment, the STAC collection, and the report.

Everything here reads the run directory (its resolved configuration, ledger, stores, models and
products), so ``swathmill report RUN_DIR`` rebuilds the report of a finished or partial run without
running anything.
"""
from __future__ import annotations

import json
import time
import warnings
from pathlib import Path
from typing import Any

import numpy as np

from swathmill.tiles.grid import Tiling
from swathmill.tiles.step import OutputSpec
from swathmill.tiles.store import TileStore, decode

from swathmill.workflows.caution import CAUTION_SHORT
from swathmill.workflows.app.runview import ACCURACY_FILE, RunView, StoreValid, is_class_map, open_run, with_role
from swathmill.workflows.inputs.reference import GroundReferenceConfig, load_samples
from swathmill.workflows.methods.accuracy import (AccuracyError, abundance_metrics, area_estimate, class_accuracy,
                                                  confusion_matrix, regression_metrics)
from swathmill.workflows.roles import Role

__all__ = ["finish_run", "assess_accuracy", "rebuild_report", "gather_collection", "write_endmember_tables",
           "ACCURACY_FILE", "RunView", "open_run", "is_class_map"]

AREA_FACTORS = {"m2": 1.0, "ha": 1e-4, "km2": 1e-6}


# accuracy --------------------------------------------------------------------------------------------
def _count_classes(store: TileStore, output: str, n_classes: int) -> np.ndarray:
    """Mapped pixels per class value 0..n (0 = unclassified), valid pixels only, read tile by tile."""
    counts = np.zeros(n_classes + 1, dtype=np.int64)
    for t in Tiling(store.grid, store.layout.shard):
        cls = store.read(output, t.core)[0]
        valid = store.read_valid(t.core)
        v = cls[valid].astype(np.int64)
        counts += np.bincount(np.clip(v, 0, n_classes), minlength=n_classes + 1)[: n_classes + 1]
    return counts


def _values_at(store: TileStore, output: str, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(bands, n) decoded values and (n,) validity at sample pixels."""
    if rows.size == 0:
        return np.zeros((len(store.specs[output].bands), 0), np.float32), np.zeros(0, bool)
    arr = store.array(output)
    raw = np.stack([np.asarray(arr.get_coordinate_selection((np.full(rows.shape, b), rows, cols)))
                    for b in range(arr.shape[0])])
    valid = np.asarray(store.array("valid").get_coordinate_selection((rows, cols))).astype(bool)
    return decode(raw, store.specs[output]), valid


def _samples(view: RunView, ref_cfg: dict, grid, mosaic: TileStore):
    cfg = GroundReferenceConfig.model_validate(ref_cfg)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        table, issues = load_samples(cfg, grid, base_dir=view.base, valid=StoreValid(mosaic))
    del caught
    return table, issues


def assess_accuracy(run_dir: Path) -> dict:
    """Assess every class, abundance and quantity map of a run against its validation samples.

    Writes and returns ``accuracy.json``. Class maps: confusion matrix (map rows x reference
    columns), overall, user's, producer's accuracy, F1, kappa, and stratified area estimates with
    95% confidence intervals (Olofsson et al., 2014) from the mapped pixel counts. Abundance and
    quantity maps: RMSE, bias and R2 against the reference fractions and measurements. Maps are found
    by the role their outputs declare (:class:`swathmill.workflows.roles.Role`).
    """
    view = open_run(run_dir)
    cfg = view.config
    out: dict[str, Any] = {"created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), "class_maps": {},
                           "abundance_maps": {}, "quantity_maps": {}, "notes": []}
    mosaic = view.store("mosaic")
    if cfg.get("reference") is None or mosaic is None:
        out["notes"].append("no ground reference in the configuration: no accuracy assessment")
        return _write(view, out)
    val = _validation_samples(view, cfg, mosaic, out)
    if len(val) == 0:
        out["notes"].append("the ground reference has no validation sample: no accuracy assessment")
        return _write(view, out)
    unit = cfg.get("accuracy", {}).get("area_unit", "ha")
    res = mosaic.grid.res
    pixel_area = res[0] * res[1] * AREA_FACTORS[unit]
    complete = [name for name in view.steps if view.complete(name)]
    for name in complete:
        for output, spec in view.outputs(name).items():
            store = view.store(name) if is_class_map(spec) else None
            if store is not None:
                out["class_maps"][f"{name}/{output}"] = _assess_classes(store, output, spec, val, pixel_area, unit)
    for name in complete:
        outs = view.outputs(name)
        for output in with_role(outs, Role.ABUNDANCE):
            _assess_abundance(view, name, output, outs[output], val, out)
    for entry in cfg.get("calibrations", []):
        _assess_quantity(view, entry, val, out)
    for name in complete:
        outs = view.outputs(name)
        for output in with_role(outs, Role.QUANTITY):
            if isinstance(outs[output].attrs.get("reference_columns"), dict):
                _assess_mapped_quantity(view, name, output, outs[output], val, out)
    return _write(view, out)


def _validation_samples(view: RunView, cfg: dict, mosaic: TileStore, out: dict):
    """The validation samples (and the unassigned ones when the configuration asks), noted in ``out``."""
    table, issues = _samples(view, cfg["reference"], mosaic.grid, mosaic)
    out["reference"] = {"file": cfg["reference"]["path"], "samples": len(table),
                        "validation": int(table.is_validation.sum()),
                        "issues": [str(i) for i in issues]}
    if issues:
        out["notes"].append(f"{len(issues)} ground-reference feature(s) could not be used in full "
                            f"(outside the mosaic or on nodata): see accuracy.json")
    use = table.is_validation
    if cfg.get("accuracy", {}).get("use_unassigned"):
        use = use | table.is_unassigned
    return table.subset(use)


def _assess_abundance(view: RunView, name: str, output: str, spec: OutputSpec, val, out: dict) -> None:
    """RMSE, bias and R2 of an abundance output against the reference's ``frac_<endmember>`` columns."""
    store = view.store(name)
    if store is None:
        return
    wanted = [b for b in spec.bands if f"frac_{b}" in val.extras]
    if not wanted:
        out["notes"].append(f"{name}: the ground reference has no frac_<endmember> column for "
                            f"{list(spec.bands)}; abundances not assessed")
        return
    est, ok = _values_at(store, output, val.row, val.col)
    ref = np.stack([val.extras[f"frac_{b}"] for b in wanted], 1)
    idx = [spec.bands.index(b) for b in wanted]
    keep = ok & np.all(np.isfinite(ref), 1) & np.all(np.isfinite(est[idx].T), 1)
    if keep.sum() < 2:
        return
    metrics = abundance_metrics(ref[keep].T, est[idx][:, keep], wanted)
    out["abundance_maps"][f"{name}/{output}"] = {
        "names": wanted, "metrics": [_metrics(m) for m in metrics],
        "observed": ref[keep].tolist(), "predicted": est[idx].T[keep].tolist()}


def _assess_quantity(view: RunView, entry: dict, val, out: dict) -> None:
    """RMSE, bias and R2 of a calibration's quantity output against the measured property."""
    name, prop = entry["name"], entry["property"]
    store = view.store(name)
    if store is None or not view.complete(name) or prop not in val.extras:
        return
    for output in with_role(store.specs, Role.QUANTITY):
        est, ok = _values_at(store, output, val.row, val.col)
        obs = val.extras[prop]
        keep = ok & np.isfinite(obs) & np.isfinite(est[0])
        if keep.sum() < 2:
            out["notes"].append(f"{name}: fewer than 2 validation samples with {prop!r}; not assessed")
            continue
        m = regression_metrics(obs[keep], est[0][keep])
        out["quantity_maps"][f"{name}/{output}"] = {"property": prop, "units": entry.get("units", ""),
                                                    "metrics": _metrics(m), "observed": obs[keep].tolist(),
                                                    "predicted": est[0][keep].tolist()}


def _assess_mapped_quantity(view: RunView, name: str, output: str, spec: OutputSpec, val, out: dict) -> None:
    """RMSE, bias and R2 of each band of a several-band quantity output (e.g. the canopy inversion's)
    against the reference column its ``reference_columns`` attribute maps the band to."""
    store = view.store(name)
    if store is None:
        return
    mapping = {str(b): str(c) for b, c in spec.attrs["reference_columns"].items() if b in spec.bands}
    units = spec.attrs.get("units", "")
    present = {b: c for b, c in mapping.items() if c in val.extras}
    absent = sorted(set(mapping.values()) - set(present.values()))
    note = f"{name}: the ground reference has no column {absent}; those properties are not validated"
    if absent and note not in out["notes"]:
        out["notes"].append(note)
    if not present:
        return
    est, ok = _values_at(store, output, val.row, val.col)
    for band, column in present.items():
        b = spec.bands.index(band)
        obs = val.extras[column]
        keep = ok & np.isfinite(obs) & np.isfinite(est[b])
        if keep.sum() < 2:
            out["notes"].append(f"{name}/{output}: fewer than 2 validation samples with {column!r} inside the "
                                f"map (vegetation mask); {band} not assessed")
            continue
        m = regression_metrics(obs[keep], est[b][keep])
        u = units[b] if isinstance(units, (list, tuple)) else units
        out["quantity_maps"][f"{name}/{output}:{band}"] = {"property": column, "units": u, "band": band,
                                                           "metrics": _metrics(m), "observed": obs[keep].tolist(),
                                                           "predicted": est[b][keep].tolist()}


def _metrics(m) -> dict:
    d = m.to_dict() if hasattr(m, "to_dict") else dict(m.__dict__)
    return {k: (None if isinstance(v, float) and not np.isfinite(v) else v) for k, v in d.items()}


def _assess_classes(store: TileStore, output: str, spec: OutputSpec, val, pixel_area: float, unit: str) -> dict:
    map_names = list(spec.class_names)
    ref_names = list(val.class_names)
    names = ["unclassified", *map_names] + [n for n in ref_names if n not in map_names]
    mapped, ok = _values_at(store, output, val.row, val.col)
    mapped = np.nan_to_num(mapped[0], nan=0).astype(np.int64)
    ref_codes = np.array([names.index(ref_names[c - 1]) for c in val.label], dtype=np.int64)
    keep = ok
    counts_map = _count_classes(store, output, len(map_names))
    counts = np.zeros(len(names), dtype=np.float64)
    counts[: len(map_names) + 1] = counts_map
    present = [i for i in range(len(names)) if counts[i] > 0 or (ref_codes[keep] == i).any()
               or (mapped[keep] == i).any()]
    labels = present
    m = confusion_matrix(mapped[keep], ref_codes[keep], labels=labels)
    used_names = [names[i] for i in labels]
    acc = class_accuracy(m, labels=labels, names=used_names)
    entry: dict[str, Any] = {"labels": labels, "names": used_names, "matrix": m.tolist(),
                             "mapped_pixels": counts[labels].tolist(), "pixel_area": pixel_area,
                             "area_unit": unit, "accuracy": acc.to_dict(), "samples": int(keep.sum())}
    try:
        areas = area_estimate(m, counts[labels], pixel_area=pixel_area, area_unit=unit, labels=labels,
                              names=used_names)
        entry["areas"] = areas.to_dict()
    except AccuracyError as exc:
        entry["areas_error"] = str(exc)
    return entry


def _write(view: RunView, out: dict) -> dict:
    p = view.dir / ACCURACY_FILE
    tmp = p.with_suffix(".json.tmp")
    tmp.write_text(json.dumps(out, indent=1, default=_json_default))
    tmp.replace(p)
    return out


def _json_default(v: Any) -> Any:
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, np.ndarray):
        return v.tolist()
    return str(v)


# STAC collection ---------------------------------------------------------------------------------------
def gather_collection(run_dir: Path, name: str) -> Path | None:
    """Gather the STAC items of the run's products into ``products/collection.json`` (validated)."""
    import pystac

    from swathmill.tiles.export import stac_collection, validate_collection_offline

    products = Path(run_dir) / "products"
    items = [pystac.Item.from_file(str(p)) for p in sorted(products.glob("*.tif.json"))]
    if not items:
        return None
    col = stac_collection(items, products, collection_id=f"{name}-products",
                          description=f"Map products of the swathmill run {name!r}. {CAUTION_SHORT}")
    validate_collection_offline(col)
    return products / "collection.json"


# finishing a run ---------------------------------------------------------------------------------------
def finish_run(run, cfg, result, plan, base: Path, progress) -> None:
    """Called by the pipeline after its steps (finished or not)."""
    t0 = time.perf_counter()
    try:
        write_endmember_tables(run.dir)
        if result is not None and result.ok and cfg.reference is not None:
            assess_accuracy(run.dir)
        if cfg.engine.export:
            gather_collection(run.dir, cfg.name)
    finally:
        run.ledger.add_timing("finish", "accuracy+stac", time.perf_counter() - t0)
    if cfg.report.enabled:
        t1 = time.perf_counter()
        path = rebuild_report(run.dir)
        run.ledger.add_timing("finish", "report", time.perf_counter() - t1)
        progress.message(f"report written: {path}")


def write_endmember_tables(run_dir: Path) -> list[Path]:
    """Endmembers found in the image: a library table and a point layer per extraction step, in products/."""
    from swathmill.workflows.methods.endmembers import write_endmember_products

    view = open_run(run_dir)
    written: list[Path] = []
    for name in view.steps:
        model = view.model(name) if view.complete(name) else None
        if model is not None and "rows" in model and "cols" in model and "names" in model and "spectra" in model:
            written += write_endmember_products(model, view.dir / "products", name)
    return written


def rebuild_report(run_dir: Path) -> Path:
    from swathmill.workflows.app.report_builder import report_from_run

    return report_from_run(open_run(run_dir))
