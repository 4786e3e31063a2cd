"""Classification: spectral angle, spectral feature fitting and support vector machines.

Pure functions (no I/O) do the science; step factories wire them into engine steps.

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

Spectral feature fitting (Clark, Gallagher and Swayze, 1990; scale-and-RMSE form, common practice)
    Pixels and references are continuum-removed over one wavelength range (upper convex hull,
    :mod:`swathmill.workflows.spectral.continuum`); ``d = 1 - CR`` is the feature depth. Per reference, the least-squares
    scale without intercept ``s = (d_r . d_o) / (d_r . d_r)`` maps the reference's depth onto the
    pixel's, ``RMSE = sqrt(mean((d_o - s d_r)^2))``, and the fit score is ``s / max(RMSE, rmse_floor)``
    (large when the feature is deep and well matched; the floor keeps it finite on perfect fits).
    A reference is eligible when ``s > min_scale`` and, if set, ``RMSE <= max_rmse`` and
    ``score >= min_score``; the pixel takes the class of the eligible reference with the highest
    score, else 0.

Support vector machine (Cortes and Vapnik, 1995; Melgani and Bruzzone, 2004)
    ``Pipeline(StandardScaler, SVC(kernel="rbf"))`` fitted on training pixels only; C and gamma by
    grid search with spatially blocked cross-validation: ``GroupKFold`` on the samples' group ids
    (polygon or block), so the pixels of one group are never on both sides of a split (checked).
    Optional class probabilities come from Platt (sigmoid) calibration on the same blocked folds
    (``CalibratedClassifierCV(..., ensemble=False)``); the class map is always the SVC's own
    prediction, which the calibrated probabilities may occasionally disagree with.
    The fitted model is serialised with skops (no pickle): loading checks every type the file names
    against the types skops trusts by default plus an explicit allow-list, and refuses anything else.
    The bytes are written deterministically (fixed zip timestamps) and their SHA-256 is in the model,
    which the engine hashes into the step key.

References
    From a spectral library (:mod:`swathmill.workflows.inputs.library`, resampled to the input's bands when the step is
    fitted: Gaussian from the input's ``fwhm`` coordinate, else linear) or from the image: the mean
    spectrum per class of the training samples of a ground reference (:mod:`swathmill.workflows.inputs.reference`),
    gathered tile by tile by a mergeable accumulator.

Class maps
    uint8, 0 = unclassified (and nodata), classes 1..k named in the output's ``class_names``; colours
    from the library when it has them, else Paul Tol's "muted" qualitative scheme, designed to stay
    distinguishable under common colour-vision deficiencies (P. Tol, "Colour Schemes", SRON technical
    note SRON/EPS/TN/09-002; hex values from memory). Beyond nine classes the colours repeat.

Steps (outputs)
    ``sam_step``: ``classes`` (1 band), ``angle`` (one band per reference, radians).
    ``sff_step``: ``classes``, ``scale``, ``rmse``, ``score`` (one band per reference each).
    ``svm_step``: ``classes``, and ``probability`` (one band per class) when asked.

The modal (majority) filter of a class map is the engine's generic step
(``swathmill.tiles.ops.modal_filter_step(name, "<step>/classes", size, n_classes=len(class_names))``).

Configuration (YAML sections, one pydantic model each; see :class:`SamConfig`, :class:`SffConfig`,
:class:`SvmConfig`) and ``build_steps(section, ctx)``; ``ctx`` provides ``grid`` (the mosaic's
:class:`swathmill.tiles.grid.Grid`, needed for ground reference) and optionally ``base_dir`` (relative paths)
and ``valid`` (a function (rows, cols) -> bool of mosaic validity, to report samples on nodata early).
"""
from __future__ import annotations

import functools
import hashlib
import io
import warnings
import zipfile
from collections import OrderedDict
from pathlib import Path
from typing import Any, Literal, Mapping, Sequence

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from swathmill.tiles.samples import gather, merge_gathered, select_no_tiles, select_tiles_holding
from swathmill.workflows.roles import Role
from swathmill.tiles.step import Block, Fit, InputMeta, OutputSpec, Step
from swathmill.tiles.store import copy_bands, index_runs

from swathmill.workflows.params import ctx_get
from swathmill.workflows.spectral.continuum import continuum_removed, range_mask
from swathmill.workflows.inputs.library import SpectralLibrary, hex_to_rgb, read_library, resample_library
from swathmill.workflows.inputs.reference import GroundReferenceConfig, SampleTable, load_samples
from swathmill.errors import SwathmillError

__all__ = [
    "ClassifyError",
    "TOL_MUTED",
    "class_palette",
    "spectral_angle",
    "assign_min_angle",
    "class_thresholds",
    "sff_fit",
    "sff_score",
    "assign_best_fit",
    "class_means",
    "blocked_folds",
    "check_training",
    "cap_samples",
    "fit_svm",
    "load_svm",
    "predict_svm",
    "sam_step",
    "sff_step",
    "svm_step",
    "ReferenceSpectraConfig",
    "SamConfig",
    "SffConfig",
    "SvmConfig",
    "build_steps",
]


class ClassifyError(SwathmillError, ValueError):
    """Bad input to a classifier; the message names the class, reference, band or key at fault."""


# Paul Tol's muted qualitative scheme (SRON/EPS/TN/09-002; from memory): rose, indigo, sand, green,
# cyan, wine, teal, olive, purple
TOL_MUTED = ("#CC6677", "#332288", "#DDCC77", "#117733", "#88CCEE", "#882255", "#44AA99", "#999933", "#AA4499")


def class_palette(n: int) -> tuple[tuple[int, int, int], ...]:
    """RGB colours for classes 1..n from :data:`TOL_MUTED` (repeating beyond nine)."""
    return tuple(hex_to_rgb(TOL_MUTED[i % len(TOL_MUTED)]) for i in range(n))


# spectral angle ----------------------------------------------------------------------------------
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


# spectral feature fitting ------------------------------------------------------------------------
def sff_fit(obs_depth: np.ndarray, ref_depth: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares scale (no intercept) and RMSE of each reference depth against each pixel depth.

    Parameters
    ----------
    obs_depth : (n, k) ``1 - CR`` of the pixels over the feature.
    ref_depth : (m, k) ``1 - CR`` of the references over the same bands.

    Returns
    -------
    scale, rmse : (n, m) float64. A reference with no depth (all zeros) gives scale NaN.
    """
    d_o = np.asarray(obs_depth, dtype=np.float64)
    d_r = np.asarray(ref_depth, dtype=np.float64)
    if d_o.ndim != 2 or d_r.ndim != 2 or d_o.shape[1] != d_r.shape[1]:
        raise ClassifyError(f"depths must be (n, k) and (m, k). Got {d_o.shape} and {d_r.shape}")
    rr = np.einsum("mk,mk->m", d_r, d_r)
    n, m = d_o.shape[0], d_r.shape[0]
    scale = np.full((n, m), np.nan)
    rmse = np.full((n, m), np.nan)
    for j in range(m):
        if not rr[j] > 0:
            continue
        s = d_o @ d_r[j] / rr[j]
        res = d_o - s[:, None] * d_r[j][None, :]
        scale[:, j] = s
        rmse[:, j] = np.sqrt(np.mean(res * res, axis=1))
    return scale, rmse


def sff_score(scale: np.ndarray, rmse: np.ndarray, rmse_floor: float = 1e-4) -> np.ndarray:
    """Fit score ``scale / max(rmse, rmse_floor)``."""
    if not rmse_floor > 0:
        raise ClassifyError(f"rmse_floor must be positive. Got {rmse_floor}")
    return np.asarray(scale) / np.maximum(np.asarray(rmse), rmse_floor)


def assign_best_fit(score: np.ndarray, scale: np.ndarray, rmse: np.ndarray, ref_class: np.ndarray, *,
                    min_scale: float = 0.0, max_rmse: float | None = None,
                    min_score: float | None = None) -> np.ndarray:
    """Class code (uint8) of the eligible reference with the highest score, 0 where none is eligible."""
    score = np.asarray(score, dtype=np.float64)
    ok = np.isfinite(score) & np.isfinite(scale) & (np.asarray(scale) > min_scale)
    if max_rmse is not None:
        ok &= np.asarray(rmse) <= max_rmse
    if min_score is not None:
        ok &= score >= min_score
    s = np.where(ok, score, -np.inf)
    j = np.argmax(s, axis=1) if s.shape[1] else np.zeros(s.shape[0], int)
    any_ok = ok.any(axis=1)
    out = np.zeros(score.shape[0], dtype=np.uint8)
    out[any_ok] = np.asarray(ref_class)[j[any_ok]]
    return out


# image-derived references ------------------------------------------------------------------------
def class_means(X: np.ndarray, labels: np.ndarray, class_names: Sequence[str]) -> np.ndarray:
    """(k, b) mean spectrum of each class 1..k; raises naming classes without samples."""
    X = np.asarray(X, dtype=np.float64)
    labels = np.asarray(labels)
    k = len(class_names)
    counts = np.bincount(labels, minlength=k + 1)[1:k + 1]
    empty = [class_names[i] for i in range(k) if counts[i] == 0]
    if empty:
        raise ClassifyError(f"no valid training sample for class(es) {empty}: cannot take their mean spectrum")
    sums = np.zeros((k, X.shape[1]))
    np.add.at(sums, labels - 1, X)
    return sums / counts[:, None]


# SVM ---------------------------------------------------------------------------------------------
SKOPS_EXTRA_TRUSTED = (
    "sklearn.calibration._CalibratedClassifier",
    "sklearn.calibration._SigmoidCalibration",
)


def blocked_folds(y: np.ndarray, groups: np.ndarray, folds: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """GroupKFold splits of the samples; checks that no group lies on both sides of any split."""
    from sklearn.model_selection import GroupKFold

    splits = list(GroupKFold(n_splits=folds).split(np.zeros((len(y), 1)), y, groups))
    for k, (tr, te) in enumerate(splits):
        shared = np.intersect1d(groups[tr], groups[te])
        if shared.size:  # cannot happen with GroupKFold; a guard against a library change
            raise ClassifyError(f"fold {k}: group(s) {shared[:5].tolist()} on both sides of the split")
    return splits


def check_training(y: np.ndarray, groups: np.ndarray, class_names: Sequence[str], folds: int) -> None:
    """Refuse training sets that cannot be cross-validated with ``folds`` blocked folds."""
    if folds < 2:
        raise ClassifyError(f"folds must be at least 2. Got {folds}")
    counts = np.bincount(np.asarray(y), minlength=len(class_names) + 1)[1:len(class_names) + 1]
    few = {class_names[i]: int(c) for i, c in enumerate(counts) if c < folds}
    if few:
        raise ClassifyError(
            f"training class(es) with fewer samples than the {folds} cross-validation folds: {few}; add "
            "reference for them, drop them from the class list, or lower folds")
    ng = np.unique(groups).size
    if ng < folds:
        raise ClassifyError(
            f"{ng} spatial group(s) (polygons or blocks) for {folds} folds: blocked cross-validation needs "
            "at least as many groups as folds")
    per_class_groups = {class_names[c - 1]: np.unique(groups[y == c]).size for c in np.unique(y)}
    thin = {k: v for k, v in per_class_groups.items() if v < 2}
    if thin:
        warnings.warn(f"class(es) {thin} come from a single polygon or block: the blocked folds that hold "
                      "it out cannot learn it, so cross-validation scores will be pessimistic", UserWarning,
                      stacklevel=3)


def _deterministic_zip(data: bytes) -> bytes:
    """Rewrite a skops archive so that the same model always gives the same bytes.

    skops names nodes and array files after Python object ids (memory addresses), which change from
    run to run. They are renumbered 1, 2, ... in order of first appearance in the schema (the same id
    keeps the same number, so shared objects stay shared), members are sorted and timestamps fixed.
    """
    import json

    src = zipfile.ZipFile(io.BytesIO(data))
    schema = json.loads(src.read("schema.json"))
    ids: dict[int, int] = {}

    def walk(node: Any) -> Any:
        if isinstance(node, dict):
            out = {}
            for k, v in node.items():
                if k == "__id__" and isinstance(v, int):
                    out[k] = ids.setdefault(v, len(ids) + 1)
                else:
                    out[k] = walk(v)
            if isinstance(out.get("file"), str) and out["file"].endswith(".npy"):
                old = int(out["file"][:-4])
                out["file"] = f"{ids.setdefault(old, len(ids) + 1)}.npy"
            return out
        if isinstance(node, list):
            return [walk(v) for v in node]
        return node

    files: dict[str, bytes] = {"schema.json": json.dumps(walk(schema), indent=2).encode()}
    for name in src.namelist():
        if name == "schema.json":
            continue
        if not name.endswith(".npy") or not name[:-4].isdigit() or int(name[:-4]) not in ids:
            raise ClassifyError(f"unexpected member {name!r} in the serialised SVM model")
        files[f"{ids[int(name[:-4])]}.npy"] = src.read(name)
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", compression=zipfile.ZIP_DEFLATED) as dst:
        for name in sorted(files):
            info = zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            dst.writestr(info, files[name])
    return out.getvalue()


def fit_svm(X: np.ndarray, y: np.ndarray, groups: np.ndarray, *, class_names: Sequence[str],
            C: Sequence[float] = (1.0, 10.0, 100.0, 1000.0), gamma: Sequence[float | str] = (1e-3, 1e-2, 1e-1, 1.0),
            folds: int = 5, scoring: str = "accuracy", probability: bool = False, seed: int = 0) -> dict:
    """Grid search C and gamma of a standardised RBF SVC with blocked CV; refit on all samples.

    Returns the engine model: ``skops`` (uint8 bytes of the serialised estimators), ``sha256``,
    ``class_names``, ``best`` ({C, gamma}), ``cv_score`` (best mean score), ``cv_scores``
    ({"C=..,gamma=..": mean}), ``n_train``, ``n_features``, ``class_counts``, ``folds``, ``scoring``,
    ``probability``.
    """
    import skops.io as sio
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.model_selection import GridSearchCV
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.int64)
    groups = np.asarray(groups)
    if X.ndim != 2 or X.shape[0] != y.size or groups.size != y.size:
        raise ClassifyError(f"X (n, b), y (n,), groups (n,) disagree: {X.shape}, {y.shape}, {groups.shape}")
    if not np.isfinite(X).all():
        raise ClassifyError("training features contain NaN or infinite values")
    if not C or not gamma:
        raise ClassifyError("the C and gamma grids need at least one value each")
    check_training(y, groups, class_names, folds)
    splits = blocked_folds(y, groups, folds)

    def make() -> Pipeline:
        return Pipeline([("scale", StandardScaler()), ("svc", SVC(kernel="rbf", random_state=seed))])

    grid = {"svc__C": [float(c) for c in C], "svc__gamma": [g if isinstance(g, str) else float(g) for g in gamma]}
    search = GridSearchCV(make(), grid, cv=splits, scoring=scoring, refit=True, n_jobs=1, error_score="raise")
    search.fit(X, y)
    best = search.best_estimator_
    res = search.cv_results_
    cv_scores = {f"C={p['svc__C']:g},gamma={p['svc__gamma']}": float(s)
                 for p, s in zip(res["params"], res["mean_test_score"])}
    calibrated = None
    if probability:
        est = make().set_params(**search.best_params_)
        calibrated = CalibratedClassifierCV(est, method="sigmoid", cv=splits, ensemble=False).fit(X, y)
    raw = _deterministic_zip(sio.dumps({"classifier": best, "probability": calibrated}))
    counts = np.bincount(y, minlength=len(class_names) + 1)[1:]
    return {
        "skops": np.frombuffer(raw, dtype=np.uint8).copy(),
        "sha256": hashlib.sha256(raw).hexdigest(),
        "class_names": list(class_names),
        "best": {"C": float(search.best_params_["svc__C"]), "gamma": search.best_params_["svc__gamma"]},
        "cv_score": float(search.best_score_),
        "cv_scores": cv_scores,
        "n_train": int(y.size),
        "n_features": int(X.shape[1]),
        "class_counts": {n: int(c) for n, c in zip(class_names, counts)},
        "folds": int(folds),
        "scoring": scoring,
        "probability": bool(probability),
    }


_SVM_CACHE: "OrderedDict[str, dict]" = OrderedDict()


def load_svm(model: Mapping[str, Any]) -> dict:
    """The estimators of an SVM model: {"classifier": Pipeline, "probability": calibrated or None}.

    Verifies the SHA-256 and refuses any type outside skops' defaults and :data:`SKOPS_EXTRA_TRUSTED`.
    Cached per process by hash.
    """
    import skops.io as sio

    raw = np.asarray(model["skops"], dtype=np.uint8).tobytes()
    digest = hashlib.sha256(raw).hexdigest()
    if digest != model.get("sha256"):
        raise ClassifyError(f"SVM model bytes do not match their recorded SHA-256 ({model.get('sha256')!r}); "
                            "the model file is corrupt or was altered")
    if digest in _SVM_CACHE:
        _SVM_CACHE.move_to_end(digest)
        return _SVM_CACHE[digest]
    untrusted = sio.get_untrusted_types(data=raw)
    refused = sorted(set(untrusted) - set(SKOPS_EXTRA_TRUSTED))
    if refused:
        raise ClassifyError(f"SVM model names types that are not trusted: {refused}; refusing to load it")
    est = sio.loads(raw, trusted=list(untrusted))
    if not isinstance(est, dict) or "classifier" not in est:
        raise ClassifyError("SVM model does not hold a classifier")
    _SVM_CACHE[digest] = est
    while len(_SVM_CACHE) > 4:
        _SVM_CACHE.popitem(last=False)
    return est


def predict_svm(estimators: Mapping[str, Any], X: np.ndarray, *, probability: bool = False,
                chunk: int = 65536) -> tuple[np.ndarray, np.ndarray | None]:
    """Class codes (n,) and, if asked, probabilities (n, k) in chunks (cost grows with support vectors)."""
    X = np.asarray(X, dtype=np.float64)
    clf = estimators["classifier"]
    labels = np.zeros(X.shape[0], dtype=np.int64)
    proba = None
    cal = estimators.get("probability")
    if probability:
        if cal is None:
            raise ClassifyError("the SVM model was fitted without probabilities")
        classes = list(cal.classes_)
        proba = np.zeros((X.shape[0], len(classes)))
    for s in range(0, X.shape[0], chunk):
        labels[s:s + chunk] = clf.predict(X[s:s + chunk])
        if proba is not None:
            proba[s:s + chunk] = cal.predict_proba(X[s:s + chunk])
    return labels, proba


# step plumbing -----------------------------------------------------------------------------------
def _coord(spec: OutputSpec, name: str, ref: str) -> np.ndarray | None:
    v = spec.coords.get(name)
    if v is None:
        return None
    try:
        return np.array([float(x) if x is not None else np.nan for x in v], dtype=np.float64)
    except (TypeError, ValueError):
        raise ClassifyError(f"input {ref!r}: coordinate {name!r} is not numeric") from None


def _wavelengths(meta: Mapping[str, InputMeta], need: str) -> tuple[np.ndarray, np.ndarray | None]:
    m = meta["x"]
    wl = _coord(m.spec, "wavelength", m.ref)
    if wl is None or not np.isfinite(wl).all():
        raise ClassifyError(f"{need} needs band wavelengths: input {m.ref!r} has no numeric 'wavelength' "
                            "coordinate (use reflectance, not transformed components)")
    return wl, _coord(m.spec, "fwhm", m.ref)


def _exclude_mask(wl: np.ndarray | None, exclude: Sequence[Sequence[float]], ref: str) -> np.ndarray:
    if not exclude:
        return np.ones(0 if wl is None else wl.size, dtype=bool)
    if wl is None:
        raise ClassifyError(f"excluded wavelength ranges need a 'wavelength' coordinate on input {ref!r}")
    keep = np.ones(wl.size, dtype=bool)
    for lo, hi in exclude:
        keep &= ~((wl >= lo) & (wl <= hi))
    if keep.sum() < 2:
        raise ClassifyError(f"excluding {list(exclude)} nm leaves {int(keep.sum())} band(s) of input {ref!r}")
    return keep


_CHUNK = 16384  # pixels per work chunk in the kernels: bounds the float64 workspace to a few tens of MB


def _pixel_chunks(block: Block, band_index: np.ndarray | None = None, chunk: int = _CHUNK):
    """Yield (start, stop, X (b, c) float64, ok (c,)) over the flattened padded window, bands first.

    ``ok`` marks valid pixels whose selected bands are all finite; columns of other pixels hold
    whatever the input holds (callers mask their results with ``ok``).
    """
    x = block.data["x"]
    flat = x.reshape(x.shape[0], -1)
    valid = block.valid.ravel()
    sel = None if band_index is None else np.asarray(band_index)
    for s in range(0, flat.shape[1], chunk):
        e = min(s + chunk, flat.shape[1])
        X = (flat[:, s:e] if sel is None else flat[sel, s:e]).astype(np.float64)
        ok = valid[s:e] & np.isfinite(X.sum(axis=0))  # NaN or inf in any band makes the sum non-finite
        yield s, e, X, ok


def _blank(m: int, shape: tuple[int, int], fill, dtype) -> np.ndarray:
    return np.full((m, shape[0] * shape[1]), fill, dtype=dtype)


def _class_spec(names: Sequence[str], colors) -> OutputSpec:
    return OutputSpec(bands=("class",), dtype="uint8", nodata=0, kind="categorical", role=Role.CLASS_MAP,
                      class_names=tuple(names),
                      colors=tuple(tuple(int(v) for v in c) for c in colors) if colors else class_palette(len(names)),
                      attrs={"unclassified": 0})


def _band_names(names: Sequence[str]) -> tuple[str, ...]:
    return tuple(str(n) for n in names)


# shared fit: references and training samples ----------------------------------------------------
def _accumulate_samples(block: Block) -> dict:
    """Spectra at the sample pixels inside this tile's core (each sample counted once)."""
    return gather(block, "x", block.static["samples.row"], block.static["samples.col"], np.float32)


def _gathered(acc: dict | None, table: SampleTable, n_bands: int, step: str) -> tuple[np.ndarray, np.ndarray, dict]:
    """Samples sorted by their index in the table (independent of tiling) and a report of skipped ones."""
    if acc is None:
        acc = {"idx": np.empty(0, np.int64), "X": np.empty((0, n_bands), np.float32), "bad": np.empty(0, np.int64)}
    order = np.argsort(acc["idx"], kind="stable")
    idx, X = acc["idx"][order], acc["X"][order]
    bad = np.sort(acc["bad"])
    report = {"n_samples": int(len(table)), "n_used": int(idx.size), "n_nodata": int(bad.size),
              "nodata_features": sorted({int(f) for f in table.feature[bad]})[:50]}
    if bad.size:
        warnings.warn(f"step {step!r}: {bad.size} reference pixel(s) lie on nodata or non-finite values and are "
                      f"left out (features {report['nodata_features'][:10]})", UserWarning, stacklevel=2)
    return idx, X.astype(np.float64), report


def _finalize_references(acc, params, meta, *, library: dict | None, table: SampleTable | None) -> dict:
    """Reference spectra on the input's bands, from the library (resampled) or the training samples."""
    step = params["step"]
    ref = meta["x"].ref
    nb = len(meta["x"].spec.bands)
    wl = _coord(meta["x"].spec, "wavelength", ref)
    model: dict[str, Any] = {}
    if library is not None:
        wl, fwhm = _wavelengths(meta, "a spectral library")
        lib = SpectralLibrary(tuple(library["names"]), np.asarray(library["wavelengths"]),
                              np.asarray(library["spectra"]), source=library["source"])
        if fwhm is not None and not np.isfinite(fwhm).any():
            fwhm = None
        refs = resample_library(lib, wl, fwhm).spectra
        model["source"] = "library"
        model["method"] = "linear" if fwhm is None else "gaussian"
    else:
        assert table is not None
        idx, X, report = _gathered(acc, table, nb, step)
        train = table.split[idx] != 2  # validation samples never shape the references
        refs = class_means(X[train], table.label[idx][train], table.class_names)
        model["source"] = "samples"
        model["samples"] = report
        model["counts"] = np.bincount(table.label[idx][train], minlength=len(table.class_names) + 1)[1:]
    keep = _exclude_mask(wl, params.get("exclude") or [], ref)
    band_index = np.flatnonzero(keep) if keep.size else np.arange(nb)
    if params["method"] == "sff":
        wl_all, _ = _wavelengths(meta, "spectral feature fitting")
        sel = np.flatnonzero(range_mask(wl_all, tuple(params["range"])) & (keep if keep.size else True))
        cr, _ = continuum_removed(wl_all[sel], refs[:, sel])
        depth = 1.0 - cr
        flat = np.flatnonzero(~(np.abs(depth).max(axis=1) > 0))
        if flat.size:
            raise ClassifyError(
                f"step {step!r}: reference(s) {[params['names'][i] for i in flat]} have no absorption feature "
                f"over {params['range'][0]:g}-{params['range'][1]:g} nm (continuum-removed depth is zero)")
        band_index = sel
        model["ref_depth"] = depth
    model["band_index"] = band_index.astype(np.int64)
    model["references"] = refs[:, band_index]
    return model


# SAM ---------------------------------------------------------------------------------------------
_SAM_CHUNK = 4096  # pixels per chunk of the spectral angle kernel: a float32 workspace of b x 4096 stays in cache
_SAM_REFINE = 0.1  # radians: pairs closer than this are recomputed in float64 (METHODS.md's precise form)


def _stored_to_work(spec: OutputSpec) -> tuple[float | None, float | None, Any]:
    """(scale, offset, nodata) to apply to stored values; a positive scale without offset is dropped."""
    scale = spec.attrs.get("scale_factor")
    offset = spec.attrs.get("add_offset") or None
    nodata = spec.nodata
    if offset is None and (scale is None or float(scale) > 0):
        scale = None  # a positive factor leaves every angle unchanged (scale invariance)
    return (None if scale is None else float(scale)), (None if offset is None else float(offset)), nodata


def _sam_kernel(block: Block, model: dict) -> dict:
    """Angles and classes of one tile, from the stored values (the step reads them undecoded).

    Per chunk of pixels: the selected bands are copied into a float32 workspace (scaled only if an
    offset makes the stored values' angles differ from the reflectances'), one float32 matrix
    product with the unit reference vectors gives the cosines, and pairs with an angle under
    ``_SAM_REFINE`` are recomputed in float64 by :func:`_angles_bands_first` (arccos, and the
    atan2 form near zero). Elsewhere float32 rounding moves an angle by about 1e-6 / sin(angle) rad
    (tested against the float64 formula).
    """
    p = block.params
    shape = block.valid.shape
    refs = np.asarray(model["references"], dtype=np.float64)
    rn = np.linalg.norm(refs, axis=1)
    if np.any(~(rn > 0)):
        raise ClassifyError(f"reference(s) {np.flatnonzero(~(rn > 0)).tolist()} have zero norm or NaN values")
    unit32 = (refs / rn[:, None]).astype(np.float32)
    ref_class = np.asarray(p["ref_class"])
    thr = class_thresholds(ref_class, p["class_names"], p["threshold"], p["class_thresholds"])
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
    return {"classes": cls.reshape(1, *shape), "angle": angle.reshape(m, *shape)}


def _sam_outputs(meta, model, params) -> dict[str, OutputSpec]:
    return {"classes": _class_spec(params["class_names"], params["colors"]),
            "angle": OutputSpec(bands=_band_names(params["names"]), dtype="float32", nodata=float("nan"), role=Role.SCORE,
                                attrs={"units": "radian", "quantity": "spectral angle"})}


# SFF ---------------------------------------------------------------------------------------------
def _sff_kernel(block: Block, model: dict) -> dict:
    p = block.params
    shape = block.valid.shape
    sel = np.asarray(model["band_index"])
    ref_depth = np.asarray(model["ref_depth"], dtype=np.float64)
    ref_class = np.asarray(p["ref_class"])
    m = ref_depth.shape[0]
    wl, _ = _wavelengths(block.meta, "spectral feature fitting")
    cls = _blank(1, shape, 0, np.uint8)
    out = {k: _blank(m, shape, np.nan, np.float32) for k in ("scale", "rmse", "score")}
    for s, e, X, ok in _pixel_chunks(block, sel):
        if not ok.any():
            continue
        cr, _ = continuum_removed(wl[sel], X[:, ok].T)
        scale, rmse = sff_fit(1.0 - cr, ref_depth)
        score = sff_score(scale, rmse, p["rmse_floor"])
        cols = np.arange(s, e)[ok]
        out["scale"][:, cols] = scale.T
        out["rmse"][:, cols] = rmse.T
        out["score"][:, cols] = score.T
        cls[0, cols] = assign_best_fit(score, scale, rmse, ref_class, min_scale=p["min_scale"],
                                       max_rmse=p["max_rmse"], min_score=p["min_score"])
    res = {k: v.reshape(m, *shape) for k, v in out.items()}
    res["classes"] = cls.reshape(1, *shape)
    return res


def _sff_outputs(meta, model, params) -> dict[str, OutputSpec]:
    names = _band_names(params["names"])
    rng = f"{params['range'][0]:g}-{params['range'][1]:g} nm"
    return {"classes": _class_spec(params["class_names"], params["colors"]),
            "scale": OutputSpec(bands=names, dtype="float32", nodata=float("nan"), role=Role.SCORE,
                                attrs={"quantity": "feature depth scale", "range": rng}),
            "rmse": OutputSpec(bands=names, dtype="float32", nodata=float("nan"), role=Role.DIAGNOSTIC,
                               attrs={"quantity": "feature fit RMSE (depth units)", "range": rng}),
            "score": OutputSpec(bands=names, dtype="float32", nodata=float("nan"), role=Role.SCORE,
                                attrs={"quantity": "scale / max(RMSE, rmse_floor)", "range": rng})}


# SVM ---------------------------------------------------------------------------------------------
def _finalize_svm(acc, params, meta, *, table: SampleTable) -> dict:
    nb = len(meta["x"].spec.bands)
    idx, X, report = _gathered(acc, table, nb, params["step"])
    y = table.label[idx].astype(np.int64)
    split = table.split[idx]
    train = split != 2
    Xt, yt, gt = X[train], y[train], table.group[idx][train]
    model = fit_svm(Xt, yt, gt, class_names=table.class_names, C=params["C"], gamma=params["gamma"],
                    folds=params["folds"], scoring=params["scoring"], probability=params["probability"],
                    seed=params["seed"])
    model["samples"] = report
    if (~train).any():
        est = load_svm(model)
        pred, _ = predict_svm(est, X[~train])
        model["validation"] = {"n": int((~train).sum()), "overall_accuracy": float(np.mean(pred == y[~train]))}
    return model


def _svm_kernel(block: Block, model: dict) -> dict:
    p = block.params
    shape = block.valid.shape
    nb = block.data["x"].shape[0]
    if nb != int(model["n_features"]):
        raise ClassifyError(f"input has {nb} bands; the SVM was trained on {model['n_features']}")
    est = load_svm(model)
    k = len(p["class_names"])
    cls = _blank(1, shape, 0, np.uint8)
    proba = _blank(k, shape, np.nan, np.float32) if p["probability"] else None
    for s, e, X, ok in _pixel_chunks(block, chunk=p["chunk"]):
        if not ok.any():
            continue
        labels, pr = predict_svm(est, X[:, ok].T, probability=p["probability"], chunk=p["chunk"])
        cols = np.arange(s, e)[ok]
        cls[0, cols] = labels
        if proba is not None:
            proba[:, cols] = pr.T
    out = {"classes": cls.reshape(1, *shape)}
    if proba is not None:
        out["probability"] = proba.reshape(k, *shape)
    return out


def _svm_outputs(meta, model, params) -> dict[str, OutputSpec]:
    out = {"classes": _class_spec(params["class_names"], params["colors"])}
    if params["probability"]:
        out["probability"] = OutputSpec(bands=_band_names(params["class_names"]), dtype="float32", role=Role.SCORE,
                                        nodata=float("nan"), attrs={"quantity": "class probability (Platt)"})
    return out


# factories ---------------------------------------------------------------------------------------
def _library_static(lib: SpectralLibrary) -> dict:
    return {"library.wavelengths": np.asarray(lib.wavelengths, dtype=np.float64),
            "library.spectra": np.asarray(lib.spectra, dtype=np.float64),
            "library.names": list(lib.names), "library.source": Path(lib.source).name}


def _reference_setup(library: SpectralLibrary | None, samples: SampleTable | None, step: str
                     ) -> tuple[dict, dict, Fit, dict]:
    """params (names, classes, colours), static, fit and library dict for SAM/SFF."""
    if (library is None) == (samples is None):
        raise ClassifyError(f"step {step!r}: give exactly one of a spectral library or ground reference samples")
    if library is not None:
        params = {"names": list(library.names), "class_names": list(library.class_names),
                  "ref_class": library.class_codes.tolist(),
                  "colors": [list(c) for c in library.class_colors()] if library.colors else None}
        static = _library_static(library)
        libd = {"names": list(library.names), "wavelengths": library.wavelengths, "spectra": library.spectra,
                "source": library.source}
        fit = Fit(accumulate=_accumulate_samples, merge=merge_gathered, select=select_no_tiles,
                  finalize=functools.partial(_finalize_references, library=libd, table=None))
        return params, static, fit, libd
    assert samples is not None
    if len(samples) == 0:
        raise ClassifyError(f"step {step!r}: the ground reference has no sample on the grid")
    names = list(samples.class_names)
    params = {"names": names, "class_names": names, "ref_class": list(range(1, len(names) + 1)), "colors": None}
    static = samples.to_static()
    fit = Fit(accumulate=_accumulate_samples, merge=merge_gathered,
              select=functools.partial(select_tiles_holding, rows=samples.row, cols=samples.col),
              finalize=functools.partial(_finalize_references, library=None, table=samples))
    return params, static, fit, {}


def sam_step(name: str, input_ref: str, *, library: SpectralLibrary | None = None,
             samples: SampleTable | None = None, threshold: float | None = 0.1,
             class_thresholds: Mapping[str, float] | None = None,
             exclude: Sequence[Sequence[float]] = ()) -> Step:
    """Spectral angle classification of ``input_ref`` against library or image-derived references.

    threshold : radians, for every class (None: always the nearest reference).
    class_thresholds : radians per class name, overriding ``threshold``.
    exclude : wavelength ranges (nm) left out of the angle (e.g. water vapour bands).
    """
    params, static, fit, _ = _reference_setup(library, samples, name)
    thr = dict(class_thresholds or {})
    class_thresholds_check = [n for n in thr if n not in params["class_names"]]
    if class_thresholds_check:
        raise ClassifyError(f"step {name!r}: thresholds for unknown class(es) {class_thresholds_check}; "
                            f"classes are {params['class_names']}")
    if threshold is not None and not threshold > 0:
        raise ClassifyError(f"step {name!r}: threshold must be a positive angle in radians. Got {threshold}")
    params.update(step=name, method="sam", threshold=threshold, class_thresholds=thr,
                  exclude=[list(map(float, r)) for r in exclude])
    return Step(name=name, kernel=_sam_kernel, outputs=_sam_outputs, inputs={"x": input_ref}, params=params,
                fit=fit, static=static, decode=False, version="2")


def sff_step(name: str, input_ref: str, *, wl_range: tuple[float, float], library: SpectralLibrary | None = None,
             samples: SampleTable | None = None, min_scale: float = 0.0, max_rmse: float | None = None,
             min_score: float | None = None, rmse_floor: float = 1e-4,
             exclude: Sequence[Sequence[float]] = ()) -> Step:
    """Spectral feature fitting over ``wl_range`` (nm) against library or image-derived references."""
    params, static, fit, _ = _reference_setup(library, samples, name)
    lo, hi = float(wl_range[0]), float(wl_range[1])
    if not lo < hi:
        raise ClassifyError(f"step {name!r}: range must be (low, high) nm with low < high. Got {wl_range}")
    if not rmse_floor > 0:
        raise ClassifyError(f"step {name!r}: rmse_floor must be positive. Got {rmse_floor}")
    params.update(step=name, method="sff", range=[lo, hi], min_scale=float(min_scale),
                  max_rmse=None if max_rmse is None else float(max_rmse),
                  min_score=None if min_score is None else float(min_score), rmse_floor=float(rmse_floor),
                  exclude=[list(map(float, r)) for r in exclude])
    return Step(name=name, kernel=_sff_kernel, outputs=_sff_outputs, inputs={"x": input_ref}, params=params,
                fit=fit, static=static)


def cap_samples(table: SampleTable, max_per_class: int, seed: int = 0) -> SampleTable:
    """At most ``max_per_class`` samples per class and split, drawn with a seeded generator.

    Applied to the sample table before the fit, so the accumulator only gathers what is trained on
    (memory stays small with large polygons). The draw depends only on the table and the seed.
    """
    if max_per_class < 1:
        raise ClassifyError(f"max_per_class must be at least 1. Got {max_per_class}")
    keep = np.zeros(len(table), dtype=bool)
    rng = np.random.default_rng(seed)
    for sp in np.unique(table.split):
        for c in np.unique(table.label):
            where = np.flatnonzero((table.label == c) & (table.split == sp))
            pick = where if where.size <= max_per_class else rng.choice(where, max_per_class, replace=False)
            keep[pick] = True
    return table.subset(keep)


def svm_step(name: str, input_ref: str, *, samples: SampleTable,
             C: Sequence[float] = (1.0, 10.0, 100.0, 1000.0), gamma: Sequence[float | str] = (1e-3, 1e-2, 1e-1, 1.0),
             folds: int = 5, scoring: str = "accuracy", probability: bool = False, seed: int = 0,
             max_per_class: int | None = None, colors: Sequence[Sequence[int]] | None = None,
             chunk: int = 65536) -> Step:
    """SVM classification of ``input_ref`` trained on the samples' train (and unassigned) pixels.

    Validation pixels (split code 2) are left out of training; the model reports their overall
    accuracy under ``validation``. ``max_per_class`` caps the samples per class and split before the
    fit (:func:`cap_samples`).
    """
    if len(samples) == 0:
        raise ClassifyError(f"step {name!r}: the ground reference has no sample on the grid")
    if max_per_class is not None:
        samples = cap_samples(samples, max_per_class, seed)
    train = samples.split != 2
    check_training(samples.label[train], samples.group[train], samples.class_names, folds)
    if colors is not None and len(colors) != len(samples.class_names):
        raise ClassifyError(f"step {name!r}: {len(colors)} colours for {len(samples.class_names)} classes")
    params = {"step": name, "method": "svm", "class_names": list(samples.class_names),
              "colors": [list(map(int, c)) for c in colors] if colors else None,
              "C": [float(c) for c in C], "gamma": [g if isinstance(g, str) else float(g) for g in gamma],
              "folds": int(folds), "scoring": scoring, "probability": bool(probability), "seed": int(seed),
              "max_per_class": max_per_class, "chunk": int(chunk)}
    fit = Fit(accumulate=_accumulate_samples, merge=merge_gathered,
              select=functools.partial(select_tiles_holding, rows=samples.row, cols=samples.col),
              finalize=functools.partial(_finalize_svm, table=samples))
    return Step(name=name, kernel=_svm_kernel, outputs=_svm_outputs, inputs={"x": input_ref}, params=params,
                fit=fit, static=samples.to_static())


# configuration -----------------------------------------------------------------------------------
class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class ReferenceSpectraConfig(_Strict):
    """Where reference spectra come from: exactly one of ``library`` or ``samples``.

    ``library``: a spectral library CSV (:mod:`swathmill.workflows.inputs.library`), optionally restricted to
    ``materials``. ``samples``: a ground reference whose training pixels are averaged per class.
    """

    library: str | None = None
    materials: list[str] | None = None
    samples: GroundReferenceConfig | None = None

    @model_validator(mode="after")
    def _one(self) -> "ReferenceSpectraConfig":
        if (self.library is None) == (self.samples is None):
            raise ValueError("give exactly one of 'library' or 'samples'")
        if self.materials is not None and self.library is None:
            raise ValueError("'materials' selects from a library; there is none")
        return self


def _check_ranges(v: list[tuple[float, float]]) -> list[tuple[float, float]]:
    for lo, hi in v:
        if not lo < hi:
            raise ValueError(f"a wavelength range is [low, high] with low < high. Got [{lo}, {hi}]")
    return v


class SamConfig(_Strict):
    """Spectral angle step. YAML::

        sam:
          input: mosaic/reflectance
          references: {library: libraries/site.csv}
          threshold: 0.1            # radians; null = always the nearest reference
          class_thresholds: {water: 0.2}
          exclude: [[1340, 1450], [1790, 1960]]
    """

    name: str = "sam"
    input: str = "mosaic/reflectance"
    references: ReferenceSpectraConfig
    threshold: float | None = Field(0.1, gt=0)
    class_thresholds: dict[str, float] = Field(default_factory=dict)
    exclude: list[tuple[float, float]] = Field(default_factory=list)

    @field_validator("exclude")
    @classmethod
    def _exclude(cls, v: list[tuple[float, float]]) -> list[tuple[float, float]]:
        return _check_ranges(v)


class SffConfig(_Strict):
    """Spectral feature fitting step. YAML::

        sff:
          input: mosaic/reflectance
          references: {library: libraries/site.csv, materials: [kaolinite, muscovite]}
          range: [2120, 2250]
          max_rmse: 0.02
    """

    name: str = "sff"
    input: str = "mosaic/reflectance"
    references: ReferenceSpectraConfig
    range: tuple[float, float]
    min_scale: float = 0.0
    max_rmse: float | None = Field(None, gt=0)
    min_score: float | None = None
    rmse_floor: float = Field(1e-4, gt=0)
    exclude: list[tuple[float, float]] = Field(default_factory=list)

    @field_validator("exclude")
    @classmethod
    def _exclude(cls, v: list[tuple[float, float]]) -> list[tuple[float, float]]:
        return _check_ranges(v)

    @field_validator("range")
    @classmethod
    def _range(cls, v: tuple[float, float]) -> tuple[float, float]:
        return _check_ranges([v])[0]


class SvmConfig(_Strict):
    """SVM step. YAML::

        svm:
          input: mnf/components
          reference: {path: field/plots.gpkg, label: material}
          C: [1, 10, 100, 1000]
          gamma: [0.001, 0.01, 0.1, 1]
          folds: 5
          probability: false
    """

    name: str = "svm"
    input: str = "mnf/components"
    reference: GroundReferenceConfig
    C: list[float] = Field(default_factory=lambda: [1.0, 10.0, 100.0, 1000.0], min_length=1)
    gamma: list[float | Literal["scale"]] = Field(default_factory=lambda: [1e-3, 1e-2, 1e-1, 1.0], min_length=1)
    folds: int = Field(5, ge=2)
    scoring: Literal["accuracy", "balanced_accuracy", "f1_macro"] = "accuracy"
    probability: bool = False
    seed: int = 0
    max_per_class: int | None = Field(None, ge=1)
    chunk: int = Field(65536, ge=1)

    @field_validator("C")
    @classmethod
    def _positive(cls, v: list[float]) -> list[float]:
        if any(not c > 0 for c in v):
            raise ValueError(f"C values must be positive. Got {v}")
        return v


def _path(p: str, ctx: Any) -> Path:
    q = Path(p).expanduser()
    base = ctx_get(ctx, "base_dir")
    return q if q.is_absolute() or base is None else Path(base) / q


def _samples(cfg: GroundReferenceConfig, ctx: Any) -> SampleTable:
    grid = ctx_get(ctx, "grid")
    if grid is None:
        raise ClassifyError("ground reference needs the mosaic grid: build_steps was called without ctx.grid")
    table, _issues = load_samples(cfg, grid, base_dir=ctx_get(ctx, "base_dir"), valid=ctx_get(ctx, "valid"))
    return table


def _references(cfg: ReferenceSpectraConfig, ctx: Any) -> tuple[SpectralLibrary | None, SampleTable | None]:
    if cfg.library is not None:
        lib = read_library(_path(cfg.library, ctx))
        if cfg.materials is not None:
            lib = lib.subset(cfg.materials)
        return lib, None
    return None, _samples(cfg.samples, ctx)


def build_steps(section: SamConfig | SffConfig | SvmConfig, ctx: Any = None) -> list[Step]:
    """Steps for one classifier section (see the config models for the YAML shape)."""
    if isinstance(section, SamConfig):
        lib, smp = _references(section.references, ctx)
        return [sam_step(section.name, section.input, library=lib, samples=smp, threshold=section.threshold,
                         class_thresholds=section.class_thresholds, exclude=section.exclude)]
    if isinstance(section, SffConfig):
        lib, smp = _references(section.references, ctx)
        return [sff_step(section.name, section.input, wl_range=section.range, library=lib, samples=smp,
                         min_scale=section.min_scale, max_rmse=section.max_rmse, min_score=section.min_score,
                         rmse_floor=section.rmse_floor, exclude=section.exclude)]
    if isinstance(section, SvmConfig):
        return [svm_step(section.name, section.input, samples=_samples(section.reference, ctx), C=section.C,
                         gamma=section.gamma, folds=section.folds, scoring=section.scoring,
                         probability=section.probability, seed=section.seed, max_per_class=section.max_per_class,
                         chunk=section.chunk)]
    raise ClassifyError(f"build_steps takes a SamConfig, SffConfig or SvmConfig. Got {type(section).__name__}")
