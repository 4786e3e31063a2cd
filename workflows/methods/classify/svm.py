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
    features used (``feature_index``, ``features_used``) and the choice (``components``).

Step outputs: ``classes``, and ``probability`` (one band per class) when asked.
"""
from __future__ import annotations

import functools
import warnings
from typing import Any, Literal, Mapping, Sequence

import numpy as np
from pydantic import Field, field_validator, model_validator

from swathmill.tiles.samples import gather, merge_gathered, select_tiles_holding
from swathmill.tiles.step import Block, Fit, InputMeta, OutputSpec, Step
from swathmill.workflows.inputs.reference import GroundReferenceConfig, SampleTable
from swathmill.workflows.params import Section
from swathmill.workflows.roles import Role

from .legend import Legend, step_legend
from .models import dump_estimators, load_svm
from .shared import (ClassifierParams, ClassifyError, accumulate_samples, band_names, blank, class_spec,
                     field_default, gathered_samples, make_settings, pixel_chunks, to_legend_codes, training_mask)

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

_CMP = "compare_"  # aliases of the curve_compare inputs: compare_0, compare_1, ...


# settings ------------------------------------------------------------------------------------------
class SvmSettings(Section):
    """The parameters of an SVM step (defaults and bounds declared here only)."""

    C: list[float] = Field(default_factory=lambda: [1.0, 10.0, 100.0, 1000.0], min_length=1)
    gamma: list[float | Literal["scale"]] = Field(default_factory=lambda: [1e-3, 1e-2, 1e-1, 1.0], min_length=1)
    folds: int = Field(5, ge=2)
    scoring: Literal["accuracy", "balanced_accuracy", "f1_macro"] = "accuracy"
    probability: bool = False
    seed: int = 0
    max_per_class: int | None = Field(None, ge=1)
    chunk: int = Field(65536, ge=1, description="pixels per prediction call")
    components: int | Literal["auto"] | None = Field(
        None, description="keep the first k features of the input (ranked order); 'auto': the one-standard-"
                          "error count of the dimensionality curve; None: all")
    curve: bool = Field(False, description="record blocked-CV accuracy against the number of features")
    curve_max: int = Field(20, ge=1, description="largest feature count of the curve")
    curve_C: float = Field(100.0, gt=0, description="SVC C of the curve (gamma 'scale', standardised features)")
    curve_compare: list[str] = Field(default_factory=list,
                                     description="further inputs ('step/output') whose curves are recorded beside")

    @field_validator("components")
    @classmethod
    def _components(cls, v: int | str | None) -> int | str | None:
        if isinstance(v, int) and v < 1:
            raise ValueError(f"components is a count of at least 1, 'auto' or null. Got {v}")
        return v

    @field_validator("curve_compare")
    @classmethod
    def _refs(cls, v: list[str]) -> list[str]:
        for r in v:
            if r.count("/") != 1:
                raise ValueError(f"curve_compare entries are 'step/output' references. Got {r!r}")
        if len(set(v)) != len(v):
            raise ValueError(f"curve_compare names an input twice: {v}")
        return v

    @model_validator(mode="after")
    def _curve_needed(self) -> "SvmSettings":
        if self.curve_compare and not (self.curve or self.components == "auto"):
            raise ValueError(f"curve_compare {self.curve_compare} is only read with curve: true or components: auto")
        return self

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
def feature_order(spec: OutputSpec) -> tuple[list[int], str, Literal["prefix", "pca"]]:
    """The ranked order of an input's bands, what they are, and how a curve counts them.

    A band-selection cube (``selection_order`` attribute): its bands in selection order, "selected
    bands". Components (role ``components``): in component order, named after their ``long_name``
    (e.g. "MNF components"). A reflectance cube: "PCA components" fitted inside each training fold
    (mode ``pca``). Anything else: its bands in input order.
    """
    bands = list(spec.bands)
    sel = spec.attrs.get("selection_order")
    if sel:
        missing = [b for b in sel if b not in bands]
        if missing:
            raise ClassifyError(f"selection_order names band(s) {missing} that the input does not hold ({bands})")
        return [bands.index(b) for b in sel], "selected bands", "prefix"
    if spec.role == Role.COMPONENTS:
        return list(range(len(bands))), str(spec.attrs.get("long_name", "components")), "prefix"
    if spec.role == Role.REFLECTANCE:
        return list(range(len(bands))), "PCA components", "pca"
    return list(range(len(bands))), "bands in input order", "prefix"


def svm_feature_curve(X: np.ndarray, y: np.ndarray, groups: np.ndarray, *, mode: Literal["prefix", "pca"],
                      settings: SvmSettings) -> dict:
    """Blocked-CV overall accuracy of a standardised RBF SVC against the number of features.

    ``X`` holds the features in ranked order (``mode="prefix"``) or raw bands (``mode="pca"``: PCA
    fitted in each training fold). Counts run 1..``curve_max`` (at most the features, and for PCA at
    most the smallest training fold less one). See
    :func:`swathmill.workflows.methods.bandselect.feature_count_curve`.
    """
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    from swathmill.workflows.methods.bandselect import feature_count_curve

    top = min(settings.curve_max, X.shape[1])
    if mode == "pca":
        smallest = min(tr.size for tr, _ in blocked_folds(y, groups, settings.folds))
        top = min(top, smallest - 1)
    if top < 1:
        raise ClassifyError(f"the dimensionality curve needs at least one feature. Got {X.shape[1]} feature(s)")

    def estimator() -> Pipeline:
        return Pipeline([("scale", StandardScaler()),
                         ("svc", SVC(kernel="rbf", C=settings.curve_C, gamma="scale", random_state=settings.seed))])

    return feature_count_curve(X, y, groups, list(range(1, top + 1)), mode=mode, folds=settings.folds,
                               estimator=estimator)


# the step ------------------------------------------------------------------------------------------
def _positions(idx: np.ndarray, wanted: np.ndarray) -> np.ndarray:
    o = np.argsort(idx, kind="stable")
    return o[np.searchsorted(idx[o], wanted)]


def _accumulate_compare(block: Block) -> dict:
    """The samples of input ``x`` and of every ``curve_compare`` input, side by side (bands concatenated);
    a sample counts only where every input is valid and finite."""
    rows, cols = block.static["samples.row"], block.static["samples.col"]
    aliases = ["x", *(f"{_CMP}{i}" for i in range(len(block.params.settings.curve_compare)))]
    parts = [gather(block, a, rows, cols, np.float32) for a in aliases]
    common = parts[0]["idx"]
    for part in parts[1:]:
        common = np.intersect1d(common, part["idx"])
    X = np.concatenate([part["X"][_positions(part["idx"], common)] for part in parts], axis=1)
    seen = np.unique(np.concatenate([np.concatenate([part["idx"], part["bad"]]) for part in parts]))
    return {"idx": common.astype(np.int64), "X": np.ascontiguousarray(X),
            "bad": np.setdiff1d(seen, common).astype(np.int64)}


def _finalize_svm(acc: dict | None, params: ClassifierParams, meta: Mapping[str, InputMeta], *,
                  table: SampleTable) -> dict:
    cfg: SvmSettings = params.settings
    spec = meta["x"].spec
    nb = len(spec.bands)
    aliases = [f"{_CMP}{i}" for i in range(len(cfg.curve_compare))]
    widths = [nb] + [len(meta[a].spec.bands) for a in aliases]
    idx, X_all, report = gathered_samples(acc, table, sum(widths), params.step)
    X = X_all[:, :nb]
    y = table.label[idx].astype(np.int64)
    train = training_mask(table, idx)
    yt, gt = y[train], table.group[idx][train]
    order, label, mode = feature_order(spec)
    if mode == "pca":  # the SVM takes the bands themselves: its own curve counts them in input order
        label = "bands in input order"
    curves: list[dict] = []
    if cfg.curve or cfg.components == "auto":
        check_training(yt, gt, table.class_names, cfg.folds)
        # the input's own features in ranked order (components: auto counts them)
        curves.append({**svm_feature_curve(X[train][:, order], yt, gt, mode="prefix", settings=cfg),
                       "ref": meta["x"].ref, "features": label})
        start = nb
        for a, w in zip(aliases, widths[1:]):
            o, lab, mode = feature_order(meta[a].spec)
            Xc = X_all[train, start:start + w][:, o]
            start += w
            curves.append({**svm_feature_curve(Xc, yt, gt, mode=mode, settings=cfg), "ref": meta[a].ref,
                           "features": lab})
    if cfg.components is None:
        use = list(range(nb))
    else:
        k = int(curves[0]["one_se"]) if cfg.components == "auto" else int(cfg.components)
        if k > nb:
            raise ClassifyError(f"step {params.step!r}: components {k} asked, but input {meta['x'].ref!r} has "
                                f"{nb} band(s)")
        use = order[:k]
    model = fit_svm(X[train][:, use], yt, gt, class_names=table.class_names, settings=cfg)
    model["samples"] = report
    model["n_input_bands"] = nb
    model["feature_index"] = [int(i) for i in use]
    model["features_used"] = [spec.bands[i] for i in use]
    model["components"] = {"asked": cfg.components, "used": len(use), "features": label,
                           "rule": ("smallest count within one standard error of the peak of the curve"
                                    if cfg.components == "auto" else "as configured")}
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
    check_training(samples.label[train], samples.group[train], samples.class_names, cfg.folds)
    if colors is not None and len(colors) != len(samples.class_names):
        raise ClassifyError(f"step {name!r}: {len(colors)} colours for {len(samples.class_names)} classes")
    names = tuple(samples.class_names)
    legend = step_legend(legend, name, names, colors, "ground reference")
    params = ClassifierParams.make(name, cfg, names, names, range(1, len(names) + 1), legend)
    compare = {f"{_CMP}{i}": ref for i, ref in enumerate(cfg.curve_compare)}
    if input_ref in cfg.curve_compare:
        raise ClassifyError(f"step {name!r}: curve_compare names the step's own input {input_ref!r}")
    fit = Fit(accumulate=_accumulate_compare if compare else accumulate_samples, merge=merge_gathered,
              select=functools.partial(select_tiles_holding, rows=samples.row, cols=samples.col),
              finalize=functools.partial(_finalize_svm, table=samples))
    return Step(name=name, kernel=_svm_kernel, outputs=_svm_outputs, inputs={"x": input_ref, **compare},
                params=params, fit=fit, static=samples.to_static(), version="2")
