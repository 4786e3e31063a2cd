"""Spectral angle classification: the angle, the class rule, the tiled kernel and the step.

Spectral angle (Kruse et al., 1993, Remote Sens. Environ. 44:145-163)
    ``alpha = arccos(t.r / (|t| |r|))`` in radians between each pixel ``t`` and each reference ``r``,
    the cosine clipped to [-1, 1] (rounding can push it past 1); near-parallel pairs (cosine above
    1 - 1e-4) are recomputed as ``2 atan2(|u - v|, |u + v|)`` on unit vectors, which keeps full
    precision where arccos loses half of it. Zero or non-finite pixels give NaN. The step works on
    the stored values (a positive scale factor leaves angles unchanged) in float32 and recomputes in
    float64 every pixel with an angle under 0.1 rad, where class decisions are made; above that,
    float32 rounding moves an angle by about 1e-6 / sin(angle) rad (at most ~1e-5 rad).
    A pixel takes the class of the reference with the smallest angle if that angle is at most the
    threshold of the reference's class (one for all, or one per class); otherwise 0 (unclassified).
    The class map is written in the codes of the run's legend (255 outside the mosaic).

Spectral angle on components, the dimensionality curve and ``components: auto``
    The angle works on any input: reflectance, selected bands, or MNF/PCA components (with
    references from training samples: the class means of the training pixels' components; component
    values are centred on the scene mean, so the angle there compares directions from that mean).
    ``components: k`` keeps the first ``k`` features in their ranked order (components in component
    order, a band-selection cube in selection order, other bands in input order; bands in ``exclude``
    never count). With ``curve: true`` (or ``components: auto``) the fit computes the blocked
    cross-validated overall accuracy against the number of features on the training samples
    (:mod:`.curves`, the same ``GroupKFold`` on the samples' spatial groups as the SVM): for each count
    k and fold, the references are the class means of the training fold's first k features
    (:class:`NearestAngle`), each held-out sample takes the class of the smallest angle (no threshold:
    the curve scores the nearest-reference rule), and the score is the share of held-out samples
    classified right. ``components: auto`` takes the smallest count within one standard error of the
    peak; ``curve_compare`` records the curves of further inputs beside it (a reflectance cube by PCA
    components fitted in each training fold). The model records ``curves``, ``feature_index``,
    ``features_used`` and ``components`` (the choice). Library references have no labelled samples
    to score a curve on, so ``curve`` and ``components: auto`` need ``references: samples``; a library
    is not moved into component space by this step (it needs band wavelengths), so with a library
    ``components: k`` applies to a band-selection cube or reflectance only.

Step outputs: ``classes`` (1 band), ``angle`` (one band per reference, radians).
"""
from __future__ import annotations

from typing import Any, Mapping, Sequence

import numpy as np
from pydantic import Field, field_validator, model_validator

from swathmill.tiles.step import Block, InputMeta, OutputSpec, Step
from swathmill.tiles.store import copy_bands, index_runs, scale_offset
from swathmill.workflows.inputs.library import SpectralLibrary
from swathmill.workflows.inputs.reference import SampleTable
from swathmill.workflows.roles import Role

from .curves import (CurveSettings, accumulate_compare, check_training, chosen_features, compare_inputs,
                     curve_samples, feature_curves, feature_order)
from .references import ReferenceSpectraConfig, class_means, reference_set, reference_spectra
from .legend import Legend
from .shared import (ClassifierParams, ClassifyError, accumulate_samples, band_names, check_ranges, class_spec,
                     make_settings, to_legend_codes, training_mask)

__all__ = [
    "spectral_angle",
    "class_thresholds",
    "assign_min_angle",
    "NearestAngle",
    "SamSettings",
    "SamConfig",
    "sam_step",
]


# the maths -----------------------------------------------------------------------------------------
def spectral_angle(pixels: np.ndarray, references: np.ndarray) -> np.ndarray:
    """Angles (radians) between each pixel and each reference.

    Parameters
    ----------
    pixels : (n, b) spectra.
    references : (m, b) spectra.

    Returns
    -------
    (n, m) float64 in [0, pi]; NaN for pixels with zero norm or non-finite values.
    """
    t = np.asarray(pixels, dtype=np.float64)
    r = np.asarray(references, dtype=np.float64)
    if t.ndim != 2 or r.ndim != 2 or t.shape[1] != r.shape[1]:
        raise ClassifyError(f"pixels (n, b) and references (m, b) must share b. Got {t.shape} and {r.shape}")
    return _angles_bands_first(t.T, r).T


def _angles_bands_first(x: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Angles (m, c) between references r (m, b) and pixel columns x (b, c) (float64)."""
    rn = np.linalg.norm(r, axis=1)
    if np.any(~(rn > 0)):
        raise ClassifyError(f"reference(s) {np.flatnonzero(~(rn > 0)).tolist()} have zero norm or NaN values")
    tn = np.sqrt(np.einsum("bc,bc->c", x, x))
    with np.errstate(invalid="ignore", divide="ignore"):
        cos = (r @ x) / (rn[:, None] * tn[None, :])
    ang = np.arccos(np.clip(cos, -1.0, 1.0))  # rounding can give 1.0000000000000002 (METHODS.md)
    # arccos loses half the digits near 0 (an error of ~1e-8 rad for parallel spectra): recompute the
    # near-parallel pairs with 2 atan2(|u - v|, |u + v|) on unit vectors (W. Kahan), exact to ~1e-16
    near = np.argwhere(cos > 1.0 - 1e-4)
    if near.size:
        u = x[:, near[:, 1]].T / tn[near[:, 1], None]
        v = r[near[:, 0]] / rn[near[:, 0], None]
        ang[near[:, 0], near[:, 1]] = 2.0 * np.arctan2(np.linalg.norm(u - v, axis=1), np.linalg.norm(u + v, axis=1))
    ang[:, ~(tn > 0) | ~np.isfinite(tn)] = np.nan
    return ang


def class_thresholds(ref_class: np.ndarray, class_names: Sequence[str], threshold: float | None,
                     per_class: Mapping[str, float] | None = None) -> np.ndarray:
    """Threshold per reference: ``per_class[name]`` for its class, else ``threshold`` (inf if None)."""
    per_class = dict(per_class or {})
    unknown = sorted(set(per_class) - set(class_names))
    if unknown:
        raise ClassifyError(f"thresholds given for unknown class(es) {unknown}; classes are {list(class_names)}")
    default = np.inf if threshold is None else float(threshold)
    by_code = np.array([per_class.get(n, default) for n in class_names], dtype=np.float64)
    return by_code[np.asarray(ref_class) - 1]


def assign_min_angle(angles: np.ndarray, ref_class: np.ndarray, thresholds: np.ndarray | float) -> np.ndarray:
    """Class code (uint8) of the reference with the smallest angle, 0 when above its threshold or NaN.

    Ties go to the first reference. ``thresholds`` is per reference (m,) or a scalar.
    """
    a = np.asarray(angles, dtype=np.float64)
    rc = np.asarray(ref_class)
    out = np.zeros(a.shape[0], dtype=np.uint8)
    if a.size == 0:
        return out
    ok = np.all(np.isfinite(a), axis=1)
    j = np.argmin(np.where(np.isfinite(a), a, np.inf), axis=1)
    best = a[np.arange(a.shape[0]), j]
    thr = np.broadcast_to(np.asarray(thresholds, dtype=np.float64), (a.shape[1],))[j]
    hit = ok & (best <= thr)
    out[hit] = rc[j[hit]]
    return out


class NearestAngle:
    """The spectral angle rule as a scikit-learn style estimator, for the dimensionality curve.

    ``fit(X, y)`` takes the mean of each class present in ``y`` as its reference
    (:func:`.references.class_means`); ``predict(X)`` gives each row the class of the reference with the
    smallest angle (:func:`spectral_angle`, ties to the first class, no threshold), 0 where the row's
    angles are undefined (zero or non-finite spectrum). References of zero norm (possible only on one or
    two features) can match nothing and are left out.
    """

    def fit(self, X: np.ndarray, y: np.ndarray) -> "NearestAngle":
        classes, codes = np.unique(np.asarray(y), return_inverse=True)
        refs = class_means(X, codes + 1, [str(c) for c in classes])
        usable = np.linalg.norm(refs, axis=1) > 0
        self.classes_, self.references_ = classes[usable], refs[usable]
        return self

    def predict(self, X: np.ndarray) -> np.ndarray:
        X = np.asarray(X, dtype=np.float64)
        if self.references_.shape[0] == 0:
            return np.zeros(X.shape[0], dtype=self.classes_.dtype)
        return assign_min_angle(spectral_angle(X, self.references_), self.classes_, np.inf)


# settings ------------------------------------------------------------------------------------------
class SamSettings(CurveSettings):
    """The parameters of a spectral angle step (its defaults and bounds are declared here only; ``folds``
    and the curve's keys ``components``, ``curve``, ``curve_max``, ``curve_compare`` on
    :class:`.curves.CurveSettings`)."""

    threshold: float | None = Field(0.1, gt=0, description="radians, for every class; null: always the "
                                                           "nearest reference")
    class_thresholds: dict[str, float] = Field(default_factory=dict, description="radians per class name, "
                                                                                  "overriding threshold")
    exclude: list[tuple[float, float]] = Field(default_factory=list, description="wavelength ranges (nm) left "
                                                                                 "out of the angle")

    @field_validator("exclude")
    @classmethod
    def _exclude(cls, v: list[tuple[float, float]]) -> list[tuple[float, float]]:
        return check_ranges(v)


class SamConfig(SamSettings):
    """Spectral angle step. YAML::

        sam:
          input: mosaic/reflectance
          references: {library: libraries/site.csv}
          threshold: 0.1            # radians; null = always the nearest reference
          class_thresholds: {water: 0.2}
          exclude: [[1340, 1450], [1790, 1960]]

    On components, with references from training samples and the number of components from the curve::

        sam:
          input: mnf/components
          references: {samples: {path: field/plots.gpkg, label: material}}
          threshold: null
          components: auto          # or a count, or null (all features)
          curve: true
          folds: 5
          curve_max: 20
          curve_compare: [mosaic/reflectance, bands/selected]
    """

    name: str = "sam"
    input: str = "mosaic/reflectance"
    references: ReferenceSpectraConfig

    @model_validator(mode="after")
    def _curve_samples(self) -> "SamConfig":
        if self.wants_curve and self.references.library is not None:
            raise ValueError(_NO_LIBRARY_CURVE)
        return self


_NO_LIBRARY_CURVE = ("curve and components: auto score the angle on labelled training samples: give "
                     "references: {samples: ...} (a library has none)")


# the step ------------------------------------------------------------------------------------------
_SAM_CHUNK = 4096  # pixels per chunk of the spectral angle kernel: a float32 workspace of b x 4096 stays in cache
_SAM_REFINE = 0.1  # radians: pairs closer than this are recomputed in float64 (METHODS.md's precise form)


def _finalize_sam(acc: dict | None, params: ClassifierParams, meta: Mapping[str, InputMeta], *,
                  library: SpectralLibrary | None, table: SampleTable | None) -> dict:
    """References on the input's bands less the excluded ranges, or on the features ``components``
    takes (a count, or the one-standard-error count of the curve)."""
    cfg: SamSettings = params.settings
    spec = meta["x"].spec
    s = curve_samples(acc, table, meta, cfg, params.step) if table is not None else None
    refs, keep, model = reference_spectra(acc, params, meta, library=library, table=table,
                                          gathered=None if s is None else (s.idx, s.X, s.report))
    kept = np.flatnonzero(keep) if keep.size else np.arange(len(spec.bands))
    order, label, mode = feature_order(spec)
    if mode == "pca":  # the angle takes the bands themselves: they count in input order
        label = "bands in input order"
    usable = set(kept.tolist())  # bands outside the exclude ranges, in the ranked order
    order = [i for i in order if i in usable]
    curves = feature_curves(s, meta, cfg, params.class_names, order, label, NearestAngle) if s is not None else []
    use, record = chosen_features(cfg, curves, order, label, kept, params.step, meta["x"].ref)
    band_index = np.sort(np.asarray(use, dtype=np.int64))
    model["band_index"] = band_index
    model["references"] = refs[:, band_index]
    if cfg.components is not None or curves:
        model["feature_index"] = use
        model["features_used"] = [spec.bands[i] for i in use]
        model["components"] = record
    if curves:
        model["curves"] = curves
    return model


def _stored_to_work(spec: OutputSpec) -> tuple[float | None, float | None, Any]:
    """(scale, offset, nodata) to apply to stored values; a positive scale without offset is dropped."""
    scale, offset = scale_offset(spec)
    nodata = spec.nodata
    if offset is None and (scale is None or float(scale) > 0):
        scale = None  # a positive factor leaves every angle unchanged (scale invariance)
    return scale, offset, nodata


def _sam_kernel(block: Block, model: dict) -> dict:
    """Angles and classes of one tile, from the stored values (the step reads them undecoded).

    Per chunk of pixels: the selected bands are copied into a float32 workspace (scaled only if an
    offset makes the stored values' angles differ from the reflectances'), one float32 matrix
    product with the unit reference vectors gives the cosines, and pairs with an angle under
    ``_SAM_REFINE`` are recomputed in float64 by :func:`_angles_bands_first` (arccos, and the
    atan2 form near zero). Elsewhere float32 rounding moves an angle by about 1e-6 / sin(angle) rad
    (tested against the float64 formula).
    """
    p: ClassifierParams = block.params
    settings: SamSettings = p.settings
    shape = block.valid.shape
    refs = np.asarray(model["references"], dtype=np.float64)
    rn = np.linalg.norm(refs, axis=1)
    if np.any(~(rn > 0)):
        raise ClassifyError(f"reference(s) {np.flatnonzero(~(rn > 0)).tolist()} have zero norm or NaN values")
    unit32 = (refs / rn[:, None]).astype(np.float32)
    ref_class = np.asarray(p.ref_class)
    thr = class_thresholds(ref_class, p.class_names, settings.threshold, settings.class_thresholds)
    m = refs.shape[0]
    x = block.data["x"]
    flat = x.reshape(x.shape[0], -1)
    runs = index_runs(model["band_index"])
    nb = sum(r.stop - r.start for r in runs)
    scale, offset, nodata = _stored_to_work(block.meta["x"].spec)
    is_int = np.issubdtype(flat.dtype, np.integer)
    valid = block.valid.ravel()
    n = flat.shape[1]
    cls = np.zeros(n, dtype=np.uint8)
    angle = np.full((m, n), np.nan, dtype=np.float32)
    cos_refine = np.float32(np.cos(_SAM_REFINE))
    work = np.zeros((nb, _SAM_CHUNK), dtype=np.float32)
    dots = np.empty((m, _SAM_CHUNK), dtype=np.float32)
    norms = np.empty(_SAM_CHUNK, dtype=np.float32)
    for s in range(0, n, _SAM_CHUNK):
        e = min(s + _SAM_CHUNK, n)
        c = e - s
        ok = valid[s:e].copy()
        if not ok.any():
            continue
        X = work[:, :c]
        on_nodata = copy_bands(flat, runs, slice(s, e), X, nodata)
        if on_nodata is not None:
            ok &= ~on_nodata
        if scale is not None:
            X *= np.float32(scale)
        if offset is not None:
            X += np.float32(offset)
        # per column over the full-width workspace (no tail loop), so a pixel's norm never depends on c
        sq = np.einsum("bc,bc->c", work, work, out=norms)[:c]
        if not is_int or offset is not None:
            ok &= np.isfinite(sq) & np.isfinite(X.sum(axis=0))
        ok &= sq > 0
        if not ok.any():
            continue
        # a full-width product whatever c is, so a pixel's arithmetic never depends on the tiling
        with np.errstate(invalid="ignore", divide="ignore"):  # NaN columns are masked by ok below
            D = np.matmul(unit32, work, out=dots)[:, :c]
            D /= np.sqrt(sq)
        np.clip(D, -1.0, 1.0, out=D)
        A = np.arccos(D)
        A[:, ~ok] = np.nan
        close = np.flatnonzero(ok & (D > cos_refine).any(axis=0))
        if close.size:
            A[:, close] = _angles_bands_first(X[:, close].astype(np.float64), refs)
        angle[:, s:e] = A
        # assign_min_angle on the columns with angles (all finite there), without a float64 copy
        cols = slice(None) if ok.all() else np.flatnonzero(ok)
        Ao = A[:, cols]
        best, j = Ao[0].copy(), np.zeros(Ao.shape[1], dtype=np.intp)
        for i in range(1, m):  # row by row: argmin along the short axis is slow; ties keep the first
            closer = Ao[i] < best
            best[closer] = Ao[i][closer]
            j[closer] = i
        cls[s:e][cols] = np.where(best <= thr[j], ref_class[j], 0)
    return {"classes": to_legend_codes(cls, p).reshape(1, *shape), "angle": angle.reshape(m, *shape)}


def _sam_outputs(meta: Mapping[str, InputMeta], model: dict | None, params: ClassifierParams
                 ) -> dict[str, OutputSpec]:
    return {"classes": class_spec(params),
            "angle": OutputSpec(bands=band_names(params.names), dtype="float32", nodata=float("nan"),
                                role=Role.SCORE, attrs={"units": "radian", "quantity": "spectral angle"})}


def sam_step(name: str, input_ref: str, *, library: SpectralLibrary | None = None,
             samples: SampleTable | None = None, settings: SamSettings | None = None, legend: Legend | None = None,
             **fields: Any) -> Step:
    """Spectral angle classification of ``input_ref`` against library or image-derived references.

    Parameters
    ----------
    name, input_ref : the step's name and the "step/output" it classifies.
    library, samples : the references: exactly one of a spectral library or ground reference samples.
    settings : a :class:`SamSettings` (or a section derived from it); or its fields as keywords:
        ``threshold`` (radians, for every class; None: always the nearest reference),
        ``class_thresholds`` (radians per class name, overriding ``threshold``), ``exclude``
        (wavelength ranges in nm left out of the angle, e.g. water vapour bands), and the curve's
        ``folds``, ``components``, ``curve``, ``curve_max``, ``curve_compare`` (see the module's notes;
        ``curve`` and ``components: auto`` need ``samples``).
    legend : the run's legend (the class map's codes); default: a legend of these references alone.
    """
    cfg: SamSettings = make_settings(SamSettings, name, settings, fields)
    refs = reference_set(library, samples, name)
    unknown = [n for n in cfg.class_thresholds if n not in refs.class_names]
    if unknown:
        raise ClassifyError(f"step {name!r}: thresholds for unknown class(es) {unknown}; "
                            f"classes are {list(refs.class_names)}")
    if cfg.wants_curve:
        if refs.table is None:
            raise ClassifyError(f"step {name!r}: {_NO_LIBRARY_CURVE}")
        train = training_mask(refs.table)
        check_training(refs.table.label[train], refs.table.group[train], refs.class_names, cfg.folds,
                       step=name)
    compare = compare_inputs(name, input_ref, cfg)
    fit = refs.fit(_finalize_sam, accumulate=accumulate_compare if compare else accumulate_samples)
    return Step(name=name, kernel=_sam_kernel, outputs=_sam_outputs, inputs={"x": input_ref, **compare},
                params=refs.params(name, cfg, legend), fit=fit, static=refs.static, decode=False, version="3")
