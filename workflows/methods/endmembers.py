"""Endmembers found in the image: ATGP, N-FINDR and VCA, run tile by tile with a global selection.

Methods (pure functions on a pixel matrix, pixels as rows)
----------------------------------------------------------
:func:`atgp`
    Automatic target generation process (Ren and Chang, 2003): the first target is the pixel of
    largest norm ``argmax r'r``; each next one maximises ``|P_perp r|^2`` with
    ``P_perp = I - U (U'U)^-1 U'`` the projector away from the targets found so far (computed with an
    orthonormal basis of ``U``).
:func:`nfindr`
    N-FINDR (Winter, 1999, Proc. SPIE 3753): in p-1 dimensions, the p pixels spanning the simplex of
    largest volume ``|det [1'; E]| / (p-1)!`` (:func:`simplex_volume`, through ``slogdet``). From a
    seeded random start, each vertex in turn is replaced by the pixel that most increases the volume
    (the volume with vertex j replaced by pixel z is ``|det E| |(E^-1)_j [1; z]|``, so all pixels are
    scored at once), until a whole sweep changes nothing. ``restarts`` seeded starts; the largest
    volume wins.
:func:`vca`
    Vertex component analysis (Nascimento and Bioucas-Dias, 2005, IEEE TGRS 43(4):898-910): the SNR is
    estimated from the data's power and its power in p principal components (the paper's eq. 13 as
    its authors' code computes it); above ``15 + 10 log10(p)`` dB the data are projected
    on the first p eigenvectors of the correlation matrix and scaled projectively (``y / (y'u)``),
    below it on the first p-1 principal components plus a constant coordinate; then p times: a random
    direction ``f = (I - A A^+) w`` orthogonal to the endmembers found so far, and the pixel of
    largest ``|f'y|`` joins them.

All three need data of reduced dimension (MNF or PCA components, ordered by decreasing SNR or
variance): the step uses the first ``n_dims`` bands of its ``reduced`` input (default p-1, the
dimension of a p-vertex simplex; N-FINDR uses the first p-1 of those). Components are centred, so
a p-vertex simplex spans p-1 of their dimensions through the origin region: ATGP and VCA run on the
homogeneous coordinates ``[y, c]`` (``c`` the largest candidate norm, as in VCA's own low-SNR
branch), in which the p vertices are linearly independent.

Tile by tile (the fit)
----------------------
Every pixel the three methods can pick is a vertex of the convex hull of the data: ATGP and VCA pick
maximisers of a convex function (a squared norm, an absolute value of a linear form) and the largest
simplex has its vertices on the hull. So per tile the accumulator keeps *candidates* that are hull
vertices:

- for each of ``n_directions`` unit directions (drawn once from the seed), the pixel of largest and of
  smallest projection;
- the ``n_brightest`` pixels of largest squared norm (ATGP's first target is among them);

with their global row and column, their reduced values and (if a ``spectra`` input is given) their
spectra; plus the count, sum and sum of outer products of the reduced values (for VCA's SNR and
projection). Merging two accumulators keeps, per direction, the winner of the two, and the overall
brightest; ties go to the smaller (row, col). This is associative and commutative, and the candidate
set equals the one computed on the whole mosaic in one piece, so the selection (run in ``finalize``
on the candidates sorted by position, from the seed) gives the same endmembers whatever the tiling.
With enough directions every vertex of a simplex-shaped cloud is found (a vertex is extreme along
every direction of its normal cone, about 1/p of the sphere for a regular simplex). What is exact
is the independence from the tiling; that the candidates hold the very pixel a method would pick on
all pixels is likely, not certain, and grows more likely with ``n_directions``.

Number of endmembers (:func:`suggest_endmember_count`)
------------------------------------------------------
MNF eigenvalues are ``SNR + 1``: components of noise only have eigenvalues near 1 (the noise floor).
The floor is estimated as the median of the smaller half of the eigenvalues, its spread as 1.4826
times their median absolute deviation. A component carries signal when its eigenvalue exceeds both
``floor * (1 + min_snr)`` (default ``min_snr = 1``: signal at least as strong as the noise) and
``floor + z * spread`` (default ``z = 6``: clear of the sampling scatter of noise eigenvalues). Data
mixing p endmembers span a (p-1)-dimensional affine subspace, so the suggestion is
``p = (signal components) + 1``. When the smaller half does not look like noise (median above 1.5,
e.g. only leading components were kept) the floor is taken as 1, the theoretical value.

Outputs
-------
The fitted model holds the endmembers' spectra, reduced values, pixel rows/columns and map
coordinates. :func:`endmember_library` turns it into a :class:`swathmill.workflows.inputs.library.SpectralLibrary`,
:func:`endmember_points` into a GeoJSON FeatureCollection of points; :func:`write_endmember_products`
writes both into a given folder.
"""
from __future__ import annotations

import json
import math
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal, Mapping, Sequence

import numpy as np
from pydantic import Field, ValidationError, model_validator

from swathmill.workflows.roles import Role
from swathmill.tiles.step import Block, Fit, InputMeta, OutputSpec, Step, StepError

from swathmill.workflows.params import Section, check_ref, validation_message
from swathmill.workflows.inputs.library import SpectralLibrary, write_library
from swathmill.errors import SwathmillError

__all__ = [
    "EXTRACTION_METHODS",
    "ExtractionSettings",
    "EndmemberError",
    "atgp",
    "nfindr",
    "vca",
    "simplex_volume",
    "suggest_endmember_count",
    "random_directions",
    "candidate_accumulate",
    "candidate_merge",
    "extraction_finalize",
    "extraction_fit",
    "extraction_params",
    "extraction_settings",
    "EndmemberParams",
    "extract_endmembers",
    "endmember_library",
    "endmember_points",
    "write_endmember_products",
    "EndmemberExtractionConfig",
    "endmember_fit_step",
    "build_steps",
]

EXTRACTION_METHODS = ("atgp", "nfindr", "vca")
_NO_KEY = np.iinfo(np.int64).max  # sorts after every pixel
_CHUNK = 4096


class EndmemberError(SwathmillError, ValueError):
    """Extraction cannot run as asked; the message names the parameter or input at fault."""


class ExtractionSettings(Section):
    """How endmembers are found in the image: the parameters shared by the ``endmembers`` section and
    the ``image`` endmember source of unmixing. Defaults and bounds are declared here only."""

    method: Literal["atgp", "nfindr", "vca"] = "nfindr"
    n_endmembers: int | None = Field(default=None, ge=2, le=64,
                                     description="null: suggested from the reduced input's MNF eigenvalues")
    n_dims: int | None = Field(default=None, ge=1, description="reduced dimensions used (null: n_endmembers - 1)")
    seed: int = Field(default=0, ge=0, description="seeds the candidate directions, N-FINDR's starts and VCA's "
                                                   "directions")
    n_directions: int = Field(default=512, ge=1, le=100_000, description="candidate directions (two extremes each)")
    n_brightest: int = Field(default=16, ge=1, le=10_000, description="brightest candidates kept")
    restarts: int = Field(default=5, ge=1, le=1000, description="N-FINDR starts")
    snr: float | None = Field(default=None, description="VCA's SNR in dB (null: estimated)")
    min_snr: float = Field(default=1.0, gt=0, description="suggestion rule: signal at least min_snr x noise")


@dataclass(frozen=True)
class EndmemberParams:
    """The parameter object of an endmember extraction step: its name and its extraction settings."""

    step: str
    extraction: ExtractionSettings


def extraction_params(method: str | None = None, n_endmembers: int | None = None, **fields: Any
                      ) -> ExtractionSettings:
    """Validated extraction settings from keywords (``method`` and ``n_endmembers`` may be positional).

    Raises :class:`EndmemberError` naming the key at fault.
    """
    if method is not None:
        fields["method"] = method
    if n_endmembers is not None:
        fields["n_endmembers"] = n_endmembers
    if "method" in fields and fields["method"] not in EXTRACTION_METHODS:
        raise EndmemberError(f"unknown extraction method {fields['method']!r}; choose one of "
                             f"{', '.join(EXTRACTION_METHODS)}")
    try:
        return ExtractionSettings(**fields)
    except ValidationError as e:
        raise EndmemberError(f"bad extraction setting(s): {validation_message(e)}") from None


def extraction_settings(params: Any) -> ExtractionSettings:
    """The extraction settings of a step's parameter object.

    ``params`` is the settings themselves, or an object whose ``extraction`` attribute holds them (an
    :class:`EndmemberParams`, or the parameters of an unmixing step with image endmembers).
    """
    if isinstance(params, ExtractionSettings):
        return params
    nested = getattr(params, "extraction", None)
    if isinstance(nested, ExtractionSettings):
        return nested
    raise EndmemberError(f"no extraction settings in the step parameters ({type(params).__name__})")


# --------------------------------------------------------------------------------------------------
# the methods


def simplex_volume(vertices: np.ndarray) -> float:
    """Volume of the simplex with p vertices in p-1 dimensions (rows of ``vertices``, (p, p-1)).

    ``|det [1'; E']| / (p-1)!`` (Winter, 1999), through ``slogdet``.
    """
    v = np.asarray(vertices, dtype=np.float64)
    p = v.shape[0]
    if v.shape != (p, p - 1):
        raise EndmemberError(f"a simplex of {p} vertices needs {p - 1} dimensions. Got vertices {v.shape}")
    sign, logdet = np.linalg.slogdet(np.vstack([np.ones(p), v.T]))
    return 0.0 if sign == 0 else float(np.exp(logdet - math.lgamma(p)))


def _check_pixels(y: np.ndarray, p: int, dims: int, method: str) -> np.ndarray:
    y = np.asarray(y, dtype=np.float64)
    if y.ndim != 2:
        raise EndmemberError(f"{method}: pixels must be a (n, dims) matrix. Got shape {y.shape}")
    if p < 2:
        raise EndmemberError(f"{method}: needs at least 2 endmembers. Got {p}")
    if y.shape[0] < p:
        raise EndmemberError(f"{method}: {p} endmembers need at least {p} pixels. Got {y.shape[0]}")
    if y.shape[1] < dims:
        raise EndmemberError(f"{method}: {p} endmembers need at least {dims} reduced dimensions. "
                             f"Got {y.shape[1]}")
    if not np.isfinite(y).all():
        raise EndmemberError(f"{method}: pixels contain NaN or infinite values")
    return y


def atgp(y: np.ndarray, p: int) -> np.ndarray:
    """Indices (p,) of the ATGP targets among the rows of ``y`` (n, dims >= p).

    Ties go to the first row.
    """
    y = _check_pixels(y, p, p, "ATGP")
    idx = [int(np.argmax(np.einsum("ij,ij->i", y, y)))]
    for _ in range(1, p):
        q, _r = np.linalg.qr(y[idx].T)
        res = y - (y @ q) @ q.T
        idx.append(int(np.argmax(np.einsum("ij,ij->i", res, res))))
    return np.asarray(idx, dtype=np.int64)


def nfindr(y: np.ndarray, p: int, *, seed: int = 0, restarts: int = 5, max_sweeps: int = 100
           ) -> tuple[np.ndarray, float]:
    """N-FINDR on the rows of ``y`` (n, dims >= p-1), using the first p-1 columns.

    Returns
    -------
    (indices (p,), volume) of the largest simplex found over ``restarts`` seeded starts.
    """
    y = _check_pixels(y, p, p - 1, "N-FINDR")
    z = np.vstack([np.ones(y.shape[0]), y[:, : p - 1].T])  # (p, n): [1; y]
    rng = np.random.default_rng(seed)
    best_idx, best_log = None, -math.inf
    for _ in range(max(1, restarts)):
        idx = np.sort(rng.choice(y.shape[0], size=p, replace=False))
        for _sweep in range(max_sweeps):
            changed = False
            for j in range(p):
                e = z[:, idx]
                sign, _ = np.linalg.slogdet(e)
                if sign == 0:  # degenerate start: any pixel not on the current span grows it
                    cand = np.argmax(np.abs(z - z[:, idx[[k for k in range(p) if k != j]]].mean(axis=1,
                                            keepdims=True)).sum(axis=0))
                    idx[j] = cand
                    changed = True
                    continue
                row = np.linalg.solve(e.T, np.eye(p)[j])  # (E^-1)_j
                score = np.abs(row @ z)
                i = int(np.argmax(score))
                if score[i] > 1.0 + 1e-10 and i not in idx:
                    idx[j] = i
                    changed = True
            if not changed:
                break
        sign, logdet = np.linalg.slogdet(z[:, idx])
        if sign != 0 and logdet > best_log + 1e-12:
            best_idx, best_log = idx.copy(), logdet
    if best_idx is None:
        raise EndmemberError(f"N-FINDR: the pixels span fewer than {p - 1} dimensions; no simplex of {p} "
                             "vertices has a volume")
    return best_idx, float(np.exp(best_log - math.lgamma(p)))


def vca(y: np.ndarray, p: int, *, seed: int = 0, snr: float | None = None,
        stats: Mapping[str, Any] | None = None) -> tuple[np.ndarray, dict]:
    """VCA on the rows of ``y`` (n, dims >= p).

    Parameters
    ----------
    snr : the SNR in dB; None estimates it (Nascimento and Bioucas-Dias, 2005, eq. 13).
    stats : ``{"n", "sum", "outer"}`` of the whole image (count, sum of pixels, sum of outer
        products) when ``y`` holds only candidates; default: computed from ``y``.

    Returns
    -------
    (indices (p,), info) with the SNR used and the projection chosen.
    """
    y = _check_pixels(y, p, p, "VCA")
    dims = y.shape[1]
    if stats is None:
        n, s, o = y.shape[0], y.sum(axis=0), y.T @ y
    else:
        n, s, o = float(stats["n"]), np.asarray(stats["sum"], np.float64), np.asarray(stats["outer"], np.float64)
    mean = s / n
    corr = o / n
    cov = corr - np.outer(mean, mean)
    if snr is None:  # eq. 13 as computed in the authors' reference code: p principal components
        wc, vc = np.linalg.eigh(cov)
        up = vc[:, ::-1][:, :p]
        p_y = float(np.trace(corr))
        p_x = float(np.trace(up.T @ cov @ up)) + float(mean @ mean)
        if p_y - p_x <= 1e-12 * p_y:
            snr_used = math.inf
        else:
            ratio = (p_x - p / dims * p_y) / (p_y - p_x)
            snr_used = 10.0 * math.log10(ratio) if ratio > 0 else -math.inf
    else:
        snr_used = float(snr)
    threshold = 15.0 + 10.0 * math.log10(p)
    if snr_used > threshold:
        w, v = np.linalg.eigh(corr)
        ud = v[:, ::-1][:, :p]  # first p eigenvectors of the correlation matrix
        xp = y @ ud
        u = mean @ ud
        den = xp @ u
        if np.any(den <= 0):
            raise EndmemberError("VCA: the projective projection needs y'u > 0 for every pixel; the data are not "
                                 "in one half-space (use reflectance-like data or set a low snr)")
        yp = xp / den[:, None]
        projection = "projective"
    else:
        wc, vc = np.linalg.eigh(cov)
        ud = vc[:, ::-1][:, : p - 1]
        xp = (y - mean) @ ud
        c = float(np.sqrt(np.einsum("ij,ij->i", xp, xp).max()))
        yp = np.hstack([xp, np.full((xp.shape[0], 1), c)])
        projection = "pca"
    rng = np.random.default_rng(seed)
    a = np.zeros((p, p))
    a[p - 1, 0] = 1.0
    idx = np.zeros(p, dtype=np.int64)
    for i in range(p):
        wv = rng.normal(size=p)
        f = wv - a @ (np.linalg.pinv(a) @ wv)
        f /= np.linalg.norm(f)
        k = int(np.argmax(np.abs(yp @ f)))
        idx[i] = k
        a[:, i] = yp[k]
    return idx, {"snr_db": snr_used, "snr_threshold_db": threshold, "projection": projection}


def suggest_endmember_count(eigenvalues: Sequence[float], *, min_snr: float = 1.0, z: float = 6.0
                            ) -> tuple[int, dict]:
    """Suggested number of endmembers from MNF eigenvalues (rule in the module notes).

    Returns
    -------
    (p, info) with ``floor``, ``spread``, ``threshold`` and ``signal_components``.
    """
    lam = np.sort(np.asarray(eigenvalues, dtype=np.float64))[::-1]
    if lam.size < 4 or not np.isfinite(lam).all():
        raise EndmemberError(f"suggesting a number of endmembers needs at least 4 finite MNF eigenvalues. "
                             f"Got {lam.size}")
    low = lam[lam.size // 2:]
    floor = float(np.median(low))
    note = "median of the smaller half"
    if floor > 1.5:
        floor, note = 1.0, "theoretical (the smaller half of the eigenvalues does not look like noise)"
        warnings.warn("the smaller half of the MNF eigenvalues lies above 1.5: they do not look like noise "
                      "(were only leading components kept?); using the theoretical noise floor of 1",
                      UserWarning, stacklevel=2)
    spread = float(1.4826 * np.median(np.abs(low - np.median(low))))
    threshold = max(floor * (1.0 + min_snr), floor + z * spread)
    k = int(np.sum(lam > threshold))
    return k + 1, {"floor": floor, "floor_estimate": note, "spread": spread, "threshold": threshold,
                   "signal_components": k, "min_snr": min_snr, "z": z}


# --------------------------------------------------------------------------------------------------
# candidates, tile by tile


def random_directions(seed: int, dims: int, count: int) -> np.ndarray:
    """(dims, count) unit vectors drawn from the seed (the same in every tile)."""
    rng = np.random.default_rng([int(seed), int(dims), 0x5EED])
    d = rng.normal(size=(dims, count))
    return d / np.linalg.norm(d, axis=0)


def _key(rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    return (np.asarray(rows, dtype=np.int64) << 32) | np.asarray(cols, dtype=np.int64)


def _better(va: np.ndarray, ka: np.ndarray, vb: np.ndarray, kb: np.ndarray) -> np.ndarray:
    """True where (vb, kb) beats (va, ka): larger value, ties to the smaller key."""
    return (vb > va) | ((vb == va) & (kb < ka))


def _empty_acc(dims: int, nspec: int | None, ndir: int, nbright: int) -> dict:
    return {
        "n": 0, "sum": np.zeros(dims), "outer": np.zeros((dims, dims)),
        "max_val": np.full(ndir, -np.inf), "max_key": np.full(ndir, _NO_KEY, np.int64),
        "min_val": np.full(ndir, -np.inf), "min_key": np.full(ndir, _NO_KEY, np.int64),
        "top_val": np.full(nbright, -np.inf), "top_key": np.full(nbright, _NO_KEY, np.int64),
        "cand_key": np.empty(0, np.int64), "cand_y": np.empty((0, dims)),
        "cand_x": None if nspec is None else np.empty((0, nspec), np.float32),
    }


def _resolve_counts(params: ExtractionSettings, meta: Mapping[str, InputMeta] | None) -> tuple[int, int, dict]:
    """(p, dims, info): the number of endmembers (given or suggested) and reduced dimensions used."""
    info: dict[str, Any] = {}
    p = params.n_endmembers
    if p is None:
        spec = meta["reduced"].spec if meta and "reduced" in meta else None
        eig = None if spec is None else spec.coords.get("eigenvalue")
        if eig is None:
            raise EndmemberError("n_endmembers is not given and the reduced input has no 'eigenvalue' coordinate "
                                 "to suggest it from (give n_endmembers, or use MNF components as input)")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            p, info = suggest_endmember_count(np.asarray(eig, dtype=np.float64), min_snr=params.min_snr)
        info["rule"] = "MNF eigenvalues above the noise floor, plus one"
    p = int(p)
    dims = int(params.n_dims or p - 1)
    if meta and "reduced" in meta:
        have = len(meta["reduced"].spec.bands)
        if dims > have:
            raise EndmemberError(f"extraction uses {dims} reduced dimensions but input "
                                 f"{meta['reduced'].ref!r} has {have} bands")
    need = p - 1
    if dims < need:
        raise EndmemberError(f"{params.method} with {p} endmembers needs at least {need} reduced "
                             f"dimensions. Got n_dims = {dims}")
    return p, dims, info


def candidate_accumulate(block: Block) -> dict:
    """Per tile: extreme pixels along the seeded directions, the brightest pixels, and moments.

    Reads ``block.data["reduced"]`` (first ``dims`` bands) and, when present, ``block.data["spectra"]``
    over the tile core.
    """
    params = extraction_settings(block.params)
    _p, dims, _ = _resolve_counts(params, block.meta)
    ndir, nbright = int(params.n_directions), int(params.n_brightest)
    crop = block.tile.crop
    red = block.data["reduced"][:dims][:, crop[0], crop[1]]
    spec_in = block.data.get("spectra")
    spec = None if spec_in is None else spec_in[:, crop[0], crop[1]]
    acc = _empty_acc(dims, None if spec is None else spec.shape[0], ndir, nbright)
    ok = block.core_valid & np.all(np.isfinite(red), axis=0)
    if spec is not None:
        ok &= np.all(np.isfinite(spec), axis=0)
    rr, cc = np.nonzero(ok)  # row-major: ties resolve to the smaller (row, col) within the tile
    if rr.size == 0:
        return acc
    core = block.tile.core
    keys = _key(rr + core.row, cc + core.col)
    y = red[:, rr, cc].astype(np.float64)  # (dims, n)
    acc["n"] = int(rr.size)
    acc["sum"] = y.sum(axis=1)
    acc["outer"] = y @ y.T
    dirs = random_directions(int(params.seed), dims, ndir)
    for lo in range(0, rr.size, _CHUNK):
        hi = min(lo + _CHUNK, rr.size)
        proj = dirs.T @ y[:, lo:hi]  # (ndir, m)
        for sign, vk, kk in ((1.0, "max_val", "max_key"), (-1.0, "min_val", "min_key")):
            v = sign * proj
            i = np.argmax(v, axis=1)
            val = v[np.arange(ndir), i]
            take = _better(acc[vk], acc[kk], val, keys[lo + i])
            acc[vk] = np.where(take, val, acc[vk])
            acc[kk] = np.where(take, keys[lo + i], acc[kk])
    norm = np.einsum("ij,ij->j", y, y)
    order = np.lexsort((keys, -norm))[:nbright]
    acc["top_val"][: order.size] = norm[order]
    acc["top_key"][: order.size] = keys[order]
    want = np.unique(np.concatenate([acc["max_key"], acc["min_key"], acc["top_key"]]))
    want = want[want != _NO_KEY]
    pos = np.searchsorted(keys, want)  # keys are increasing in row-major order
    acc["cand_key"] = want
    acc["cand_y"] = np.ascontiguousarray(y[:, pos].T)
    if spec is not None:
        acc["cand_x"] = np.ascontiguousarray(spec[:, rr[pos], cc[pos]].T, dtype=np.float32)
    return acc


def candidate_merge(a: dict | None, b: dict | None) -> dict | None:
    """Merge two candidate accumulators (associative and commutative)."""
    if a is None:
        return b
    if b is None:
        return a
    out = {"n": a["n"] + b["n"], "sum": a["sum"] + b["sum"], "outer": a["outer"] + b["outer"]}
    for vk, kk in (("max_val", "max_key"), ("min_val", "min_key")):
        take = _better(a[vk], a[kk], b[vk], b[kk])
        out[vk] = np.where(take, b[vk], a[vk])
        out[kk] = np.where(take, b[kk], a[kk])
    tv = np.concatenate([a["top_val"], b["top_val"]])
    tk = np.concatenate([a["top_key"], b["top_key"]])
    order = np.lexsort((tk, -tv))[: a["top_val"].size]
    out["top_val"], out["top_key"] = tv[order], tk[order]
    keys = np.concatenate([a["cand_key"], b["cand_key"]])
    ys = np.concatenate([a["cand_y"], b["cand_y"]])
    xs = None if a["cand_x"] is None else np.concatenate([a["cand_x"], b["cand_x"]])
    want = np.unique(np.concatenate([out["max_key"], out["min_key"], out["top_key"]]))
    want = want[want != _NO_KEY]
    uk, first = np.unique(keys, return_index=True)
    pos = first[np.searchsorted(uk, want)]
    out["cand_key"] = want
    out["cand_y"] = ys[pos]
    out["cand_x"] = None if xs is None else xs[pos]
    return out


def _homogeneous(y: np.ndarray) -> tuple[np.ndarray, float]:
    """``[y, c]`` with ``c`` the largest norm of the rows of ``y``: centred components of a p-vertex
    simplex span only p-1 dimensions, and ATGP and VCA need the p vertices linearly independent."""
    c = float(np.sqrt(np.einsum("ij,ij->i", y, y).max())) or 1.0
    return np.hstack([y, np.full((y.shape[0], 1), c)]), c


def _select(method: str, y: np.ndarray, p: int, params: ExtractionSettings, stats: Mapping[str, Any] | None
            ) -> tuple[np.ndarray, dict]:
    seed = int(params.seed)
    if method == "atgp":
        yh, c = _homogeneous(y)
        return atgp(yh, p), {"constant": c}
    if method == "nfindr":
        idx, vol = nfindr(y, p, seed=seed, restarts=int(params.restarts))
        return idx, {"volume": vol}
    if method == "vca":
        yh, c = _homogeneous(y)
        hstats = None
        if stats is not None:  # moments of [y, c]
            n, s, o = float(stats["n"]), np.asarray(stats["sum"]), np.asarray(stats["outer"])
            d = s.size
            so = np.zeros((d + 1, d + 1))
            so[:d, :d], so[:d, d], so[d, :d], so[d, d] = o, c * s, c * s, c * c * n
            hstats = {"n": n, "sum": np.r_[s, c * n], "outer": so}
        idx, info = vca(yh, p, seed=seed, snr=params.snr, stats=hstats)
        info["constant"] = c
        return idx, info
    raise EndmemberError(f"unknown extraction method {method!r}; choose one of {', '.join(EXTRACTION_METHODS)}")


def extraction_finalize(acc: dict | None, params: Any, meta: Mapping[str, InputMeta]) -> dict:
    """The global selection on the merged candidates; returns the endmember model (see the module notes).

    ``params``: the extraction settings or a parameter object holding them (:func:`extraction_settings`).
    """
    params = extraction_settings(params)
    p, dims, info = _resolve_counts(params, meta)
    method = params.method
    if "wavelength" in meta["reduced"].spec.coords:
        warnings.warn(f"endmember extraction runs on the first {dims} bands of {meta['reduced'].ref!r}, which has "
                      "wavelengths: it looks like reflectance, not reduced data; give MNF or PCA components",
                      UserWarning, stacklevel=2)
    if acc is None or acc["cand_key"].size < p:
        got = 0 if acc is None else int(acc["cand_key"].size)
        raise EndmemberError(f"endmember extraction found {got} candidate pixel(s) for {p} endmembers: too few "
                             "valid pixels (check nodata and the input)")
    keys = acc["cand_key"]  # sorted: candidates in row-major order
    y = acc["cand_y"]
    stats = {"n": acc["n"], "sum": acc["sum"], "outer": acc["outer"]}
    idx, extra = _select(method, y, p, params, stats)
    if len(set(idx.tolist())) < p:
        raise EndmemberError(f"{method} picked the same pixel twice: the data hold fewer than {p} distinct "
                             "extreme pixels (reduce n_endmembers)")
    rows, cols = keys[idx] >> 32, keys[idx] & 0xFFFFFFFF
    ref = meta["reduced"]
    t = ref.grid.transform
    xs = [float(t.c + t.a * (c + 0.5) + t.b * (r + 0.5)) for r, c in zip(rows, cols)]
    ys = [float(t.f + t.d * (c + 0.5) + t.e * (r + 0.5)) for r, c in zip(rows, cols)]
    names = [f"em_{i + 1}" for i in range(p)]
    model: dict[str, Any] = {
        "method": method, "names": names, "n_endmembers": p, "n_dims": dims,
        "rows": rows.astype(np.int64), "cols": cols.astype(np.int64), "x": xs, "y": ys, "crs": ref.grid.crs,
        "reduced": y[idx], "n_candidates": int(keys.size), "n_pixels": int(acc["n"]),
        "seed": int(params.seed), "suggestion": info, "selection": _jsonable(extra),
    }
    if acc["cand_x"] is not None:
        model["spectra"] = acc["cand_x"][idx].astype(np.float64)
        sm = meta.get("spectra")
        wl = None if sm is None else sm.spec.coords.get("wavelength")
        model["spectra_bands"] = list(sm.spec.bands) if sm is not None else []
        if wl is not None:
            model["wavelengths"] = np.asarray(wl, dtype=np.float64)
    return model


def _jsonable(d: Mapping[str, Any]) -> dict:
    out = {}
    for k, v in d.items():
        if isinstance(v, float) and not math.isfinite(v):
            out[k] = str(v)
        elif isinstance(v, np.generic):
            out[k] = v.item()
        else:
            out[k] = v
    return out


def extraction_fit() -> Fit:
    """The engine fit phase: :func:`candidate_accumulate`, :func:`candidate_merge`,
    :func:`extraction_finalize` (the settings are read by :func:`extraction_settings`)."""
    return Fit(accumulate=candidate_accumulate, merge=candidate_merge, finalize=extraction_finalize)


def extract_endmembers(reduced: np.ndarray, spectra: np.ndarray | None = None, *, method: str | None = None,
                       n_endmembers: int | None = None, eigenvalues: Sequence[float] | None = None,
                       **kw: Any) -> dict:
    """Whole-array extraction (one tile): ``reduced`` (dims, rows, cols), optional ``spectra``
    (bands, rows, cols). Same candidates and selection as the tiled fit. Returns the model.

    ``method``, ``n_endmembers`` and the keywords ``kw`` are :class:`ExtractionSettings` fields.
    Without ``n_endmembers``, it is suggested from ``eigenvalues`` (all MNF eigenvalues, which may be
    more than the reduced bands given).
    """
    from swathmill.tiles.grid import Grid, Tiling
    from affine import Affine

    red = np.asarray(reduced, dtype=np.float32)
    grid = Grid(red.shape[1], red.shape[2], Affine.identity(), "EPSG:4326")
    tile = Tiling(grid, max(red.shape[1:]))[0, 0]
    suggestion = None
    if n_endmembers is None and eigenvalues is not None:
        min_snr = extraction_params(method, None, **kw).min_snr
        n_endmembers, suggestion = suggest_endmember_count(eigenvalues, min_snr=min_snr)
    params = extraction_params(method, n_endmembers, **kw)
    meta = {"reduced": InputMeta("src/reduced", grid, OutputSpec(tuple(f"c{i}" for i in range(red.shape[0])),
                                                                  "float32", float("nan")))}
    data = {"reduced": red}
    valid = np.all(np.isfinite(red), axis=0)
    if spectra is not None:
        sp = np.asarray(spectra, dtype=np.float32)
        data["spectra"] = sp
        meta["spectra"] = InputMeta("src/spectra", grid, OutputSpec(tuple(f"b{i}" for i in range(sp.shape[0])),
                                                                     "float32", float("nan")))
    block = Block(data=data, valid=valid, tile=tile, grid=grid, params=params, static={}, meta=meta)
    model = extraction_finalize(candidate_accumulate(block), params, meta)
    if suggestion is not None:
        model["suggestion"] = suggestion
    return model


# --------------------------------------------------------------------------------------------------
# products


def endmember_library(model: Mapping[str, Any], *, source: str = "image endmembers") -> SpectralLibrary:
    """The extracted endmembers' spectra as a :class:`SpectralLibrary` (needs a ``spectra`` input
    with a wavelength coordinate). Takes the model of :func:`endmember_fit_step` or of an unmixing
    step with image endmembers (:func:`swathmill.workflows.methods.unmix.unmix_step`)."""
    if "spectra" not in model or "wavelengths" not in model:
        raise EndmemberError("the extraction has no spectra with wavelengths: give the fit a 'spectra' input "
                             "(the reflectance cube) to write the endmembers as a library")
    names = model.get("extracted_names", model["names"])  # an unmixing model may add a shade endmember
    return SpectralLibrary(tuple(names), np.asarray(model["wavelengths"], dtype=np.float64),
                           np.asarray(model["spectra"], dtype=np.float64), source=source)


def endmember_points(model: Mapping[str, Any]) -> dict:
    """The endmembers' pixel centres as a GeoJSON FeatureCollection (coordinates in the grid's CRS,
    named in a ``crs`` member as the 2008 GeoJSON draft did; RFC 7946 readers assume WGS 84)."""
    feats = []
    for i, name in enumerate(model.get("extracted_names", model["names"])):
        feats.append({"type": "Feature",
                      "geometry": {"type": "Point", "coordinates": [float(model["x"][i]), float(model["y"][i])]},
                      "properties": {"name": name, "order": i + 1, "row": int(model["rows"][i]),
                                     "col": int(model["cols"][i]), "method": model["method"]}})
    return {"type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": str(model["crs"])}},
            "features": feats}


def write_endmember_products(model: Mapping[str, Any], folder: str | Path, stem: str) -> list[Path]:
    """Write ``<stem>_endmembers.csv`` (library, when spectra with wavelengths exist) and
    ``<stem>_endmembers.geojson`` into ``folder``; returns the paths written."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    out = []
    pts = folder / f"{stem}_endmembers.geojson"
    pts.write_text(json.dumps(endmember_points(model), indent=1))
    out.append(pts)
    if "spectra" in model and "wavelengths" in model:
        out.append(write_library(endmember_library(model), folder / f"{stem}_endmembers.csv", precision=0))
    return out


# --------------------------------------------------------------------------------------------------
# step factory and configuration


def _locations_kernel(block: Block, model: Mapping[str, Any] | None) -> dict[str, np.ndarray]:
    """Class map of the endmember pixels: i at the pixel of endmember i, 0 elsewhere."""
    if model is None:
        raise EndmemberError("the endmember locations kernel needs the fitted extraction model")
    pad = block.tile.padded
    out = np.zeros((1,) + block.valid.shape, dtype=np.uint8)
    rows, cols = np.asarray(model["rows"]), np.asarray(model["cols"])
    inside = pad.contains(rows, cols)
    for i in np.flatnonzero(inside):
        out[0, rows[i] - pad.row, cols[i] - pad.col] = i + 1
    return {"locations": out}


def _locations_outputs(meta: Mapping[str, InputMeta], model: Mapping[str, Any] | None,
                       params: EndmemberParams) -> dict[str, OutputSpec]:
    if model is None:
        raise StepError(f"step {params.step!r}: its outputs depend on the fitted endmembers")
    return {"locations": OutputSpec(bands=("endmember",), dtype="uint8", nodata=0, kind="categorical",
                                    role=Role.DIAGNOSTIC,
                                    class_names=tuple(model["names"]),
                                    attrs={"method": model["method"],
                                           "long_name": "pixels chosen as endmembers (class i = endmember i)"})}


def endmember_fit_step(name: str, reduced_ref: str, spectra_ref: str | None = None, *,
                       settings: ExtractionSettings | None = None, **fields: Any) -> Step:
    """A step that finds endmembers in the image (its fitted model) and maps their pixels.

    Parameters
    ----------
    name : step name.
    reduced_ref : "step/output" of MNF or PCA components (first ``n_dims`` bands are used).
    spectra_ref : "step/output" of the cube whose spectra the endmembers take (e.g.
        "mosaic/reflectance"); None keeps the reduced values only.
    settings : an :class:`ExtractionSettings` (or a section derived from it); or its fields as keywords:
        ``method`` ("atgp", "nfindr" or "vca"), ``n_endmembers`` (p; None suggests it from the reduced
        input's ``eigenvalue`` coordinate), ``n_dims`` (default p - 1), ``seed`` (the candidate
        directions, N-FINDR's starts and VCA's directions), ``n_directions`` and ``n_brightest``
        (candidates kept per direction, its two extremes, and by brightness), ``restarts`` (N-FINDR
        starts), ``snr`` (VCA's SNR in dB; None: estimated), ``min_snr`` (for the suggested count).

    Returns
    -------
    Step with output ``locations`` (uint8 class map, class i at the pixel of endmember i). The model
    (``names``, ``rows``, ``cols``, ``x``, ``y``, ``spectra``, ``wavelengths``, ``reduced``, ...) is
    what :func:`endmember_library` and :func:`endmember_points` read. Its parameter object is an
    :class:`EndmemberParams`.
    """
    if settings is not None:
        if fields:
            raise EndmemberError(f"step {name!r}: give the settings object or keyword settings, not both. "
                                 f"Got settings and {sorted(fields)}")
        extraction = (settings if type(settings) is ExtractionSettings else
                      ExtractionSettings.model_validate(settings.model_dump(include=set(ExtractionSettings.model_fields))))
    else:
        extraction = extraction_params(**fields)
    inputs = {"reduced": reduced_ref}
    if spectra_ref is not None:
        inputs["spectra"] = spectra_ref
    return Step(name=name, kernel=_locations_kernel, outputs=_locations_outputs, inputs=inputs,
                params=EndmemberParams(step=name, extraction=extraction), fit=extraction_fit())


class EndmemberExtractionConfig(ExtractionSettings):
    """The ``endmembers`` section: endmembers found in the image.

    YAML shape (all keys optional)::

        endmembers:
          name: endmembers              # step name
          method: nfindr                # atgp | nfindr | vca
          input: mnf/components         # reduced data (MNF or PCA components)
          spectra: mosaic/reflectance   # spectra the endmembers take (null: reduced values only)
          n_endmembers: null            # null: suggested from the MNF eigenvalues
          n_dims: null                  # reduced dimensions used (default n_endmembers - 1)
          seed: 0
          n_directions: 512             # candidate directions per tile (two extremes each)
          n_brightest: 16               # brightest candidates per tile
          restarts: 5                   # N-FINDR starts
          snr: null                     # VCA SNR in dB (null: estimated)
          min_snr: 1.0                  # suggestion rule: signal at least min_snr x noise
    """

    name: str = "endmembers"
    input: str = "mnf/components"
    spectra: str | None = "mosaic/reflectance"

    @model_validator(mode="after")
    def _check(self) -> "EndmemberExtractionConfig":
        for key in ("input", "spectra"):
            check_ref(getattr(self, key), key)
        return self


def build_steps(section: EndmemberExtractionConfig, ctx: Any = None) -> list[Step]:
    """``[endmember_fit_step(...)]`` for the ``endmembers`` section (``ctx`` is not needed)."""
    if not isinstance(section, EndmemberExtractionConfig):
        raise EndmemberError(f"build_steps takes an EndmemberExtractionConfig. Got {type(section).__name__}")
    return [endmember_fit_step(section.name, section.input, section.spectra, settings=section)]
