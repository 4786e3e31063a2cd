"""The dimensionality curve of a classifier step and ``components: auto`` (SVM and spectral angle).

Blocked cross-validation on the training samples
    ``GroupKFold`` on the samples' spatial group ids (polygon or block): the pixels of one group are
    never on both sides of a split (checked). Every class needs at least ``folds`` training samples
    and the samples at least ``folds`` groups.

The curve
    For counts k = 1..``curve_max`` and each fold, the step's classifier is fitted on the training
    fold's first k features and scores the overall accuracy of the held-out fold
    (:func:`swathmill.workflows.methods.bandselect.feature_count_curve`): mean and standard deviation
    over folds per count, the peak and the smallest count within one standard error of it. Features
    are taken in their ranked order (:func:`feature_order`): MNF or PCA components in component order,
    a band-selection cube's bands in selection order (its ``selection_order`` attribute), other bands in
    input order; a reflectance cube named in ``curve_compare`` is counted in PCA components fitted
    inside each training fold.

What a step records (its model)
    ``curves`` (the input's own curve first, then one per ``curve_compare`` input, each with ``ref``
    and ``features``), ``feature_index`` and ``features_used`` (the features taken, in ranked order),
    and ``components`` ({asked, used, features, rule}).
"""
from __future__ import annotations

import warnings
from typing import Any, Callable, Literal, Mapping, Sequence

import numpy as np
from pydantic import Field, field_validator, model_validator

from swathmill.tiles.samples import gather
from swathmill.tiles.step import Block, InputMeta, OutputSpec
from swathmill.workflows.inputs.reference import SampleTable
from swathmill.workflows.params import Section
from swathmill.workflows.roles import Role

from .shared import ClassifyError, gathered_samples, training_mask

__all__ = [
    "CurveSettings",
    "COMPARE_PREFIX",
    "blocked_folds",
    "check_training",
    "feature_order",
    "count_curve",
    "compare_inputs",
    "accumulate_compare",
    "CurveSamples",
    "curve_samples",
    "feature_curves",
    "chosen_features",
]

COMPARE_PREFIX = "compare_"  # aliases of the curve_compare inputs: compare_0, compare_1, ...


class CurveSettings(Section):
    """The settings of the dimensionality curve shared by the SVM and spectral angle steps."""

    folds: int = Field(5, ge=2, description="spatially blocked cross-validation folds (GroupKFold on the "
                                            "samples' polygons or blocks)")
    components: int | Literal["auto"] | None = Field(
        None, description="keep the first k features of the input (ranked order); 'auto': the one-standard-"
                          "error count of the dimensionality curve; None: all")
    curve: bool = Field(False, description="record blocked-CV accuracy against the number of features")
    curve_max: int = Field(20, ge=1, description="largest feature count of the curve")
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
    def _curve_needed(self) -> "CurveSettings":
        if self.curve_compare and not self.wants_curve:
            raise ValueError(f"curve_compare {self.curve_compare} is only read with curve: true or components: auto")
        return self

    @property
    def wants_curve(self) -> bool:
        """True when the fit computes the curve (asked for, or needed by ``components: auto``)."""
        return self.curve or self.components == "auto"


# blocked cross-validation ----------------------------------------------------------------------------
def blocked_folds(y: np.ndarray, groups: np.ndarray, folds: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """GroupKFold splits of the samples; checks that no group lies on both sides of any split."""
    from sklearn.model_selection import GroupKFold

    splits = list(GroupKFold(n_splits=folds).split(np.zeros((len(y), 1)), y, groups))
    for k, (tr, te) in enumerate(splits):
        shared = np.intersect1d(groups[tr], groups[te])
        if shared.size:  # cannot happen with GroupKFold; a guard against a library change
            raise ClassifyError(f"fold {k}: group(s) {shared[:5].tolist()} on both sides of the split")
    return splits


def check_training(y: np.ndarray, groups: np.ndarray, class_names: Sequence[str], folds: int,
                   step: str | None = None) -> None:
    """Refuse training sets that cannot be cross-validated with ``folds`` blocked folds (the message
    names ``step`` when given)."""
    at = f"step {step!r}: " if step else ""
    if folds < 2:
        raise ClassifyError(f"{at}folds must be at least 2. Got {folds}")
    counts = np.bincount(np.asarray(y), minlength=len(class_names) + 1)[1:len(class_names) + 1]
    few = {class_names[i]: int(c) for i, c in enumerate(counts) if c < folds}
    if few:
        raise ClassifyError(
            f"{at}training class(es) with fewer samples than the {folds} cross-validation folds: {few}; add "
            "reference for them, drop them from the class list, or lower folds")
    ng = np.unique(groups).size
    if ng < folds:
        raise ClassifyError(
            f"{at}{ng} spatial group(s) (polygons or blocks) for {folds} folds: blocked cross-validation needs "
            "at least as many groups as folds")
    per_class_groups = {class_names[c - 1]: np.unique(groups[y == c]).size for c in np.unique(y)}
    thin = {k: v for k, v in per_class_groups.items() if v < 2}
    if thin:
        warnings.warn(f"class(es) {thin} come from a single polygon or block: the blocked folds that hold "
                      "it out cannot learn it, so cross-validation scores will be pessimistic", UserWarning,
                      stacklevel=3)


# the curve -------------------------------------------------------------------------------------------
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


def count_curve(X: np.ndarray, y: np.ndarray, groups: np.ndarray, *, mode: Literal["prefix", "pca"],
                settings: CurveSettings, estimator: Callable[[], Any]) -> dict:
    """Blocked-CV overall accuracy of ``estimator()`` against the number of features.

    ``X`` holds the features in ranked order (``mode="prefix"``) or raw bands (``mode="pca"``: PCA
    fitted in each training fold). Counts run 1..``curve_max`` (at most the features, and for PCA at
    most the smallest training fold less one). See
    :func:`swathmill.workflows.methods.bandselect.feature_count_curve`.
    """
    from swathmill.workflows.methods.bandselect import feature_count_curve

    top = min(settings.curve_max, X.shape[1])
    if mode == "pca":
        smallest = min(tr.size for tr, _ in blocked_folds(y, groups, settings.folds))
        top = min(top, smallest - 1)
    if top < 1:
        raise ClassifyError(f"the dimensionality curve needs at least one feature. Got {X.shape[1]} feature(s)")
    return feature_count_curve(X, y, groups, list(range(1, top + 1)), mode=mode, folds=settings.folds,
                               estimator=estimator)


# the step's plumbing ---------------------------------------------------------------------------------
def compare_inputs(step: str, input_ref: str, settings: CurveSettings) -> dict[str, str]:
    """The step's extra inputs {alias: "step/output"} for ``curve_compare``."""
    if input_ref in settings.curve_compare:
        raise ClassifyError(f"step {step!r}: curve_compare names the step's own input {input_ref!r}")
    return {f"{COMPARE_PREFIX}{i}": ref for i, ref in enumerate(settings.curve_compare)}


def _positions(idx: np.ndarray, wanted: np.ndarray) -> np.ndarray:
    o = np.argsort(idx, kind="stable")
    return o[np.searchsorted(idx[o], wanted)]


def accumulate_compare(block: Block) -> dict:
    """The samples of input ``x`` and of every ``curve_compare`` input, side by side (bands concatenated);
    a sample counts only where every input is valid and finite."""
    rows, cols = block.static["samples.row"], block.static["samples.col"]
    aliases = ["x", *(f"{COMPARE_PREFIX}{i}" for i in range(len(block.params.settings.curve_compare)))]
    parts = [gather(block, a, rows, cols, np.float32) for a in aliases]
    common = parts[0]["idx"]
    for part in parts[1:]:
        common = np.intersect1d(common, part["idx"])
    X = np.concatenate([part["X"][_positions(part["idx"], common)] for part in parts], axis=1)
    seen = np.unique(np.concatenate([np.concatenate([part["idx"], part["bad"]]) for part in parts]))
    return {"idx": common.astype(np.int64), "X": np.ascontiguousarray(X),
            "bad": np.setdiff1d(seen, common).astype(np.int64)}


class CurveSamples:
    """The gathered samples of a step with a curve: the input's own features and the compared ones.

    Attributes: ``idx`` (sample indices in the table), ``X`` (n, b) the input's bands, ``compare``
    [(alias, (n, w) bands)], ``y`` (labels), ``train`` (mask of training samples), ``groups`` (of the
    training samples), ``report`` (what was gathered and left out).
    """

    def __init__(self, idx: np.ndarray, X_all: np.ndarray, widths: Sequence[tuple[str, int]], table: SampleTable,
                 report: dict) -> None:
        self.idx, self.report = idx, report
        cuts = np.cumsum([0, *(w for _, w in widths)])
        self.X = X_all[:, cuts[0]:cuts[1]]
        self.compare = [(a, X_all[:, cuts[i]:cuts[i + 1]]) for i, (a, _) in enumerate(widths) if i > 0]
        self.y = table.label[idx].astype(np.int64)
        self.train = training_mask(table, idx)
        self.groups = table.group[idx][self.train]


def curve_samples(acc: dict | None, table: SampleTable, meta: Mapping[str, InputMeta], settings: CurveSettings,
                  step: str) -> CurveSamples:
    """The samples a step's accumulator gathered (:func:`accumulate_compare` or the plain gathering), split
    into the input's bands and each compared input's."""
    aliases = ["x", *(f"{COMPARE_PREFIX}{i}" for i in range(len(settings.curve_compare)))]
    widths = [(a, len(meta[a].spec.bands)) for a in aliases]
    idx, X_all, report = gathered_samples(acc, table, sum(w for _, w in widths), step)
    return CurveSamples(idx, X_all, widths, table, report)


def feature_curves(s: CurveSamples, meta: Mapping[str, InputMeta], settings: CurveSettings,
                   class_names: Sequence[str], order: Sequence[int], label: str,
                   estimator: Callable[[], Any]) -> list[dict]:
    """The input's own curve (its features in ``order``, named ``label``), then one per compared input.

    Empty when the settings ask for no curve.
    """
    if not settings.wants_curve:
        return []
    yt = s.y[s.train]
    check_training(yt, s.groups, class_names, settings.folds)
    curves = [{**count_curve(s.X[s.train][:, list(order)], yt, s.groups, mode="prefix", settings=settings,
                             estimator=estimator), "ref": meta["x"].ref, "features": label}]
    for alias, Xc in s.compare:
        o, lab, mode = feature_order(meta[alias].spec)
        curves.append({**count_curve(Xc[s.train][:, o], yt, s.groups, mode=mode, settings=settings,
                                     estimator=estimator), "ref": meta[alias].ref, "features": lab})
    return curves


def chosen_features(settings: CurveSettings, curves: Sequence[Mapping], order: Sequence[int], label: str,
                    all_features: Sequence[int], step: str, ref: str) -> tuple[list[int], dict]:
    """The features a step takes (in ranked order) and the record of that choice for its model.

    ``components`` None: ``all_features``; a count k: the first k of ``order``; "auto": the one-standard-
    error count of the input's own curve (``curves[0]``).
    """
    if settings.components is None:
        use = list(all_features)
    else:
        k = int(curves[0]["one_se"]) if settings.components == "auto" else int(settings.components)
        if k > len(order):
            raise ClassifyError(f"step {step!r}: components {k} asked, but input {ref!r} has {len(order)} "
                                "feature(s) to take")
        use = list(order[:k])
    record = {"asked": settings.components, "used": len(use), "features": label,
              "rule": ("smallest count within one standard error of the peak of the curve"
                       if settings.components == "auto" else "as configured")}
    return [int(i) for i in use], record
