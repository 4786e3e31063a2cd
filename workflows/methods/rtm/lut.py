"""The look-up table and the two inversions: table search and a hybrid regressor trained on the table.

Pure numpy / scikit-learn, no I/O, no engine imports.

Table
    :func:`sample_parameters` draws ``size`` parameter sets by Latin hypercube sampling (scipy.stats.qmc)
    over uniform ranges; the draw depends only on the ranges, the size and the seed, so entry ``j`` is
    the same whoever simulates it. :func:`simulate_entries` runs the forward model for a subset of the
    entries and convolves to the campaign's bands.

Search (:func:`lut_search`)
    The cost of entry ``e`` for pixel ``x`` over ``b`` bands is the RMSE,
    ``sqrt((||x||^2 - 2 x.L_e + ||L_e||^2) / b)``. A chunk of pixels is ranked against the whole table
    by one float32 matrix product (``||x||^2`` left out: it does not change a pixel's ranking) and a
    partial sort; entries the float32 rounding could misplace are settled by their exact float64 cost,
    so the selection is the one exact costs give (see :func:`lut_search`). The estimate is the mean of the parameters of the ``k`` best entries
    (``k = max(1, round(fraction * size))``), their standard deviation the uncertainty, and the RMSE of
    the best entry the fit diagnostic.

Hybrid (:func:`train_hybrid`, :func:`predict_hybrid`)
    A scikit-learn random forest trained on the table's spectra with added noise (multiplicative and
    additive Gaussian, seeded) against the standardised parameters (so no parameter dominates the
    multi-output splits). Its uncertainty is the standard deviation of the individual trees' predictions:
    the spread of trees grown on bootstrap samples of the noisy table, a measure of how well the table
    constrains the pixel, not a calibrated error (documented in the README).
"""
from __future__ import annotations

from typing import Any, Mapping, Sequence

import numpy as np

from .forward import Geometry, RtmError, simulate_canopy, to_bands

__all__ = [
    "TARGETS",
    "UNITS",
    "sample_parameters",
    "simulate_entries",
    "lut_search",
    "add_noise",
    "train_hybrid",
    "predict_hybrid",
    "hybrid_to_bytes",
    "hybrid_from_bytes",
]

TARGETS = ("lai", "cab", "cw", "cm")  # the retrieved parameters, in output band order
UNITS = {"lai": "m2 m-2", "cab": "ug cm-2", "cw": "g cm-2", "cm": "g cm-2"}


def sample_parameters(ranges: Mapping[str, tuple[float, float]], size: int, seed: int) -> tuple[list[str], np.ndarray]:
    """Latin hypercube sample of ``size`` parameter sets over uniform ``ranges`` (name -> (low, high)).

    A range with low == high fixes the parameter. Returns (names in sorted order, array (size, n_names)).
    """
    from scipy.stats import qmc

    if size < 1:
        raise RtmError(f"the table needs at least one entry. Got size={size}")
    names = sorted(ranges)
    lo = np.array([float(ranges[k][0]) for k in names])
    hi = np.array([float(ranges[k][1]) for k in names])
    bad = [k for k, a, b in zip(names, lo, hi) if not (np.isfinite(a) and np.isfinite(b) and a <= b)]
    if bad:
        raise RtmError(f"parameter ranges must be finite (low, high) with low <= high; wrong: {bad}")
    unit = qmc.LatinHypercube(d=len(names), seed=np.random.default_rng(seed)).random(size)
    return names, lo + unit * (hi - lo)


def simulate_entries(names: Sequence[str], table: np.ndarray, rows: np.ndarray, geometry: Geometry,
                     wavelengths: np.ndarray, fwhm: np.ndarray | None) -> np.ndarray:
    """Simulated reflectance (len(rows), m) of table entries ``rows`` at the campaign's bands."""
    rows = np.asarray(rows, dtype=np.int64)
    if rows.size == 0:
        return np.empty((0, np.asarray(wavelengths).size))
    p = {k: table[rows, i] for i, k in enumerate(names)}
    spectra = simulate_canopy(geometry=geometry, **p)
    return to_bands(spectra, wavelengths, fwhm)


def _k_smallest(d: np.ndarray, k: int) -> np.ndarray:
    """Column indices (c, k) of the k smallest values of each row of ``d`` (in no order).

    The same set as ``np.argpartition(d, k - 1, axis=1)[:, :k]`` (up to ties at the k-th value), found
    faster on a large table: a threshold from the first eighth of the columns (the table's order is
    random), at about twice the expected quantile, keeps every entry at or below it, and
    ``argpartition`` runs on those alone; a row keeping fewer than k entries is partitioned whole.
    """
    c, e = d.shape
    ns = e // 8
    if k * 16 > e or ns < 256:
        return np.argpartition(d, k - 1, axis=1)[:, :k]
    ks = min(ns - 1, 2 * (k * ns) // e + 16)
    thr = np.partition(d[:, :ns], ks, axis=1)[:, ks:ks + 1]
    keep = d <= thr
    cnt = np.count_nonzero(keep, axis=1)
    out = np.empty((c, k), np.int64)
    whole = cnt < k
    if whole.any():
        out[whole] = np.argpartition(d[whole], k - 1, axis=1)[:, :k]
        rows = np.flatnonzero(~whole)
        keep, cnt = keep[rows], cnt[rows]
    else:
        rows = np.arange(c)
    if rows.size:
        pix, col = np.divmod(np.flatnonzero(keep), e)  # row-major: grouped by row
        pos = np.arange(pix.size) - (np.cumsum(cnt) - cnt)[pix]
        pool = np.full((rows.size, int(cnt.max())), np.inf, np.float32)
        cand = np.zeros(pool.shape, np.int64)
        pool[pix, pos] = d[rows[pix], col]
        cand[pix, pos] = col
        out[rows] = np.take_along_axis(cand, np.argpartition(pool, k - 1, axis=1)[:, :k], axis=1)
    return out


def lut_search(x: np.ndarray, spectra: np.ndarray, params: np.ndarray, fraction: float, *,
               chunk: int | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Look-up table search by RMSE over the bands.

    Parameters
    ----------
    x : (p, b) pixel spectra (finite).
    spectra : (e, b) table spectra.
    params : (e, q) table parameters.
    fraction : share of the best entries averaged (at least one entry).
    chunk : pixels per matrix product (default: keeps the (chunk, e) cost matrix near 32 MB).

    Returns
    -------
    estimate (p, q), spread (p, q) (standard deviation over the best entries, ddof=0), best RMSE (p,).

    Notes
    -----
    The same entries as exact float64 costs select, found fast. Pixels and entries are centred on the
    table's mean spectrum ``m`` and ranked in float32 by ``d_e = ||L_e - m||^2 - 2 (x - m).(L_e - m)``
    (the squared distance less ``||x - m||^2``, which does not change a pixel's ranking): one product
    of ``[x - m, 1]`` with ``[-2 (L - m) ; ||L - m||^2]``, then a partial sort (:func:`_k_smallest`).
    A float32 ``d`` is within ``err`` of the exact value, a bound on the rounding of the inputs and of a
    sum of ``b + 1`` products (``|error| <= gamma_n sum |terms|``, ``gamma_n ~ n u``; Higham, Accuracy
    and Stability of Numerical Algorithms, 2002, section 3.1; from memory), doubled for safety. With
    ``v`` the k-th smallest ``d``, an entry with ``d < v - 2 err`` is certainly among the k best and
    one with ``d > v + 2 err`` certainly not; the few entries in between get their exact float64 cost
    (``sum (x - L_e)^2``) and the best of them fill the remaining places. The best RMSE is the exact
    cost's minimum over the entries within ``2 err`` of the smallest ``d``.
    """
    x = np.asarray(x, dtype=np.float64)
    L = np.asarray(spectra)
    P = np.asarray(params, dtype=np.float64)
    if x.ndim != 2 or L.ndim != 2 or x.shape[1] != L.shape[1]:
        raise RtmError(f"pixels (p, b) and table spectra (e, b) must share their band count. "
                       f"Got {x.shape} and {L.shape}")
    if P.shape[0] != L.shape[0]:
        raise RtmError(f"table parameters have {P.shape[0]} rows for {L.shape[0]} spectra")
    if not (0.0 < fraction <= 1.0):
        raise RtmError(f"fraction must lie in (0, 1]. Got {fraction}")
    e, b = L.shape
    k = max(1, int(round(fraction * e)))
    chunk = chunk or max(16, int(8_000_000 // max(e, 1)))
    L64 = np.asarray(L, dtype=np.float64)
    m = L64.mean(axis=0)
    Lc = L64 - m
    l2 = np.einsum("eb,eb->e", Lc, Lc)
    A = np.empty((b + 1, e), np.float32)  # [-2 (L - m).T ; ||L - m||^2]
    A[:b] = (-2.0 * Lc).T
    A[b] = l2
    del Lc
    lmax = float(np.sqrt(l2.max()))
    u = 2.0 ** -24  # unit roundoff of float32
    est = np.empty((x.shape[0], P.shape[1]))
    spread = np.empty_like(est)
    best = np.empty(x.shape[0])
    xa = np.empty((min(chunk, x.shape[0]), b + 1), np.float32)
    for s in range(0, x.shape[0], chunk):
        xs = x[s:s + chunk]
        c = xs.shape[0]
        xc = xs - m
        xa[:c, :b] = xc
        xa[:c, b] = 1.0
        d = xa[:c] @ A  # (c, e) float32
        xn = np.sqrt(np.einsum("pb,pb->p", xc, xc))
        err = 2.0 * (b + 8) * u * (2.0 * xn * lmax + lmax * lmax)  # (c,) bound on |d32 - d|, doubled
        w = (2.0 * err)[:, None]
        if k < e:
            idx = _k_smallest(d, k)  # the k best by float32 d
            dk = np.take_along_axis(d, idx, axis=1)
            v = dk.max(axis=1)[:, None].astype(np.float64)  # the k-th smallest d
        else:
            idx, dk, v = None, d, np.full((c, 1), np.inf)
        # best RMSE: the exact costs of the entries that may be the best (all among the k best
        # unless the window reaches the k-th)
        dmin = dk.min(axis=1)[:, None].astype(np.float64)
        inside = bool((dmin + w < v).all())
        flat = np.flatnonzero(dk <= dmin + w) if inside else np.flatnonzero(d <= dmin + w)
        pix, pos = np.divmod(flat, dk.shape[1] if inside else e)
        ent = idx[pix, pos] if inside and idx is not None else pos
        cost = ((L64[ent] - xs[pix]) ** 2).mean(axis=1)
        best_cost = np.full(c, np.inf)
        np.minimum.at(best_cost, pix, cost)
        best[s:s + c] = np.sqrt(best_cost)
        if idx is None:
            est[s:s + c] = P.mean(axis=0)
            spread[s:s + c] = P.std(axis=0)
            continue
        open_slot = dk >= v - w  # places in the k best not certain by float32
        if open_slot.any():
            # the undecided entries, grouped by pixel (flatnonzero is row-major)
            pix, ent = np.divmod(np.flatnonzero((d >= v - w) & (d <= v + w)), e)
            cost = ((L64[ent] - xs[pix]) ** 2).sum(axis=1)
            order = np.lexsort((ent, cost, pix))  # by pixel, then exact cost (ties: lower entry)
            pix, ent = pix[order], ent[order]
            starts = np.searchsorted(pix, np.arange(c))
            rank = np.arange(pix.size) - starts[pix]
            need = open_slot.sum(axis=1)
            take = rank < need[pix]
            rows, cols = np.nonzero(open_slot)  # row-major: grouped by pixel like ``pix``
            idx[rows, cols] = ent[take]
        sel = P[idx]  # (c, k, q)
        est[s:s + c] = sel.mean(axis=1)
        spread[s:s + c] = sel.std(axis=1)
    return est, spread, best


def add_noise(spectra: np.ndarray, relative: float, absolute: float, seed: int) -> np.ndarray:
    """``spectra * (1 + relative * N1) + absolute * N2`` with independent standard normal N1, N2 (seeded)."""
    rng = np.random.default_rng(seed)
    s = np.asarray(spectra, dtype=np.float64)
    return s * (1.0 + relative * rng.standard_normal(s.shape)) + absolute * rng.standard_normal(s.shape)


def _scaler(params: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    mu = params.mean(axis=0)
    sd = params.std(axis=0)
    return mu, np.where(sd > 0, sd, 1.0)


def train_hybrid(spectra: np.ndarray, params: np.ndarray, *, trees: int, min_leaf: int, training_size: int,
                 noise_relative: float, noise_absolute: float, seed: int) -> dict[str, Any]:
    """Train the hybrid regressor on (up to ``training_size`` entries of) the noisy table.

    Returns {"forest": RandomForestRegressor, "mean": (q,), "scale": (q,)}: the forest predicts the
    standardised parameters ``(params - mean) / scale``.
    """
    from sklearn.ensemble import RandomForestRegressor

    L = np.asarray(spectra, dtype=np.float64)
    P = np.asarray(params, dtype=np.float64)
    rng = np.random.default_rng(seed)
    rows = np.sort(rng.choice(L.shape[0], size=min(training_size, L.shape[0]), replace=False))
    X = add_noise(L[rows], noise_relative, noise_absolute, seed + 1)
    mu, sd = _scaler(P[rows])
    forest = RandomForestRegressor(n_estimators=trees, min_samples_leaf=min_leaf, random_state=seed, n_jobs=1)
    forest.fit(X, (P[rows] - mu) / sd)
    return {"forest": forest, "mean": mu, "scale": sd}


def predict_hybrid(model: Mapping[str, Any], x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Estimate (p, q) and uncertainty (p, q): mean and standard deviation of the trees' predictions."""
    x = np.asarray(x, dtype=np.float64)
    forest = model["forest"]
    mu, sd = np.asarray(model["mean"]), np.asarray(model["scale"])
    per_tree = np.stack([t.predict(x).reshape(x.shape[0], -1) for t in forest.estimators_])
    # the forest's prediction is the mean of its trees' (scikit-learn's RandomForestRegressor.predict)
    return per_tree.mean(axis=0) * sd + mu, per_tree.std(axis=0) * sd


def hybrid_to_bytes(model: Mapping[str, Any]) -> np.ndarray:
    """The forest serialised with skops (no pickle), as uint8 for the engine's model file."""
    import skops.io as sio

    from swathmill.workflows.methods.estimators import deterministic_archive

    # deterministic bytes: the same forest gives the same model hash (and step key) in any process
    return np.frombuffer(deterministic_archive(sio.dumps(model["forest"]), "hybrid forest"), dtype=np.uint8).copy()


TRUSTED = ("sklearn.ensemble._forest.RandomForestRegressor", "sklearn.tree._classes.DecisionTreeRegressor",
           "sklearn.tree._tree.Tree")


def hybrid_from_bytes(raw: np.ndarray, mean: np.ndarray, scale: np.ndarray) -> dict[str, Any]:
    """Load a forest saved by :func:`hybrid_to_bytes`, refusing any type outside skops' own trusted set
    and :data:`TRUSTED`."""
    import skops.io as sio

    data = np.asarray(raw, dtype=np.uint8).tobytes()
    untrusted = sio.get_untrusted_types(data=data)
    refused = sorted(set(untrusted) - set(TRUSTED))
    if refused:
        raise RtmError(f"the hybrid model names types that are not trusted: {refused}; refusing to load it")
    forest = sio.loads(data, trusted=list(untrusted))
    return {"forest": forest, "mean": np.asarray(mean, dtype=np.float64), "scale": np.asarray(scale, dtype=np.float64)}
