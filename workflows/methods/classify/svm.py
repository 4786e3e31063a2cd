"""Support vector machine classification: blocked cross-validation, the fit, prediction and the step.

Support vector machine (Cortes and Vapnik, 1995; Melgani and Bruzzone, 2004)
    ``Pipeline(StandardScaler, SVC(kernel="rbf"))`` fitted on training pixels only; C and gamma by
    grid search with spatially blocked cross-validation: ``GroupKFold`` on the samples' group ids
    (polygon or block), so the pixels of one group are never on both sides of a split (checked).
    Optional class probabilities come from Platt (sigmoid) calibration on the same blocked folds
    (``CalibratedClassifierCV(..., ensemble=False)``); the class map is always the SVC's own
    prediction, which the calibrated probabilities may occasionally disagree with. The fitted
    estimators are stored by :mod:`swathmill.workflows.methods.classify.models`.

The dimensionality curve and ``components: auto``
    With ``curve: true`` (or ``components: auto``) the fit computes, on the training samples, the
    blocked cross-validated overall accuracy against the number of features
    (:func:`swathmill.workflows.methods.bandselect.feature_count_curve`: the same ``GroupKFold`` on
    the samples' spatial groups; a standardised RBF SVC with ``curve_C`` and ``gamma="scale"``, fixed
    so that the curve costs one fit per count and fold; mean and standard deviation over folds per
    count, the peak and the smallest count within one standard error of it). Features are taken in
    their ranked order: MNF or PCA components in component order, a band-selection cube's bands in
    selection order (its ``selection_order`` attribute), other bands in input order. ``curve_compare``
    names further inputs whose curves are recorded beside it (components and selected bands by their
    order; a reflectance cube by PCA components fitted inside each training fold), so the report can
    show MNF components, PCA components and selected bands on one plot; note that the engine reads
    those inputs for every tile of the step too, and that the class map is left empty where one of
    them is nodata. ``components: k`` keeps the first ``k`` features; ``components: auto`` keeps the
    one-standard-error count of the input's curve. The model records the curves (``curves``), the
    features used (``feature_index``, ``features_used``) and the choice (``components``). The
    machinery (settings, folds, curves, the choice) is :mod:`.curves`, shared with the spectral angle.

Step outputs: ``classes``, and ``probability`` (one band per class) when asked.
"""
from __future__ import annotations

import functools
from typing import Any, Callable, Literal, Mapping, Sequence

import numpy as np
from pydantic import Field, field_validator

from swathmill.tiles.samples import merge_gathered, select_tiles_holding
from swathmill.tiles.step import Block, Fit, InputMeta, OutputSpec, Step
from swathmill.workflows.inputs.reference import GroundReferenceConfig, SampleTable
from swathmill.workflows.roles import Role

from .curves import (CurveSettings, accumulate_compare, blocked_folds, check_training, chosen_features,
                     compare_inputs, count_curve, curve_samples, feature_curves, feature_order)
from .legend import Legend, step_legend
from .models import dump_estimators, load_svm
from .shared import (ClassifierParams, ClassifyError, accumulate_samples, band_names, blank, class_spec,
                     field_default, make_settings, pixel_chunks, to_legend_codes, training_mask)

__all__ = [
    "SvmSettings",
    "SvmConfig",
    "blocked_folds",
    "check_training",
    "cap_samples",
    "fit_svm",
    "predict_svm",
    "feature_order",
    "svm_feature_curve",
    "svm_step",
]

# settings ------------------------------------------------------------------------------------------
class SvmSettings(CurveSettings):
    """The parameters of an SVM step (defaults and bounds declared here only; ``folds`` and the curve's
    keys ``components``, ``curve``, ``curve_max``, ``curve_compare`` on :class:`.curves.CurveSettings`)."""

    C: list[float] = Field(default_factory=lambda: [1.0, 10.0, 100.0, 1000.0], min_length=1)
    gamma: list[float | Literal["scale"]] = Field(default_factory=lambda: [1e-3, 1e-2, 1e-1, 1.0], min_length=1)
    scoring: Literal["accuracy", "balanced_accuracy", "f1_macro"] = "accuracy"
    probability: bool = False
    seed: int = 0
    max_per_class: int | None = Field(None, ge=1)
    chunk: int = Field(65536, ge=1, description="pixels per prediction call")
    curve_C: float = Field(100.0, gt=0, description="SVC C of the curve (gamma 'scale', standardised features)")

    @field_validator("C")
    @classmethod
    def _positive(cls, v: list[float]) -> list[float]:
        if any(not c > 0 for c in v):
            raise ValueError(f"C values must be positive. Got {v}")
        return v


class SvmConfig(SvmSettings):
    """SVM step. YAML::

        svm:
          input: mnf/components
          reference: {path: field/plots.gpkg, label: material}
          C: [1, 10, 100, 1000]
          gamma: [0.001, 0.01, 0.1, 1]
          folds: 5
          probability: false
          components: auto               # or a count, or null (all features)
          curve: true
          curve_compare: [mosaic/reflectance, bands/selected]
    """

    name: str = "svm"
    input: str = "mnf/components"
    reference: GroundReferenceConfig


# the maths -----------------------------------------------------------------------------------------
def fit_svm(X: np.ndarray, y: np.ndarray, groups: np.ndarray, *, class_names: Sequence[str],
            settings: SvmSettings | None = None, **fields: Any) -> dict:
    """Grid search C and gamma of a standardised RBF SVC with blocked CV; refit on all samples.

    The grid and the cross-validation come from ``settings`` (an :class:`SvmSettings`) or its fields
    as keywords (``C``, ``gamma``, ``folds``, ``scoring``, ``probability``, ``seed``).

    Returns the engine model: ``skops`` (uint8 bytes of the serialised estimators), ``sha256``,
    ``class_names``, ``best`` ({C, gamma}), ``cv_score`` (best mean score), ``cv_scores``
    ({"C=..,gamma=..": mean}), ``n_train``, ``n_features``, ``class_counts``, ``folds``, ``scoring``,
    ``probability``.
    """
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.model_selection import GridSearchCV
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    cfg: SvmSettings = make_settings(SvmSettings, "svm", settings, fields)
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.int64)
    groups = np.asarray(groups)
    if X.ndim != 2 or X.shape[0] != y.size or groups.size != y.size:
        raise ClassifyError(f"X (n, b), y (n,), groups (n,) disagree: {X.shape}, {y.shape}, {groups.shape}")
    if not np.isfinite(X).all():
        raise ClassifyError("training features contain NaN or infinite values")
    check_training(y, groups, class_names, cfg.folds)
    splits = blocked_folds(y, groups, cfg.folds)

    def make() -> Pipeline:
        return Pipeline([("scale", StandardScaler()), ("svc", SVC(kernel="rbf", random_state=cfg.seed))])

    grid = {"svc__C": [float(c) for c in cfg.C],
            "svc__gamma": [g if isinstance(g, str) else float(g) for g in cfg.gamma]}
    search = GridSearchCV(make(), grid, cv=splits, scoring=cfg.scoring, refit=True, n_jobs=1, error_score="raise")
    search.fit(X, y)
    best = search.best_estimator_
    res = search.cv_results_
    cv_scores = {f"C={p['svc__C']:g},gamma={p['svc__gamma']}": float(s)
                 for p, s in zip(res["params"], res["mean_test_score"])}
    calibrated = None
    if cfg.probability:
        est = make().set_params(**search.best_params_)
        calibrated = CalibratedClassifierCV(est, method="sigmoid", cv=splits, ensemble=False).fit(X, y)
    counts = np.bincount(y, minlength=len(class_names) + 1)[1:]
    return {
        **dump_estimators(best, calibrated),
        "class_names": list(class_names),
        "best": {"C": float(search.best_params_["svc__C"]), "gamma": search.best_params_["svc__gamma"]},
        "cv_score": float(search.best_score_),
        "cv_scores": cv_scores,
        "n_train": int(y.size),
        "n_features": int(X.shape[1]),
        "class_counts": {n: int(c) for n, c in zip(class_names, counts)},
        "folds": int(cfg.folds),
        "scoring": cfg.scoring,
        "probability": bool(cfg.probability),
    }


def predict_svm(estimators: Mapping[str, Any], X: np.ndarray, *, probability: bool = False,
                chunk: int = field_default(SvmSettings, "chunk")) -> tuple[np.ndarray, np.ndarray | None]:
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


def cap_samples(table: SampleTable, max_per_class: int, seed: int = field_default(SvmSettings, "seed")
                ) -> SampleTable:
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


# the dimensionality curve -------------------------------------------------------------------------
def _svc_factory(settings: SvmSettings) -> Callable[[], Any]:
    """A fresh standardised RBF SVC with ``curve_C`` and ``gamma="scale"`` per call."""
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    def estimator() -> Pipeline:
        return Pipeline([("scale", StandardScaler()),
                         ("svc", SVC(kernel="rbf", C=settings.curve_C, gamma="scale", random_state=settings.seed))])
    return estimator


def svm_feature_curve(X: np.ndarray, y: np.ndarray, groups: np.ndarray, *, mode: Literal["prefix", "pca"],
                      settings: SvmSettings) -> dict:
    """Blocked-CV overall accuracy of a standardised RBF SVC against the number of features
    (:func:`.curves.count_curve` with the SVC of the curve)."""
    return count_curve(X, y, groups, mode=mode, settings=settings, estimator=_svc_factory(settings))


# the step ------------------------------------------------------------------------------------------
def _finalize_svm(acc: dict | None, params: ClassifierParams, meta: Mapping[str, InputMeta], *,
                  table: SampleTable) -> dict:
    cfg: SvmSettings = params.settings
    spec = meta["x"].spec
    nb = len(spec.bands)
    s = curve_samples(acc, table, meta, cfg, params.step)
    X, y, train = s.X, s.y, s.train
    yt, gt = y[train], s.groups
    order, label, mode = feature_order(spec)
    if mode == "pca":  # the SVM takes the bands themselves: its own curve counts them in input order
        label = "bands in input order"
    curves = feature_curves(s, meta, cfg, table.class_names, order, label, _svc_factory(cfg))
    use, record = chosen_features(cfg, curves, order, label, range(nb), params.step, meta["x"].ref)
    model = fit_svm(X[train][:, use], yt, gt, class_names=table.class_names, settings=cfg)
    model["samples"] = s.report
    model["n_input_bands"] = nb
    model["feature_index"] = use
    model["features_used"] = [spec.bands[i] for i in use]
    model["components"] = record
    if curves:
        model["curves"] = curves
    if (~train).any():
        est = load_svm(model)
        pred, _ = predict_svm(est, X[~train][:, use])
        model["validation"] = {"n": int((~train).sum()), "overall_accuracy": float(np.mean(pred == y[~train]))}
    return model


def _svm_kernel(block: Block, model: dict) -> dict:
    p: ClassifierParams = block.params
    settings: SvmSettings = p.settings
    shape = block.valid.shape
    nb = block.data["x"].shape[0]
    expected = int(model.get("n_input_bands", model["n_features"]))
    if nb != expected:
        raise ClassifyError(f"input has {nb} bands; the SVM was trained on an input of {expected}")
    use = model.get("feature_index")
    band_index = None if use is None or list(use) == list(range(nb)) else np.asarray(use, dtype=np.intp)
    est = load_svm(model)
    k = len(p.class_names)
    cls = blank(1, shape, 0, np.uint8)  # the step's own labels 1..k; legend codes on return
    proba = blank(k, shape, np.nan, np.float32) if settings.probability else None
    for s, e, X, ok in pixel_chunks(block, band_index, chunk=settings.chunk):
        if not ok.any():
            continue
        labels, pr = predict_svm(est, X[:, ok].T, probability=settings.probability, chunk=settings.chunk)
        cols = np.arange(s, e)[ok]
        cls[0, cols] = labels
        if proba is not None:
            proba[:, cols] = pr.T
    out = {"classes": to_legend_codes(cls, p).reshape(1, *shape)}
    if proba is not None:
        out["probability"] = proba.reshape(k, *shape)
    return out


def _svm_outputs(meta: Mapping[str, InputMeta], model: dict | None, params: ClassifierParams
                 ) -> dict[str, OutputSpec]:
    out = {"classes": class_spec(params)}
    if params.settings.probability:
        out["probability"] = OutputSpec(bands=band_names(params.class_names), dtype="float32", role=Role.SCORE,
                                        nodata=float("nan"),
                                        attrs={"quantity": "class probability (Platt)", "units": "1"})
    return out


def svm_step(name: str, input_ref: str, *, samples: SampleTable, colors: Sequence[Sequence[int]] | None = None,
             settings: SvmSettings | None = None, legend: Legend | None = None, **fields: Any) -> Step:
    """SVM classification of ``input_ref`` trained on the samples' train (and unassigned) pixels.

    Parameters
    ----------
    name, input_ref : the step's name and the "step/output" it classifies.
    samples : the ground reference samples on the grid.
    colors : RGB per class of a legend made for this step alone (ignored with ``legend``; default: the
        colour-blind-safe palette of :mod:`swathmill.tiles.palette`).
    settings : an :class:`SvmSettings` (or a section derived from it); or its fields as keywords
        (``C``, ``gamma``, ``folds``, ``scoring``, ``probability``, ``seed``, ``max_per_class``, ``chunk``,
        ``components``, ``curve``, ``curve_max``, ``curve_C``, ``curve_compare``).
    legend : the run's legend (the class map's codes); default: a legend of the samples' classes.

    Validation pixels are left out of training; the model reports their overall accuracy under
    ``validation``. ``max_per_class`` caps the samples per class and split before the fit
    (:func:`cap_samples`).
    """
    cfg: SvmSettings = make_settings(SvmSettings, name, settings, fields)
    if len(samples) == 0:
        raise ClassifyError(f"step {name!r}: the ground reference has no sample on the grid")
    if cfg.max_per_class is not None:
        samples = cap_samples(samples, cfg.max_per_class, cfg.seed)
    train = training_mask(samples)
    check_training(samples.label[train], samples.group[train], samples.class_names, cfg.folds, step=name)
    if colors is not None and len(colors) != len(samples.class_names):
        raise ClassifyError(f"step {name!r}: {len(colors)} colours for {len(samples.class_names)} classes")
    names = tuple(samples.class_names)
    legend = step_legend(legend, name, names, colors, "ground reference")
    params = ClassifierParams.make(name, cfg, names, names, range(1, len(names) + 1), legend)
    compare = compare_inputs(name, input_ref, cfg)
    fit = Fit(accumulate=accumulate_compare if compare else accumulate_samples, merge=merge_gathered,
              select=functools.partial(select_tiles_holding, rows=samples.row, cols=samples.col),
              points=("samples.row", "samples.col"),
              finalize=functools.partial(_finalize_svm, table=samples))
    return Step(name=name, kernel=_svm_kernel, outputs=_svm_outputs, inputs={"x": input_ref, **compare},
                params=params, fit=fit, static=samples.to_static(), version="2")
