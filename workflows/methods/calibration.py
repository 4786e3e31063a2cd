"""Calibration of a quantity (clay content, chlorophyll, turbidity ...) against ground measurements.

Two regressions, fitted on the predictor values at the reference samples:

``linear``
    Ordinary least squares with an intercept on chosen predictor bands (typically features from
    :mod:`swathmill.workflows.methods.features`, e.g. a band depth).
``pls``
    Partial least squares regression (``sklearn.cross_decomposition.PLSRegression``) on spectra or
    on MNF components, optionally restricted to wavelength ranges; the number of latent components
    is fixed or chosen by the smallest cross-validated RMSE (then the reported CV figures are
    slightly optimistic, as the choice is made on the same folds).

``svr``
    Support vector regression (``sklearn.svm.SVR``, RBF kernel, in a pipeline after
    ``StandardScaler``; Drucker et al., 1997; Smola and Schoelkopf, 2004) on spectra, selected bands,
    components or feature bands. ``C``, ``gamma`` and ``epsilon`` come from a grid searched with the
    same cross-validation folds (the combination of the smallest CV RMSE; the reported CV figures are
    then slightly optimistic, as for the PLS component count). ``epsilon`` is given in units of the
    quantity; by default the grid is 0, 0.05, 0.1 and 0.2 times the sample standard deviation of the
    measured values.

Cross-validation (``sklearn.model_selection.KFold`` shuffled with a seed, or ``GroupKFold`` when
samples carry groups, e.g. one group per field site so that neighbouring samples never sit on both
sides) gives a prediction for every sample from a model that did not see it; R2, RMSE and bias
(mean of predicted minus observed) are computed from those predictions.

Model storage
    The fitted model is plain arrays plus JSON (no pickle): the regression is stored as its affine
    map ``y = X b + c`` over the predictors, which is exact for both methods, and for PLS also the
    affine map from predictors to latent scores. Applying the model needs numpy only. An SVR is
    stored as its scaler (mean, scale), support vectors (in scaled units), dual coefficients,
    intercept and numeric ``gamma``: ``y = sum_i a_i exp(-gamma |z - s_i|^2) + b`` with
    ``z = (x - mean) / scale``, which is what ``SVR.predict`` computes; the same for each CV-fold model.

Per-pixel uncertainty (the choice made here)
    A 1-sigma prediction error taken from the cross-validation residuals: the samples are split
    into up to 5 bins of equal count (at least 10 samples each) by their cross-validated
    prediction; the root mean square residual of each bin is placed at the bin's median prediction
    and interpolated linearly in the pixel's predicted value (held constant beyond the outer bins).
    With fewer than 20 samples it is one value, the CV RMSE. It thus follows the error where it
    changes with the level of the quantity (often larger at high values), includes any bias, and is
    only meaningful inside the calibration range.
    For ``svr`` the 1-sigma is ``sqrt(s_cv(y)^2 + v_jack(x))``: the binned CV residual above plus the
    delete-a-fold jackknife variance of the k CV-fold models' predictions at the pixel,
    ``v_jack = (k - 1) / k * sum_i (f_i(x) - mean f(x))^2`` (Efron and Stein, 1981, from memory). The
    second term grows where the fold models disagree, typically away from the calibration samples; as
    the CV residuals already hold part of that spread, the sum errs on the large side.

Out-of-range mask
    A pixel is outside when any predictor (``linear``) or any PLS latent score (``pls``; raw
    spectra have too many bands for a per-band box to be useful), or, for ``svr``, any of the first
    ``min(5, p, n - 1)`` principal-component scores of the standardised predictors, lies outside the minimum-maximum
    of the calibration samples, widened by ``range_margin`` times that range. The output
    ``out_of_range`` is 1 inside, 2 outside (0 no data).

The step (:func:`build_steps`) gathers the samples tile by tile: each tile reads the predictors at
the sample pixels in its core (rows and columns of the step's grid, in ``static``), the samples are
merged, and the model is fitted in ``finalize``. The kernel applies it tile by tile.
"""
from __future__ import annotations

import re
import warnings
from dataclasses import dataclass
from functools import partial
from typing import Any, Literal, Mapping, Sequence

import numpy as np
from pydantic import Field, field_validator, model_validator

from swathmill.tiles.samples import in_core
from swathmill.workflows.roles import Role
from swathmill.tiles.step import Block, Fit, InputMeta, OutputSpec, Step

from swathmill.workflows.methods.accuracy import regression_metrics
from swathmill.workflows.params import Section, check_ref
from swathmill.errors import SwathmillError

__all__ = [
    "CalibrationError",
    "CrossValidation",
    "CalibrationConfig",
    "CalibrationSamples",
    "fit_calibration",
    "predict_calibration",
    "calibration_curve",
    "build_steps",
    "calibration_kernel",
]

_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_\-]*$")
_ALIAS = "predictors"
INSIDE, OUTSIDE = 1, 2


class CalibrationError(SwathmillError, ValueError):
    """Calibration cannot be fitted or applied; the message names the step, sample or band at fault."""


# ----------------------------------------------------------------------------------------------
# configuration
# ----------------------------------------------------------------------------------------------

class CrossValidation(Section):
    """How the calibration is cross-validated."""

    folds: int = Field(5, ge=2, description="number of folds")
    grouped: bool = Field(False, description="keep each sample group within one fold (GroupKFold)")
    seed: int = Field(0, description="seed of the shuffled KFold split")


class CalibrationConfig(Section):
    """One ``calibrations`` entry: a quantity calibrated on the predictors of one input.

    YAML::

        calibrations:
          - name: clay_map                 # step name
            quantity: clay                 # output band name
            units: "%"
            method: linear                 # linear | pls
            input: features/features
            bands: [aloh_depth]            # predictor bands (required for linear)
            cv: {folds: 5, grouped: true, seed: 0}
          - name: clay_pls
            quantity: clay
            units: "%"
            method: pls
            input: mosaic/reflectance      # or mnf/components
            wavelength_ranges: [[2000, 2450]]
            n_components: null             # chosen by CV up to max_components
            max_components: 8
          - name: clay_svr
            quantity: clay
            method: svr
            input: bands/selected          # selected bands, components or feature bands too
            C: [1, 10, 100]
            gamma: [scale, 0.01, 0.1]
            epsilon: null                  # 0, 0.05, 0.1, 0.2 x std of the measured values
            cv: {folds: 5, grouped: true}
    """

    name: str
    quantity: str
    units: str = ""
    method: Literal["linear", "pls", "svr"]
    input: str
    bands: list[str] | None = Field(None, description="predictor band names; all bands if omitted (pls)")
    wavelength_ranges: list[tuple[float, float]] | None = Field(
        None, description="keep only bands whose wavelength lies in one of these [low, high] nm ranges")
    n_components: int | None = Field(None, ge=1, description="PLS components; None: chosen by CV")
    max_components: int = Field(10, ge=1)
    scale: bool = Field(True, description="PLS: scale predictors to unit variance")
    cv: CrossValidation = Field(default_factory=CrossValidation)
    range_margin: float = Field(0.0, ge=0.0, description="widen the calibration range by this fraction")
    C: list[float] = Field(default_factory=lambda: [1.0, 10.0, 100.0], min_length=1, description="SVR: C grid")
    gamma: list[float | Literal["scale"]] = Field(default_factory=lambda: ["scale", 0.01, 0.1], min_length=1,
                                                  description="SVR: RBF gamma grid (on standardised predictors)")
    epsilon: list[float] | None = Field(None, description="SVR: epsilon grid in units of the quantity; "
                                                          "None: 0, 0.05, 0.1, 0.2 x std of the measured values")
    curve: bool = Field(False, description="record the CV R2 against the number of leading predictors "
                                           "(components in order, bands in selection order)")
    curve_max: int = Field(20, ge=1, description="largest predictor count of the curve")

    @field_validator("C")
    @classmethod
    def _positive_c(cls, v: list[float]) -> list[float]:
        if any(not c > 0 for c in v):
            raise ValueError(f"C values must be positive. Got {v}")
        return v

    @field_validator("epsilon")
    @classmethod
    def _epsilon(cls, v: list[float] | None) -> list[float] | None:
        if v is not None and (not v or any(e < 0 for e in v)):
            raise ValueError(f"epsilon values must be >= 0 (at least one). Got {v}")
        return v

    @field_validator("name", "quantity")
    @classmethod
    def _names(cls, v: str) -> str:
        if not _NAME.match(v):
            raise ValueError(f"names start with a letter and hold letters, digits, '_' or '-'. Got {v!r}")
        return v

    @field_validator("input")
    @classmethod
    def _ref(cls, v: str) -> str:
        return check_ref(v)

    @field_validator("wavelength_ranges")
    @classmethod
    def _ranges(cls, v: list[tuple[float, float]] | None) -> list[tuple[float, float]] | None:
        for lo, hi in v or []:
            if not lo < hi:
                raise ValueError(f"a wavelength range is [low, high] with low < high. Got {[lo, hi]}")
        return v

    @model_validator(mode="after")
    def _method(self) -> "CalibrationConfig":
        if self.method == "linear" and not self.bands:
            raise ValueError(f"calibration {self.name!r}: method 'linear' needs 'bands', the predictor "
                             "band names to regress on (e.g. [aloh_depth])")
        if self.bands is not None and self.wavelength_ranges is not None:
            raise ValueError(f"calibration {self.name!r}: give either 'bands' or 'wavelength_ranges', not both")
        if self.method == "linear" and (self.n_components is not None):
            raise ValueError(f"calibration {self.name!r}: 'n_components' applies to method 'pls' only")
        return self


@dataclass(frozen=True)
class CalibrationSamples:
    """Reference samples on the step's grid: pixel rows and columns, measured values, optional groups.

    ``ids`` are labels used in messages and the report (default: the sample's position).
    """

    rows: np.ndarray
    cols: np.ndarray
    values: np.ndarray
    groups: np.ndarray | None = None
    ids: Sequence[str] | None = None

    def __post_init__(self) -> None:
        n = np.asarray(self.values).size
        for name in ("rows", "cols") + (("groups",) if self.groups is not None else ()):
            if np.asarray(getattr(self, name)).size != n:
                raise CalibrationError(f"samples: {name} has {np.asarray(getattr(self, name)).size} "
                                       f"values for {n} measured values")
        if self.ids is not None and len(self.ids) != n:
            raise CalibrationError(f"samples: {len(self.ids)} ids for {n} measured values")
        if not np.all(np.isfinite(np.asarray(self.values, dtype=float))):
            bad = int(np.flatnonzero(~np.isfinite(np.asarray(self.values, dtype=float)))[0])
            raise CalibrationError(f"samples: measured value of sample {self._id(bad)} is not finite")

    def _id(self, i: int) -> str:
        return str(self.ids[i]) if self.ids is not None else str(i)

    def to_static(self) -> dict[str, Any]:
        st = {"sample_rows": np.asarray(self.rows, dtype=np.int64).ravel(),
              "sample_cols": np.asarray(self.cols, dtype=np.int64).ravel(),
              "sample_values": np.asarray(self.values, dtype=np.float64).ravel()}
        if self.groups is not None:
            st["sample_groups"] = np.asarray(self.groups).ravel()
        if self.ids is not None:
            st["sample_ids"] = [str(x) for x in self.ids]
        return st


# ----------------------------------------------------------------------------------------------
# fitting (pure numpy / scikit-learn on small arrays)
# ----------------------------------------------------------------------------------------------

def _ols(X: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, float]:
    A = np.column_stack([np.ones(len(X)), X])
    sol, *_ = np.linalg.lstsq(A, y, rcond=None)
    return sol[1:], float(sol[0])


def _pls(X: np.ndarray, y: np.ndarray, k: int, scale: bool) -> Any:
    from sklearn.cross_decomposition import PLSRegression

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return PLSRegression(n_components=k, scale=scale).fit(X, y)


def _affine_of(fn: Any, p: int) -> tuple[np.ndarray, np.ndarray]:
    """The exact affine map of a linear function of rows of X: fn(X) = X @ B + c."""
    c = np.atleast_2d(fn(np.zeros((1, p))))
    B = np.atleast_2d(fn(np.eye(p))) - c
    return B, c[0]


def _splits(n: int, groups: np.ndarray | None, folds: int, seed: int, where: str) -> list[tuple[np.ndarray, np.ndarray]]:
    from sklearn.model_selection import GroupKFold, KFold

    if groups is not None:
        ng = np.unique(groups).size
        if ng < folds:
            raise CalibrationError(f"{where}: {folds} folds need at least {folds} sample groups. Got {ng}")
        return list(GroupKFold(n_splits=folds).split(np.zeros(n), groups=groups))
    if n < folds:
        raise CalibrationError(f"{where}: {folds} folds need at least {folds} samples. Got {n}")
    return list(KFold(n_splits=folds, shuffle=True, random_state=seed).split(np.zeros(n)))


def _uncertainty_bins(pred: np.ndarray, resid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    n = pred.size
    nbins = int(min(5, max(1, n // 10)))
    if nbins == 1:
        return np.array([float(np.median(pred))]), np.array([float(np.sqrt(np.mean(resid ** 2)))])
    order = np.argsort(pred, kind="stable")
    centres, values = [], []
    for part in np.array_split(order, nbins):
        centres.append(float(np.median(pred[part])))
        values.append(float(np.sqrt(np.mean(resid[part] ** 2))))
    return np.array(centres), np.array(values)


def _svr_fit(X: np.ndarray, y: np.ndarray, C: float, gamma: float | str, epsilon: float) -> dict[str, np.ndarray]:
    """A standardised RBF SVR fitted with scikit-learn, returned as plain arrays (see the module notes)."""
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVR

    pipe = Pipeline([("scale", StandardScaler()), ("svr", SVR(kernel="rbf", C=C, gamma=gamma, epsilon=epsilon))])
    pipe.fit(X, y)
    sc, svr = pipe.named_steps["scale"], pipe.named_steps["svr"]
    if isinstance(gamma, str):  # 'scale': 1 / (n_features * Z.var()) on the standardised data (sklearn SVR docs)
        Z = sc.transform(X)
        var = float(Z.var())
        g = 1.0 / (Z.shape[1] * var) if var > 0 else 1.0
    else:
        g = float(gamma)
    return {"mean": np.asarray(sc.mean_, dtype=np.float64), "scale": np.asarray(sc.scale_, dtype=np.float64),
            "sv": np.asarray(svr.support_vectors_, dtype=np.float64),
            "dual": np.asarray(svr.dual_coef_, dtype=np.float64).ravel(),
            "b": np.asarray(float(svr.intercept_[0])), "gamma": np.asarray(g)}


def _svr_apply(m: Mapping[str, np.ndarray], X: np.ndarray, chunk: int = 16384) -> np.ndarray:
    """``sum_i a_i exp(-gamma |z - s_i|^2) + b`` in chunks of pixels (numpy only)."""
    sv = np.asarray(m["sv"], dtype=np.float64)
    dual = np.asarray(m["dual"], dtype=np.float64)
    g, b = float(m["gamma"]), float(m["b"])
    mean, scale = np.asarray(m["mean"]), np.asarray(m["scale"])
    sv2 = np.einsum("ij,ij->i", sv, sv)
    out = np.empty(X.shape[0])
    for s in range(0, X.shape[0], chunk):
        Z = (X[s:s + chunk] - mean) / scale
        d2 = np.einsum("ij,ij->i", Z, Z)[:, None] + sv2[None, :] - 2.0 * Z @ sv.T
        out[s:s + chunk] = np.exp(-g * np.maximum(d2, 0.0)) @ dual + b
    return out


def _svr_pack(prefix: str, m: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    return {f"{prefix}_{k}": np.asarray(v) for k, v in m.items()}


def _svr_unpack(model: Mapping[str, Any], prefix: str) -> dict[str, np.ndarray]:
    return {k: np.asarray(model[f"{prefix}_{k}"]) for k in ("mean", "scale", "sv", "dual", "b", "gamma")}


def _svr_folds(model: Mapping[str, Any]) -> list[dict[str, np.ndarray]]:
    sizes = np.asarray(model["svr_fold_sizes"], dtype=np.int64)
    ends = np.cumsum(sizes)
    out = []
    for i, (e, n) in enumerate(zip(ends, sizes)):
        out.append({"mean": np.asarray(model["svr_fold_mean"])[i], "scale": np.asarray(model["svr_fold_scale"])[i],
                    "sv": np.asarray(model["svr_fold_sv"])[e - n:e], "dual": np.asarray(model["svr_fold_dual"])[e - n:e],
                    "b": np.asarray(model["svr_fold_b"])[i], "gamma": np.asarray(model["svr_fold_gamma"])[i]})
    return out


def _svr_sigma(model: Mapping[str, Any], X: np.ndarray, value: np.ndarray) -> np.ndarray:
    preds = np.array([_svr_apply(m, X) for m in _svr_folds(model)])
    k = preds.shape[0]
    jack = (k - 1) / k * np.sum((preds - preds.mean(axis=0)) ** 2, axis=0)
    s_cv = np.interp(value, np.asarray(model["sigma_at"]), np.asarray(model["sigma"]))
    return np.sqrt(s_cv ** 2 + jack)


def _pca_score_map(X: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Affine map of rows of X to the first k principal-component scores of the standardised X."""
    mean = X.mean(axis=0)
    scale = X.std(axis=0)
    scale[scale == 0] = 1.0
    Z = (X - mean) / scale
    _, _, vt = np.linalg.svd(Z, full_matrices=False)
    V = vt[:k].T
    return V / scale[:, None], -(mean / scale) @ V


def fit_calibration(X: np.ndarray, y: np.ndarray, *, method: Literal["linear", "pls"],
                    predictor_names: Sequence[str], groups: np.ndarray | None = None, folds: int = 5,
                    seed: int = 0, n_components: int | None = None, max_components: int = 10,
                    scale: bool = True, range_margin: float = 0.0, where: str = "calibration",
                    C: Sequence[float] = (1.0, 10.0, 100.0), gamma: Sequence[float | str] = ("scale", 0.01, 0.1),
                    epsilon: Sequence[float] | None = None) -> dict:
    """Fit a calibration and cross-validate it.

    Parameters
    ----------
    X
        (n_samples, n_predictors) predictor values at the samples (finite).
    y
        (n_samples,) measured values.
    method
        ``"linear"`` (OLS with intercept), ``"pls"`` or ``"svr"``.
    groups
        Optional (n_samples,) group labels: GroupKFold instead of a shuffled KFold.
    n_components
        PLS components; None chooses the count with the smallest CV RMSE in 1..max_components.
    where
        Label used in error messages (e.g. the step name).
    C, gamma, epsilon
        SVR grids (``epsilon`` None: 0, 0.05, 0.1, 0.2 times the standard deviation of ``y``).

    Returns
    -------
    dict
        The model: arrays (``coef``, ``intercept``, ``range_low``/``range_high``, ``sigma_at``/
        ``sigma``, ``observed``, ``cv_predicted``, ``fitted``, PLS ``score_map``/``score_offset``)
        and JSON values (``method``, ``predictors``, ``n_components``, ``cv`` and ``fit`` metrics).
        SVR models hold ``svr_*`` arrays (the refitted model and, ``svr_fold_*``, the CV-fold
        models), ``svr_best`` and ``svr_grid`` (CV RMSE per combination) instead of an affine map.
    """
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64).ravel()
    if X.ndim != 2 or X.shape[0] != y.size:
        raise CalibrationError(f"{where}: X must be (n_samples={y.size}, n_predictors). Got shape {X.shape}")
    n, p = X.shape
    if len(predictor_names) != p:
        raise CalibrationError(f"{where}: {len(predictor_names)} predictor names for {p} predictors")
    if not np.all(np.isfinite(X)):
        raise CalibrationError(f"{where}: predictor values must be finite")
    need = max(folds, p + 2) if method == "linear" else max(folds, 3)
    if method == "svr" and (not C or not gamma or (epsilon is not None and not epsilon)):
        raise CalibrationError(f"{where}: the SVR grids C, gamma and epsilon need at least one value each")
    if n < need:
        raise CalibrationError(f"{where}: method {method!r} with {p} predictors and {folds} folds needs at least "
                               f"{need} samples with valid predictors. Got {n}")
    splits = _splits(n, None if groups is None else np.asarray(groups), folds, seed, where)
    smallest_train = min(len(tr) for tr, _ in splits)

    def cv_predict(k: int | None) -> np.ndarray:
        out = np.empty(n)
        for tr, te in splits:
            if method == "linear":
                b, c = _ols(X[tr], y[tr])
                out[te] = X[te] @ b + c
            else:
                out[te] = _pls(X[tr], y[tr], k, scale).predict(X[te]).ravel()
        return out

    curve: list[float] = []
    extra: dict[str, Any] = {}
    score_map = score_offset = None
    k: int | None = None
    if method == "svr":
        cv_pred, fitted, low, high, extra = _fit_svr(X, y, splits, C, gamma, epsilon)
        score_map, score_offset = extra.pop("score_map"), extra.pop("score_offset")
        coef, intercept = np.zeros(p), 0.0
    elif method == "linear":
        cv_pred = cv_predict(None)
        coef, intercept = _ols(X, y)
        low, high = X.min(0), X.max(0)
    elif method == "pls":
        k, cv_pred, curve = _choose_pls_components(cv_predict, y, p, smallest_train, n_components,
                                                   max_components, where)
        pls = _pls(X, y, k, scale)
        B, c = _affine_of(lambda A: pls.predict(A).reshape(len(A), -1), p)
        coef, intercept = B[:, 0], float(c[0])
        score_map, score_offset = _affine_of(pls.transform, p)
        scores = X @ score_map + score_offset
        low, high = scores.min(0), scores.max(0)
    else:
        raise CalibrationError(f"{where}: method must be 'linear', 'pls' or 'svr'. Got {method!r}")
    if method != "svr":
        fitted = X @ coef + intercept
    widen = range_margin * (high - low)
    sigma_at, sigma = _uncertainty_bins(cv_pred, cv_pred - y)
    cvm, fitm = regression_metrics(y, cv_pred), regression_metrics(y, fitted)
    model: dict[str, Any] = {
        "method": method, "predictors": list(predictor_names), "n_components": k,
        "cv": {"r2": cvm.r2, "rmse": cvm.rmse, "bias": cvm.bias, "n": cvm.n, "folds": folds,
               "grouped": groups is not None, "seed": seed},
        "fit": {"r2": fitm.r2, "rmse": fitm.rmse, "bias": fitm.bias, "n": fitm.n},
        "cv_rmse_by_components": curve,
        "range_space": {"linear": "predictors", "pls": "pls_scores", "svr": "pca_scores"}[method],
        "coef": np.asarray(coef, dtype=np.float64), "intercept": np.asarray(intercept, dtype=np.float64),
        "range_low": low - widen, "range_high": high + widen,
        "sigma_at": sigma_at, "sigma": sigma,
        "observed": y, "cv_predicted": cv_pred, "fitted": fitted,
    }
    if score_map is not None:
        model["score_map"] = score_map
        model["score_offset"] = score_offset
    model.update(extra)
    return model


def _fit_svr(X: np.ndarray, y: np.ndarray, splits: list, C: Sequence[float], gamma: Sequence[float | str],
             epsilon: Sequence[float] | None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, dict]:
    """SVR: the (C, gamma, epsilon) of the smallest CV RMSE on ``splits``, refitted on every sample.

    Returns the CV predictions of that choice, the refitted model's predictions, the range box of the
    samples' first PCA scores (low, high), and the model entries (the refitted model, the CV-fold models
    of the choice, the choice, the grid's CV RMSE, and the PCA score map of the range box).
    """
    n, p = X.shape
    eps = list(epsilon) if epsilon is not None else [f * float(np.std(y)) for f in (0.0, 0.05, 0.1, 0.2)]
    grid = [(float(c), g if isinstance(g, str) else float(g), float(e)) for c in C for g in gamma for e in eps]
    best_rmse, best, best_pred, best_folds = np.inf, None, None, None
    scores: dict[str, float] = {}
    for c, g, e in grid:
        pred = np.empty(n)
        folds_m = []
        for tr, te in splits:
            fm = _svr_fit(X[tr], y[tr], c, g, e)
            pred[te] = _svr_apply(fm, X[te])
            folds_m.append(fm)
        rmse = float(np.sqrt(np.mean((pred - y) ** 2)))
        scores[f"C={c:g},gamma={g},epsilon={e:g}"] = rmse
        if rmse < best_rmse:
            best_rmse, best, best_pred, best_folds = rmse, (c, g, e), pred, folds_m
    full = _svr_fit(X, y, *best)
    fitted = _svr_apply(full, X)
    nk = int(min(5, p, n - 1))
    score_map, score_offset = _pca_score_map(X, nk)
    scores_x = X @ score_map + score_offset
    extra = {**_svr_pack("svr", full), "score_map": score_map, "score_offset": score_offset,
             "svr_fold_sizes": np.array([f["sv"].shape[0] for f in best_folds], dtype=np.int64),
             "svr_fold_sv": np.concatenate([f["sv"] for f in best_folds], axis=0),
             "svr_fold_dual": np.concatenate([f["dual"] for f in best_folds]),
             **{f"svr_fold_{key}": np.array([f[key] for f in best_folds]) for key in ("mean", "scale", "b", "gamma")},
             "svr_best": {"C": best[0], "gamma": best[1], "epsilon": best[2],
                          "gamma_value": float(full["gamma"])},
             "svr_grid": scores}
    return best_pred, fitted, scores_x.min(0), scores_x.max(0), extra


def _choose_pls_components(cv_predict: Any, y: np.ndarray, p: int, smallest_train: int, n_components: int | None,
                           max_components: int, where: str) -> tuple[int, np.ndarray, list[float]]:
    """PLS components: as given (checked against what the training folds allow), else the count of the
    smallest CV RMSE in 1..max_components. Returns the count, its CV predictions and the RMSE curve."""
    kmax = min(p, smallest_train - 1)
    if n_components is not None:
        if n_components > kmax:
            raise CalibrationError(
                f"{where}: {n_components} PLS components exceed what {p} predictors and training folds "
                f"of {smallest_train} samples allow (at most {kmax})")
        return n_components, cv_predict(n_components), []
    if kmax < 1:
        raise CalibrationError(f"{where}: too few samples per training fold ({smallest_train}) for PLS")
    preds = [cv_predict(j) for j in range(1, min(max_components, kmax) + 1)]
    curve = [float(np.sqrt(np.mean((pr - y) ** 2))) for pr in preds]
    k = int(np.argmin(curve)) + 1
    return k, preds[k - 1], curve


def predict_calibration(model: Mapping[str, Any], X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Apply a fitted calibration to predictor rows.

    Parameters
    ----------
    model
        As returned by :func:`fit_calibration` (or loaded back from JSON + npz).
    X
        (n, n_predictors) predictor values.

    Returns
    -------
    (value, sigma, outside)
        (n,) predicted quantity, its 1-sigma uncertainty, and True where the pixel lies outside the
        calibration range (NaN, NaN and False for rows with a non-finite predictor).
    """
    X = np.asarray(X, dtype=np.float64)
    coef = np.asarray(model["coef"], dtype=np.float64)
    if X.ndim != 2 or X.shape[1] != coef.size:
        raise CalibrationError(f"the calibration needs {coef.size} predictors per pixel. Got shape {X.shape}")
    ok = np.all(np.isfinite(X), axis=1)
    if model["method"] == "svr":
        Xs = np.where(ok[:, None], X, 0.0)
        value = _svr_apply(_svr_unpack(model, "svr"), Xs)
        sigma = _svr_sigma(model, Xs, value)
    else:
        value = X @ coef + float(model["intercept"])
        sigma = np.interp(value, np.asarray(model["sigma_at"]), np.asarray(model["sigma"]))
    space = X if model["range_space"] == "predictors" else X @ np.asarray(model["score_map"]) + np.asarray(model["score_offset"])
    with np.errstate(invalid="ignore"):
        outside = np.any((space < np.asarray(model["range_low"])) | (space > np.asarray(model["range_high"])), axis=1)
    return np.where(ok, value, np.nan), np.where(ok, sigma, np.nan), outside & ok


# ----------------------------------------------------------------------------------------------
# the step
# ----------------------------------------------------------------------------------------------

def calibration_curve(X: np.ndarray, y: np.ndarray, model: Mapping[str, Any], groups: np.ndarray | None, *,
                      folds: int, seed: int, max_count: int = 20) -> dict[str, Any]:
    """Cross-validated R2 against the number of leading predictors (the dimensionality curve).

    Uses :func:`swathmill.workflows.methods.bandselect.feature_count_curve` with the fitted method's
    estimator (OLS; PLS with min(k, chosen components); the SVR of the chosen C, gamma and epsilon) on
    the first k predictors, on GroupKFold folds of the sample groups, or, without groups, of a seeded
    random assignment of the samples to ``folds`` groups.
    """
    from sklearn.cross_decomposition import PLSRegression
    from sklearn.linear_model import LinearRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVR

    from swathmill.workflows.methods.bandselect import feature_count_curve

    n, p = X.shape
    if groups is None:
        groups = np.random.default_rng(seed).permutation(n) % folds
    counts = list(range(1, min(p, max_count) + 1))
    method = model["method"]
    if method == "svr":
        b = model["svr_best"]
        est = lambda: make_pipeline(StandardScaler(), SVR(C=b["C"], gamma=b["gamma"], epsilon=b["epsilon"]))  # noqa: E731
        curve = feature_count_curve(X, y, groups, counts, task="regress", folds=folds, estimator=est)
    elif method == "pls":
        kc = int(model["n_components"])

        class _Pls(PLSRegression):
            def fit(self, A, t):  # type: ignore[override]
                self.n_components = min(kc, A.shape[1])
                return super().fit(A, t)

            def predict(self, A, copy=True):  # type: ignore[override]
                return super().predict(A, copy=copy).ravel()

        curve = feature_count_curve(X, y, groups, counts, task="regress", folds=folds,
                                    estimator=lambda: _Pls(n_components=1, scale=True))
    else:
        curve = feature_count_curve(X, y, groups, counts, task="regress", folds=folds, estimator=LinearRegression)
    return {**curve, "features": "leading predictors in input order"}


def _select_bands(meta: InputMeta, params: CalibrationConfig, where: str) -> tuple[list[int], list[str]]:
    names = list(meta.spec.bands)
    if params.bands:
        missing = [b for b in params.bands if b not in names]
        if missing:
            raise CalibrationError(f"{where}: input {meta.ref!r} has no band(s) {missing}; its bands are {names}")
        idx = [names.index(b) for b in params.bands]
    elif params.wavelength_ranges:
        wl = meta.spec.coords.get("wavelength")
        if wl is None:
            raise CalibrationError(f"{where}: 'wavelength_ranges' needs a wavelength coordinate on input "
                                   f"{meta.ref!r}; it has {sorted(meta.spec.coords)}")
        wl = np.asarray(wl, dtype=float)
        keep = np.zeros(wl.size, bool)
        for lo, hi in params.wavelength_ranges:
            keep |= (wl >= lo) & (wl <= hi)
        idx = np.flatnonzero(keep).tolist()
        if not idx:
            raise CalibrationError(f"{where}: no band of {meta.ref!r} lies in {[list(r) for r in params.wavelength_ranges]} nm")
    else:
        idx = list(range(len(names)))
    return idx, [names[i] for i in idx]


def _accumulate(block: Block) -> tuple[np.ndarray, np.ndarray]:
    idx, rr, cc = in_core(block.tile, np.asarray(block.static["sample_rows"]), np.asarray(block.static["sample_cols"]))
    X = block.data[_ALIAS][:, rr, cc].T.astype(np.float64)
    X[~block.valid[rr, cc]] = np.nan
    return idx.astype(np.int64), X


def _merge(a: tuple[np.ndarray, np.ndarray], b: tuple[np.ndarray, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    return np.concatenate([a[0], b[0]]), np.concatenate([a[1], b[1]], axis=0)


def _finalize(acc: tuple[np.ndarray, np.ndarray], params: CalibrationConfig, meta: dict[str, InputMeta],
              static: Mapping[str, Any]) -> dict:
    where = f"calibration {params.name!r}"
    m = meta[_ALIAS]
    rows, cols = np.asarray(static["sample_rows"]), np.asarray(static["sample_cols"])
    values = np.asarray(static["sample_values"], dtype=np.float64)
    ids = static.get("sample_ids") or [str(i) for i in range(values.size)]
    off = np.flatnonzero(~m.grid.full.contains(rows, cols))
    if off.size:
        i = int(off[0])
        raise CalibrationError(f"{where}: sample {ids[i]} at row {rows[i]}, col {cols[i]} lies outside the "
                               f"{m.grid.rows} x {m.grid.cols} grid ({off.size} samples outside)")
    idx, X = acc
    order = np.argsort(idx, kind="stable")
    idx, X = idx[order], X[order]
    if idx.size != values.size or np.any(idx != np.arange(values.size)):
        raise CalibrationError(f"{where}: gathered {idx.size} sample values for {values.size} samples "
                               "(each sample must lie in exactly one tile)")
    bidx, bnames = _select_bands(m, params, where)
    X = X[:, bidx]
    ok = np.all(np.isfinite(X), axis=1)
    dropped = [ids[i] for i in np.flatnonzero(~ok)]
    groups = static.get("sample_groups") if params.cv.grouped else None
    model = fit_calibration(
        X[ok], values[ok], method=params.method, predictor_names=bnames,
        groups=None if groups is None else np.asarray(groups)[ok], folds=params.cv.folds,
        seed=params.cv.seed, n_components=params.n_components,
        max_components=params.max_components, scale=params.scale,
        range_margin=params.range_margin, where=where,
        C=tuple(params.C), gamma=tuple(params.gamma), epsilon=params.epsilon)
    if params.curve:
        model["feature_curve"] = calibration_curve(
            X[ok], values[ok], model, None if groups is None else np.asarray(groups)[ok],
            folds=params.cv.folds, seed=params.cv.seed, max_count=params.curve_max)
    model.update({"predictor_index": bidx, "dropped_samples": dropped,
                  "sample_ids": [ids[i] for i in np.flatnonzero(ok)],
                  "quantity": params.quantity, "units": params.units})
    return model


def calibration_kernel(block: Block, model: Mapping[str, Any]) -> dict[str, np.ndarray]:
    """Apply the fitted calibration: quantity, uncertainty and the out-of-range classes."""
    data = block.data[_ALIAS]
    _, r, c = data.shape
    X = data[np.asarray(model["predictor_index"], dtype=np.intp)].reshape(-1, r * c).T
    valid = block.valid.ravel() & np.all(np.isfinite(X), axis=1)
    value = np.full(r * c, np.nan, np.float32)
    sigma = np.full(r * c, np.nan, np.float32)
    flag = np.zeros(r * c, np.uint8)
    if valid.any():
        v, s, out = predict_calibration(model, X[valid])
        value[valid], sigma[valid] = v, s
        flag[valid] = np.where(out, OUTSIDE, INSIDE)
    return {"quantity": value.reshape(1, r, c), "uncertainty": sigma.reshape(1, r, c),
            "out_of_range": flag.reshape(1, r, c), "valid": valid.reshape(r, c)}


def _outputs(meta: dict[str, InputMeta], model: Mapping[str, Any] | None,
             params: CalibrationConfig) -> dict[str, OutputSpec]:
    q, units = params.quantity, params.units
    attrs: dict[str, Any] = {"units": units, "method": params.method}
    if model is not None:
        attrs.update({f"cv_{k}": model["cv"][k] for k in ("r2", "rmse", "bias", "n")})
        attrs["predictors"] = list(model["predictors"])
        attrs["n_components"] = model["n_components"]
        if model.get("svr_best"):
            attrs["svr"] = dict(model["svr_best"])
    return {
        "quantity": OutputSpec(bands=(q,), dtype="float32", nodata=float("nan"), attrs=attrs, role=Role.QUANTITY),
        "uncertainty": OutputSpec(bands=(f"{q}_sigma",), dtype="float32", nodata=float("nan"), role=Role.UNCERTAINTY,
                                  attrs={"units": units, "meaning": "1-sigma prediction error from CV residuals"
                                         + (" and the spread of the CV-fold models" if params.method == "svr" else "")}),
        "out_of_range": OutputSpec(bands=(f"{q}_range",), dtype="uint8", nodata=0, kind="categorical", role=Role.MASK,
                                   class_names=("within calibration range", "outside calibration range"),
                                   colors=((200, 200, 200), (215, 48, 39))),
    }


def build_steps(section: CalibrationConfig | Mapping[str, Any], samples: CalibrationSamples) -> list[Step]:
    """The calibration step: fit on the samples (gathered tile by tile), then map tile by tile.

    Outputs ``quantity`` (float32, band named after the quantity), ``uncertainty`` (float32, 1-sigma)
    and ``out_of_range`` (uint8: 1 inside, 2 outside the calibration range, 0 no data).
    """
    cfg = section if isinstance(section, CalibrationConfig) else CalibrationConfig.model_validate(section)
    if cfg.cv.grouped and samples.groups is None:
        raise CalibrationError(f"calibration {cfg.name!r}: cv.grouped is set but the samples carry no groups")
    static = samples.to_static()
    fit = Fit(accumulate=_accumulate, merge=_merge, finalize=partial(_finalize, static=static),
              points=("sample_rows", "sample_cols"))
    return [Step(name=cfg.name, kernel=calibration_kernel, outputs=_outputs, inputs={_ALIAS: cfg.input},
                 params=cfg, fit=fit, static=static)]
