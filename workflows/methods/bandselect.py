"""Band selection: which few bands of a cube to keep, with or without ground reference.

Pure functions (no I/O, no engine) do the science; :func:`band_selection_step` wires them into a step
with a fit over the whole mosaic, whose model is the selected band list and whose kernel writes a cube
of those bands (role ``reflectance``) that any classifier, calibration or unmixing step can take as
``input: <step>/selected``.

Class separability (Jeffries-Matusita distance between two Gaussian classes)
    Bhattacharyya distance (Bhattacharyya, 1943; in the form of Fukunaga, *Introduction to Statistical
    Pattern Recognition*, 2nd ed., 1990, from memory)::

        B = 1/8 (m1 - m2)^T S^-1 (m1 - m2) + 1/2 ln( det S / sqrt(det S1 det S2) ),  S = (S1 + S2) / 2

    and ``JM = 2 (1 - exp(-B))`` (Richards and Jia, *Remote Sensing Digital Image Analysis*, from
    memory), which lies in [0, 2): 0 for identical classes, near 2 for well separated ones. The
    criterion of a band set is the average JM over all class pairs. Log-determinants come from
    ``numpy.linalg.slogdet``; subsets of equal size are evaluated as one batch.

Covariances when samples are few
    Each class covariance is estimated once over all candidate bands and shrunk towards a scaled
    identity, ``(1 - a) S + a (tr S / p) I``, with ``a`` from the Ledoit-Wolf formula
    (``sklearn.covariance.ledoit_wolf``, computed per class; ``shrinkage: ledoit_wolf``) or a fixed
    ``a`` in [0, 1]. The covariance of a band subset is the sub-matrix of the shrunk matrix, which stays
    positive definite for ``a > 0`` whatever the number of samples.

Sequential forward floating selection (Pudil, Novovicova and Kittler, 1994, Pattern Recognition
Letters 15:1119-1125)
    From the empty set: add the band that maximises the criterion (inclusion); then, while removing one
    band (the one whose removal leaves the highest criterion) gives a set better than the best set of
    that size found so far, remove it (conditional exclusion). The best set and value per size are
    kept; after an inclusion that does not beat the best set of the new size, the search continues from
    that best set. Stops when the set has
    ``n_bands`` + 2 bands (a larger set may yield a better one of the asked size by exclusion) and
    returns the best set of ``n_bands``. The best sets per size start from the plain forward path, so
    the result is never worse than forward selection. Ties go to the lower band index.

Second criterion: blocked cross-validated accuracy
    The mean overall accuracy of a standardised RBF SVM (``C`` and ``gamma`` fixed in the section)
    over ``GroupKFold`` folds on the samples' spatial groups (no polygon on both sides of a split). It
    costs one SVM fit per fold per candidate: keep sample counts small (``max_per_class``).

Unsupervised: linear-prediction band selection (Du and Yang, 2008, IEEE Geoscience and Remote Sensing
Letters 5(4):564-568, "Similarity-based unsupervised band selection for hyperspectral image
analysis"; details from memory)
    A band is redundant when it is well predicted by the bands already kept. On a seeded sample of
    pixels, each band is centred; the first pair is found by starting at the band of largest variance,
    taking the band worst predicted by it (least squares with an intercept), then the band worst
    predicted by that one, until the pair repeats (at most 10 rounds). Then, repeatedly, the band with
    the largest root-mean-square linear-prediction residual from all kept bands is added. The value
    recorded for a band is that residual (in the cube's units): large means new information.

Bands offered to a selection
    Every band of the input that has a wavelength outside the ``exclude`` windows (the usual water
    vapour windows by default, the same windows the mosaic's ``bad_bands`` takes), inside one of the
    ``wavelength_ranges`` if given, and finite at every sample used.

The dimensionality curve
    :func:`feature_count_curve` gives, for counts 1..n, the accuracy of a classifier (or R2 of a
    regression) with spatially blocked cross-validation on the first ``k`` features of a ranked
    feature list (MNF or PCA components in their order, or selected bands in selection order), or on
    ``k`` PCA components fitted inside each training fold. It reports the mean and standard
    deviation over folds per count, the count of the peak and the smallest count whose mean is within
    one standard error (std / sqrt(folds)) of the peak's mean (the "one standard error rule", Breiman
    et al., 1984, from memory). With ``curve: true`` the band-selection step records that curve for its
    selected bands (in selection order) in its model.
"""
from __future__ import annotations

import functools
import itertools
import warnings
from typing import Any, Callable, Literal, Mapping, Sequence

import numpy as np
from pydantic import Field, field_validator, model_validator

from swathmill.errors import SwathmillError
from swathmill.tiles.samples import gather, merge_gathered, select_tiles_holding
from swathmill.tiles.step import Block, Fit, InputMeta, OutputSpec, Step
from swathmill.workflows.inputs.reference import GroundReferenceConfig, SampleTable, load_samples
from swathmill.workflows.params import Section, check_ref, ctx_get
from swathmill.workflows.roles import Role

__all__ = [
    "BandSelectionError",
    "bhattacharyya_distance",
    "jeffries_matusita",
    "shrink_covariance",
    "class_statistics",
    "average_jm",
    "sffs",
    "forward_selection",
    "blocked_accuracy_criterion",
    "linear_prediction_selection",
    "feature_count_curve",
    "candidate_bands",
    "BandSelectionConfig",
    "band_selection_step",
    "build_steps",
    "DEFAULT_EXCLUDE",
]

#: Usual water-vapour windows in nm (common practice; the same as the mosaic's suggested bad bands).
DEFAULT_EXCLUDE: tuple[tuple[float, float], ...] = ((1340.0, 1460.0), (1790.0, 1960.0))
_ALIAS = "x"


class BandSelectionError(SwathmillError, ValueError):
    """Band selection cannot run; the message names the step, band, class or key at fault."""


# ----------------------------------------------------------------------------------------------
# separability
# ----------------------------------------------------------------------------------------------

def bhattacharyya_distance(m1: np.ndarray, S1: np.ndarray, m2: np.ndarray, S2: np.ndarray) -> np.ndarray:
    """Bhattacharyya distance between Gaussian classes (batched over leading axes).

    Parameters
    ----------
    m1, m2
        (..., d) class means.
    S1, S2
        (..., d, d) class covariances (positive definite).

    Returns
    -------
    numpy.ndarray
        (...) distances, ``1/8 dm^T S^-1 dm + 1/2 ln(det S / sqrt(det S1 det S2))`` with
        ``S = (S1 + S2) / 2``.
    """
    m1, m2 = np.asarray(m1, dtype=np.float64), np.asarray(m2, dtype=np.float64)
    S1, S2 = np.asarray(S1, dtype=np.float64), np.asarray(S2, dtype=np.float64)
    if m1.ndim == 0:
        m1, m2 = m1[None], m2[None]
    if S1.ndim == m1.ndim:  # scalar variances in 1-D
        S1, S2 = S1[..., None, None], S2[..., None, None]
    S = 0.5 * (S1 + S2)
    dm = m1 - m2
    sol = np.linalg.solve(S, dm[..., None])[..., 0]
    maha = np.einsum("...i,...i->...", dm, sol)
    _, ld = np.linalg.slogdet(S)
    _, ld1 = np.linalg.slogdet(S1)
    _, ld2 = np.linalg.slogdet(S2)
    return maha / 8.0 + 0.5 * (ld - 0.5 * (ld1 + ld2))


def jeffries_matusita(m1: np.ndarray, S1: np.ndarray, m2: np.ndarray, S2: np.ndarray) -> np.ndarray:
    """Jeffries-Matusita distance ``2 (1 - exp(-B))`` between Gaussian classes, in [0, 2)."""
    return 2.0 * (1.0 - np.exp(-bhattacharyya_distance(m1, S1, m2, S2)))


def shrink_covariance(S: np.ndarray, a: float) -> np.ndarray:
    """``(1 - a) S + a (tr S / p) I``: shrinkage towards a scaled identity."""
    S = np.asarray(S, dtype=np.float64)
    p = S.shape[0]
    return (1.0 - a) * S + a * (np.trace(S) / p) * np.eye(p)


def class_statistics(X: np.ndarray, labels: np.ndarray, *, shrinkage: float | Literal["ledoit_wolf"] = "ledoit_wolf",
                     class_names: Sequence[str] | None = None) -> dict[str, np.ndarray]:
    """Means, shrunk covariances and shrinkage of each class present in ``labels``.

    Returns
    -------
    dict
        ``classes`` (k,), ``means`` (k, p), ``covs`` (k, p, p), ``shrinkage`` (k,), ``counts`` (k,).
    """
    from sklearn.covariance import ledoit_wolf

    X = np.asarray(X, dtype=np.float64)
    labels = np.asarray(labels)
    classes = np.unique(labels)
    means, covs, alphas, counts = [], [], [], []
    for c in classes:
        Xc = X[labels == c]
        name = class_names[int(c) - 1] if class_names is not None else str(c)
        if Xc.shape[0] < 2:
            raise BandSelectionError(f"class {name!r} has {Xc.shape[0]} sample(s); a covariance needs at least 2")
        mu = Xc.mean(axis=0)
        if shrinkage == "ledoit_wolf":
            _, a = ledoit_wolf(Xc)
            a = float(a)
        else:
            a = float(shrinkage)
        S = np.cov(Xc, rowvar=False, bias=True).reshape(X.shape[1], X.shape[1])
        S = shrink_covariance(S, a)
        if np.linalg.eigvalsh(S).min() <= 0:
            raise BandSelectionError(
                f"class {name!r}: the covariance of its {Xc.shape[0]} samples is singular after shrinkage "
                f"{a:g}; use shrinkage 'ledoit_wolf' or a larger value, or drop constant bands")
        means.append(mu)
        covs.append(S)
        alphas.append(a)
        counts.append(Xc.shape[0])
    if classes.size < 2:
        raise BandSelectionError(f"class separability needs at least 2 classes with samples. Got {classes.size}")
    return {"classes": classes, "means": np.array(means), "covs": np.array(covs), "shrinkage": np.array(alphas),
            "counts": np.array(counts)}


def average_jm(stats: Mapping[str, np.ndarray], subsets: np.ndarray) -> np.ndarray:
    """Average JM distance over class pairs for each band subset.

    Parameters
    ----------
    stats
        From :func:`class_statistics`.
    subsets
        (m, d) band indices (m subsets of d bands each), or (d,) for one subset.

    Returns
    -------
    numpy.ndarray
        (m,) averages (a scalar array for a single subset).
    """
    sub = np.asarray(subsets, dtype=np.intp)
    single = sub.ndim == 1
    sub = np.atleast_2d(sub)
    mu = stats["means"][:, sub]  # (k, m, d)
    cov = stats["covs"][:, sub[:, :, None], sub[:, None, :]]  # (k, m, d, d)
    k = mu.shape[0]
    total = np.zeros(sub.shape[0])
    pairs = list(itertools.combinations(range(k), 2))
    for i, j in pairs:
        total += jeffries_matusita(mu[i], cov[i], mu[j], cov[j])
    out = total / len(pairs)
    return out[0] if single else out


# ----------------------------------------------------------------------------------------------
# search
# ----------------------------------------------------------------------------------------------

Criterion = Callable[[np.ndarray], np.ndarray]  # (m, d) subsets -> (m,) values


def _best_addition(criterion: Criterion, current: list[int], candidates: Sequence[int]) -> tuple[int, float]:
    rest = [c for c in candidates if c not in current]
    subsets = np.array([sorted(current + [c]) for c in rest], dtype=np.intp)
    vals = np.asarray(criterion(subsets), dtype=np.float64)
    i = int(np.argmax(vals))
    return rest[i], float(vals[i])


def forward_selection(criterion: Criterion, candidates: Sequence[int], n: int) -> dict[str, Any]:
    """Plain sequential forward selection: add the best band ``n`` times.

    Returns ``order`` (bands in the order added) and ``values`` (criterion after each addition).
    """
    cand = [int(c) for c in candidates]
    if n > len(cand):
        raise BandSelectionError(f"{n} bands asked from {len(cand)} candidate band(s)")
    S: list[int] = []
    values: list[float] = []
    for _ in range(n):
        b, v = _best_addition(criterion, S, cand)
        S.append(b)
        values.append(v)
    return {"order": S, "values": values}


def sffs(criterion: Criterion, candidates: Sequence[int], n: int, *, extra: int = 2,
         max_steps: int | None = None) -> dict[str, Any]:
    """Sequential forward floating selection (Pudil et al., 1994) for a set of ``n`` bands.

    Parameters
    ----------
    criterion
        Maps (m, d) band subsets (sorted index rows) to (m,) values to maximise.
    candidates
        Band indices allowed.
    n
        Size of the set returned.
    extra
        The search runs up to ``n + extra`` bands (bounded by the candidates), as the floating search
        may find a better set of size ``n`` by removing a band from a larger set (Pudil et al. let the
        search run past the target size for this reason).
    max_steps
        Guard on inclusions plus exclusions (default ``20 (n + extra) + 20``).

    Returns
    -------
    dict
        ``order`` (the best set of size ``n``, its bands in the order they were added), ``values``
        (the best criterion value per size 1..n), ``best_sets`` (the best set per size, sorted),
        ``history`` (list of ``[action, band, size, value]``), ``forward_values`` (plain forward
        selection's value per size, which the floating result never falls below: the best sets per
        size start from the forward path).
    """
    cand = [int(c) for c in candidates]
    if n < 1:
        raise BandSelectionError(f"the number of bands must be at least 1. Got {n}")
    if n > len(cand):
        raise BandSelectionError(f"{n} bands asked from {len(cand)} candidate band(s)")
    top = min(n + max(0, extra), len(cand))
    limit = max_steps if max_steps is not None else 20 * top + 20
    fwd = forward_selection(criterion, cand, top)
    best_val = {k: fwd["values"][k - 1] for k in range(1, top + 1)}
    best_set = {k: fwd["order"][:k] for k in range(1, top + 1)}  # bands in order of addition
    S: list[int] = []
    history: list[list[Any]] = []
    steps = 0
    while len(S) < top and steps < limit:
        b, v = _best_addition(criterion, S, cand)
        S = S + [b]
        k = len(S)
        history.append(["add", b, k, v])
        steps += 1
        if v > best_val[k]:
            best_val[k], best_set[k] = v, list(S)
        else:
            S = list(best_set[k])  # continue from the best set of this size
        while len(S) > 2 and steps < limit:
            subsets = np.array([sorted(x for x in S if x != r) for r in S], dtype=np.intp)
            vals = np.asarray(criterion(subsets), dtype=np.float64)
            i = int(np.argmax(vals))
            k1 = len(S) - 1
            if vals[i] > best_val[k1]:
                removed = S[i]
                S = [x for x in S if x != removed]
                best_val[k1], best_set[k1] = float(vals[i]), list(S)
                history.append(["remove", removed, k1, float(vals[i])])
                steps += 1
            else:
                break
    if len(S) < top:
        warnings.warn(f"floating selection stopped after {steps} steps (limit {limit}); the best sets found so far "
                      "are kept", UserWarning, stacklevel=2)
    return {"order": list(best_set[n]), "values": [best_val[k] for k in range(1, n + 1)],
            "best_sets": [sorted(best_set[k]) for k in range(1, n + 1)], "history": history,
            "forward_values": fwd["values"][:n]}


def blocked_accuracy_criterion(X: np.ndarray, y: np.ndarray, groups: np.ndarray, *, folds: int = 5,
                               C: float = 100.0, gamma: float | str = "scale", seed: int = 0) -> Criterion:
    """A criterion: mean overall accuracy of a standardised RBF SVM over blocked (GroupKFold) folds."""
    from sklearn.model_selection import GroupKFold
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y)
    groups = np.asarray(groups)
    ng = np.unique(groups).size
    if ng < folds:
        raise BandSelectionError(f"{folds} blocked folds need at least {folds} spatial groups. Got {ng}")
    splits = list(GroupKFold(n_splits=folds).split(X, y, groups))

    def crit(subsets: np.ndarray) -> np.ndarray:
        out = np.empty(len(subsets))
        for s, sub in enumerate(np.atleast_2d(subsets)):
            acc = []
            for tr, te in splits:
                m = make_pipeline(StandardScaler(), SVC(C=C, gamma=gamma, random_state=seed))
                m.fit(X[tr][:, sub], y[tr])
                acc.append(np.mean(m.predict(X[te][:, sub]) == y[te]))
            out[s] = float(np.mean(acc))
        return out

    return crit


def linear_prediction_selection(X: np.ndarray, n: int, candidates: Sequence[int] | None = None,
                                max_rounds: int = 10) -> dict[str, Any]:
    """Unsupervised linear-prediction band selection (Du and Yang, 2008; details from memory).

    Parameters
    ----------
    X
        (n_pixels, n_bands) sample of pixels.
    n
        Number of bands to select (at least 2).
    candidates
        Band indices allowed (default all).

    Returns
    -------
    dict
        ``order`` (bands in selection order), ``values`` (root-mean-square prediction residual of each
        band from the bands kept before it; the first pair both carry their mutual residual),
        ``initial_rounds``.
    """
    X = np.asarray(X, dtype=np.float64)
    cand = list(range(X.shape[1])) if candidates is None else [int(c) for c in candidates]
    if n < 2:
        raise BandSelectionError(f"linear-prediction selection picks at least 2 bands. Got {n}")
    if n > len(cand):
        raise BandSelectionError(f"{n} bands asked from {len(cand)} candidate band(s)")
    if X.shape[0] < n + 2:
        raise BandSelectionError(f"linear-prediction selection of {n} bands needs at least {n + 2} pixels. "
                                 f"Got {X.shape[0]}")
    Z = X[:, cand] - X[:, cand].mean(axis=0)

    def residuals(kept: list[int]) -> np.ndarray:
        """RMS residual of every candidate predicted from ``kept`` (positions in ``cand``)."""
        A = Z[:, kept]  # centred: the intercept is implicit
        coef, *_ = np.linalg.lstsq(A, Z, rcond=None)
        r = Z - A @ coef
        e = np.sqrt(np.mean(r * r, axis=0))
        e[kept] = -np.inf
        return e

    a = int(np.argmax(Z.var(axis=0)))
    b = int(np.argmax(residuals([a])))
    rounds = 1
    seen = {(a, b)}
    while rounds < max_rounds:
        c = int(np.argmax(residuals([b])))
        rounds += 1
        if c == a:
            break
        a, b = b, c
        if (a, b) in seen:
            break
        seen.add((a, b))
    first = float(residuals([a])[b])
    kept = [a, b]
    values = [first, first]
    while len(kept) < n:
        e = residuals(kept)
        j = int(np.argmax(e))
        kept.append(j)
        values.append(float(e[j]))
    return {"order": [cand[i] for i in kept], "values": values, "initial_rounds": rounds}


# ----------------------------------------------------------------------------------------------
# the dimensionality curve
# ----------------------------------------------------------------------------------------------

def feature_count_curve(X: np.ndarray, y: np.ndarray, groups: np.ndarray, counts: Sequence[int], *,
                        mode: Literal["prefix", "pca"] = "prefix", task: Literal["classify", "regress"] = "classify",
                        folds: int = 5, estimator: Callable[[], Any] | None = None) -> dict[str, Any]:
    """Blocked cross-validated score against the number of features.

    Parameters
    ----------
    X
        (n, p) features, ranked (``mode="prefix"``: the first k columns are used for count k, e.g. MNF
        components or bands in selection order) or raw (``mode="pca"``: k PCA components fitted on each
        training fold).
    y
        (n,) class codes (``task="classify"``, score = overall accuracy) or values (``"regress"``,
        score = R2 of the fold).
    groups
        (n,) spatial group ids (GroupKFold).
    counts
        Feature counts to evaluate (each <= p).
    estimator
        Factory of a fresh scikit-learn estimator (default: standardised RBF SVC with ``gamma="scale"``,
        or standardised SVR for regression).

    Returns
    -------
    dict
        ``counts``, ``mean``, ``std`` (over folds), ``se`` (std / sqrt(folds)), ``peak`` (count of the
        highest mean), ``one_se`` (smallest count with mean >= peak mean - peak se), ``folds``,
        ``score`` ("accuracy" or "r2").
    """
    from sklearn.decomposition import PCA
    from sklearn.metrics import r2_score
    from sklearn.model_selection import GroupKFold
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC, SVR

    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y)
    groups = np.asarray(groups)
    counts = [int(c) for c in counts]
    if not counts or min(counts) < 1 or max(counts) > X.shape[1]:
        raise BandSelectionError(f"feature counts must lie in 1..{X.shape[1]}. Got {counts}")
    ng = np.unique(groups).size
    if ng < folds:
        raise BandSelectionError(f"{folds} blocked folds need at least {folds} spatial groups. Got {ng}")
    if estimator is None:
        def estimator() -> Any:
            return make_pipeline(StandardScaler(), SVC(gamma="scale") if task == "classify" else SVR(gamma="scale"))
    splits = list(GroupKFold(n_splits=folds).split(X, y, groups))
    scores = np.empty((len(counts), len(splits)))
    for f, (tr, te) in enumerate(splits):
        if mode == "pca":
            pca = PCA(n_components=max(counts), svd_solver="full").fit(X[tr])
            Ftr, Fte = pca.transform(X[tr]), pca.transform(X[te])
        else:
            Ftr, Fte = X[tr], X[te]
        for i, k in enumerate(counts):
            m = estimator().fit(Ftr[:, :k], y[tr])
            pred = m.predict(Fte[:, :k])
            scores[i, f] = np.mean(pred == y[te]) if task == "classify" else r2_score(y[te], pred)
    mean, std = scores.mean(axis=1), scores.std(axis=1, ddof=1) if len(splits) > 1 else np.zeros(len(counts))
    se = std / np.sqrt(len(splits))
    p = int(np.argmax(mean))
    ok = np.flatnonzero(mean >= mean[p] - se[p])
    return {"counts": counts, "mean": mean.tolist(), "std": std.tolist(), "se": se.tolist(),
            "peak": counts[p], "one_se": counts[int(ok[np.argmin(np.asarray(counts)[ok])])],
            "folds": len(splits), "score": "accuracy" if task == "classify" else "r2"}


# ----------------------------------------------------------------------------------------------
# configuration
# ----------------------------------------------------------------------------------------------

class BandSelectionConfig(Section):
    """The band-selection step. YAML::

        band_selection:
          name: bands
          input: mosaic/reflectance
          method: sffs                   # sffs (needs reference) | linear_prediction (no labels)
          criterion: jm                  # jm | cv_accuracy (sffs only)
          n_bands: 12
          reference: {path: field/plots.gpkg, label: material}
          exclude: [[1340, 1460], [1790, 1960]]
          wavelength_ranges: [[400, 2450]]
          shrinkage: ledoit_wolf         # or a fixed value in [0, 1]
          curve: true                    # record accuracy against the number of selected bands
    """

    name: str = "bands"
    input: str = "mosaic/reflectance"
    method: Literal["sffs", "linear_prediction"] = "sffs"
    criterion: Literal["jm", "cv_accuracy"] = "jm"
    n_bands: int = Field(10, ge=2, description="number of bands to select")
    reference: GroundReferenceConfig | None = Field(None, description="training samples (sffs)")
    exclude: list[tuple[float, float]] = Field(default_factory=lambda: [tuple(w) for w in DEFAULT_EXCLUDE],
                                               description="wavelength windows (nm) never selected")
    wavelength_ranges: list[tuple[float, float]] | None = Field(
        None, description="select only bands inside one of these [low, high] nm ranges")
    shrinkage: float | Literal["ledoit_wolf"] = Field("ledoit_wolf", description="covariance shrinkage (jm)")
    C: float = Field(100.0, gt=0, description="SVM C of the cv_accuracy criterion and the curve")
    gamma: float | Literal["scale"] = Field("scale", description="SVM gamma of the cv_accuracy criterion and the curve")
    folds: int = Field(5, ge=2, description="blocked cross-validation folds")
    max_per_class: int | None = Field(300, ge=2, description="cap on training samples per class (seeded)")
    sample_pixels: int = Field(20000, ge=10, description="seeded pixel sample of linear_prediction")
    seed: int = Field(0, ge=0, description="seeds the capped training draw and the pixel sample")
    curve: bool = Field(False, description="record blocked-CV accuracy against the number of selected bands")

    @field_validator("input")
    @classmethod
    def _ref(cls, v: str) -> str:
        return check_ref(v)

    @field_validator("exclude", "wavelength_ranges")
    @classmethod
    def _ranges(cls, v: list[tuple[float, float]] | None) -> list[tuple[float, float]] | None:
        for lo, hi in v or []:
            if not lo < hi:
                raise ValueError(f"a wavelength window is [low, high] with low < high. Got {[lo, hi]}")
        return v

    @field_validator("shrinkage")
    @classmethod
    def _shrink(cls, v: float | str) -> float | str:
        if not isinstance(v, str) and not 0.0 <= v <= 1.0:
            raise ValueError(f"shrinkage is 'ledoit_wolf' or a value in [0, 1]. Got {v}")
        return v

    @model_validator(mode="after")
    def _needs(self) -> "BandSelectionConfig":
        if self.method == "sffs" and self.reference is None:
            raise ValueError(f"band selection {self.name!r}: method 'sffs' needs 'reference' (labelled samples); "
                             "use method 'linear_prediction' without ground reference")
        if self.method == "linear_prediction" and self.curve:
            raise ValueError(f"band selection {self.name!r}: 'curve' needs labelled samples (method 'sffs')")
        return self


# ----------------------------------------------------------------------------------------------
# the step
# ----------------------------------------------------------------------------------------------

def candidate_bands(wavelength: np.ndarray | None, n_bands: int, exclude: Sequence[Sequence[float]],
                    ranges: Sequence[Sequence[float]] | None, where: str) -> np.ndarray:
    """Indices of the bands a selection may take (see the module's notes)."""
    if wavelength is None:
        if exclude or ranges:
            raise BandSelectionError(f"{where}: 'exclude' and 'wavelength_ranges' need a 'wavelength' coordinate "
                                     "on the input; set exclude: [] for inputs without wavelengths")
        return np.arange(n_bands)
    wl = np.asarray(wavelength, dtype=np.float64)
    keep = np.isfinite(wl)
    for lo, hi in exclude:
        keep &= ~((wl >= lo) & (wl <= hi))
    if ranges:
        inside = np.zeros(wl.size, bool)
        for lo, hi in ranges:
            inside |= (wl >= lo) & (wl <= hi)
        keep &= inside
    return np.flatnonzero(keep)


def _wavelength(meta: InputMeta) -> np.ndarray | None:
    wl = meta.spec.coords.get("wavelength")
    if wl is None:
        return None
    return np.array([np.nan if v is None else float(v) for v in wl])


_MIX = np.uint64(0x9E3779B97F4A7C15)


def _pixel_hash(index: np.ndarray, seed: int) -> np.ndarray:
    """splitmix64 of the pixel's global index: a uniform in [0, 1) that does not depend on the tiling."""
    with np.errstate(over="ignore"):
        z = index.astype(np.uint64) + np.uint64(seed & 0xFFFFFFFF) * _MIX + _MIX
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        z = z ^ (z >> np.uint64(31))
    return (z >> np.uint64(11)).astype(np.float64) / float(1 << 53)


def _accumulate_labelled(block: Block) -> dict:
    return gather(block, _ALIAS, block.static["samples.row"], block.static["samples.col"], np.float32)


def _accumulate_pixels(block: Block) -> dict:
    """The seeded pixel sample inside this tile's core: global index and spectrum of each valid pixel."""
    p = block.params
    g = block.meta[_ALIAS].grid
    rate = min(1.0, p.sample_pixels / float(g.rows * g.cols))
    core, pad = block.tile.core, block.tile.padded
    rr, cc = np.mgrid[core.row:core.row + core.rows, core.col:core.col + core.cols]
    gidx = (rr * g.cols + cc).ravel().astype(np.int64)
    pick = _pixel_hash(gidx, p.seed) < rate
    r0, c0 = rr.ravel()[pick] - pad.row, cc.ravel()[pick] - pad.col
    x = block.data[_ALIAS][:, r0, c0].T
    ok = block.valid[r0, c0] & np.all(np.isfinite(x), axis=1)
    return {"idx": gidx[pick][ok], "X": np.ascontiguousarray(x[ok], dtype=np.float32),
            "bad": gidx[pick][~ok]}


def _usable(X: np.ndarray, cand: np.ndarray, where: str) -> np.ndarray:
    finite = np.all(np.isfinite(X[:, cand]), axis=0)
    const = np.ptp(X[:, cand], axis=0) == 0
    keep = cand[finite & ~const]
    return keep


def _finalize(acc: dict | None, params: BandSelectionConfig, meta: dict[str, InputMeta], *,
              table: SampleTable | None) -> dict:
    where = f"band selection {params.name!r}"
    m = meta[_ALIAS]
    names = list(m.spec.bands)
    wl = _wavelength(m)
    cand = candidate_bands(wl, len(names), params.exclude, params.wavelength_ranges, where)
    if acc is None or acc["idx"].size == 0:
        raise BandSelectionError(f"{where}: no valid pixel was gathered from {m.ref!r}")
    order = np.argsort(acc["idx"], kind="stable")
    idx, X = acc["idx"][order], acc["X"][order].astype(np.float64)
    cand = _usable(X, cand, where)
    if cand.size < params.n_bands:
        raise BandSelectionError(
            f"{where}: {params.n_bands} bands asked, but only {cand.size} band(s) of {m.ref!r} lie outside "
            f"{params.exclude} nm{f' and inside {params.wavelength_ranges} nm' if params.wavelength_ranges else ''} "
            "and vary at the samples")
    model: dict[str, Any] = {"method": params.method, "n_samples": int(idx.size), "n_candidates": int(cand.size)}
    if params.method == "linear_prediction":
        res = linear_prediction_selection(X, params.n_bands, cand)
        model.update(criterion="rms_prediction_residual", initial_rounds=res["initial_rounds"])
    else:
        assert table is not None
        y = table.label[idx].astype(np.int64)
        groups = table.group[idx]
        if params.criterion == "jm":
            stats = class_statistics(X, y, shrinkage=params.shrinkage, class_names=table.class_names)
            crit = functools.partial(average_jm, stats)
            model.update(shrinkage={table.class_names[int(c) - 1]: float(a)
                                    for c, a in zip(stats["classes"], stats["shrinkage"])})
        else:
            crit = blocked_accuracy_criterion(X, y, groups, folds=params.folds, C=params.C, gamma=params.gamma,
                                              seed=params.seed)
        res = sffs(crit, cand, params.n_bands)
        model.update(criterion="average_jm" if params.criterion == "jm" else "blocked_cv_accuracy",
                     history=res["history"], best_sets=[[names[i] for i in s] for s in res["best_sets"]],
                     class_counts={n: int(np.sum(y == k + 1)) for k, n in enumerate(table.class_names)})
        if params.curve:
            curve = feature_count_curve(X[:, res["order"]], y, groups, list(range(1, params.n_bands + 1)),
                                        folds=params.folds)
            model["curve"] = {**curve, "features": "selected bands in selection order"}
    sel = [int(i) for i in res["order"]]
    model.update({
        "bands": [names[i] for i in sel],
        "wavelengths": [None if wl is None else float(wl[i]) for i in sel],
        "values": [float(v) for v in res["values"]],
        "index": sorted(sel),  # the output cube keeps the input's band order
    })
    return model


def _kernel(block: Block, model: Mapping[str, Any]) -> dict[str, np.ndarray]:
    x = block.data[_ALIAS]
    out = x[np.asarray(model["index"], dtype=np.intp)].astype(np.float32)
    return {"selected": out}


def _outputs(meta: dict[str, InputMeta], model: Mapping[str, Any] | None, params: BandSelectionConfig
             ) -> dict[str, OutputSpec]:
    spec = meta[_ALIAS].spec
    if model is None:
        return {"selected": OutputSpec(bands=tuple(f"selected_{i + 1}" for i in range(params.n_bands)),
                                    dtype="float32", nodata=float("nan"), role=Role.REFLECTANCE)}
    idx = list(model["index"])
    coords = {k: tuple(v[i] for i in idx) for k, v in spec.coords.items()}
    attrs = {k: v for k, v in spec.attrs.items() if k not in ("scale_factor", "add_offset")}
    attrs.update({"selection_method": model["method"], "selection_order": list(model["bands"])})
    return {"selected": OutputSpec(bands=tuple(spec.bands[i] for i in idx), dtype="float32", nodata=float("nan"),
                                role=Role.REFLECTANCE, coords=coords, attrs=attrs)}


def _cap(table: SampleTable, max_per_class: int | None, seed: int) -> SampleTable:
    if max_per_class is None:
        return table
    keep = np.zeros(len(table), bool)
    rng = np.random.default_rng(seed)
    for c in np.unique(table.label):
        where = np.flatnonzero(table.label == c)
        keep[where if where.size <= max_per_class else rng.choice(where, max_per_class, replace=False)] = True
    return table.subset(keep)


def band_selection_step(cfg: BandSelectionConfig, samples: SampleTable | None = None) -> Step:
    """The band-selection step: fit (the selection) over the mosaic, then the cube of selected bands.

    ``samples``: the ground reference on the grid (method ``sffs``); only training (and unassigned)
    samples are used, at most ``max_per_class`` per class (seeded draw).
    """
    where = f"band selection {cfg.name!r}"
    if cfg.method == "sffs":
        if samples is None or len(samples) == 0:
            raise BandSelectionError(f"{where}: method 'sffs' needs labelled samples on the grid; got none")
        table = _cap(samples.subset(~samples.is_validation), cfg.max_per_class, cfg.seed)
        present = np.unique(table.label)
        if present.size < 2:
            raise BandSelectionError(f"{where}: the training samples hold {present.size} class(es); "
                                     "separability needs at least 2")
        fit = Fit(accumulate=_accumulate_labelled, merge=merge_gathered,
                  select=functools.partial(select_tiles_holding, rows=table.row, cols=table.col),
                  points=("samples.row", "samples.col"),
                  finalize=functools.partial(_finalize, table=table))
        static = table.to_static()
    else:
        fit = Fit(accumulate=_accumulate_pixels, merge=merge_gathered,
                  finalize=functools.partial(_finalize, table=None))
        static = {}
    return Step(name=cfg.name, kernel=_kernel, outputs=_outputs, inputs={_ALIAS: cfg.input}, params=cfg,
                fit=fit, static=static)


def build_steps(section: BandSelectionConfig, ctx: Any = None) -> list[Step]:
    """Steps of a ``band_selection`` section; ``ctx`` gives ``grid``, ``base_dir``, ``valid`` (sffs)."""
    samples = None
    if section.reference is not None and section.method == "sffs":
        grid = ctx_get(ctx, "grid")
        if grid is None:
            raise BandSelectionError("ground reference needs the mosaic grid: build_steps was called without ctx.grid")
        samples, _ = load_samples(section.reference, grid, base_dir=ctx_get(ctx, "base_dir"),
                                  valid=ctx_get(ctx, "valid"))
    return [band_selection_step(section, samples)]
