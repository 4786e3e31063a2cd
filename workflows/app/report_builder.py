"""Fill the report's summary from a run directory (finished or partial) and write the HTML file."""
from __future__ import annotations

import dataclasses
import json
import math
import time
from pathlib import Path

import numpy as np

from swathmill.tiles.ledger import Ledger
from swathmill.tiles.paths import resolve
from swathmill.tiles.store import TileStore, decode

from swathmill.workflows.app.report import (AccuracyView, ClassMapView, ContinuousMapView, EigenvalueCurve, FlightLine,
                                            InputsSection, LineGains, PlanCheck, Quicklook, ReportSummary, ScatterView,
                                            SpectraView, StepParameters, StepTiming, build_report, model_choice_html)
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
    # a band asked for twice (a coarse sensor's nearest band to two colours) is read once, then repeated
    sel_b, again = np.unique(bands if bands is not None else np.arange(arr.shape[0]), return_inverse=True)
    sel_b = [int(b) for b in sel_b]
    raw = arr.get_orthogonal_selection((sel_b, slice(None, None, step), slice(None, None, step)))
    valid = store.array("valid")[::step, ::step].astype(bool)
    spec = store.specs[output]
    spec_sel = spec if bands is None else dataclasses.replace(spec, bands=tuple(spec.bands[i] for i in sel_b),
                                                              coords={})
    out = decode(np.asarray(raw), spec_sel)
    out[:, ~valid] = np.nan
    return out if bands is None else out[np.asarray(again).ravel()]


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
    if cfg.get("canopy"):
        from swathmill.workflows.methods.rtm.step import CAUTION_CANOPY

        summary.caution = f"{summary.caution} {CAUTION_CANOPY}"
    _mosaic(view, summary)
    for name in view.steps:
        summary.parameters.append(step_parameters(view, name))
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
    summary.model_choice = model_choice_html(
        {n: view.model(n) for n in view.steps if view.complete(n)},
        json.loads((view.dir / ACCURACY_FILE).read_text()) if (view.dir / ACCURACY_FILE).is_file() else None,
        cfg.get("calibrations") or [])
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
    summary.crs_unit = _crs_unit(mosaic.grid.crs)
    for output in with_role(mosaic.specs, Role.SOURCE):
        names = [ln.name for ln in summary.inputs.lines] if summary.inputs else []
        src = _thumb(mosaic, output)[0]
        n = max(len(names), int(np.nanmax(src)) if np.isfinite(src).any() else 0)
        names = names + [f"line {k}" for k in range(len(names) + 1, n + 1)]
        summary.class_maps.append(ClassMapView(
            name="mosaic: flight line of each pixel", classes=np.nan_to_num(src, nan=0).astype(np.int32),
            class_names=names, extent=_extent(mosaic), step="mosaic",
            note=f"Where lines overlap, each pixel comes from one line (overlap rule: "
                 f"{mosaic.specs[output].attrs.get('policy', 'see the parameters')}); 0 is outside every line."))


def _crs_unit(crs: str) -> str:
    """Unit name of the first axis of ``crs`` ("metre", "degree"...), "" when unknown."""
    try:
        from pyproj import CRS

        axes = CRS.from_user_input(crs).axis_info
        return str(axes[0].unit_name) if axes else ""
    except Exception:  # noqa: BLE001 - the labels then go without a unit
        return ""


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
                name=f"{name}/{output}", classes=np.nan_to_num(cls, nan=int(spec.nodata)).astype(np.int32),
                class_names=list(spec.class_names), colors=[tuple(c) for c in spec.colors] if spec.colors else None,
                extent=_extent(store), nodata=int(spec.nodata), step=name))
        elif spec.role == Role.ABUNDANCE:
            data = _thumb(store, output)
            for b, band in enumerate(spec.bands):
                summary.continuous_maps.append(ContinuousMapView(
                    name=f"{name}: {band}", values=data[b], units="fraction", kind="abundance", vmin=0.0,
                    vmax=1.0, extent=_extent(store), step=name))
        elif spec.role == Role.DIAGNOSTIC and has_abundance and _is_residual(spec):
            summary.continuous_maps.append(ContinuousMapView(
                name=f"{name}: residual RMSE of the unmixing fit", values=_thumb(store, output)[0],
                units="reflectance", kind="diagnostic", extent=_extent(store), step=name,
                note="A diagnostic of the fit, not a quantity: high where the endmembers do not explain the "
                     "spectrum (a missing material, noise), colours stretched between the 2nd and 98th percentiles."))
        elif spec.role == Role.FEATURE:
            data = _thumb(store, output)
            units = spec.attrs.get("units")
            for b, band in enumerate(spec.bands):
                u = units[b] if isinstance(units, list) and b < len(units) else (units or "")
                summary.continuous_maps.append(ContinuousMapView(
                    name=f"{name}: {band}", values=data[b], units=str(u), kind="feature", extent=_extent(store),
                    step=name))
        elif spec.role == Role.QUANTITY:
            _quantity_maps(name, store, output, spec, summary)


def _is_residual(spec) -> bool:
    """The unmixing fit's residual: its one-band continuous diagnostic (not a count or a sum of fractions)."""
    if len(spec.bands) != 1 or spec.kind != "continuous":
        return False
    text = f"{spec.bands[0]} {spec.attrs.get('quantity', '')} {spec.attrs.get('long_name', '')}".lower()
    return "rmse" in text or "residual" in text


def _quantity_maps(name: str, store: TileStore, output: str, spec, summary: ReportSummary) -> None:
    """A calibrated quantity, drawn in red outside its samples' range (the store's mask), and its uncertainty."""
    if len(spec.bands) > 1:
        _band_quantity_maps(name, store, output, spec, summary)
        return
    masks = with_role(store.specs, Role.MASK)
    outside = _thumb(store, masks[0])[0] == OUTSIDE_RANGE if masks else None
    units = str(spec.attrs.get("units", ""))
    summary.continuous_maps.append(ContinuousMapView(
        name=f"{name}: {spec.bands[0]}", values=_thumb(store, output)[0], units=units, kind="quantity",
        extent=_extent(store), outside=outside, step=name,
        note="Drawn in red: pixels whose prediction lies outside the range of the calibration samples "
             "(an extrapolation)."))
    for unc in with_role(store.specs, Role.UNCERTAINTY):
        summary.continuous_maps.append(ContinuousMapView(
            name=f"{name}: uncertainty (1 sigma)", values=_thumb(store, unc)[0], units=units,
            kind="uncertainty", extent=_extent(store), step=name))


def _band_quantity_maps(name: str, store: TileStore, output: str, spec, summary: ReportSummary) -> None:
    """A several-band quantity (one property per band, e.g. the canopy inversion) and the uncertainty
    output that names it in its ``of`` attribute, band by band."""
    units = spec.attrs.get("units", "")
    data = _thumb(store, output)
    sds = [u for u in with_role(store.specs, Role.UNCERTAINTY) if store.specs[u].attrs.get("of") == output]
    sd = _thumb(store, sds[0]) if sds else None
    for b, band in enumerate(spec.bands):
        u = str(units[b] if isinstance(units, (list, tuple)) else units)
        summary.continuous_maps.append(ContinuousMapView(
            name=f"{name}/{output}: {band}", values=data[b], units=u, kind="quantity", extent=_extent(store),
            note="empty where the step's mask leaves the pixel out", step=name))
        if sd is not None:
            summary.continuous_maps.append(ContinuousMapView(
                name=f"{name}/{sds[0]}: {band} (1 sigma)", values=sd[b], units=u, kind="uncertainty",
                extent=_extent(store), step=name))


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
        path = resolve(view.base, p)
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
        summary.accuracy.append(AccuracyView(map_name=ref, accuracy=ca, areas=areas, note=note,
                                             producible=_producible(view, ref, e["names"])))
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


def _producible(view: RunView, ref: str, names: list[str]) -> list[str] | None:
    """The classes the map ``step/output`` can produce (its class names and "unclassified")."""
    step, _, output = ref.partition("/")
    store = view.store(step)
    spec = store.specs.get(output) if store is not None else None
    if spec is None or not spec.class_names:
        return None
    own = set(spec.class_names) | {"unclassified"}
    return [n for n in names if n in own]


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
    invocations = list(dict.fromkeys(r["invocation"] for r in rows))
    last = invocations[-1]
    sums: dict[tuple[str, str], StepTiming] = {}
    seen: dict[tuple[str, str], set] = {}
    for r in rows:
        k = (r["name"], r["phase"])
        t = sums.setdefault(k, StepTiming(step=r["name"], seconds=0.0, phase=r["phase"], invocations=0,
                                          tiles=view.steps.get(r["name"], {}).get("total")))
        t.seconds += float(r["seconds"])
        seen.setdefault(k, set()).add(r["invocation"])
        t.invocations = len(seen[k])
        if r["invocation"] == last:
            t.last_seconds = (t.last_seconds or 0.0) + float(r["seconds"])
    summary.timings.extend(sums.values())
    _plan_vs_run(view, summary, rows)
    summary.timing_note = (
        f"Seconds add up every invocation of this run that did work: {len(invocations)} invocation(s), "
        f"{', '.join(invocations)} (the latest last). A resumed invocation adds only the tiles it computed; "
        "a step recomputed after a change includes the time of its earlier computations.")


def _store_bytes(path: Path) -> int | None:
    if not path.is_dir():
        return None
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())


def _plan_vs_run(view: RunView, summary: ReportSummary, rows: list[dict]) -> None:
    """The planner's estimate (``estimate-plan.json`` from ``swathmill plan --probe --save``, else the
    ``estimate.json`` every run saves, which has sizes but no times) beside the measured figures: fit and
    tile seconds over every invocation, and each store's bytes on disk."""
    path = next((p for p in (view.dir / "estimate-plan.json", view.dir / "estimate.json") if p.is_file()), None)
    if path is None:
        return
    try:
        est = json.loads(path.read_text())
        slots = max(1, int(est.get("workers") or 1) * int(est.get("threads_per_worker") or 1))
        steps = list(est["steps"])
    except (ValueError, KeyError, TypeError) as exc:
        summary.notes.append(f"{path.name} could not be read ({exc}); the plan is not compared with the run")
        return
    spent: dict[str, float] = {}
    for r in rows:
        if r["phase"] in ("fit", "tiles"):
            spent[r["name"]] = spent.get(r["name"], 0.0) + float(r["seconds"])
    for s in steps:
        name = s.get("step")
        if name not in view.steps:
            continue
        secs = s.get("seconds")
        summary.estimates.append(PlanCheck(
            step=name, est_seconds=None if secs is None else float(secs) / slots, seconds=spent.get(name),
            est_disk=s.get("disk"), disk=_store_bytes(view.dir / "stores" / f"{name}.zarr")))
    probed = bool(est.get("probe"))
    summary.estimate_note = (
        f"From {path.name} ({'probed: times and compressed sizes measured on a few tiles' if probed else 'not probed: no times, sizes without compression'}"
        f", written {est.get('written', '?')}, for {slots} worker slot(s)). Times are the fit and tile tasks of a "
        "fresh run, not the export of products; measured seconds add up every invocation, and a step fused with "
        "others carries its share of their pass.")


# ----------------------------------------------------------------------------------------------
# each step's parameters in plain words
# ----------------------------------------------------------------------------------------------

def _flat(value: object, prefix: str = "") -> list[tuple[str, str]]:
    """A parameter dump as (dotted key, short value) rows; long lists are summarised."""
    if isinstance(value, dict):
        rows: list[tuple[str, str]] = []
        for k, v in value.items():
            rows += _flat(v, f"{prefix}.{k}" if prefix else str(k))
        return rows
    text = json.dumps(value, default=str)
    if len(text) > 160:
        text = (f"{len(value)} items: " if isinstance(value, list) else "") + text[:150] + " ..."
    return [(prefix, text)]


def _fmt(v: object) -> str:
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def _get(d: dict | None, *path: str, default: object = None) -> object:
    for key in path:
        if not isinstance(d, dict) or key not in d:
            return default
        d = d[key]
    return d


def step_parameters(view: RunView, name: str) -> StepParameters:
    """The parameters of step ``name`` in plain words, from the ledger and its fitted model.

    Sentences are written for what the run recorded (thresholds, bad-band windows, brightness gains,
    components kept and why, endmembers, the SVM's chosen C and gamma, calibration metrics); every
    parameter also appears in the table, as the step recorded it.
    """
    info = view.steps.get(name, {}).get("info", {})
    params = info.get("params") or {}
    model = view.model(name) or {}
    out = StepParameters(step=name, table=_flat(params))
    say = out.sentences.append
    section = params.get("section") if isinstance(params.get("section"), dict) else None
    settings = params.get("settings") if isinstance(params.get("settings"), dict) else {}
    inputs = info.get("inputs") or {}
    if inputs:
        say("Reads " + ", ".join(f"{v}" for v in inputs.values()) + ".")
    if section is not None and "bad_bands" in section:  # the mosaic
        bad = section.get("bad_bands") or []
        say("Bands dropped as bad (water vapour, detector ends): "
            + (", ".join(f"{a:g}–{b:g} nm" for a, b in bad) if bad else "none") + ".")
        say(f"Overlaps: each pixel taken by the rule {section.get('overlap')!s}"
            + (f" (blend width {section.get('blend_width')})" if section.get("overlap") == "blend" else "")
            + f"; resampling {section.get('resampling')}.")
        if section.get("brightness_matching"):
            say(f"Brightness matching on: every line is brought to line {model.get('reference', section.get('reference_line'))} "
                f"by a gain and an offset per band, fitted on up to {section.get('sample_size')} overlap pixels.")
            for row in model.get("summary", []) or []:
                pair = row.get("pair")
                if pair and "rmsd_before" in row and "rmsd_after" in row:
                    say(f"Overlap of lines {pair[0]} and {pair[1]}: RMS difference {row['rmsd_before']:.4f} before, "
                        f"{row['rmsd_after']:.4f} after matching.")
            if "gain" in model and "offset" in model:
                out.gains = _gains(view, params, model)
        else:
            say("Brightness matching off: lines are mosaicked as they are.")
    elif "eigenvalues" in model:  # MNF or PCA
        k = model.get("n_components")
        why = ("the configuration asks for this number (components)" if params.get("components") else
               f"eigenvalues of at least {params.get('min_eigenvalue')} (min_eigenvalue)"
               if params.get("min_eigenvalue") else
               f"the first components holding {params.get('cumulative_fraction')} of the variance "
               "(cumulative_fraction)" if params.get("cumulative_fraction") else "the method's default")
        lam = np.asarray(model["eigenvalues"], dtype=float)
        last = f"; the last kept has eigenvalue {lam[k - 1]:.3g}, the first dropped {lam[k]:.3g}" \
            if k and lam.size > k else ""
        say(f"{str(model.get('method', 'mnf')).upper()}: {k} of {lam.size} components kept, because {why}{last}.")
        if model.get("method") == "mnf":
            say(f"Noise estimated from differences of neighbouring pixels ({params.get('noise_direction')}) over "
                f"{model.get('n_pixels')} pixels.")
    elif params.get("denoise_components"):
        say(f"Reflectance rebuilt from the first {params['denoise_components']} MNF components (noise removal).")
    if isinstance(params.get("extraction"), dict) and "n_endmembers" in model:
        ex = params["extraction"]
        say(f"{model.get('n_endmembers')} endmembers found by {model.get('method', ex.get('method'))} in "
            f"{model.get('n_dims')} reduced dimensions among {model.get('n_candidates')} candidate pixels "
            f"(asked for {ex.get('n_endmembers')}, seed {ex.get('seed')}).")
    if "threshold" in settings:
        cls = settings.get("class_thresholds") or {}
        say(f"Spectral angle: a pixel takes the class of the closest reference spectrum when the angle is at most "
            f"{_fmt(settings['threshold'])} rad; otherwise it stays unclassified."
            + (" Per-class thresholds: " + ", ".join(f"{k} {_fmt(v)} rad" for k, v in cls.items()) + "." if cls else ""))
    if "max_rmse" in settings and "range" in settings:
        lo, hi = settings["range"]
        say(f"Feature fitting over {lo:g}–{hi:g} nm (continuum removed): a class needs a fit RMSE of at most "
            f"{_fmt(settings['max_rmse'])}" + (f" and a scale of at least {_fmt(settings['min_scale'])}"
                                               if settings.get("min_scale") else "") + ".")
    if params.get("names") and ("threshold" in settings or "max_rmse" in settings):
        say(f"References ({model.get('source', 'library')}, resampled by {model.get('method', '?')} band "
            f"responses): {', '.join(params['names'])}.")
    if "best" in model and "C" in settings:
        best = model["best"]
        say(f"SVM (RBF kernel): chosen C = {_fmt(best.get('C'))} and gamma = {_fmt(best.get('gamma'))} from the grid "
            f"C {settings['C']} x gamma {settings['gamma']}, by {model.get('folds', settings.get('folds'))}-fold "
            f"spatially blocked cross-validation ({model.get('scoring', 'accuracy')} {_fmt(model.get('cv_score'))}).")
        counts = model.get("class_counts") or {}
        if counts:
            say(f"Training samples per class ({model.get('n_train', sum(counts.values()))} in all): "
                + ", ".join(f"{k} {v}" for k, v in counts.items()) + ".")
        val = model.get("validation") or {}
        if val:
            say(f"{val.get('n')} validation samples kept apart (overall accuracy on them "
                f"{_fmt(val.get('overall_accuracy'))}; per class in the accuracy section).")
    if "size" in params and "n_classes" in params:
        say(f"Majority (modal) filter in a {params['size']} x {params['size']} pixel window.")
    if "condition_number" in model and "endmembers" in model:
        say(f"Unmixing: {settings.get('method', '?')} least squares with {len(model.get('names', []))} endmembers "
            f"from the {model.get('source', '?')} ({', '.join(model.get('names', []))}); condition number of the "
            f"endmember matrix {model['condition_number']:.1f} (limit {_fmt(settings.get('max_condition'))}).")
    if "cv" in model and "method" in model and "predictors" in model:
        cv = model["cv"]
        k = model.get("n_components")
        say(f"Calibration: {model['method']}" + (f" with {k} components" if k else "")
            + f" on {len(model['predictors'])} predictors; cross-validated R² {_fmt(cv.get('r2'))}, RMSE "
              f"{_fmt(cv.get('rmse'))} {model.get('units', '')}, bias {_fmt(cv.get('bias'))}, n {cv.get('n')}.")
    if isinstance(params.get("features"), list):
        say("Features: " + "; ".join(
            f"{f.get('name')} ({f.get('kind')}" + (f", {f['range'][0]:g}–{f['range'][1]:g} nm" if f.get("range") else "")
            + ")" for f in params["features"] if isinstance(f, dict)) + ".")
    return out


def _gains(view: RunView, params: dict, model: dict) -> LineGains:
    """The mosaic's brightness gains and offsets per line, at the mosaic's band wavelengths."""
    lines = params.get("lines") or []
    gain = np.asarray(model["gain"], dtype=float)
    names = [str(ln.get("name", f"line {k + 1}")) if isinstance(ln, dict) else str(ln)
             for k, ln in enumerate(lines)] or [f"line {k + 1}" for k in range(gain.shape[0])]
    names = (names + [f"line {k + 1}" for k in range(len(names), gain.shape[0])])[:gain.shape[0]]
    wl = np.arange(gain.shape[1], dtype=float)
    store = view.store("mosaic")
    if store is not None and "reflectance" in store.specs:
        w = np.asarray(store.specs["reflectance"].coords.get("wavelength", ()), dtype=float)
        if w.size == gain.shape[1]:
            wl = w
    ref = model.get("reference")
    ref_name = names[ref - 1] if isinstance(ref, int) and 0 < ref <= len(names) else ""
    return LineGains(names=names, wavelengths=wl, gain=gain, offset=np.asarray(model["offset"], dtype=float),
                     reference=ref_name)
