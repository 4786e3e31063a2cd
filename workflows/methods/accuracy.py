"""Accuracy assessment of class maps and quantitative maps.

Class maps
    A confusion matrix is laid out with **map classes as rows and reference classes as columns**
    (the layout of Olofsson et al. 2014; ``sklearn.metrics.confusion_matrix`` uses the transpose).
    From it: overall accuracy, user's accuracy (per map row), producer's accuracy (per reference
    column), F1 and Cohen's kappa with its delta-method standard error (Bishop, Fienberg and Holland
    1975, as used by Congalton and Green).

Area estimates
    The stratified estimators of Olofsson et al. (2014, Remote Sens. Environ. 148:42-57), treating
    map classes as strata: the estimated area of each reference class with its 95% confidence
    interval, and user's, producer's and overall accuracy with their confidence intervals, all
    weighted by the mapped area of each class. Mapped areas are pixel counts of the class map,
    counted tile by tile (:func:`count_classes`, :func:`count_classes_in_raster` or the
    accumulator of :func:`class_counts_fit`), so no map is ever held in memory whole.

Quantitative maps
    RMSE, bias (mean of predicted minus observed) and R2 (the coefficient of determination,
    ``1 - SS_res / SS_tot``, as ``sklearn.metrics.r2_score``, not the squared correlation).

Everything here is plain numpy on small arrays, except the window-by-window counting functions.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
from swathmill.errors import SwathmillError
from swathmill.tiles.grid import Window

__all__ = [
    "AccuracyError",
    "ClassAccuracy",
    "AreaEstimate",
    "RegressionMetrics",
    "confusion_matrix",
    "class_accuracy",
    "kappa",
    "area_estimate",
    "regression_metrics",
    "abundance_metrics",
    "count_classes",
    "count_classes_in_raster",
    "class_counts_fit",
    "values_at",
    "Z95",
]

Z95 = 1.96
"""The normal quantile used for 95% confidence intervals (Olofsson et al. 2014 use 1.96)."""


class AccuracyError(SwathmillError, ValueError):
    """Bad input to an accuracy computation; the message names the class, sample or window at fault."""


# ----------------------------------------------------------------------------------------------
# confusion matrix and per-class accuracy
# ----------------------------------------------------------------------------------------------

def confusion_matrix(mapped: Sequence[int] | np.ndarray, reference: Sequence[int] | np.ndarray,
                     labels: Sequence[int]) -> np.ndarray:
    """Count samples by map class (rows) and reference class (columns).

    Parameters
    ----------
    mapped, reference
        Class values of the same samples, in the map and in the reference data.
    labels
        Class values in the order of the matrix's rows and columns. Samples whose map or reference
        value is not among them (e.g. 0, unclassified, when it is not listed) are left out; every
        listed class keeps its row and column even when empty.

    Returns
    -------
    numpy.ndarray
        (k, k) int64 counts, ``m[i, j]`` = samples mapped as ``labels[i]`` and labelled
        ``labels[j]`` in the reference.
    """
    mapped = np.asarray(mapped).ravel()
    reference = np.asarray(reference).ravel()
    if mapped.shape != reference.shape:
        raise AccuracyError(f"mapped and reference need the same number of samples. "
                            f"Got {mapped.size} and {reference.size}")
    labels = np.asarray(labels)
    if labels.ndim != 1 or labels.size == 0:
        raise AccuracyError(f"labels must be a non-empty list of class values. Got {labels.tolist()}")
    if np.unique(labels).size != labels.size:
        raise AccuracyError(f"labels must be unique. Got {labels.tolist()}")
    k = labels.size
    order = np.argsort(labels)
    sorted_labels = labels[order]

    def index(v: np.ndarray) -> np.ndarray:
        pos = np.searchsorted(sorted_labels, v)
        pos = np.clip(pos, 0, k - 1)
        found = sorted_labels[pos] == v
        return np.where(found, order[pos], -1)

    i, j = index(mapped), index(reference)
    keep = (i >= 0) & (j >= 0)
    return np.bincount(i[keep] * k + j[keep], minlength=k * k).reshape(k, k).astype(np.int64)


def kappa(matrix: np.ndarray) -> tuple[float, float]:
    """Cohen's kappa and its standard error by the delta method.

    kappa = (theta1 - theta2) / (1 - theta2), theta1 the observed agreement, theta2 the chance
    agreement from the margins (Cohen 1960). The large-sample variance is that of Bishop, Fienberg
    and Holland (1975), as given by Congalton and Green:

    var = 1/n [ t1(1-t1)/(1-t2)^2 + 2(1-t1)(2 t1 t2 - t3)/(1-t2)^3 + (1-t1)^2 (t4 - 4 t2^2)/(1-t2)^4 ]

    with t3 = sum_i p_ii (p_i+ + p_+i) and t4 = sum_ij p_ij (p_j+ + p_+i)^2.

    Returns
    -------
    (kappa, standard error); NaN when the chance agreement is 1 (a single class).
    """
    m = _check_matrix(matrix)
    n = m.sum()
    if n == 0:
        raise AccuracyError("the confusion matrix holds no samples")
    p = m / n
    rows, cols = p.sum(1), p.sum(0)
    t1 = np.trace(p)
    t2 = float(np.sum(rows * cols))
    if np.isclose(t2, 1.0):
        return float("nan"), float("nan")
    t3 = float(np.sum(np.diag(p) * (rows + cols)))
    t4 = float(np.sum(p * (cols[:, None] + rows[None, :]) ** 2))
    k = (t1 - t2) / (1 - t2)
    var = (t1 * (1 - t1) / (1 - t2) ** 2
           + 2 * (1 - t1) * (2 * t1 * t2 - t3) / (1 - t2) ** 3
           + (1 - t1) ** 2 * (t4 - 4 * t2 ** 2) / (1 - t2) ** 4) / n
    return float(k), float(np.sqrt(max(var, 0.0)))


@dataclass(frozen=True)
class ClassAccuracy:
    """Sample-based accuracy of one class map (no area weighting).

    ``users[i]`` is the share of samples mapped as class i that are class i in the reference,
    ``producers[j]`` the share of reference samples of class j that the map gets right; NaN where
    the row or column is empty. ``f1`` is their harmonic mean (0 where both are 0).
    """

    matrix: np.ndarray
    labels: tuple[int, ...]
    names: tuple[str, ...]
    n: int
    overall: float
    users: np.ndarray
    producers: np.ndarray
    f1: np.ndarray
    kappa: float
    kappa_se: float

    def to_dict(self) -> dict[str, Any]:
        return {
            "labels": list(self.labels), "names": list(self.names), "n": self.n,
            "matrix": self.matrix.tolist(), "overall": self.overall,
            "users": _nan_list(self.users), "producers": _nan_list(self.producers),
            "f1": _nan_list(self.f1), "kappa": _nan_float(self.kappa), "kappa_se": _nan_float(self.kappa_se),
        }


def class_accuracy(matrix: np.ndarray, labels: Sequence[int] | None = None,
                   names: Sequence[str] | None = None) -> ClassAccuracy:
    """Overall, user's and producer's accuracy, F1 and kappa from a map-by-reference matrix."""
    m = _check_matrix(matrix)
    k = m.shape[0]
    labels = tuple(int(x) for x in (labels if labels is not None else range(1, k + 1)))
    names = tuple(str(x) for x in (names if names is not None else [f"class {v}" for v in labels]))
    if len(labels) != k or len(names) != k:
        raise AccuracyError(f"a {k} x {k} matrix needs {k} labels and names. "
                            f"Got {len(labels)} labels and {len(names)} names")
    n = int(m.sum())
    if n == 0:
        raise AccuracyError("the confusion matrix holds no samples")
    diag = np.diag(m).astype(float)
    rows, cols = m.sum(1).astype(float), m.sum(0).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        users = np.where(rows > 0, diag / rows, np.nan)
        producers = np.where(cols > 0, diag / cols, np.nan)
        denom = users + producers
        f1 = np.where(denom > 0, 2 * users * producers / denom, np.where(np.isnan(denom), np.nan, 0.0))
    kap, kse = kappa(m)
    return ClassAccuracy(matrix=m.astype(np.int64), labels=labels, names=names, n=n,
                         overall=float(diag.sum() / n), users=users, producers=producers, f1=f1,
                         kappa=kap, kappa_se=kse)


# ----------------------------------------------------------------------------------------------
# Olofsson et al. (2014) stratified estimators
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class AreaEstimate:
    """Area-weighted accuracy and area estimates of Olofsson et al. (2014).

    All ``*_ci`` are half-widths of 95% confidence intervals (``Z95`` x standard error).
    ``area`` and ``area_ci`` are in the unit of ``pixel_area`` (e.g. hectares); ``mapped_area`` is
    the mapped (pixel-counted) area of each class, for comparison.
    """

    labels: tuple[int, ...]
    names: tuple[str, ...]
    mapped_pixels: np.ndarray
    pixel_area: float
    area_unit: str
    proportion: np.ndarray
    proportion_se: np.ndarray
    area: np.ndarray
    area_ci: np.ndarray
    mapped_area: np.ndarray
    overall: float
    overall_ci: float
    users: np.ndarray
    users_ci: np.ndarray
    producers: np.ndarray
    producers_ci: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        return {
            "labels": list(self.labels), "names": list(self.names),
            "mapped_pixels": self.mapped_pixels.tolist(), "pixel_area": self.pixel_area,
            "area_unit": self.area_unit,
            "proportion": _nan_list(self.proportion), "proportion_se": _nan_list(self.proportion_se),
            "area": _nan_list(self.area), "area_ci": _nan_list(self.area_ci),
            "mapped_area": _nan_list(self.mapped_area),
            "overall": _nan_float(self.overall), "overall_ci": _nan_float(self.overall_ci),
            "users": _nan_list(self.users), "users_ci": _nan_list(self.users_ci),
            "producers": _nan_list(self.producers), "producers_ci": _nan_list(self.producers_ci),
        }


def area_estimate(matrix: np.ndarray, mapped_pixels: Sequence[float] | np.ndarray, *,
                  pixel_area: float = 1.0, area_unit: str = "pixels",
                  labels: Sequence[int] | None = None, names: Sequence[str] | None = None,
                  z: float = Z95) -> AreaEstimate:
    """Stratified area and accuracy estimates with confidence intervals (Olofsson et al. 2014).

    Map classes are the strata; the sample is assumed stratified random (or simple random, which
    is a special case). With ``W_i`` the mapped share of class i, ``n_ij`` the sample counts and
    ``n_i.`` the row totals:

    - ``p_ij = W_i n_ij / n_i.`` (eq. 4); reference-class area share ``p_.k = sum_i p_ik`` with
      ``SE(p_.k) = sqrt(sum_i W_i^2 (n_ik/n_i.)(1 - n_ik/n_i.) / (n_i. - 1))`` (eq. 10), area
      ``A p_.k``.
    - overall ``O = sum_j p_jj``, ``V(O) = sum_i W_i^2 U_i (1 - U_i) / (n_i. - 1)`` (eq. 5);
      user's ``U_i = n_ii / n_i.``, ``V(U_i) = U_i (1 - U_i) / (n_i. - 1)`` (eq. 6).
    - producer's ``P_j = p_jj / p_.j`` with the variance of eq. 7, which uses the mapped pixel
      counts ``N_i.`` and the estimated reference-class totals ``N_.j = sum_i N_i. n_ij / n_i.``.

    Parameters
    ----------
    matrix
        (k, k) sample counts, map classes as rows, reference classes as columns.
    mapped_pixels
        (k,) mapped pixel count (or area) of each map class, in the order of the rows.
    pixel_area
        Area of one pixel in ``area_unit`` (e.g. 0.09 for 30 m pixels in hectares).

    Raises
    ------
    AccuracyError
        When a mapped class has fewer than 2 samples (its variance is undefined), or the sizes
        disagree.
    """
    m = _check_matrix(matrix).astype(float)
    k = m.shape[0]
    counts = np.asarray(mapped_pixels, dtype=float).ravel()
    labels = tuple(int(x) for x in (labels if labels is not None else range(1, k + 1)))
    names = tuple(str(x) for x in (names if names is not None else [f"class {v}" for v in labels]))
    if counts.size != k or len(labels) != k or len(names) != k:
        raise AccuracyError(f"a {k} x {k} matrix needs {k} mapped counts, labels and names. "
                            f"Got {counts.size}, {len(labels)} and {len(names)}")
    if np.any(counts < 0) or not np.all(np.isfinite(counts)):
        raise AccuracyError(f"mapped pixel counts must be finite and >= 0. Got {counts.tolist()}")
    if counts.sum() <= 0:
        raise AccuracyError("the mapped pixel counts sum to zero: nothing was mapped")
    ni = m.sum(1)
    short = [(names[i], int(ni[i])) for i in range(k) if counts[i] > 0 and ni[i] < 2]
    if short:
        raise AccuracyError(
            "every mapped class needs at least 2 validation samples for the stratified variance; "
            f"got {', '.join(f'{nm!r}: {c}' for nm, c in short)}. Add samples or merge the class")
    W = counts / counts.sum()
    with np.errstate(invalid="ignore", divide="ignore"):
        q = np.where(ni[:, None] > 0, m / ni[:, None], 0.0)           # n_ij / n_i.
        denom = np.where(ni > 1, ni - 1, np.inf)[:, None]             # unsampled empty strata add 0
        p = W[:, None] * q                                            # eq. 4
        prop = p.sum(0)
        prop_se = np.sqrt(np.sum(W[:, None] ** 2 * q * (1 - q) / denom, axis=0))
        U = np.where(ni > 0, np.diag(m) / ni, np.nan)
        overall = float(np.trace(p))
        Uz = np.nan_to_num(U)
        v_overall = float(np.sum(W ** 2 * Uz * (1 - Uz) / denom[:, 0]))
        v_users = np.where(ni > 1, U * (1 - U) / (ni - 1), np.nan)
        P = np.where(prop > 0, np.diag(p) / prop, np.nan)
        Nref = (counts[:, None] * q).sum(0)                            # estimated N_.j
        v_prod = np.full(k, np.nan)
        for j in range(k):
            if Nref[j] <= 0 or ni[j] < 2:
                continue
            first = counts[j] ** 2 * (1 - P[j]) ** 2 * U[j] * (1 - U[j]) / (ni[j] - 1)
            others = [counts[i] ** 2 * q[i, j] * (1 - q[i, j]) / (ni[i] - 1)
                      for i in range(k) if i != j and ni[i] > 1]
            v_prod[j] = (first + P[j] ** 2 * float(np.sum(others))) / Nref[j] ** 2   # eq. 7
    total_area = counts.sum() * pixel_area
    return AreaEstimate(
        labels=labels, names=names, mapped_pixels=counts, pixel_area=float(pixel_area), area_unit=area_unit,
        proportion=prop, proportion_se=prop_se, area=prop * total_area, area_ci=z * prop_se * total_area,
        mapped_area=counts * pixel_area, overall=overall, overall_ci=z * float(np.sqrt(v_overall)),
        users=U, users_ci=z * np.sqrt(v_users), producers=P, producers_ci=z * np.sqrt(v_prod),
    )


# ----------------------------------------------------------------------------------------------
# regression metrics
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class RegressionMetrics:
    """Agreement of predicted with observed values.

    rmse = sqrt(mean((pred - obs)^2)); bias = mean(pred - obs) (positive: the map overestimates);
    r2 = 1 - SS_res / SS_tot (coefficient of determination; can be negative); n samples used.
    """

    n: int
    rmse: float
    bias: float
    r2: float
    name: str = ""
    extra: Mapping[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "n": self.n, "rmse": _nan_float(self.rmse), "bias": _nan_float(self.bias),
                "r2": _nan_float(self.r2), **{k: _nan_float(v) for k, v in self.extra.items()}}


def regression_metrics(observed: Sequence[float] | np.ndarray, predicted: Sequence[float] | np.ndarray,
                       name: str = "") -> RegressionMetrics:
    """RMSE, bias and R2 of ``predicted`` against ``observed``; pairs with a NaN are left out.

    Works for a quantity map sampled at reference points and for abundance maps against reference
    fractions (pass one endmember at a time, or all fractions flattened for a pooled figure).
    """
    obs = np.asarray(observed, dtype=float).ravel()
    pred = np.asarray(predicted, dtype=float).ravel()
    if obs.shape != pred.shape:
        raise AccuracyError(f"observed and predicted need the same number of values"
                            f"{f' for {name!r}' if name else ''}. Got {obs.size} and {pred.size}")
    keep = np.isfinite(obs) & np.isfinite(pred)
    obs, pred = obs[keep], pred[keep]
    n = int(obs.size)
    if n == 0:
        return RegressionMetrics(0, float("nan"), float("nan"), float("nan"), name)
    err = pred - obs
    ss_tot = float(np.sum((obs - obs.mean()) ** 2))
    r2 = 1.0 - float(np.sum(err ** 2)) / ss_tot if ss_tot > 0 else float("nan")
    return RegressionMetrics(n=n, rmse=float(np.sqrt(np.mean(err ** 2))), bias=float(err.mean()), r2=r2, name=name)


def abundance_metrics(reference: np.ndarray, estimate: np.ndarray,
                      names: Sequence[str] | None = None) -> list[RegressionMetrics]:
    """RMSE, bias and R2 of estimated against reference fractions, per endmember and pooled.

    Parameters
    ----------
    reference, estimate
        (k, n) fractions of k endmembers at n pixels (or (k, rows, cols)); NaN pairs are left out.
    names
        Endmember names (default "endmember 1" ...).

    Returns
    -------
    list of RegressionMetrics
        One per endmember, then the pooled figure over all fractions (named "all").
    """
    ref = np.asarray(reference, dtype=float)
    est = np.asarray(estimate, dtype=float)
    if ref.shape != est.shape or ref.ndim < 2:
        raise AccuracyError(f"reference and estimated fractions need the same (endmembers, pixels) shape. "
                            f"Got {ref.shape} and {est.shape}")
    k = ref.shape[0]
    names = list(names) if names is not None else [f"endmember {i + 1}" for i in range(k)]
    if len(names) != k:
        raise AccuracyError(f"{k} endmembers need {k} names. Got {len(names)}")
    ref, est = ref.reshape(k, -1), est.reshape(k, -1)
    out = [regression_metrics(ref[i], est[i], name=str(names[i])) for i in range(k)]
    out.append(regression_metrics(ref, est, name="all"))
    return out


# ----------------------------------------------------------------------------------------------
# mapped pixel counts, window by window
# ----------------------------------------------------------------------------------------------

def _bincount_classes(values: np.ndarray, n_classes: int, where: str) -> np.ndarray:
    v = np.asarray(values)
    if v.size and (v.min() < 0 or v.max() > n_classes):
        bad = int(v.min()) if v.min() < 0 else int(v.max())
        raise AccuracyError(f"{where}: class value {bad} is outside 0..{n_classes}")
    return np.bincount(v.ravel().astype(np.int64), minlength=n_classes + 1)


def count_classes(array: Any, n_classes: int, *, band: int | None = 0, window: int = 1024,
                  nodata: int | None = None) -> np.ndarray:
    """Pixel count of each class value 0..n_classes in a class-map array, window by window.

    Parameters
    ----------
    array
        Anything sliced like numpy: a zarr array, a numpy array or memmap, (bands, rows, cols) or
        (rows, cols). Only one window of ``window`` x ``window`` pixels is read at a time.
    n_classes
        Largest class value; classes are 1..n_classes, 0 is unclassified.
    band
        Band index of a 3-d array; ignored for a 2-d one.
    nodata
        A value to leave out of the counts (e.g. 255); 0 is counted, as index 0.

    Returns
    -------
    numpy.ndarray
        (n_classes + 1,) int64 counts; index c is the count of class c, index 0 unclassified.
    """
    shape = tuple(array.shape)
    if len(shape) not in (2, 3):
        raise AccuracyError(f"a class map must be (rows, cols) or (bands, rows, cols). Got shape {shape}")
    rows, cols = shape[-2:]
    total = np.zeros(n_classes + 1, dtype=np.int64)
    for r in range(0, rows, window):
        for c in range(0, cols, window):
            sl = (slice(r, min(r + window, rows)), slice(c, min(c + window, cols)))
            block = np.asarray(array[(band, *sl)] if len(shape) == 3 else array[sl])
            if nodata is not None:
                block = block[block != nodata]
            total += _bincount_classes(block, n_classes, f"window rows {sl[0].start}:{sl[0].stop}, "
                                                          f"cols {sl[1].start}:{sl[1].stop}")
    return total


def count_classes_in_raster(path: str | Path, n_classes: int, *, band: int = 1) -> np.ndarray:
    """Pixel count of each class 0..n_classes in a GeoTIFF/COG band, read block by block.

    Pixels equal to the band's nodata value (if set) are left out; 0 counts as unclassified.
    """
    import rasterio

    path = Path(path)
    with rasterio.open(path) as ds:
        if not 1 <= band <= ds.count:
            raise AccuracyError(f"{path}: band {band} does not exist (the file has {ds.count})")
        nodata = ds.nodatavals[band - 1]
        total = np.zeros(n_classes + 1, dtype=np.int64)
        for _, win in ds.block_windows(band):
            block = ds.read(band, window=win)
            if nodata is not None:
                block = block[block != nodata]
            total += _bincount_classes(block, n_classes, f"{path} window {win}")
    return total


def class_counts_fit(alias: str, n_classes: int) -> "Any":
    """A :class:`swathmill.tiles.step.Fit` counting the classes 0..n_classes of input ``alias`` over all tiles.

    Each pixel is counted once (core of each tile, valid pixels only). ``finalize`` returns
    ``{"counts": int64 array (n_classes + 1,)}``.
    """
    from swathmill.tiles.step import Fit

    def accumulate(block: Any) -> np.ndarray:
        data = block.data[alias]
        core = data[(0, *block.tile.crop)] if data.ndim == 3 else data[block.tile.crop]
        values = core[block.core_valid]
        values = values[np.isfinite(values)] if values.dtype.kind == "f" else values
        return _bincount_classes(values, n_classes, block.tile.name)

    def merge(a: np.ndarray, b: np.ndarray) -> np.ndarray:
        return a + b

    def finalize(acc: np.ndarray, params: Mapping[str, Any], meta: Any) -> dict:
        return {"counts": np.asarray(acc, dtype=np.int64)}

    return Fit(accumulate=accumulate, merge=merge, finalize=finalize)


def values_at(array: Any, rows: Sequence[int] | np.ndarray, cols: Sequence[int] | np.ndarray, *,
              band: int | None = 0, window: int = 1024) -> np.ndarray:
    """Values of a (bands, rows, cols) or (rows, cols) array at sample pixels, one window at a time.

    Samples are grouped by window so each window is read once; a zarr array is never read whole.
    Raises :class:`AccuracyError` naming the first sample outside the array.
    """
    rows = np.asarray(rows, dtype=np.int64).ravel()
    cols = np.asarray(cols, dtype=np.int64).ravel()
    if rows.shape != cols.shape:
        raise AccuracyError(f"rows and cols need the same length. Got {rows.size} and {cols.size}")
    shape = tuple(array.shape)
    nr, nc = shape[-2:]
    outside = np.flatnonzero(~Window(0, 0, nr, nc).contains(rows, cols))
    if outside.size:
        i = int(outside[0])
        raise AccuracyError(f"sample {i} at row {rows[i]}, col {cols[i]} lies outside the "
                            f"{nr} x {nc} map ({outside.size} samples outside)")
    out = None
    key = (rows // window) * ((nc + window - 1) // window) + cols // window
    for k in np.unique(key):
        idx = np.flatnonzero(key == k)
        r0 = int(rows[idx[0]] // window) * window
        c0 = int(cols[idx[0]] // window) * window
        sl = (slice(r0, min(r0 + window, nr)), slice(c0, min(c0 + window, nc)))
        block = np.asarray(array[(band, *sl)] if len(shape) == 3 else array[sl])
        if out is None:
            out = np.empty(rows.size, dtype=block.dtype)
        out[idx] = block[rows[idx] - r0, cols[idx] - c0]
    return out if out is not None else np.empty(0)


# ----------------------------------------------------------------------------------------------

def _check_matrix(matrix: np.ndarray) -> np.ndarray:
    m = np.asarray(matrix)
    if m.ndim != 2 or m.shape[0] != m.shape[1] or m.shape[0] == 0:
        raise AccuracyError(f"a confusion matrix must be square (k x k). Got shape {m.shape}")
    if np.any(m < 0) or not np.all(np.isfinite(m)):
        raise AccuracyError("a confusion matrix holds counts >= 0")
    return m


def _nan_float(v: float) -> float | None:
    return None if v is None or not np.isfinite(v) else float(v)


def _nan_list(a: np.ndarray) -> list[float | None]:
    return [_nan_float(float(x)) for x in np.asarray(a, dtype=float)]
