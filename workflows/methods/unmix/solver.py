"""Linear spectral unmixing solvers: four variants, exact non-negative solutions, whole tiles at once.

Model
-----
A pixel spectrum ``x`` (L bands) is modelled as ``x = M a + e`` with ``M`` the (L, p) endmember matrix
(one column per endmember), ``a`` the p abundances and ``e`` the residual. Four variants:

``unconstrained``      least squares, ``a = G^-1 b`` with ``G = M'M`` and ``b = M'x`` (normal equations).
``sum_to_one``         least squares subject to ``1'a = 1``, in closed form from the bordered system
                       ``[[G, 1], [1', 0]] [a; mu] = [b; 1]`` (equal to ``a_LS + G^-1 1 (1 - 1'a_LS) /
                       (1'G^-1 1)``).
``nonnegative``        least squares subject to ``a >= 0`` (what ``scipy.optimize.nnls`` solves).
``fully_constrained``  both constraints (Heinz and Chang, 2001, IEEE TGRS 39(3):529-545).

How a tile is solved
--------------------
Pixels are columns of a matrix. For a chunk of pixels the only per-pixel quantities the solvers need
are ``b = M'x`` (p values) and ``x'x``; ``G`` and everything derived from it are computed once per
endmember set (:class:`Unmixer`). For every support ``S`` (subset of endmembers allowed to be
non-zero) the constrained or unconstrained least-squares solution on ``S`` is an affine function of
``b``, ``a_S = K_S b + c_S``; the matrices ``K_S, c_S`` are precomputed for all ``2^p - 1`` supports
when ``p <= 12`` and cached on demand otherwise.

The non-negative variants use a primal active-set method (the scheme of Lawson and Hanson's NNLS,
1974, extended with the equality constraint), run on all pixels of a chunk at once: every pixel
carries its own support (a bitmask) and its own feasible point; in each round each unfinished pixel
either moves to the solution on its support (and, when a Lagrange multiplier is negative, frees the
most negative one) or stops at the first bound it meets and drops that endmember. Pixels are advanced
together, with the affine maps gathered by bitmask. It starts from the full-support closed form:
pixels where that is feasible are optimal at once (so all constraints are inactive), the others start
from its positive entries. A handful of rounds settles nearly all pixels.

The same rounds exist as a compiled per-pixel loop (``engine="compiled"``, numba, p <= 12), which
is several times faster; the default ``engine="auto"`` uses it when numba is installed. Both give
the same abundances (to round-off) and go through the same check.

Optimality is then checked on every pixel with the Karush-Kuhn-Tucker conditions in relative form
(:func:`kkt_violation`): ``a >= 0``; ``g = G a - b`` (plus the sum-to-one multiplier ``mu``) is zero on
the support and non-negative off it. Pixels that fail (round-off on ill-conditioned sets, or cycling
in degenerate cases) are re-solved one by one: ``scipy.optimize.nnls`` for ``nonnegative``; for
``fully_constrained`` Heinz and Chang's augmented nnls locates the support, the sum-to-one solution
on that support is computed by QR, and if that does not satisfy the conditions, all supports are
enumerated (p <= 12). The result is the optimum, not an approximation.

The residual is ``rss = x'x - 2 a'b + a'G a``; where that formula cancels (``rss < 1e-6 x'x``, e.g.
noise-free mixtures) the residual is recomputed explicitly, so RMSE keeps its relative precision.
``rmse = sqrt(rss / L)``.

Endmember sets
--------------
:func:`check_endmembers` refuses rank-deficient sets (naming the offending endmembers) and warns
(:class:`IllConditionedWarning`) when the condition number of the problem exceeds ``max_condition``,
naming that number and the two most similar endmembers. The condition number is that of ``M`` for the
unconstrained and non-negative variants, and that of ``M Z`` (``Z`` an orthonormal basis of the
directions with ``1'z = 0``) for the sum-to-one variants, whose solutions only depend on the
differences between endmembers.

A shade (zero) endmember can be added for the sum-to-one variants. Data in another space (e.g. MNF
components) are unmixed with endmembers moved into that space by the same transform
(:class:`LinearTransform` or any callable); note that an affine transform (with an offset) keeps the
linear mixing model only under the sum-to-one constraint.

The engine step, its configuration and the endmember sources live in
:mod:`swathmill.workflows.methods.unmix.step`; this module is the maths only (numpy, scipy, optional
numba; no engine, no configuration).
"""
from __future__ import annotations

import importlib.util
import math
import warnings
from dataclasses import dataclass
from typing import Any, Callable, Literal, Mapping, Sequence

import numpy as np
import scipy.optimize

from swathmill.errors import SwathmillError

__all__ = [
    "METHODS",
    "Method",
    "UnmixError",
    "IllConditionedWarning",
    "LinearTransform",
    "UnmixResult",
    "Unmixer",
    "condition_number",
    "check_endmembers",
    "kkt_violation",
    "kkt_violation_compiled",
    "HAVE_NUMBA",
    "fcls_pixel",
    "unmix",
    "unmix_cube",
    "SUM_TO_ONE",
    "NONNEGATIVE",
]

Method = Literal["unconstrained", "sum_to_one", "nonnegative", "fully_constrained"]
METHODS: tuple[str, ...] = ("unconstrained", "sum_to_one", "nonnegative", "fully_constrained")
SUM_TO_ONE = ("sum_to_one", "fully_constrained")
NONNEGATIVE = ("nonnegative", "fully_constrained")

_TABLE_MAX_P = 12  # precompute the affine maps of all supports up to this many endmembers
_ENUMERATE_MAX_P = 12  # per-pixel exact enumeration in the fall-back up to this many endmembers


class UnmixError(SwathmillError, ValueError):
    """Endmembers or data unfit for unmixing; the message names what is at fault."""


class IllConditionedWarning(UserWarning):
    """The endmember set is ill-conditioned: abundances are sensitive to noise."""


@dataclass(frozen=True)
class LinearTransform:
    """``y = (x[band_index] - offset) @ matrix``: spectra (n, bands) to components (n, k).

    Parameters
    ----------
    offset : (b,) array subtracted first (e.g. the MNF mean of the bands it uses).
    matrix : (b, k) array (e.g. the first k MNF eigenvectors as columns).
    band_index : optional (b,) indices of the bands of the full spectra the transform uses (MNF may
        leave bands out); None uses all bands.
    """

    offset: np.ndarray
    matrix: np.ndarray
    band_index: np.ndarray | None = None

    def __post_init__(self) -> None:
        off = np.asarray(self.offset, dtype=np.float64).ravel()
        mat = np.asarray(self.matrix, dtype=np.float64)
        if mat.ndim != 2 or mat.shape[0] != off.size:
            raise UnmixError(f"a linear transform needs offset (bands,) and matrix (bands, k). Got offset "
                             f"{off.shape} and matrix {mat.shape}")
        object.__setattr__(self, "offset", off)
        object.__setattr__(self, "matrix", mat)
        if self.band_index is not None:
            idx = np.asarray(self.band_index, dtype=np.int64).ravel()
            if idx.size != off.size:
                raise UnmixError(f"band_index has {idx.size} entries for a transform of {off.size} bands")
            object.__setattr__(self, "band_index", idx)

    @classmethod
    def from_mnf_model(cls, model: Mapping[str, Any], k: int | None = None) -> "LinearTransform":
        """The forward transform of a fitted MNF/PCA model (:mod:`swathmill.workflows.methods.mnf`): its ``mean``, the
        first ``k`` columns of ``eigenvectors`` (default ``n_components``) and its ``band_index``."""
        try:
            k = int(model["n_components"]) if k is None else int(k)
            vec = np.asarray(model["eigenvectors"], dtype=np.float64)[:, :k]
            return cls(np.asarray(model["mean"]), vec, np.asarray(model["band_index"]))
        except KeyError as exc:
            raise UnmixError(f"an MNF/PCA model needs 'mean', 'eigenvectors', 'band_index' and "
                             f"'n_components'; {exc} is missing") from None

    def __call__(self, spectra: np.ndarray) -> np.ndarray:
        s = np.asarray(spectra, dtype=np.float64)
        if self.band_index is not None:
            if s.shape[-1] <= int(self.band_index.max()):
                raise UnmixError(f"the transform uses band {int(self.band_index.max()) + 1} but the spectra have "
                                 f"{s.shape[-1]} bands")
            s = s[..., self.band_index]
        if s.shape[-1] != self.offset.size:
            raise UnmixError(f"the transform expects spectra of {self.offset.size} bands. Got {s.shape[-1]}")
        return (s - self.offset) @ self.matrix


# --------------------------------------------------------------------------------------------------
# checks of the endmember set


def _null_sum_basis(p: int) -> np.ndarray:
    """(p, p-1) orthonormal basis of {z : 1'z = 0}."""
    u, _s, _vt = np.linalg.svd(np.eye(p) - 1.0 / p)  # the centring projector: p-1 unit singular values
    return u[:, : p - 1]


def condition_number(endmembers: np.ndarray, method: str = "unconstrained") -> float:
    """2-norm condition number of the unmixing problem (see the module notes).

    ``cond(M)`` for the unconstrained and non-negative variants; ``cond(M Z)`` for the sum-to-one
    variants, ``Z`` an orthonormal basis of ``{z : 1'z = 0}``. ``inf`` when rank-deficient.
    """
    m = np.asarray(endmembers, dtype=np.float64)
    if method in SUM_TO_ONE:
        if m.shape[1] == 1:
            return 1.0
        m = m @ _null_sum_basis(m.shape[1])
    s = np.linalg.svd(m, compute_uv=False)
    if s[-1] <= s[0] * np.finfo(np.float64).eps * max(m.shape) or s[0] == 0:
        return math.inf
    return float(s[0] / s[-1])


def _closest_pair(m: np.ndarray, names: Sequence[str]) -> tuple[str, str, float]:
    norms = np.linalg.norm(m, axis=0)
    norms = np.where(norms > 0, norms, np.inf)
    cos = np.clip((m.T @ m) / np.outer(norms, norms), -1.0, 1.0)  # spectral angle (Kruse et al., 1993)
    ang = np.arccos(cos)
    np.fill_diagonal(ang, np.inf)
    i, j = np.unravel_index(np.argmin(ang), ang.shape)
    return names[min(i, j)], names[max(i, j)], float(ang[i, j])


def check_endmembers(endmembers: np.ndarray, names: Sequence[str], method: str,
                     max_condition: float = 1e3) -> float:
    """Refuse unusable endmember sets; warn for ill-conditioned ones. Returns the condition number.

    Raises
    ------
    UnmixError
        NaN or infinite values (naming the endmember and band), fewer bands than the problem needs,
        or a rank-deficient set (condition number infinite), naming the two most similar endmembers.

    Warns
    -----
    IllConditionedWarning
        When the condition number exceeds ``max_condition``, naming it and the closest pair.
    """
    m = np.asarray(endmembers, dtype=np.float64)
    if m.ndim != 2 or m.shape[1] != len(names):
        raise UnmixError(f"endmembers must be (bands, {len(names)}) for {len(names)} names. Got {m.shape}")
    if method not in METHODS:
        raise UnmixError(f"unknown unmixing method {method!r}; choose one of {', '.join(METHODS)}")
    bad = ~np.isfinite(m)
    if bad.any():
        b, e = np.argwhere(bad)[0]
        raise UnmixError(f"endmember {names[e]!r} has a non-finite value in band {b + 1} "
                         f"({int(bad[:, e].sum())} such bands)")
    p, nb = m.shape[1], m.shape[0]
    need = p - 1 if method in SUM_TO_ONE else p
    if nb < need:
        raise UnmixError(f"{p} endmembers need at least {need} bands for the {method} variant. Got {nb}")
    cond = condition_number(m, method)
    if p > 1:
        a, b, ang = _closest_pair(m, names)
        pair = f"the most similar pair is {a!r} and {b!r} (spectral angle {ang:.3g} rad)"
    else:
        pair = ""
    if not math.isfinite(cond):
        raise UnmixError(f"the endmember set is rank-deficient for the {method} variant (condition number "
                         f"infinite): {pair}; remove one of them")
    if cond > max_condition:
        warnings.warn(f"ill-conditioned endmember set: condition number {cond:.4g} exceeds {max_condition:.4g}; "
                      f"{pair}. Abundances will be sensitive to noise", IllConditionedWarning, stacklevel=3)
    return cond


# --------------------------------------------------------------------------------------------------
# the affine maps of all supports


def _support_bits(masks: np.ndarray, p: int) -> np.ndarray:
    return ((np.asarray(masks, dtype=np.int64)[:, None] >> np.arange(p)) & 1).astype(bool)


def _support_maps(g: np.ndarray, masks: np.ndarray, sum_to_one: bool) -> tuple[np.ndarray, np.ndarray]:
    """Affine maps ``a = K b + c`` of the least-squares solutions on each support (zero off it).

    The bordered (or plain) Gram matrix of each support is embedded in a full-size matrix with the
    identity on the rows and columns outside the support, inverted in one batch, and masked.
    Singular supports get NaN maps (never used for a full-rank set).
    """
    p = g.shape[0]
    bits = _support_bits(masks, p)
    s = bits.astype(np.float64)
    q = p + 1 if sum_to_one else p
    h = np.zeros((len(masks), q, q))
    outer = s[:, :, None] * s[:, None, :]
    h[:, :p, :p] = g * outer
    h[:, np.arange(p), np.arange(p)] += 1.0 - s
    t = float(np.mean(np.diag(g))) or 1.0  # scale of the constraint row (conditioning only)
    if sum_to_one:
        h[:, :p, p] = t * s
        h[:, p, :p] = t * s
    cond = np.linalg.cond(h)
    ok = np.isfinite(cond) & (cond < 1.0 / (np.finfo(np.float64).eps * 16))
    hinv = np.full_like(h, np.nan)
    if ok.any():
        hinv[ok] = np.linalg.inv(h[ok])
    k = hinv[:, :p, :p] * outer
    c = hinv[:, :p, p] * s * t if sum_to_one else np.zeros((len(masks), p))
    return k, c


class _Supports:
    """Affine maps of all supports (a table when p <= 12) or of the supports met so far (a cache).

    Layout: pixels are columns, ``b`` is (p, n); the table holds ``K`` as (p, p, 2^p) and ``c`` as
    (p, 2^p) so that one support gather per matrix entry gives contiguous (n,) rows.
    """

    def __init__(self, g: np.ndarray, sum_to_one: bool):
        self.g, self.sum_to_one = g, sum_to_one
        p = g.shape[0]
        self.p = p
        self.full = (1 << p) - 1
        k, c = _support_maps(g, np.array([self.full]), sum_to_one)
        self.k_full, self.c_full = k[0], c[0]
        if p <= _TABLE_MAX_P:
            k, c = _support_maps(g, np.arange(1 << p), sum_to_one)
            k[0], c[0] = 0.0, 0.0  # the empty support: a = 0
            self.k = np.ascontiguousarray(np.moveaxis(k, 0, -1))
            self.c = np.ascontiguousarray(c.T)
        else:
            self.k = self.c = None
            self.cache: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def solve_full(self, b: np.ndarray) -> np.ndarray:
        return self.k_full @ b + self.c_full[:, None]

    def solve(self, b: np.ndarray, masks: np.ndarray) -> np.ndarray:
        """Solutions (p, n) on each pixel's support for right-hand sides ``b`` (p, n)."""
        if self.k is not None:
            out = self.c[:, masks]
            for j in range(self.p):
                out += self.k[:, j, masks] * b[j]
            return out
        out = np.empty_like(b)
        uniq, inv = np.unique(masks, return_inverse=True)
        missing = [int(m) for m in uniq if int(m) not in self.cache]
        if missing:
            k, c = _support_maps(self.g, np.asarray(missing), self.sum_to_one)
            for i, m in enumerate(missing):
                self.cache[m] = (k[i], c[i]) if m else (np.zeros((self.p, self.p)), np.zeros(self.p))
        for u, m in enumerate(uniq):
            sel = inv == u
            k, c = self.cache[int(m)]
            out[:, sel] = k @ b[:, sel] + c[:, None]
        return out


# --------------------------------------------------------------------------------------------------
# optimality check and exact per-pixel solutions


def kkt_violation(gram: np.ndarray, b: np.ndarray, a: np.ndarray, method: str) -> np.ndarray:
    """Largest violation of the optimality conditions per pixel, relative to the problem's scale.

    For ``min 1/2 a'Ga - b'a`` with ``a >= 0`` (and ``1'a = 1``): ``g = G a - b`` (+ ``mu`` for the
    sum-to-one multiplier, fitted on the support) must be 0 where ``a > 0`` and ``>= 0`` where
    ``a = 0``; ``a >= 0``; ``|1'a - 1| = 0``. The scale is ``max|b| + max|G| sum|a|``.

    Parameters
    ----------
    gram : (p, p) ``M'M``.
    b : (p, n) ``M'x`` per pixel (pixels as columns).
    a : (p, n) abundances.
    method : one of :data:`METHODS`.

    Returns
    -------
    (n,) float64, 0 at an exact optimum.
    """
    gram = np.asarray(gram, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    a = np.asarray(a, dtype=np.float64)
    g = gram @ a - b
    gmax = np.abs(gram).max()
    scale = np.abs(b).max(axis=0) + gmax * np.abs(a).sum(axis=0) + np.finfo(np.float64).tiny
    pos = a > 0 if method in NONNEGATIVE else np.ones(a.shape, dtype=bool)
    if method in SUM_TO_ONE:
        mu = -(g * pos).sum(axis=0) / np.maximum(pos.sum(axis=0), 1)
        g += mu
    v = np.where(pos, np.abs(g), np.maximum(-g, 0.0)).max(axis=0) / scale
    if method in NONNEGATIVE:
        v = np.maximum(v, np.maximum(-a, 0.0).max(axis=0) * gmax / scale)
    if method in SUM_TO_ONE:
        v = np.maximum(v, np.abs(a.sum(axis=0) - 1.0))
    return v


def _sum_to_one_on(m: np.ndarray, x: np.ndarray, support: np.ndarray) -> np.ndarray:
    """Sum-to-one least squares on a support by QR (null-space form); zeros off the support."""
    p = m.shape[1]
    idx = np.flatnonzero(support)
    a = np.zeros(p)
    if idx.size == 1:
        a[idx] = 1.0
        return a
    ms = m[:, idx]
    v0 = np.full(idx.size, 1.0 / idx.size)
    z = _null_sum_basis(idx.size)
    sol, *_ = np.linalg.lstsq(ms @ z, x - ms @ v0, rcond=None)
    a[idx] = v0 + z @ sol
    return a


def _kkt_pixel(m: np.ndarray, x: np.ndarray, a: np.ndarray, method: str, rtol: float) -> bool:
    gram = m.T @ m
    return bool(kkt_violation(gram, (m.T @ x)[:, None], a[:, None], method)[0] <= rtol)


def fcls_pixel(m: np.ndarray, x: np.ndarray, *, rtol: float = 1e-9, delta: float | None = None) -> np.ndarray:
    """Exact fully constrained least squares for one pixel (the fall-back of :class:`Unmixer`).

    Heinz and Chang's augmented problem ``nnls([M; d 1'], [x; d])`` locates the support; the
    sum-to-one least-squares solution on that support (QR, null-space form) is returned when it is
    feasible and satisfies the optimality conditions; otherwise every support is tried (p <= 12) and
    the feasible solution of smallest residual is returned.

    Parameters
    ----------
    m : (L, p) endmembers.  x : (L,) pixel.
    delta : weight of the sum-to-one row; default ``1e3 max|M|`` (Heinz and Chang, 2001).
    """
    m = np.asarray(m, dtype=np.float64)
    x = np.asarray(x, dtype=np.float64)
    p = m.shape[1]
    d = 1e3 * max(np.abs(m).max(), 1e-300) if delta is None else float(delta)
    aug = np.vstack([m, np.full((1, p), d)])
    a_hc, _ = scipy.optimize.nnls(aug, np.r_[x, d], maxiter=50 * p)
    a = _sum_to_one_on(m, x, a_hc > 0)
    if a.min() >= 0 and _kkt_pixel(m, x, a, "fully_constrained", rtol):
        return a
    if p > _ENUMERATE_MAX_P:
        return np.maximum(a_hc, 0) / max(a_hc.sum(), 1e-300)
    best, best_r = None, math.inf
    for mask in range(1, 1 << p):
        sup = _support_bits(np.array([mask]), p)[0]
        cand = _sum_to_one_on(m, x, sup)
        if cand.min() < -1e-12:
            continue
        r = float(np.sum((x - m @ cand) ** 2))
        if r < best_r:
            best, best_r = np.maximum(cand, 0.0), r
    return best / best.sum()


# --------------------------------------------------------------------------------------------------
# the compiled per-pixel loop (optional: numba)


def _active_set_loop(b, k_tab, c_tab, gram, sum_to_one, tol_add, max_rounds, a_out, flag):  # pragma: no cover
    """The same active-set method as :meth:`Unmixer._round`, one pixel at a time (compiled by numba).

    b (p, n); k_tab (2^p, p, p), c_tab (2^p, p) the affine maps of all supports; writes a_out (p, n)
    and flag (n,) (True where the pixel did not settle within max_rounds).
    """
    p, n = b.shape
    full = (1 << p) - 1
    gmax = np.abs(gram).max()
    bi = np.empty(p)
    s = np.empty(p)
    ai = np.empty(p)
    ratio = np.empty(p)
    for i in range(n):
        for q in range(p):
            bi[q] = b[q, i]
        for q in range(p):
            acc = c_tab[full, q]
            for r in range(p):
                acc += k_tab[full, q, r] * bi[r]
            s[q] = acc
        feasible = True
        for q in range(p):
            if s[q] < 0.0:
                feasible = False
        if feasible:
            for q in range(p):
                a_out[q, i] = s[q]
            flag[i] = False
            continue
        bmax = 0.0
        ssum = 0.0
        mask = 0
        jbest = 0
        for q in range(p):
            bmax = max(bmax, abs(bi[q]))
            ssum += abs(s[q])
            ai[q] = 0.0
            if s[q] > 0.0:
                mask |= 1 << q
            if s[q] > s[jbest]:
                jbest = q
        if sum_to_one:
            ai[jbest] = 1.0
            mask |= 1 << jbest
        tol = tol_add * (bmax + gmax * ssum)
        settled = False
        for _round in range(max_rounds):
            for q in range(p):
                acc = c_tab[mask, q]
                for r in range(p):
                    acc += k_tab[mask, q, r] * bi[r]
                s[q] = acc
            blocked = False
            for q in range(p):
                if (mask >> q) & 1 and s[q] <= 0.0:
                    blocked = True
            if not blocked:
                for q in range(p):
                    ai[q] = s[q]
                mu = 0.0
                cnt = 0
                if sum_to_one:
                    for q in range(p):
                        if (mask >> q) & 1:
                            g = -bi[q]
                            for r in range(p):
                                g += gram[q, r] * s[r]
                            mu -= g
                            cnt += 1
                    mu /= max(cnt, 1)
                jmin = -1
                lmin = 0.0
                for q in range(p):
                    if not (mask >> q) & 1:
                        g = -bi[q] + mu
                        for r in range(p):
                            g += gram[q, r] * s[r]
                        if jmin < 0 or g < lmin:
                            jmin = q
                            lmin = g
                if jmin >= 0 and lmin < -tol:
                    mask |= 1 << jmin
                    continue
                settled = True
                break
            alpha = np.inf
            for q in range(p):
                ratio[q] = np.inf
                if (mask >> q) & 1 and s[q] <= 0.0:
                    ratio[q] = 0.0 if ai[q] <= 0.0 else ai[q] / (ai[q] - s[q])
                    alpha = min(alpha, ratio[q])
            newmask = 0
            for q in range(p):
                if (mask >> q) & 1:
                    an = ai[q] + alpha * (s[q] - ai[q])
                    if an > 0.0 and not (s[q] <= 0.0 and ratio[q] <= alpha):
                        ai[q] = an
                        newmask |= 1 << q
                    else:
                        ai[q] = 0.0
                else:
                    ai[q] = 0.0
            mask = newmask
        for q in range(p):
            a_out[q, i] = ai[q]
        flag[i] = not settled


def _kkt_loop(gram, b, a, xx, nonnegative, sum_to_one, out, rss):  # pragma: no cover - compiled by numba
    """:func:`kkt_violation`, pixel by pixel (compiled by numba); writes out (n,). With ``xx`` (n,)
    = x'x given (non-empty), also the residual ``rss = x'x - 2 a'b + a'G a`` (n,) from the same
    gradient, ``a'(G a - b) - a'b``."""
    p, n = b.shape
    with_rss = xx.size == n
    gmax = np.abs(gram).max()
    g = np.empty(p)
    for i in range(n):
        bmax = 0.0
        asum = 0.0
        tot = 0.0
        for q in range(p):
            acc = -b[q, i]
            for r in range(p):
                acc += gram[q, r] * a[r, i]
            g[q] = acc
            bmax = max(bmax, abs(b[q, i]))
            asum += abs(a[q, i])
            tot += a[q, i]
        scale = bmax + gmax * asum + 2.2250738585072014e-308
        if with_rss:
            ag = 0.0
            ab = 0.0
            for q in range(p):
                ag += a[q, i] * g[q]
                ab += a[q, i] * b[q, i]
            rss[i] = xx[i] + ag - ab
        mu = 0.0
        if sum_to_one:
            cnt = 0
            for q in range(p):
                if (not nonnegative) or a[q, i] > 0.0:
                    mu -= g[q]
                    cnt += 1
            mu /= max(cnt, 1)
        v = 0.0
        for q in range(p):
            lam = g[q] + mu
            if (not nonnegative) or a[q, i] > 0.0:
                v = max(v, abs(lam))
            else:
                v = max(v, -lam)
        v /= scale
        if nonnegative:
            for q in range(p):
                v = max(v, -a[q, i] * gmax / scale)
        if sum_to_one:
            v = max(v, abs(tot - 1.0))
        out[i] = v


def _have_numba() -> bool:
    try:
        return importlib.util.find_spec("numba") is not None
    except (ImportError, ValueError):  # ValueError: a blocked or broken entry in sys.modules
        return False


HAVE_NUMBA = _have_numba()
_COMPILED: dict = {}


def _compiled(fn):
    """``fn`` compiled by numba on first use (cached on disk)."""
    if fn.__name__ not in _COMPILED:
        import numba

        _COMPILED[fn.__name__] = numba.njit(cache=True, nogil=True)(fn)
    return _COMPILED[fn.__name__]


def _active_set_compiled(*args) -> None:
    _compiled(_active_set_loop)(*args)


def kkt_violation_compiled(gram: np.ndarray, b: np.ndarray, a: np.ndarray, method: str) -> np.ndarray:
    """:func:`kkt_violation` by a loop compiled with numba (the same conditions and scale)."""
    out = np.empty(b.shape[1])
    _compiled(_kkt_loop)(np.ascontiguousarray(gram, dtype=np.float64), np.ascontiguousarray(b, dtype=np.float64),
                         np.ascontiguousarray(a, dtype=np.float64), np.empty(0), method in NONNEGATIVE,
                         method in SUM_TO_ONE, out, np.empty(0))
    return out


# --------------------------------------------------------------------------------------------------
# the solver


@dataclass
class UnmixResult:
    """Abundances (p, n), RMSE (n,), and how many pixels needed the exact per-pixel fall-back."""

    abundances: np.ndarray
    rmse: np.ndarray
    n_fallback: int = 0
    n_valid: int = 0


class Unmixer:
    """A prepared unmixing problem: endmembers, variant, and everything precomputed from them.

    Parameters
    ----------
    endmembers : (L, p) array, one endmember per column, in the space of the data.
    method : one of :data:`METHODS`.
    names : endmember names (default ``em_1..``).
    max_condition : warn above this condition number (see :func:`check_endmembers`).
    kkt_rtol : relative tolerance of the optimality check (pixels above are re-solved exactly).
    chunk : pixels per chunk (bounds the float64 work arrays to ``L * chunk`` values).
    max_rounds : rounds of the vectorised active-set method before the rest fall back
        (default ``3 p + 10``).
    engine : "numpy" runs the active-set rounds on all pixels at once with numpy; "compiled" runs
        the same method pixel by pixel in a loop compiled by numba (faster; needs numba and
        p <= 12); "auto" (default) picks "compiled" when it can.
    """

    def __init__(self, endmembers: np.ndarray, method: str = "fully_constrained", *,
                 names: Sequence[str] | None = None, max_condition: float = 1e3, kkt_rtol: float = 1e-9,
                 chunk: int = 2048, max_rounds: int | None = None,
                 engine: Literal["auto", "numpy", "compiled"] = "auto"):
        m = np.asarray(endmembers, dtype=np.float64)
        if m.ndim != 2:
            raise UnmixError(f"endmembers must be a (bands, p) matrix. Got shape {m.shape}")
        p = m.shape[1]
        self.names = tuple(names) if names is not None else tuple(f"em_{i + 1}" for i in range(p))
        if len(set(self.names)) != len(self.names):
            raise UnmixError(f"endmember names must be unique. Got {list(self.names)}")
        self.condition = check_endmembers(m, self.names, method, max_condition)
        self.method = method
        self.m = np.ascontiguousarray(m)
        self.gram = m.T @ m
        self.sum_to_one = method in SUM_TO_ONE
        self.nonnegative = method in NONNEGATIVE
        self.kkt_rtol = float(kkt_rtol)
        self.chunk = int(chunk)
        self.max_rounds = int(max_rounds) if max_rounds is not None else 3 * p + 10
        self._supports = _Supports(self.gram, self.sum_to_one)
        self._mt = np.ascontiguousarray(m.T)
        self._pow2 = (1 << np.arange(p)).astype(np.int64)
        self._bits = _support_bits(np.arange(1 << p), p).T.copy() if p <= _TABLE_MAX_P else None
        self._gmax = float(np.abs(self.gram).max())
        if engine not in ("auto", "numpy", "compiled"):
            raise UnmixError(f"engine must be 'auto', 'numpy' or 'compiled'. Got {engine!r}")
        can = HAVE_NUMBA and p <= _TABLE_MAX_P
        if engine == "compiled" and not can:
            raise UnmixError("engine 'compiled' needs numba installed and at most "
                             f"{_TABLE_MAX_P} endmembers (got {p}); use engine 'numpy'")
        self.engine = "compiled" if (engine == "compiled" or (engine == "auto" and can)) else "numpy"
        if self.engine == "compiled":
            self._k_rows = np.ascontiguousarray(np.moveaxis(self._supports.k, -1, 0))
            self._c_rows = np.ascontiguousarray(self._supports.c.T)

    @property
    def p(self) -> int:
        return self.m.shape[1]

    @property
    def bands(self) -> int:
        return self.m.shape[0]

    # -- normal-equation form ----------------------------------------------------------------------
    def solve_normal(self, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Abundances (p, n) from ``b = M'x`` (p, n), and a flag (n,) of pixels that need the fall-back.

        The closed forms for the unconstrained and sum-to-one variants; the vectorised active-set
        method for the others (see the module notes). Flagged pixels either failed the KKT check
        or did not settle within ``max_rounds``.
        """
        a, flag, _rss = self._solve_normal(b)
        return a, flag

    def _solve_normal(self, b: np.ndarray, xx: np.ndarray | None = None
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """:meth:`solve_normal`; the compiled engine also returns the residuals when ``xx`` is given."""
        b = np.ascontiguousarray(b, dtype=np.float64)
        p, n = b.shape
        if self.nonnegative and self.engine == "compiled":
            a = np.empty_like(b)
            flag = np.empty(n, dtype=bool)
            _active_set_compiled(b, self._k_rows, self._c_rows, self.gram, self.sum_to_one,
                                 0.1 * self.kkt_rtol, self.max_rounds, a, flag)
            viol = np.empty(n)
            rss = np.empty(n) if xx is not None else np.empty(0)
            _compiled(_kkt_loop)(self.gram, b, a, np.empty(0) if xx is None else np.ascontiguousarray(xx),
                                 True, self.sum_to_one, viol, rss)
            flag |= ~(viol <= self.kkt_rtol)
            return a, flag, (rss if xx is not None else None)
        s = self._supports.solve_full(b)
        if not self.nonnegative:
            return s, np.zeros(n, dtype=bool), None
        done = np.all(s >= 0.0, axis=0)  # the full-support optimum is feasible: it is the optimum
        a = np.where(done, s, 0.0)
        todo = np.flatnonzero(~done)
        flag = np.zeros(n, dtype=bool)
        if todo.size:
            st = s[:, todo]
            wb = np.ascontiguousarray(b[:, todo])
            wmask = self._pow2 @ (st > 0.0)
            wa = np.zeros_like(st)
            if self.sum_to_one:  # a feasible start: the vertex of the largest closed-form abundance
                j = np.argmax(st, axis=0)
                wa[j, np.arange(j.size)] = 1.0
                wmask |= self._pow2[j]
            wscale = np.abs(wb).max(axis=0) + self._gmax * np.abs(st).sum(axis=0)
            widx = todo
            for _ in range(self.max_rounds):
                fin = self._round(wb, wa, wmask, wscale)
                if fin.any():
                    a[:, widx[fin]] = wa[:, fin]
                    keep = ~fin
                    wb, wa, wmask, wscale, widx = wb[:, keep], wa[:, keep], wmask[keep], wscale[keep], widx[keep]
                if not widx.size:
                    break
            if widx.size:
                a[:, widx] = wa
                flag[widx] = True
        viol = kkt_violation(self.gram, b, a, self.method)
        flag |= ~(viol <= self.kkt_rtol)
        return a, flag, None

    def _round(self, b: np.ndarray, a: np.ndarray, mask: np.ndarray, scale: np.ndarray) -> np.ndarray:
        """One round of the active-set method on a working set (updated in place); returns finished."""
        s = self._supports.solve(b, mask)
        pi = self._bits[:, mask] if self._bits is not None else _support_bits(mask, self.p).T
        neg = pi & (s <= 0.0)
        blocked = neg.any(axis=0)
        fin = np.zeros(mask.size, dtype=bool)
        # pixels whose support solution is feasible: move there, then test the multipliers
        f = np.flatnonzero(~blocked)
        if f.size:
            sf, pf = s[:, f], pi[:, f]
            a[:, f] = sf
            lam = self.gram @ sf - b[:, f]
            if self.sum_to_one:
                lam -= (lam * pf).sum(axis=0) / pf.sum(axis=0)
            lam[pf] = np.inf
            j = np.argmin(lam, axis=0)
            lmin = lam[j, np.arange(j.size)]
            grow = lmin < -0.1 * self.kkt_rtol * scale[f]
            fin[f[~grow]] = True
            mask[f[grow]] |= self._pow2[j[grow]]
        # pixels whose support solution leaves the feasible set: step to the first bound, drop it
        bl = np.flatnonzero(blocked)
        if bl.size:
            ab, sb, nb, pb = a[:, bl], s[:, bl], neg[:, bl], pi[:, bl]
            with np.errstate(divide="ignore", invalid="ignore"):
                ratio = np.where(nb, ab / (ab - sb), np.inf)
            ratio[nb & (ab <= 0.0)] = 0.0
            alpha = ratio.min(axis=0)
            anew = ab + alpha * (sb - ab)
            keep = pb & (anew > 0.0) & ~(nb & (ratio <= alpha))
            a[:, bl] = np.where(keep, anew, 0.0)
            mask[bl] = self._pow2 @ keep
        return fin

    # -- pixels --------------------------------------------------------------------------------------
    def solve(self, pixels: np.ndarray) -> UnmixResult:
        """Unmix pixels given as columns (L, n) (any float dtype; NaN pixels give NaN).

        Two passes: ``b = M'x`` and ``x'x`` per chunk (in float64), then all pixels solved at once;
        pixels needing the exact fall-back or an explicit residual are read again.

        Returns
        -------
        UnmixResult with abundances (p, n) and rmse (n,) in float64.
        """
        x = np.asarray(pixels)
        if x.ndim != 2 or x.shape[0] != self.bands:
            raise UnmixError(f"pixels must be ({self.bands} bands, n) to match the endmembers. Got {x.shape}")
        n = x.shape[1]
        p, nbands = self.p, self.bands
        b = np.empty((p, n))
        xx = np.empty(n)
        buf = np.empty((nbands, min(self.chunk, max(n, 1))))
        for lo in range(0, n, self.chunk):
            hi = min(lo + self.chunk, n)
            xc = buf[:, : hi - lo]
            xc[...] = x[:, lo:hi]
            np.matmul(self._mt, xc, out=b[:, lo:hi])
            np.einsum("ij,ij->j", xc, xc, out=xx[lo:hi])
        ok = np.isfinite(xx) & np.all(np.isfinite(b), axis=0)
        if not ok.any():
            return UnmixResult(np.full((p, n), np.nan), np.full(n, np.nan), 0, 0)
        okx = None if ok.all() else np.flatnonzero(ok)
        bs = b if okx is None else b[:, okx]
        xxs = xx if okx is None else xx[okx]
        a, flag, rss = self._solve_normal(bs, xxs)
        cols = np.arange(n) if okx is None else okx
        fb = np.flatnonzero(flag)
        for k in fb:
            a[:, k] = self._exact_pixel(np.asarray(x[:, cols[k]], dtype=np.float64))
        if rss is None:
            rss = xxs - 2.0 * np.einsum("ij,ij->j", a, bs) + np.einsum("ij,ij->j", self.gram @ a, a)
        elif fb.size:
            af, bf = a[:, fb], bs[:, fb]
            rss[fb] = xxs[fb] - 2.0 * np.einsum("ij,ij->j", af, bf) + np.einsum("ij,ij->j", self.gram @ af, af)
        weak = np.flatnonzero(~(rss > 1e-6 * xxs))
        for lo in range(0, weak.size, self.chunk):
            w = weak[lo:lo + self.chunk]
            r = np.asarray(x[:, cols[w]], dtype=np.float64) - self.m @ a[:, w]
            rss[w] = np.einsum("ij,ij->j", r, r)
        rm = np.sqrt(np.maximum(rss, 0.0) / nbands)
        if okx is None:
            out_a, out_r = a, rm
        else:
            out_a, out_r = np.full((p, n), np.nan), np.full(n, np.nan)
            out_a[:, okx] = a
            out_r[okx] = rm
        return UnmixResult(out_a, out_r, int(fb.size), int(cols.size))

    def _exact_pixel(self, x: np.ndarray) -> np.ndarray:
        if self.method == "nonnegative":
            a, _ = scipy.optimize.nnls(self.m, x, maxiter=50 * self.p)
            return a
        return fcls_pixel(self.m, x, rtol=self.kkt_rtol)


# --------------------------------------------------------------------------------------------------
# conveniences


def _prepare_endmembers(endmembers: np.ndarray, names: Sequence[str] | None, method: str, shade: bool,
                        transform: Callable[[np.ndarray], np.ndarray] | None) -> tuple[np.ndarray, tuple[str, ...]]:
    m = np.asarray(endmembers, dtype=np.float64)
    if m.ndim != 2:
        raise UnmixError(f"endmembers must be a (bands, p) matrix. Got shape {m.shape}")
    names = tuple(names) if names is not None else tuple(f"em_{i + 1}" for i in range(m.shape[1]))
    if len(names) != m.shape[1]:
        raise UnmixError(f"{len(names)} endmember names for {m.shape[1]} endmembers")
    if shade:
        if method not in SUM_TO_ONE:
            raise UnmixError(f"a shade endmember needs a sum-to-one variant (sum_to_one or fully_constrained); "
                             f"with {method!r} its abundance is undetermined")
        if "shade" in names:
            raise UnmixError("an endmember is already called 'shade'; rename it or set shade: false")
        m = np.hstack([m, np.zeros((m.shape[0], 1))])
        names = names + ("shade",)
    if transform is not None:
        m = np.asarray(transform(m.T), dtype=np.float64).T
    return m, names


def unmix(pixels: np.ndarray, endmembers: np.ndarray, method: str = "fully_constrained", *,
          names: Sequence[str] | None = None, shade: bool = False,
          transform: Callable[[np.ndarray], np.ndarray] | None = None, max_condition: float = 1e3,
          kkt_rtol: float = 1e-9, chunk: int = 2048) -> UnmixResult:
    """Unmix pixels (L, n) with endmembers (bands, p); see :class:`Unmixer`.

    ``shade`` appends a zero endmember named ``shade``; ``transform`` maps endmember spectra
    (p, bands) into the space of the pixels (p, L), e.g. a :class:`LinearTransform` for MNF components.
    """
    m, names = _prepare_endmembers(endmembers, names, method, shade, transform)
    return Unmixer(m, method, names=names, max_condition=max_condition, kkt_rtol=kkt_rtol,
                   chunk=chunk).solve(pixels)


def unmix_cube(cube: np.ndarray, endmembers: np.ndarray, method: str = "fully_constrained", *,
               names: Sequence[str] | None = None, shade: bool = False,
               transform: Callable[[np.ndarray], np.ndarray] | None = None, max_condition: float = 1e3,
               unmixer: Unmixer | None = None) -> dict[str, np.ndarray]:
    """Unmix a cube (bands, rows, cols): ``{"abundance": (p, rows, cols), "rmse": (1, rows, cols)}``
    as float32, plus ``"sum"`` (1, rows, cols) for the unconstrained variant. NaN where any band is NaN.

    Give a prepared ``unmixer`` to skip preparing the endmembers (then the other endmember arguments
    are ignored).
    """
    cube = np.asarray(cube)
    if cube.ndim != 3:
        raise UnmixError(f"a cube must be (bands, rows, cols). Got shape {cube.shape}")
    if unmixer is None:
        m, names = _prepare_endmembers(endmembers, names, method, shade, transform)
        unmixer = Unmixer(m, method, names=names, max_condition=max_condition)
    nb, rows, cols = cube.shape
    res = unmixer.solve(cube.reshape(nb, rows * cols))
    out = {"abundance": res.abundances.reshape(unmixer.p, rows, cols).astype(np.float32),
           "rmse": res.rmse.reshape(1, rows, cols).astype(np.float32)}
    if unmixer.method == "unconstrained":
        out["sum"] = res.abundances.sum(axis=0).reshape(1, rows, cols).astype(np.float32)
    return out
