"""The run report: one self-contained HTML page a person looks at instead of reading tables.

:func:`build_report` writes ``report.html`` into the run directory from a :class:`ReportSummary`.
Every section of the summary is optional (``None`` or an empty list), so a partial run still gets
a report; the page lists what the run did not produce.

The page has no remote resources and no scripts: every figure is a PNG drawn with matplotlib's Agg
renderer and embedded as a base64 ``data:`` URI, the style sheet is inline, and every piece of text
from the run is HTML-escaped. Large rasters are thinned by striding (nearest sample) to at most
``max_pixels`` on their longer side before plotting: the report shows the maps, the products hold
the data.

The summary is a plain typed structure (dataclasses of numpy arrays, strings and numbers), filled
by whoever knows the run (the pipeline, from the run directory); accuracy sections take the result
objects of :mod:`swathmill.workflows.methods.accuracy` directly.
"""
from __future__ import annotations

import base64
import html
import io
import os
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Literal, Mapping, Sequence

import numpy as np

from swathmill.tiles.palette import UNCLASSIFIED_RGB
from swathmill.workflows.caution import CAUTION
from swathmill.workflows.methods.accuracy import AreaEstimate, ClassAccuracy, regression_metrics

__all__ = [
    "CAUTION",
    "REPORT_NAME",
    "FlightLine",
    "InputsSection",
    "Quicklook",
    "EigenvalueCurve",
    "ClassMapView",
    "ContinuousMapView",
    "SpectraView",
    "ScatterView",
    "AccuracyView",
    "StepTiming",
    "model_choice_html",
    "LineGains",
    "StepParameters",
    "ReportSummary",
    "overall_ci",
    "render_html",
    "build_report",
]

REPORT_NAME = "report.html"

Extent = tuple[float, float, float, float]
"""(left, right, bottom, top) in the mosaic's CRS, as matplotlib's ``imshow`` takes it."""


# ----------------------------------------------------------------------------------------------
# the summary: every field optional
# ----------------------------------------------------------------------------------------------

@dataclass
class FlightLine:
    """One input flight line: where it came from and its footprint on the mosaic grid.

    ``footprint`` is a ring of (x, y) vertices in the mosaic's CRS.
    """

    name: str
    path: str = ""
    bands: int | None = None
    rows: int | None = None
    cols: int | None = None
    footprint: Sequence[tuple[float, float]] | None = None


@dataclass
class InputsSection:
    """The inputs and the mosaic they make.

    ``background`` is an (rows, cols, 3) RGB (0-1) or (rows, cols) image of the mosaic over
    ``extent`` on which the footprints are drawn (typically the quicklook).
    """

    lines: list[FlightLine] = field(default_factory=list)
    crs: str = ""
    grid_shape: tuple[int, int] | None = None
    resolution: float | None = None
    background: np.ndarray | None = None
    extent: Extent | None = None


@dataclass
class Quicklook:
    """A true-colour view: ``rgb`` is (3, rows, cols) reflectance (red, green, blue), stretched
    between the ``stretch`` percentiles of each channel; ``wavelengths`` the bands used (nm)."""

    rgb: np.ndarray
    wavelengths: tuple[float, float, float] | None = None
    extent: Extent | None = None
    stretch: tuple[float, float] = (2.0, 98.0)


@dataclass
class EigenvalueCurve:
    """Eigenvalues of a transform (MNF: signal-to-noise + 1), largest first; ``kept`` components."""

    values: np.ndarray
    kept: int | None = None
    title: str = "MNF eigenvalues"
    ylabel: str = "eigenvalue (SNR + 1)"


@dataclass
class ClassMapView:
    """A class map: values 1..n name ``class_names``; 0 is unclassified (grey), ``nodata`` no data (white)."""

    name: str
    classes: np.ndarray
    class_names: Sequence[str]
    colors: Sequence[tuple[int, int, int]] | None = None
    extent: Extent | None = None
    nodata: int | None = None
    note: str = ""
    step: str = ""


@dataclass
class ContinuousMapView:
    """An abundance, quantity or uncertainty map, NaN where there is no data.

    ``outside`` (optional, bool) marks pixels outside the calibration range; they are drawn in red over the map.
    """

    name: str
    values: np.ndarray
    units: str = ""
    kind: Literal["abundance", "quantity", "uncertainty", "diagnostic", "feature", "other"] = "quantity"
    vmin: float | None = None
    vmax: float | None = None
    extent: Extent | None = None
    outside: np.ndarray | None = None
    note: str = ""
    step: str = ""


@dataclass
class SpectraView:
    """Spectra on one plot: ``spectra`` maps a name to values at ``wavelengths`` (nm)."""

    title: str
    wavelengths: np.ndarray
    spectra: Mapping[str, np.ndarray]
    kind: Literal["endmember", "library", "other"] = "endmember"
    ylabel: str = "reflectance"


@dataclass
class ScatterView:
    """Predicted against observed values at reference samples (calibration CV, abundance, quantity).

    ``metrics`` (r2, rmse, bias, n) are computed from the points when not given.
    """

    name: str
    observed: np.ndarray
    predicted: np.ndarray
    units: str = ""
    kind: Literal["calibration", "abundance", "quantity"] = "calibration"
    metrics: Mapping[str, float] | None = None
    note: str = ""

    @classmethod
    def from_calibration(cls, name: str, model: Mapping[str, object]) -> "ScatterView":
        """The cross-validated scatter of a fitted model of :mod:`swathmill.workflows.methods.calibration`."""
        cv = dict(model["cv"])  # type: ignore[arg-type]
        k = model.get("n_components")
        what = f"{model['method']}" + (f", {k} components" if k else "")
        return cls(name=f"{name} ({what})", observed=np.asarray(model["observed"]),
                   predicted=np.asarray(model["cv_predicted"]), units=str(model.get("units", "")),
                   kind="calibration", metrics={key: cv[key] for key in ("n", "r2", "rmse", "bias")},
                   note=f"predictors: {', '.join(map(str, model['predictors']))}"
                        if len(model["predictors"]) <= 12 else f"{len(model['predictors'])} predictors")  # type: ignore[arg-type]


@dataclass
class AccuracyView:
    """The accuracy of one class map: sample-based figures and, when mapped counts are known,
    the area-weighted estimates of Olofsson et al. (2014)."""

    map_name: str
    accuracy: ClassAccuracy
    areas: AreaEstimate | None = None
    note: str = ""
    producible: Sequence[str] | None = None
    """Classes the map can produce (None: all of the matrix's classes)."""


@dataclass
class PlanCheck:
    """The planner's estimate of one step next to what the run measured (None where either is unknown)."""

    step: str
    est_seconds: float | None = None  # wall seconds of its fit and tile tasks
    seconds: float | None = None
    est_disk: int | None = None  # bytes of its store on disk
    disk: int | None = None


@dataclass
class StepTiming:
    """Wall time of one phase of one step (``phase`` e.g. "fit", "tiles", "export")."""

    step: str
    seconds: float
    phase: str = ""
    tiles: int | None = None
    state: str = ""
    invocations: int = 1
    last_seconds: float | None = None
    """Seconds of the latest invocation alone (``seconds`` adds up every invocation)."""


@dataclass
class LineGains:
    """Brightness matching of the flight lines: per line and band ``gain`` and ``offset``
    (reflectance of the line -> reflectance of the reference line), at ``wavelengths`` (nm)."""

    names: Sequence[str]
    wavelengths: np.ndarray
    gain: np.ndarray
    offset: np.ndarray
    reference: str = ""


@dataclass
class StepParameters:
    """A step's parameters in plain words (``sentences``) and as a table of (key, value) rows."""

    step: str
    sentences: list[str] = field(default_factory=list)
    table: list[tuple[str, str]] = field(default_factory=list)
    gains: LineGains | None = None


@dataclass
class ReportSummary:
    """Everything the report shows. Every section is optional; absent ones are listed as such."""

    title: str = "swathmill run report"
    run_name: str = ""
    created: str | None = None
    inputs: InputsSection | None = None
    quicklook: Quicklook | None = None
    eigenvalues: list[EigenvalueCurve] = field(default_factory=list)
    class_maps: list[ClassMapView] = field(default_factory=list)
    continuous_maps: list[ContinuousMapView] = field(default_factory=list)
    spectra: list[SpectraView] = field(default_factory=list)
    scatters: list[ScatterView] = field(default_factory=list)
    accuracy: list[AccuracyView] = field(default_factory=list)
    timings: list[StepTiming] = field(default_factory=list)
    timing_note: str = ""
    estimates: list[PlanCheck] = field(default_factory=list)
    estimate_note: str = ""
    parameters: list[StepParameters] = field(default_factory=list)
    crs_unit: str = ""
    """Unit of the map coordinates (e.g. "metre"): axis labels and the scale bar."""
    provenance: Mapping[str, str] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    caution: str = CAUTION
    model_choice: str | None = None  # HTML of :func:`model_choice_html`


# ----------------------------------------------------------------------------------------------
# figures
# ----------------------------------------------------------------------------------------------

_DEFAULT_COLORS = [
    (31, 119, 180), (255, 127, 14), (44, 160, 44), (214, 39, 40), (148, 103, 189), (140, 86, 75),
    (227, 119, 194), (127, 127, 127), (188, 189, 34), (23, 190, 207), (174, 199, 232), (255, 187, 120),
    (152, 223, 138), (255, 152, 150), (197, 176, 213), (196, 156, 148), (247, 182, 210), (219, 219, 141),
]


def _figure(w: float = 7.0, h: float = 4.5):
    from matplotlib.figure import Figure

    return Figure(figsize=(w, h), dpi=100, layout="constrained")


def _with_legend_axes(fig, ratio: float = 0.3):
    """A main axes and, on its right, an empty axes holding the legend (the layout keeps both whole)."""
    gs = fig.add_gridspec(1, 2, width_ratios=[1.0, ratio])
    ax, lax = fig.add_subplot(gs[0]), fig.add_subplot(gs[1])
    lax.axis("off")
    return ax, lax


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _img(fig, alt: str) -> str:
    return f'<img alt="{_e(alt)}" src="data:image/png;base64,{_png(fig)}">'


def _thin(a: np.ndarray, max_pixels: int) -> tuple[np.ndarray, int]:
    """Stride an image (rows, cols, ...) down to at most ``max_pixels`` on its longer side."""
    step = max(1, int(np.ceil(max(a.shape[0], a.shape[1]) / max_pixels)))
    return a[::step, ::step], step


def _stretch(rgb: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """(3, r, c) or (r, c, 3) -> (r, c, 4) RGBA in 0..1, transparent where any channel is NaN."""
    a = np.asarray(rgb, dtype=np.float64)
    if a.ndim == 3 and a.shape[0] == 3 and a.shape[-1] != 3:
        a = np.moveaxis(a, 0, -1)
    if a.ndim != 3 or a.shape[-1] != 3:
        raise ValueError(f"an RGB image must be (3, rows, cols) or (rows, cols, 3). Got shape {a.shape}")
    out = np.zeros(a.shape[:2] + (4,))
    ok = np.all(np.isfinite(a), axis=-1)
    for k in range(3):
        ch = a[..., k]
        if ok.any():
            p0, p1 = np.percentile(ch[ok], [lo, hi])
            out[..., k] = np.clip((ch - p0) / (p1 - p0 if p1 > p0 else 1.0), 0, 1)
    out[..., 3] = ok
    out[~ok, :3] = 0
    return out


_CRS_UNIT = {"unit": ""}
"""Unit of the map coordinates of the report being drawn (set by :func:`render_html`)."""

_METRES = {"metre": 1.0, "meter": 1.0, "m": 1.0, "US survey foot": 0.3048006096, "foot": 0.3048}


def _nice_length(span: float) -> float:
    """A round length (1, 2 or 5 times a power of ten) near a fifth of ``span``."""
    target = span / 5
    if target <= 0:
        return 0.0
    p = 10 ** np.floor(np.log10(target))
    return float(min((m * p for m in (1, 2, 5, 10)), key=lambda v: abs(v - target)))


def _scale_bar(ax, extent: Extent) -> None:
    """A black and white bar in the lower left corner, its length in metres or kilometres."""
    to_m = _METRES.get(_CRS_UNIT["unit"])
    if to_m is None:
        return
    from matplotlib.patches import Rectangle

    left, right, bottom, top = extent
    metres = _nice_length(abs(right - left) * to_m)
    if metres <= 0:
        return
    length = metres / to_m
    x0 = left + 0.05 * (right - left)
    y0 = bottom + 0.06 * (top - bottom)
    h = 0.012 * abs(top - bottom)
    ax.add_patch(Rectangle(
        (x0 - 0.01 * (right - left), y0 - 1.5 * h), length + 0.02 * (right - left), 5.5 * h,
        facecolor="white", alpha=0.8, lw=0))
    ax.add_patch(Rectangle(
        (x0, y0), length / 2, h, facecolor="black", edgecolor="black", lw=0.8))
    ax.add_patch(Rectangle(
        (x0 + length / 2, y0), length / 2, h, facecolor="white", edgecolor="black", lw=0.8))
    label = f"{metres / 1000:g} km" if metres >= 1000 else f"{metres:g} m"
    ax.text(x0 + length / 2, y0 + 1.6 * h, label, ha="center", va="bottom", fontsize=8)


def _axes_labels(ax, extent: Extent | None) -> None:
    """Axis labels with the unit of the map's CRS, plain tick labels, and a scale bar."""
    if extent is None:
        ax.set_xlabel("column (pixels)")
        ax.set_ylabel("row (pixels)")
        return
    unit = _CRS_UNIT["unit"]
    geographic = unit.startswith("degree")
    u = f" ({unit})" if unit else ""
    ax.set_xlabel(("longitude" if geographic else "easting") + u)
    ax.set_ylabel(("latitude" if geographic else "northing") + u)
    ax.ticklabel_format(useOffset=False, style="plain")
    for lab in ax.get_xticklabels():
        lab.set_rotation(30)
        lab.set_ha("right")
    ax.tick_params(labelsize=8)
    _scale_bar(ax, extent)


def _imshow_extent(shape: tuple[int, int], extent: Extent | None, step: int) -> Extent:
    if extent is not None:
        return extent
    return (-0.5, shape[1] * step - 0.5, shape[0] * step - 0.5, -0.5)


def _fig_inputs(sec: InputsSection, max_pixels: int) -> str | None:
    if sec.background is None and not any(ln.footprint for ln in sec.lines):
        return None
    fig = _figure(7, 6)
    ax = fig.add_subplot()
    if sec.background is not None:
        bg = np.asarray(sec.background)
        img = _stretch(bg, 2, 98) if bg.ndim == 3 else bg
        img, step = _thin(img, max_pixels)
        ax.imshow(img, extent=_imshow_extent(img.shape[:2], sec.extent, step), cmap="gray", interpolation="nearest")
    for k, ln in enumerate(sec.lines):
        if not ln.footprint:
            continue
        ring = np.asarray(ln.footprint, dtype=float)
        ring = np.vstack([ring, ring[:1]])
        color = np.array(_DEFAULT_COLORS[k % len(_DEFAULT_COLORS)]) / 255
        ax.plot(ring[:, 0], ring[:, 1], color=color, lw=1.8, label=ln.name)
        cx, cy = ring[:-1].mean(0)
        ax.annotate(ln.name, (cx, cy), color=color, fontsize=8, ha="center",
                    bbox={"facecolor": "white", "alpha": 0.7, "lw": 0})
    _axes_labels(ax, sec.extent)
    ax.set_title("Flight-line footprints over the mosaic")
    ax.set_aspect("equal")
    return _img(fig, "flight-line footprints over the mosaic")


def _fig_quicklook(q: Quicklook, max_pixels: int) -> str:
    rgba = _stretch(q.rgb, *q.stretch)
    rgba, step = _thin(rgba, max_pixels)
    fig = _figure(7, 6)
    ax = fig.add_subplot()
    ax.imshow(rgba, extent=_imshow_extent(rgba.shape[:2], q.extent, step), interpolation="nearest")
    _axes_labels(ax, q.extent)
    wl = f" (R {q.wavelengths[0]:.0f}, G {q.wavelengths[1]:.0f}, B {q.wavelengths[2]:.0f} nm)" if q.wavelengths else ""
    ax.set_title(f"True-colour quicklook{wl}")
    return _img(fig, "true-colour quicklook")


def _fig_eigen(c: EigenvalueCurve) -> str:
    v = np.asarray(c.values, dtype=float).ravel()
    fig = _figure(7, 4)
    ax = fig.add_subplot()
    k = np.arange(1, v.size + 1)
    ax.plot(k, v, "o-", ms=3, color="#1f4e79")
    if c.kept:
        ax.axvline(c.kept + 0.5, color="#c0392b", ls="--", label=f"{c.kept} components kept")
        ax.legend()
    if np.all(v > 0) and v.max() / v.min() > 50:
        ax.set_yscale("log")
    ax.set_xlabel("component")
    ax.set_ylabel(c.ylabel)
    ax.set_title(c.title)
    ax.grid(alpha=0.3)
    return _img(fig, c.title)


def _fig_classmap(v: ClassMapView, max_pixels: int) -> str:
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch

    cls = np.asarray(v.classes)
    if cls.ndim == 3:
        cls = cls[0]
    n = len(v.class_names)
    colors = list(v.colors) if v.colors else _DEFAULT_COLORS[:n]
    while len(colors) < n:
        colors.append(_DEFAULT_COLORS[len(colors) % len(_DEFAULT_COLORS)])
    img, step = _thin(cls, max_pixels)
    img = img.astype(np.int64)
    # drawn as index 0 nodata (white, the page), 1 unclassified (grey, the products' colour), 2.. classes
    nodata = (img == v.nodata) if v.nodata is not None else np.zeros(img.shape, bool)
    img = np.where(nodata | (img < 0) | (img > n), -1, img) + 1
    grey = tuple(np.array(UNCLASSIFIED_RGB) / 255)
    cmap = ListedColormap([(1, 1, 1), grey] + [tuple(np.array(c[:3]) / 255) for c in colors[:n]])
    fig = _figure(7.5, 6)
    ax, lax = _with_legend_axes(fig)
    ax.imshow(img, cmap=cmap, vmin=-0.5, vmax=n + 1.5, extent=_imshow_extent(img.shape, v.extent, step),
              interpolation="nearest")
    counts = np.bincount(img.ravel(), minlength=n + 2)
    handles = [Patch(facecolor=cmap(i + 1), edgecolor="black", lw=0.5, label=f"{i} {name}")
               for i, name in enumerate(v.class_names, start=1)]
    if counts[1]:
        handles.append(Patch(facecolor=grey, edgecolor="black", lw=0.5, label="0 unclassified"))
    if counts[0]:
        handles.append(Patch(facecolor="white", edgecolor="black", lw=0.5, label="no data (outside the mosaic)"))
    lax.legend(handles=handles, loc="upper left", fontsize=8, frameon=False)  # in its own axes: never clipped
    _axes_labels(ax, v.extent)
    ax.set_title(v.name)
    return _img(fig, f"class map {v.name}")


def _fig_continuous(v: ContinuousMapView, max_pixels: int) -> str:
    vals = np.asarray(v.values, dtype=float)
    if vals.ndim == 3:
        vals = vals[0]
    img, step = _thin(vals, max_pixels)
    finite = img[np.isfinite(img)]
    vmin, vmax = v.vmin, v.vmax
    if v.kind == "abundance":
        vmin = 0.0 if vmin is None else vmin
        vmax = 1.0 if vmax is None else vmax
    if finite.size and (vmin is None or vmax is None):
        p2, p98 = np.percentile(finite, [2, 98])
        vmin = p2 if vmin is None else vmin
        vmax = p98 if vmax is None else vmax
    cmap = {"abundance": "viridis", "quantity": "cividis", "uncertainty": "magma"}.get(v.kind, "viridis")
    fig = _figure(7.5, 6)
    ax = fig.add_subplot()
    ext = _imshow_extent(img.shape, v.extent, step)
    im = ax.imshow(np.ma.masked_invalid(img), cmap=cmap, vmin=vmin, vmax=vmax, extent=ext, interpolation="nearest")
    cb = fig.colorbar(im, ax=ax, shrink=0.85)
    cb.set_label(f"{v.name} ({v.units})" if v.units else v.name)
    if v.outside is not None:
        out, _ = _thin(np.asarray(v.outside, dtype=bool).reshape(vals.shape), max_pixels)
        if out.any():
            overlay = np.zeros(out.shape + (4,))
            overlay[out] = (0.84, 0.19, 0.15, 0.75)
            ax.imshow(overlay, extent=ext, interpolation="nearest")
            ax.set_title(f"{v.name}\n(red: outside the calibration range, {100 * out.mean():.1f}% of pixels)",
                         fontsize=10)
    _axes_labels(ax, v.extent)
    if not ax.get_title():
        ax.set_title(v.name)
    return _img(fig, f"map {v.name}")


def _fig_spectra(v: SpectraView) -> str:
    fig = _figure(7.5, 4.5)
    ax, lax = _with_legend_axes(fig)
    wl = np.asarray(v.wavelengths, dtype=float)
    for k, (name, s) in enumerate(v.spectra.items()):
        ax.plot(wl, np.asarray(s, dtype=float), lw=1.3, label=name,
                color=np.array(_DEFAULT_COLORS[k % len(_DEFAULT_COLORS)]) / 255)
    ax.set_xlabel("wavelength (nm)")
    ax.set_ylabel(v.ylabel)
    ax.set_title(v.title)
    ax.grid(alpha=0.3)
    if v.spectra:
        lax.legend(*ax.get_legend_handles_labels(), fontsize=8, loc="upper left", frameon=False)
    return _img(fig, v.title)


def _scatter_metrics(v: ScatterView) -> dict[str, float]:
    if v.metrics is not None:
        return dict(v.metrics)
    m = regression_metrics(v.observed, v.predicted)
    return {"n": m.n, "r2": m.r2, "rmse": m.rmse, "bias": m.bias}


def _fig_scatter(v: ScatterView) -> str:
    obs = np.asarray(v.observed, dtype=float).ravel()
    pred = np.asarray(v.predicted, dtype=float).ravel()
    m = _scatter_metrics(v)
    fig = _figure(5.2, 5)
    ax = fig.add_subplot()
    ax.scatter(obs, pred, s=14, alpha=0.75, color="#1f4e79", edgecolor="none")
    both = np.concatenate([obs, pred])
    both = both[np.isfinite(both)]
    if both.size:
        lo, hi = both.min(), both.max()
        pad = 0.05 * (hi - lo if hi > lo else 1.0)
        ax.plot([lo - pad, hi + pad], [lo - pad, hi + pad], color="#888", lw=1, ls="--", label="1:1")
        ax.set_xlim(lo - pad, hi + pad)
        ax.set_ylim(lo - pad, hi + pad)
    u = f" ({v.units})" if v.units else ""
    ax.set_xlabel(f"observed{u}")
    ax.set_ylabel(f"{'cross-validated ' if v.kind == 'calibration' else ''}predicted{u}")
    ax.set_title(v.name)
    ax.text(0.03, 0.97, f"n = {int(m.get('n', obs.size))}\nR² = {_num(m.get('r2'))}\nRMSE = {_num(m.get('rmse'))}"
            f"\nbias = {_num(m.get('bias'))}", transform=ax.transAxes, va="top", fontsize=9,
            bbox={"facecolor": "white", "alpha": 0.8, "lw": 0})
    ax.set_box_aspect(1)
    ax.grid(alpha=0.3)
    return _img(fig, f"scatter {v.name}")


def _fig_confusion(v: AccuracyView) -> str:
    m = np.asarray(v.accuracy.matrix)
    names = list(v.accuracy.names)
    k = len(names)
    fig = _figure(max(6.0, 3.0 + 0.7 * k), max(5.0, 2.0 + 0.6 * k))
    ax = fig.add_subplot()
    rows = m.sum(1, keepdims=True)
    share = np.divide(m, rows, out=np.zeros(m.shape, float), where=rows > 0)
    im = ax.imshow(share, cmap="Blues", vmin=0, vmax=1)
    for i in range(k):
        for j in range(k):
            ax.text(j, i, str(int(m[i, j])), ha="center", va="center", fontsize=8,
                    color="white" if share[i, j] > 0.6 else "black")
    ax.set_xticks(range(k), names, rotation=45, ha="right", fontsize=8)
    ax.set_yticks(range(k), names, fontsize=8)
    ax.set_xlabel("reference class")
    ax.set_ylabel("map class")
    ax.set_title(f"{v.map_name}: validation samples", fontsize=10)
    fig.colorbar(im, ax=ax, shrink=0.8).set_label("share of the map row")
    return _img(fig, f"confusion matrix {v.map_name}")


def _fig_gains(g: LineGains) -> str:
    """Gain and offset of each line against wavelength (the reference line is 1 and 0)."""
    fig = _figure(8, 3.6)
    gs = fig.add_gridspec(1, 3, width_ratios=[4, 4, 1.6])
    ax1, ax2, lax = fig.add_subplot(gs[0]), fig.add_subplot(gs[1]), fig.add_subplot(gs[2])
    lax.axis("off")
    wl = np.asarray(g.wavelengths, dtype=float)
    gain, offset = np.atleast_2d(np.asarray(g.gain, float)), np.atleast_2d(np.asarray(g.offset, float))
    x = wl if wl.size == gain.shape[1] else np.arange(1, gain.shape[1] + 1)
    for k, name in enumerate(g.names):
        color = np.array(_DEFAULT_COLORS[k % len(_DEFAULT_COLORS)]) / 255
        ax1.plot(x, gain[k], lw=1.2, color=color, label=name)
        ax2.plot(x, offset[k], lw=1.2, color=color, label=name)
    for ax, what in ((ax1, "gain"), (ax2, "offset (reflectance)")):
        ax.set_xlabel("wavelength (nm)" if x is wl else "band")
        ax.set_ylabel(what)
        ax.grid(alpha=0.3)
        ax.tick_params(labelsize=8)
    ax1.set_title("brightness gain per line", fontsize=10)
    ax2.set_title("brightness offset per line", fontsize=10)
    lax.legend(*ax2.get_legend_handles_labels(), fontsize=7, loc="upper left", frameon=False)
    return _img(fig, "brightness gains and offsets per flight line")


def overall_ci(correct: float, n: int, z: float = 1.96) -> tuple[float, float]:
    """Sample-based overall accuracy and the half-width of its confidence interval.

    Under simple random sampling the variance of the proportion correct is p (1 - p) / (n - 1)
    (Olofsson et al. 2014, Remote Sensing of Environment 148, eq. 5 with one stratum); the interval is
    ``p ± z * sqrt(var)``, z = 1.96 for 95 %.
    """
    if n <= 0:
        return float("nan"), float("nan")
    p = correct / n
    var = p * (1 - p) / (n - 1) if n > 1 else float("nan")
    return p, z * float(np.sqrt(var))


def _fig_timings(ts: Sequence[StepTiming]) -> str:
    labels = [f"{t.step} {t.phase}".strip() for t in ts]
    secs = [float(t.seconds) for t in ts]
    fig = _figure(7, max(2.0, 0.35 * len(ts) + 1.0))
    ax = fig.add_subplot()
    y = np.arange(len(ts))
    ax.barh(y, secs, color="#4a7bb7")
    ax.set_yticks(y, labels, fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel("seconds")
    ax.set_title("Run time per step")
    ax.grid(axis="x", alpha=0.3)
    return _img(fig, "run time per step")


# ----------------------------------------------------------------------------------------------
# HTML
# ----------------------------------------------------------------------------------------------

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:0 auto;max-width:1100px;padding:0 1.2em 3em;
color:#1d2733;line-height:1.45}
h1{margin-top:1em}h2{border-bottom:2px solid #dbe3ec;padding-bottom:.2em;margin-top:2em}
h3{margin-bottom:.3em}
.caution{background:#fff4e0;border-left:5px solid #e08a00;padding:.8em 1em;margin:1em 0}
table{border-collapse:collapse;margin:.6em 0 1.2em;font-size:.92em}
th,td{border:1px solid #cfd8e3;padding:.25em .6em;text-align:right}
th:first-child,td:first-child{text-align:left}
thead th{background:#eef3f8}
img{max-width:100%;height:auto;display:block;margin:.4em 0 1em}
.params{background:#f3f6f9;border-left:4px solid #9fb3c8;padding:.4em .8em}
details{margin:.3em 0 1em}.muted{color:#6b7785}.grid{display:flex;flex-wrap:wrap;gap:1em}.grid>div{flex:1 1 420px}
nav ul{columns:2;font-size:.95em}code{background:#f1f4f7;padding:0 .25em}
"""


def _e(s: object) -> str:
    return html.escape(str(s), quote=True)


def _ratio(a: float | None, b: float | None) -> str:
    return "–" if a is None or b is None or not b else f"{a / b:.2f}"


def _plan_checks(s: ReportSummary) -> str:
    """The planner's estimates beside the measured figures, so a reader learns how far to trust them."""
    if not s.estimates:
        return ""
    mb = lambda v: None if v is None else v / 1e6  # noqa: E731
    rows = [[_e(c.step), _num(c.est_seconds, 3), _num(c.seconds, 3), _ratio(c.est_seconds, c.seconds),
             _num(mb(c.est_disk), 4), _num(mb(c.disk), 4), _ratio(c.est_disk, c.disk)] for c in s.estimates]
    return ("<h3>The plan against the run</h3>"
            + (f"<p>{_e(s.estimate_note)}</p>" if s.estimate_note else "")
            + _table(["step", "estimated s (fit + tiles)", "measured s", "estimate / measured",
                      "estimated store MB", "measured store MB", "estimate / measured"], rows))


def _num(v: object, digits: int = 4) -> str:
    if v is None:
        return "–"
    try:
        f = float(v)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return _e(v)
    if not np.isfinite(f):
        return "–"
    if f != 0 and (abs(f) >= 1e5 or abs(f) < 1e-3):
        return f"{f:.{digits - 1}e}"
    return f"{f:.{digits}g}" if abs(f) >= 1 else f"{f:.{digits}f}"


def _pm(v: float, ci: float, digits: int = 3) -> str:
    if v is None or not np.isfinite(v):
        return "–"
    if ci is None or not np.isfinite(ci):
        return f"{v:.{digits}f}"
    return f"{v:.{digits}f} ± {ci:.{digits}f}"


def _area(v: float, ci: float) -> str:
    if v is None or not np.isfinite(v):
        return "–"
    return f"{v:,.1f}" if ci is None or not np.isfinite(ci) else f"{v:,.1f} ± {ci:,.1f}"


def _table(head: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    h = "".join(f"<th>{_e(c)}</th>" for c in head)
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" for c in r) + "</tr>" for r in rows)
    return f"<table><thead><tr>{h}</tr></thead><tbody>{body}</tbody></table>"


def _accuracy_html(v: AccuracyView) -> str:
    a = v.accuracy
    parts = [f"<h3>{_e(v.map_name)}</h3>"]
    if v.note:
        parts.append(f"<p>{_e(v.note)}</p>")
    oa, ci = overall_ci(float(np.trace(a.matrix)), a.n)
    parts.append(
        f"<p>{a.n} validation samples. Overall accuracy <b>{_pm(oa, ci)}</b> (± the 95% confidence "
        f"interval); kappa {_num(a.kappa, 3)} (standard error {_num(a.kappa_se, 3)}). Sample-based figures "
        f"(each sample counts once, whatever the area of its class):</p>")
    if v.producible is not None:
        can = set(v.producible)
        ref_counts = np.asarray(a.matrix).sum(0)
        cannot = [(nm, int(ref_counts[i])) for i, nm in enumerate(a.names) if nm not in can and ref_counts[i] > 0]
        if cannot:
            keep = [i for i, nm in enumerate(a.names) if nm in can]
            sub = np.asarray(a.matrix)[np.ix_(keep, keep)]
            n_sub = int(np.asarray(a.matrix)[:, keep].sum())
            oa2, ci2 = overall_ci(float(np.trace(sub)), n_sub)
            parts.append(
                f"<p><b>Classes this map cannot produce.</b> {sum(c for _, c in cannot)} of the {a.n} samples "
                f"belong to reference classes the method was not given ("
                + _e(", ".join(f"{nm}: {c}" for nm, c in cannot))
                + f"); they count as errors in the overall accuracy above. Over the {n_sub} samples of the "
                  f"classes it can produce, overall accuracy is <b>{_pm(oa2, ci2)}</b>.</p>")
    parts.append(_fig_confusion(v))
    rows = [[_e(nm), str(int(a.matrix[i].sum())), str(int(a.matrix[:, i].sum())), _num(a.users[i], 3),
             _num(a.producers[i], 3), _num(a.f1[i], 3)] for i, nm in enumerate(a.names)]
    parts.append(_table(["class", "mapped samples", "reference samples", "user's", "producer's", "F1"], rows))
    ar = v.areas
    if ar is not None:
        parts.append(
            f"<p>Area-weighted estimates (Olofsson et al. 2014, map classes as strata; ± is the 95% "
            f"confidence interval). Overall accuracy <b>{_pm(ar.overall, ar.overall_ci)}</b>.</p>")
        unit = _e(ar.area_unit)
        rows = [[_e(nm), _area(ar.mapped_area[i], None), _area(ar.area[i], ar.area_ci[i]),
                 _pm(ar.users[i], ar.users_ci[i]), _pm(ar.producers[i], ar.producers_ci[i])]
                for i, nm in enumerate(ar.names)]
        parts.append(_table(["class", f"mapped area ({unit})", f"estimated area ({unit})", "user's", "producer's"],
                            rows))
    return "\n".join(parts)


# ----------------------------------------------------------------------------------------------
# number of features (dimensionality curves) and calibration methods side by side
# ----------------------------------------------------------------------------------------------

def _step_curves(model: Mapping[str, object]) -> tuple[list[Mapping], int | None]:
    """The dimensionality curves a fitted model records, and the count it took (None: not chosen by a curve)."""
    if isinstance(model.get("curves"), list):  # SVM, spectral angle: the input's curve first, then the compared
        comp = model.get("components") or {}
        return list(model["curves"]), int(comp["used"]) if comp.get("asked") == "auto" else None
    for key in ("curve", "feature_curve"):  # band selection, calibration
        if isinstance(model.get(key), Mapping):
            return [model[key]], None
    return [], None


def _fig_curves(name: str, curves: Sequence[Mapping], chosen: int | None) -> str:
    fig = _figure(7, 4.2)
    ax = fig.add_subplot()
    for i, c in enumerate(curves):
        col = "#%02x%02x%02x" % _DEFAULT_COLORS[i % len(_DEFAULT_COLORS)]
        k = np.asarray(c["counts"], dtype=float)
        m, sd = np.asarray(c["mean"], dtype=float), np.asarray(c["std"], dtype=float)
        ax.plot(k, m, "o-", ms=3, color=col, label=f"{c.get('features', '')} (peak {c['peak']}, one SE {c['one_se']})")
        ax.fill_between(k, m - sd, m + sd, color=col, alpha=0.15, lw=0)
        p = list(c["counts"]).index(c["peak"])
        ax.plot([c["peak"]], [m[p]], "*", ms=13, color=col, mec="black")
        q = list(c["counts"]).index(c["one_se"])
        ax.plot([c["one_se"]], [m[q]], "v", ms=9, color=col, mec="black")
    if chosen is not None:
        ax.axvline(chosen, color="#c0392b", ls="--", label=f"taken by the step: {chosen}")
    ax.set_xlabel("number of features")
    ax.set_ylabel("blocked-CV " + ("R²" if curves and curves[0].get("score") == "r2" else "overall accuracy"))
    ax.set_title(f"{name}: score against the number of features (band: ±1 std over folds)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    return _img(fig, f"dimensionality curve of {name}")


def _calibration_rows(models: Mapping[str, Mapping | None], accuracy: Mapping | None,
                      calibrations: Sequence[Mapping]) -> list[list[str]]:
    rows = []
    quantity_maps = (accuracy or {}).get("quantity_maps", {})
    for entry in calibrations:
        name = str(entry.get("name"))
        model = models.get(name)
        if not model or "cv" not in model:
            continue
        cv = model["cv"]
        if model.get("method") == "svr" and model.get("svr_best"):
            b = model["svr_best"]
            setting = f"C {_num(b.get('C'))}, gamma {_num(b.get('gamma'))}, epsilon {_num(b.get('epsilon'))}"
        else:
            setting = f"{model.get('n_components')} component(s)" if model.get("method") == "pls" else "–"
        val = next((v["metrics"] for k, v in quantity_maps.items() if k.split("/")[0] == name), {})
        rows.append([_e(name), _e(entry.get("quantity", "")), _e(model.get("method", "")), _e(setting),
                     _num(cv.get("n")), _num(cv.get("r2"), 3), _num(cv.get("rmse")), _num(val.get("n")),
                     _num(val.get("r2"), 3), _num(val.get("rmse")), _e(entry.get("units", ""))])
    return rows


def model_choice_html(models: Mapping[str, Mapping | None], accuracy: Mapping | None = None,
                      calibrations: Sequence[Mapping] = ()) -> str | None:
    """The report's section on how many features, and which calibration method.

    Parameters
    ----------
    models
        Step name -> fitted model (None for steps without one). Dimensionality curves are read from
        SVM and spectral angle models (``curves``, ``components``), band-selection models (``curve``)
        and calibration models (``feature_curve``).
    accuracy
        The run's accuracy file (its ``quantity_maps`` give the validation metrics), or None.
    calibrations
        The configuration's calibration entries (``name``, ``quantity``, ``units``).

    Returns
    -------
    str or None
        HTML, or None when no model records a curve and no calibration was fitted.
    """
    parts: list[str] = []
    summary: list[list[str]] = []
    for name, model in models.items():
        if not model:
            continue
        curves, chosen = _step_curves(model)
        if not curves:
            continue
        parts.append(_fig_curves(name, curves, chosen))
        for c in curves:
            p = list(c["counts"]).index(c["peak"])
            summary.append([_e(name), _e(c.get("features", "")), _e(c.get("ref", "")), _num(c.get("folds")),
                            f"{c['peak']} ({_num(c['mean'][p], 3)})", str(c["one_se"]),
                            str(chosen) if chosen is not None and c is curves[0] else "–"])
    if summary:
        parts.insert(0, "<p>Blocked cross-validation on the training samples (no spatial group on both sides "
                        "of a split): the mean score per number of features and its spread over folds. The star "
                        "marks the peak, the triangle the smallest count within one standard error of the peak "
                        "(std / √folds), the count a step takes with <code>components: auto</code>. With few "
                        "ground samples, more features eventually make a model worse.</p>"
                     + _table(["step", "features", "input", "folds", "peak (score)", "one-SE count", "taken"],
                              summary))
    rows = _calibration_rows(models, accuracy, calibrations)
    if rows:
        parts.append("<h3>Calibrations side by side</h3><p>Cross-validated figures on the training samples "
                     "and figures against the validation samples (where the run has them).</p>"
                     + _table(["calibration", "quantity", "method", "chosen setting", "CV n", "CV R²", "CV RMSE",
                               "validation n", "validation R²", "validation RMSE", "units"], rows))
    return "\n".join(parts) or None


def _section(anchor: str, title: str, body: str) -> str:
    return f'<section id="{anchor}"><h2>{_e(title)}</h2>\n{body}\n</section>'


def render_html(summary: ReportSummary, *, max_pixels: int = 900) -> str:
    """The report page as a string (see :func:`build_report`)."""
    s = summary
    _CRS_UNIT["unit"] = s.crs_unit
    created = s.created or datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
    sections: list[tuple[str, str, str]] = []
    missing: list[str] = []

    def add(anchor: str, title: str, body: str | None) -> None:
        if body:
            sections.append((anchor, title, body))
        else:
            missing.append(title)

    # inputs and footprints
    body = None
    if s.inputs is not None:
        inp = s.inputs
        parts = []
        info = []
        if inp.grid_shape:
            info.append(f"mosaic grid {inp.grid_shape[0]} x {inp.grid_shape[1]} pixels")
        if inp.resolution:
            info.append(f"pixel size {_num(inp.resolution)}")
        if inp.crs:
            info.append(f"CRS <code>{_e(inp.crs if len(inp.crs) < 80 else inp.crs[:77] + '...')}</code>")
        if info:
            parts.append("<p>" + "; ".join(info) + ".</p>")
        if inp.lines:
            parts.append(_table(["flight line", "file", "bands", "rows", "cols"],
                                [[_e(ln.name), _e(ln.path), _num(ln.bands), _num(ln.rows), _num(ln.cols)]
                                 for ln in inp.lines]))
        fig = _fig_inputs(inp, max_pixels)
        if fig:
            parts.append(fig)
        body = "\n".join(parts)
    add("inputs", "Inputs and flight-line footprints", body)
    add("quicklook", "True-colour quicklook", _fig_quicklook(s.quicklook, max_pixels) if s.quicklook else None)
    add("mnf", "MNF eigenvalues", "\n".join(
        "".join(f'<p class="params">{" ".join(_e(t) for t in p.sentences)}</p>' for p in s.parameters
                if p.sentences and f"({p.step})" in c.title) + _fig_eigen(c) for c in s.eigenvalues) or None)
    params = {p.step: p for p in s.parameters}

    def maps(views, fig) -> str | None:
        shown: set[str] = set()
        out = []
        for v in views:
            if v.step and v.step not in shown and v.step in params and params[v.step].sentences:
                shown.add(v.step)
                out.append(f'<p class="params"><b>{_e(v.step)}</b>: '
                           + " ".join(_e(t) for t in params[v.step].sentences)
                           + f' <a href="#params-{_e(v.step)}">(all parameters)</a></p>')
            out.append((f"<p>{_e(v.note)}</p>" if v.note else "") + fig(v, max_pixels))
        return "\n".join(out) or None

    src = [v for v in s.class_maps if v.step == "mosaic"]
    add("source", "Flight line of each pixel", maps(src, _fig_classmap))
    add("classes", "Class maps", maps([v for v in s.class_maps if v.step != "mosaic"], _fig_classmap))
    by_kind = lambda *kinds: [v for v in s.continuous_maps if v.kind in kinds]  # noqa: E731
    add("abundance", "Abundance maps", maps(by_kind("abundance"), _fig_continuous))
    add("diagnostics", "Unmixing diagnostics", maps(by_kind("diagnostic"), _fig_continuous))
    add("features", "Spectral feature maps", maps(by_kind("feature"), _fig_continuous))
    add("quantity", "Quantity maps", maps(by_kind("quantity", "uncertainty", "other"), _fig_continuous))
    add("spectra", "Endmember and library spectra", "\n".join(_fig_spectra(v) for v in s.spectra) or None)
    if s.scatters:
        rows = []
        for v in s.scatters:
            m = _scatter_metrics(v)
            rows.append([_e(v.name), _e(v.kind), _num(m.get("n")), _num(m.get("r2"), 3), _num(m.get("rmse")),
                         _num(m.get("bias")), _e(v.units)])
        figs = "".join(f"<div>{_fig_scatter(v)}{f'<p>{_e(v.note)}</p>' if v.note else ''}</div>" for v in s.scatters)
        body = ("<p>Calibration figures are cross-validated: each sample is predicted by a model that did not "
                "see it. Bias is the mean of predicted minus observed.</p>"
                + _table(["name", "kind", "n", "R²", "RMSE", "bias", "units"], rows)
                + f'<div class="grid">{figs}</div>')
    else:
        body = None
    add("calibration", "Calibration and regression checks", body)
    add("model-choice", "Number of features and model comparison", s.model_choice)
    add("accuracy", "Accuracy of the class maps", "\n".join(_accuracy_html(v) for v in s.accuracy) or None)
    if s.parameters:
        blocks = []
        for p in s.parameters:
            b = [f'<h3 id="params-{_e(p.step)}">{_e(p.step)}</h3>']
            if p.sentences:
                b.append("<ul>" + "".join(f"<li>{_e(t)}</li>" for t in p.sentences) + "</ul>")
            if p.gains is not None:
                g = p.gains
                gain, off = np.atleast_2d(np.asarray(g.gain, float)), np.atleast_2d(np.asarray(g.offset, float))
                rows = [[_e(nm) + (" (reference)" if nm == g.reference else ""),
                         f"{np.nanmean(gain[k]):.4f}", f"{np.nanmin(gain[k]):.4f} – {np.nanmax(gain[k]):.4f}",
                         f"{np.nanmean(off[k]):.4f}", f"{np.nanmin(off[k]):.4f} – {np.nanmax(off[k]):.4f}"]
                        for k, nm in enumerate(g.names)]
                b.append(_table(["flight line", "mean gain", "gain range", "mean offset", "offset range"], rows))
                b.append(_fig_gains(g))
            if p.table:
                b.append("<details><summary>every parameter of this step</summary>"
                         + _table(["parameter", "value"], [[_e(k), f"<code>{_e(v)}</code>"] for k, v in p.table])
                         + "</details>")
            blocks.append("\n".join(b))
        body = "\n".join(blocks)
    else:
        body = None
    add("parameters", "Steps and their parameters", body)
    if s.timings:
        total = sum(float(t.seconds) for t in s.timings)
        body = ((f"<p>{_e(s.timing_note)}</p>" if s.timing_note else "")
                + _table(["step", "phase", "seconds (all invocations)", "invocations", "seconds (latest)", "tiles"],
                         [[_e(t.step), _e(t.phase), _num(t.seconds, 3), str(t.invocations),
                           _num(t.last_seconds, 3), _num(t.tiles)] for t in s.timings])
                + f"<p>Total {total:.1f} s.</p>" + _fig_timings(s.timings) + _plan_checks(s))
    else:
        body = None
    add("timings", "Run time per step", body)
    add("provenance", "Provenance", _table(["item", "value"], [[_e(k), f"<code>{_e(v)}</code>"]
                                                               for k, v in s.provenance.items()])
        if s.provenance else None)

    nav = "".join(f'<li><a href="#{a}">{_e(t)}</a></li>' for a, t, _ in sections)
    notes = "".join(f"<li>{_e(n)}</li>" for n in s.notes)
    parts = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(s.title)}{' – ' + _e(s.run_name) if s.run_name else ''}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<h1>{_e(s.title)}</h1>",
        f'<p class="muted">{"Run " + _e(s.run_name) + " · " if s.run_name else ""}report written {_e(created)}</p>',
        f'<div class="caution" id="caution"><b>Caution.</b> {_e(s.caution)}</div>',
        f"<nav><ul>{nav}</ul></nav>" if nav else "",
        f"<ul>{notes}</ul>" if notes else "",
        f'<p class="muted">Not in this run: {_e(", ".join(missing))}.</p>' if missing else "",
        *(_section(a, t, b) for a, t, b in sections),
        "</body></html>",
    ]
    return "\n".join(p for p in parts if p)


def build_report(run_dir: str | Path, summary: ReportSummary, *, max_pixels: int = 900,
                 name: str = REPORT_NAME) -> Path:
    """Write the run's report as one self-contained HTML file in ``run_dir``; return its path.

    The file is written to a temporary name and renamed into place, so a reader never sees half a
    report. Raises FileNotFoundError when ``run_dir`` does not exist.
    """
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise FileNotFoundError(f"run directory {run_dir} does not exist")
    if "/" in name or "\\" in name or not name.endswith(".html"):
        raise ValueError(f"the report name must be a plain file name ending in .html. Got {name!r}")
    text = render_html(summary, max_pixels=max_pixels)
    path = run_dir / name
    tmp = run_dir / f".{name}.tmp"
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)
    return path
