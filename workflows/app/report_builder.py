"""Fill the report's summary from a run directory (finished or partial) and write the HTML file."""
from __future__ import annotations

import dataclasses
import json
import math
import time
from pathlib import Path

import numpy as np

from swathmill.tiles.ledger import Ledger
from swathmill.tiles.store import TileStore, decode

from swathmill.workflows.app.report import (AccuracyView, ClassMapView, ContinuousMapView, EigenvalueCurve, FlightLine,
                                            InputsSection, Quicklook, ReportSummary, ScatterView, SpectraView,
                                            StepTiming, build_report)
from swathmill.workflows.app.runview import ACCURACY_FILE, RunView, is_class_map, with_role
from swathmill.workflows.methods.accuracy import area_estimate, class_accuracy
from swathmill.workflows.roles import Role

__all__ = ["report_from_run"]

MAX_PIXELS = 900


def _extent(store: TileStore) -> tuple[float, float, float, float]:
    left, bottom, right, top = store.grid.bounds
    return left, right, bottom, top


def _thumb(store: TileStore, output: str, bands: list[int] | None = None, max_pixels: int = MAX_PIXELS) -> np.ndarray:
    """Decoded (bands, rows, cols) at a stride that keeps the longer side near ``max_pixels``."""
    g = store.grid
    step = max(1, math.ceil(max(g.rows, g.cols) / max_pixels))
    arr = store.array(output)
    sel_b = bands if bands is not None else list(range(arr.shape[0]))
    raw = arr.get_orthogonal_selection((sel_b, slice(None, None, step), slice(None, None, step)))
    valid = store.array("valid")[::step, ::step].astype(bool)
    spec = store.specs[output]
    spec_sel = spec if bands is None else dataclasses.replace(spec, bands=tuple(spec.bands[i] for i in sel_b),
                                                              coords={})
    out = decode(np.asarray(raw), spec_sel)
    out[:, ~valid] = np.nan
    return out


def _quicklook(view: RunView, mosaic: TileStore) -> Quicklook | None:
    spec = mosaic.specs["reflectance"]
    wl = np.asarray(spec.coords.get("wavelength", ()), dtype=float)
    if wl.size == 0 or wl.min() > 700 or wl.max() < 450:
        return None
    idx = [int(np.argmin(np.abs(wl - w))) for w in (640.0, 550.0, 470.0)]
    rgb = _thumb(mosaic, "reflectance", idx)
    return Quicklook(rgb=rgb, wavelengths=tuple(float(wl[i]) for i in idx), extent=_extent(mosaic))


def _inputs(view: RunView, mosaic: TileStore, background: np.ndarray | None) -> InputsSection:
    from pyproj import Transformer

    lines = []
    fp = view.dir / "footprints.geojson"
    tr = Transformer.from_crs("EPSG:4326", mosaic.grid.crs, always_xy=True)
    if fp.is_file():
        doc = json.loads(fp.read_text())
        for f in doc.get("features", []):
            props = f.get("properties", {})
            if "line" not in props:
                continue
            geom = f["geometry"]
            ring = geom["coordinates"][0] if geom["type"] == "Polygon" else geom["coordinates"][0][0]
            xs, ys = tr.transform([p[0] for p in ring], [p[1] for p in ring])
            lines.append(FlightLine(name=str(props.get("name")), path=str(props.get("file", "")),
                                    bands=props.get("bands"), footprint=list(zip(xs, ys))))
    bg = None
    if background is not None:
        bg = np.nan_to_num(np.moveaxis(background, 0, -1))
        hi = np.nanpercentile(bg, 98) or 1.0
        bg = np.clip(bg / hi, 0, 1)
    return InputsSection(lines=lines, crs=mosaic.grid.crs, grid_shape=mosaic.grid.shape,
                         resolution=mosaic.grid.res[0], background=bg, extent=_extent(mosaic))


OUTSIDE_RANGE = 2
"""Value of a calibration's range mask outside the range of its samples (1 inside, 0 no data)."""


def report_from_run(view: RunView, title: str | None = None) -> Path:
    """Fill the report's summary from a run directory and write ``report.html``; returns its path."""
    cfg = view.config
    summary = ReportSummary(title=title or (cfg.get("report") or {}).get("title") or f"swathmill run {cfg['name']}",
                            run_name=cfg["name"], created=time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()))
    incomplete = [n for n in view.steps if not view.complete(n)]
    if incomplete:
        summary.notes.append(f"partial run: steps not finished: {', '.join(incomplete)}; their maps are left out")
    _mosaic(view, summary)
    for name in view.steps:
        if not view.complete(name) or name == "mosaic":
            continue
        store = view.store(name)
        if store is None:
            continue
        model = view.model(name)
        _step_maps(name, store, model, summary)
        _step_models(name, model, summary)
    _library_spectra(view, summary)
    _accuracy(view, summary)
    _timings(view, summary)
    summary.provenance = {
        "software": "swathmill", "software_version": _version(),
        "configuration file": cfg.get("config_file", ""), "run directory": str(view.dir),
        **{f"step {n}": s["key"] for n, s in view.steps.items()},
    }
    return build_report(view.dir, summary, max_pixels=MAX_PIXELS)


def _mosaic(view: RunView, summary: ReportSummary) -> None:
    """The quicklook, the input flight lines and the brightness-matching note of a finished mosaic."""
    mosaic = view.store("mosaic") if view.complete("mosaic") else None
    if mosaic is None:
        return
    summary.quicklook = _quicklook(view, mosaic)
    summary.inputs = _inputs(view, mosaic, summary.quicklook.rgb if summary.quicklook else None)
    mm = view.model("mosaic")
    if mm and "overlap_stats" in mm:
        summary.notes.append(f"brightness matching: {json.dumps(mm['overlap_stats'])[:600]}")


def _step_maps(name: str, store: TileStore, model: dict | None, summary: ReportSummary) -> None:
    """The maps of one step's store, chosen by the role of each output."""
    specs = store.specs
    has_abundance = bool(with_role(specs, Role.ABUNDANCE))
    for output, spec in specs.items():
        if spec.role == Role.COMPONENTS and model is not None and "eigenvalues" in model:
            lam = np.asarray(model["eigenvalues"], dtype=float)
            method = str(model.get("method", "mnf"))
            summary.eigenvalues.append(EigenvalueCurve(
                values=lam, kept=int(model.get("n_components", len(lam))),
                title=f"{method.upper()} eigenvalues ({name})",
                ylabel="eigenvalue (SNR + 1)" if method == "mnf" else "variance"))
        elif is_class_map(spec):
            cls = _thumb(store, output)[0]
            summary.class_maps.append(ClassMapView(
                name=f"{name}/{output}", classes=np.nan_to_num(cls, nan=0).astype(np.int32),
                class_names=list(spec.class_names), colors=[tuple(c) for c in spec.colors] if spec.colors else None,
                extent=_extent(store)))
        elif spec.role == Role.ABUNDANCE:
            data = _thumb(store, output)
            for b, band in enumerate(spec.bands):
                summary.continuous_maps.append(ContinuousMapView(
                    name=f"{name}: {band}", values=data[b], units="fraction", kind="abundance", vmin=0.0,
                    vmax=1.0, extent=_extent(store)))
        elif spec.role == Role.DIAGNOSTIC and has_abundance and _is_residual(spec):
            summary.continuous_maps.append(ContinuousMapView(
                name=f"{name}: residual RMSE", values=_thumb(store, output)[0], units="reflectance",
                kind="other", extent=_extent(store)))
        elif spec.role == Role.QUANTITY:
            _quantity_maps(name, store, output, spec, summary)


def _is_residual(spec) -> bool:
    """The unmixing fit's residual: its one-band diagnostic carrying units (the abundance sum has none)."""
    return len(spec.bands) == 1 and "units" in spec.attrs


def _quantity_maps(name: str, store: TileStore, output: str, spec, summary: ReportSummary) -> None:
    """A calibrated quantity, hatched outside its samples' range (the store's mask), and its uncertainty."""
    masks = with_role(store.specs, Role.MASK)
    outside = _thumb(store, masks[0])[0] == OUTSIDE_RANGE if masks else None
    units = str(spec.attrs.get("units", ""))
    summary.continuous_maps.append(ContinuousMapView(
        name=f"{name}: {spec.bands[0]}", values=_thumb(store, output)[0], units=units, kind="quantity",
        extent=_extent(store), outside=outside,
        note="hatched: outside the range of the calibration samples"))
    for unc in with_role(store.specs, Role.UNCERTAINTY):
        summary.continuous_maps.append(ContinuousMapView(
            name=f"{name}: uncertainty (1 sigma)", values=_thumb(store, unc)[0], units=units,
            kind="uncertainty", extent=_extent(store)))


def _step_models(name: str, model: dict | None, summary: ReportSummary) -> None:
    """Figures from a step's fitted model: calibration scatter, endmember spectra found in the image."""
    if model is not None and "cv_predicted" in model and "observed" in model:
        summary.scatters.append(ScatterView.from_calibration(name, model))
    if model is not None and "spectra" in model and "wavelengths" in model and "names" in model:
        spectra = np.asarray(model["spectra"], dtype=float)
        wl = np.asarray(model["wavelengths"], dtype=float)
        if spectra.ndim == 2 and spectra.shape[-1] == wl.size:
            summary.spectra.append(SpectraView(
                title=f"endmembers found by {name} ({model.get('method', '')})", wavelengths=wl,
                spectra={str(n): spectra[i] for i, n in enumerate(model["names"])}, kind="endmember"))


def _version() -> str:
    from swathmill.tiles.run import ENGINE_VERSION
    return ENGINE_VERSION


def _library_spectra(view: RunView, summary: ReportSummary) -> None:
    from swathmill.workflows.inputs.library import read_library

    paths = set()
    cfg = view.config
    for key in ("sam", "sff"):
        for sec in (cfg.get("classify") or {}).get(key, []) or []:
            lib = (sec.get("references") or {}).get("library")
            if lib:
                paths.add(lib)
    lib = ((cfg.get("unmix") or {}).get("endmembers") or {}).get("library")
    if lib:
        paths.add(lib)
    for p in sorted(paths):
        path = Path(p) if Path(p).is_absolute() else view.base / p
        try:
            lib = read_library(path)
        except Exception as exc:  # noqa: BLE001 - the report shows what it can
            summary.notes.append(f"library {p}: {exc}")
            continue
        summary.spectra.append(SpectraView(title=f"spectral library {Path(p).name}", wavelengths=lib.wavelengths,
                                           spectra={n: lib.spectra[i] for i, n in enumerate(lib.names)},
                                           kind="library"))


def _accuracy(view: RunView, summary: ReportSummary) -> None:
    p = view.dir / ACCURACY_FILE
    if not p.is_file():
        summary.notes.append("no accuracy assessment in this run (no ground reference, or the run is partial)")
        return
    acc = json.loads(p.read_text())
    summary.notes += acc.get("notes", [])
    for ref, e in acc.get("class_maps", {}).items():
        m = np.asarray(e["matrix"], dtype=float)
        ca = class_accuracy(m, labels=e["labels"], names=e["names"])
        areas = None
        note = f"{e['samples']} validation samples"
        if "areas" in e:
            areas = area_estimate(m, np.asarray(e["mapped_pixels"], dtype=float), pixel_area=e["pixel_area"],
                                  area_unit=e["area_unit"], labels=e["labels"], names=e["names"])
        else:
            note += f"; areas not estimated: {e.get('areas_error', '')}"
        summary.accuracy.append(AccuracyView(map_name=ref, accuracy=ca, areas=areas, note=note))
    for ref, e in acc.get("quantity_maps", {}).items():
        mt = e["metrics"]
        summary.scatters.append(ScatterView(
            name=f"{ref} against validation samples of {e['property']}", observed=np.asarray(e["observed"]),
            predicted=np.asarray(e["predicted"]), units=e.get("units", ""), kind="quantity",
            metrics={k: mt[k] for k in ("n", "r2", "rmse", "bias") if k in mt}))
    for ref, e in acc.get("abundance_maps", {}).items():
        obs, pred = np.asarray(e["observed"]), np.asarray(e["predicted"])
        pooled = e["metrics"][-1] if len(e["metrics"]) > len(e["names"]) else e["metrics"][0]
        summary.scatters.append(ScatterView(
            name=f"{ref} against reference fractions ({', '.join(e['names'])})", observed=obs.ravel(),
            predicted=pred.ravel(), units="fraction", kind="abundance",
            metrics={k: pooled[k] for k in ("n", "r2", "rmse", "bias") if k in pooled}))


def _timings(view: RunView, summary: ReportSummary) -> None:
    ledger = Ledger(view.dir / "ledger.sqlite")
    try:
        rows = ledger.timings()
    finally:
        ledger.close()
    from swathmill.tiles.incremental import campaign_notes

    summary.notes.extend(campaign_notes(view.dir))
    if not rows:
        return
    last = rows[-1]["invocation"]
    for r in rows:
        if r["invocation"] == last:
            summary.timings.append(StepTiming(step=r["name"], seconds=float(r["seconds"]), phase=r["phase"],
                                              tiles=view.steps.get(r["name"], {}).get("total")))
