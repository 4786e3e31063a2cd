"""Minimum noise fraction (MNF) and principal component (PCA) transforms of the whole mosaic.

The MNF transform (Green, Berman, Switzer and Craig, 1988, IEEE TGRS 26(1):65-74) rotates the cube
into components ordered by signal-to-noise ratio: it solves the generalized symmetric eigenproblem
``S v = lambda N v`` with ``S`` the data covariance and ``N`` the noise covariance, so that
``V' N V = I``, ``V' S V = diag(lambda)`` and ``lambda = SNR + 1``. PCA is the same machinery with the
identity as noise covariance.

How the statistics are gathered, tile by tile
---------------------------------------------
* Per tile, :func:`accumulate` returns the count, mean and M2 (sum of centred outer products) of the
  valid pixels of the tile core, and the same moments of the shift differences
  ``z(r, c) - z(r, c + 1)`` (horizontal) and ``z(r, c) - z(r + 1, c)`` (vertical). Everything is in
  float64 and centred per tile (in row chunks, merged within the tile), so a large mean does not eat
  the precision of the covariance.
* A tile counts the difference pairs inside its core. For the pairs across its borders it keeps its
  first and last rows and columns (:class:`Strip`, keyed by the border's position in the grid), and
  :func:`merge` pairs the two strips of a border when the tiles on both sides meet. So every pair of
  the mosaic is counted exactly once, whatever the tiling, and no tile reads a halo (for a one-pixel
  halo zarr decodes the neighbours' whole inner chunks, which tripled the fit's reading time in
  ``tests/benchmarks/bench_mnf.py``). Pairs touching an invalid pixel (nodata, or any non-finite
  band) are left out.
* The step reads stored values (e.g. int16 reflectance x 10000): moments of the stored values are
  exact in float64, and :func:`finalize` turns them into moments of physical values with the input's
  CF ``scale_factor`` and ``add_offset`` (means scale and shift, covariances scale by the square).
* :func:`merge` combines two accumulators with the pairwise update of Chan, Golub and LeVeque (1979):
  ``delta = mu_B - mu_A``, ``M2 = M2_A + M2_B + delta delta' n_A n_B / n``. It is associative up to
  float64 round-off, so the engine may merge in any tree.
* :func:`finalize` turns the merged moments into the model: ``S = M2 / (n - 1)``; the noise covariance
  of one direction is half the covariance of its differences (``Cov(z(x) - z(x + d)) = 2 N`` for a
  smooth signal and white noise), and with both directions the two estimates are averaged (common
  practice). Then ``scipy.linalg.eigh(S, N)``, reversed to decreasing eigenvalues, each eigenvector's
  largest loading made positive.

Near-singular noise covariance
------------------------------
Constant or saturated bands have (almost) no noise variance, and duplicated bands (or bands that are
a linear combination of others) make ``N`` singular; ``eigh`` then fails. :func:`screen_noise_bands`
finds them by name: a band whose noise variance is at most ``singular_tolerance`` times the median
noise variance, or whose noise, in correlation units, is explained by the earlier bands up to a
residual of at most ``singular_tolerance``. ``singular="exclude"`` (default) leaves them out of the
transform (the denoised output passes them through unchanged), ``"regularize"`` adds
``regularization * mean(diag N)`` to the diagonal of ``N``, ``"error"`` refuses. Each case names the
bands in a warning or in the error.

Sampling for speed
------------------
``tile_fraction < 1`` fits on a seeded random subset of tiles (:func:`select_tiles`, the engine's
``Fit.select``; pairs across a border count only when both tiles are in the subset);
``pixel_fraction < 1`` keeps a pixel when a hash of (seed, global row, global column) falls below
the fraction, so the pixel sample does not depend on the tiling. Both are recorded in the model
under ``"selection"``. ``tests/benchmarks/bench_mnf.py`` prints what each costs and how far the
sampled model is from the whole fit.

Model
-----
A dict of numpy arrays and JSON values (saved by the engine as JSON plus npz):

``method``, ``bands`` (all input band names), ``used_bands`` and ``band_index`` (the bands that enter
the transform), ``excluded_bands`` ({band: reason}, left out), ``flagged_bands`` ({band: reason}, found
by the screening, excluded or regularized), ``mean`` (p,), ``eigenvalues`` (p,) in decreasing
order, ``eigenvectors`` (p, p) with components as columns, ``inverse`` (p, p) = V^-1 = V' N (rows are
components), ``data_covariance`` and ``noise_covariance`` (p, p; identity for PCA), ``regularization``
(ridge added to N, 0 if none), ``n_components`` (kept), ``n_pixels``, ``n_noise_pairs``
({direction: count}), ``selection``.

With pixels as rows, forward ``Y = (X - mu) V[:, :k]``; inverse ``X = mu + Y V^-1[:k]`` (exact with all
components); denoising keeps k components.

Steps
-----
:func:`mnf_steps` builds the fit+forward step (named after the method, output ``components`` with
bands ``mnf_1..k`` or ``pca_1..k``) and, when ``denoise_components`` is set, a denoising step
(``<name>_denoised``, output ``reflectance`` on the original bands). The denoising step reads the
forward step's components and the cube; the mean and the inverse rows it needs travel in the
components' output attributes (``attrs["inverse_transform"]``), so the fit runs once. The forward
transform travels the same way (``attrs["forward_transform"]``: mean, the kept eigenvectors, the bands
they take with their wavelengths and FWHM), so a step on the components (e.g. unmixing with library
endmembers) can move spectra into component space from its input's metadata, and every step of a run
can be built before any runs.

Both steps take the validated :class:`MnfConfig` itself as their parameter object (``Step.params``);
defaults and bounds live only on its fields.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Any, Literal, Mapping, Sequence

import numpy as np
import scipy.linalg
from pydantic import Field, field_validator, model_validator

from swathmill.tiles.grid import Tile, Window
from swathmill.tiles.samples import pixel_sample_mask
from swathmill.workflows.roles import Role
from swathmill.tiles.step import Block, Fit, InputMeta, OutputSpec, Step, StepError
from swathmill.tiles.store import copy_bands, index_runs, scale_offset
from swathmill.errors import SwathmillError
from swathmill.workflows.params import Section

__all__ = [
    "FORWARD_TRANSFORM",
    "INVERSE_TRANSFORM",
    "MnfConfig",
    "NoiseArea",
    "MnfError",
    "MnfWarning",
    "Moments",
    "MnfAccumulator",
    "moments",
    "merge_moments",
    "accumulate",
    "merge",
    "finalize",
    "select_tiles",
    "screen_noise_bands",
    "keep_components",
    "pixel_sample_mask",
    "forward",
    "inverse",
    "denoise",
    "forward_kernel",
    "denoise_kernel",
    "mnf_steps",
]

CUBE = "cube"  # input alias of the cube in both steps
COMPONENTS = "components"  # output of the forward step, input alias of the denoising step
FORWARD_TRANSFORM = "forward_transform"  # attribute of the components: the transform from the cube's bands
INVERSE_TRANSFORM = "inverse_transform"  # attribute of the components: the transform back to the cube's bands
_DIRECTIONS = {"both": ("horizontal", "vertical"), "horizontal": ("horizontal",), "vertical": ("vertical",)}
_CHUNK_VALUES = 2_000_000  # float64 values per working chunk (16 MB) in accumulate and the kernels


class MnfError(SwathmillError, ValueError):
    """The MNF/PCA fit or transform cannot proceed; the message names the band, tile or key at fault."""


class MnfWarning(UserWarning):
    """A recoverable problem in the MNF fit (bands excluded or regularized)."""


# --------------------------------------------------------------------------------------------------
# configuration


class NoiseArea(Section):
    """A homogeneous area to estimate the noise from: a pixel window or a polygon (one of them).

    window: ``[row, col, rows, cols]`` in the pixel coordinates of the mosaic grid.
    polygon: exterior ring as ``[[x, y], ...]`` in the grid's CRS, or a WKT polygon string.
    A difference pair enters the noise estimate only when both of its pixels lie in the area (pixel
    centres for the polygon).
    """

    window: tuple[int, int, int, int] | None = None
    polygon: list[tuple[float, float]] | str | None = None

    @field_validator("window")
    @classmethod
    def _check_window(cls, v: tuple[int, int, int, int] | None) -> tuple[int, int, int, int] | None:
        if v is not None:
            row, col, rows, cols = v
            if row < 0 or col < 0 or rows <= 0 or cols <= 0:
                raise ValueError(f"window must be [row >= 0, col >= 0, rows > 0, cols > 0]. Got {list(v)}")
        return v

    @field_validator("polygon")
    @classmethod
    def _check_polygon(cls, v: list[tuple[float, float]] | str | None) -> list[tuple[float, float]] | str | None:
        if v is not None:
            _polygon(v)  # raises with a clear message
        return v

    @model_validator(mode="after")
    def _one_of(self) -> "NoiseArea":
        if (self.window is None) == (self.polygon is None):
            raise ValueError("noise_area needs exactly one of 'window' or 'polygon'. "
                             f"Got window={self.window!r}, polygon={self.polygon!r}")
        return self


class MnfConfig(Section):
    """The ``mnf`` section of a run config.

    YAML shape (all keys optional)::

        mnf:
          method: mnf              # mnf | pca
          name: null               # step name; default: the method ("mnf" or "pca")
          components: 20           # keep this many components, or
          min_eigenvalue: null     #   keep components with eigenvalue >= this, or
          cumulative_fraction: null  # keep the fewest components reaching this fraction of the eigenvalue sum
          noise_direction: both    # both | horizontal | vertical (MNF only)
          noise_area: null         # {window: [row, col, rows, cols]} or {polygon: [[x, y], ...] | WKT}
          tile_fraction: 1.0       # fit on a seeded random subset of tiles
          pixel_fraction: 1.0      # fit on a seeded random subset of pixels
          seed: 0
          singular: exclude        # exclude | regularize | error (near-singular noise covariance)
          singular_tolerance: 1.0e-8
          regularization: 1.0e-6   # ridge, relative to the mean noise variance, for singular: regularize
          denoise_components: null # k: add a step returning reflectance rebuilt from k components

    With none of ``components``, ``min_eigenvalue``, ``cumulative_fraction`` all components are kept.

    The section is the parameter object of both steps (``Step.params``): the accumulator, the tile
    selection, the finalizer and the kernels read its attributes.
    """

    method: Literal["mnf", "pca"] = "mnf"
    name: str | None = None
    components: int | None = Field(default=None, gt=0)
    min_eigenvalue: float | None = Field(default=None, gt=0)
    cumulative_fraction: float | None = Field(default=None, gt=0, le=1)
    noise_direction: Literal["both", "horizontal", "vertical"] = "both"
    noise_area: NoiseArea | None = None
    tile_fraction: float = Field(default=1.0, gt=0, le=1)
    pixel_fraction: float = Field(default=1.0, gt=0, le=1)
    seed: int = Field(default=0, ge=0)
    singular: Literal["exclude", "regularize", "error"] = "exclude"
    singular_tolerance: float = Field(default=1e-8, gt=0, lt=1)
    regularization: float = Field(default=1e-6, gt=0)
    denoise_components: int | None = Field(default=None, gt=0)

    @model_validator(mode="after")
    def _consistent(self) -> "MnfConfig":
        given = [k for k in ("components", "min_eigenvalue", "cumulative_fraction") if getattr(self, k) is not None]
        if len(given) > 1:
            raise ValueError(f"give at most one of components, min_eigenvalue, cumulative_fraction. Got {given}")
        if self.method == "pca" and self.noise_area is not None:
            raise ValueError("noise_area has no effect with method 'pca' (PCA uses no noise estimate); remove it")
        if self.components is not None and self.denoise_components is not None \
                and self.denoise_components > self.components:
            raise ValueError(f"denoise_components ({self.denoise_components}) cannot exceed components "
                             f"({self.components})")
        if self.name is not None:
            n = self.name
            if not n or "/" in n or not n.replace("_", "").replace("-", "").isalnum():
                raise ValueError(f"name must be letters, digits, '_' or '-'. Got {n!r}")
        return self

    @property
    def step_name(self) -> str:
        return self.name or self.method


# --------------------------------------------------------------------------------------------------
# moments and their pairwise merge


@dataclass(frozen=True)
class Moments:
    """Count, mean and M2 (sum of centred outer products) of a set of vectors, in float64."""

    n: int
    mean: np.ndarray  # (p,)
    m2: np.ndarray  # (p, p)

    @classmethod
    def empty(cls, p: int) -> "Moments":
        return cls(0, np.zeros(p), np.zeros((p, p)))

    @property
    def p(self) -> int:
        return int(self.mean.shape[0])

    def covariance(self, ddof: int = 1) -> np.ndarray:
        if self.n - ddof <= 0:
            raise MnfError(f"a covariance needs more than {ddof} sample(s). Got {self.n}")
        return self.m2 / (self.n - ddof)


def moments(x: np.ndarray) -> Moments:
    """Moments of the columns of ``x`` (p, n), centred on their own mean, in float64."""
    return _moments_inplace(np.array(x, dtype=np.float64))


def _moments_inplace(x: np.ndarray) -> Moments:
    """Moments of the columns of a float64 array (p, n) that may be overwritten (centred in place)."""
    p, n = x.shape
    if n == 0:
        return Moments.empty(p)
    mean = x.mean(axis=1)
    x -= mean[:, None]
    m2 = x @ x.T  # numpy uses a symmetric rank-k update for a @ a.T
    m2 = 0.5 * (m2 + m2.T)
    return Moments(n, mean, m2)


def merge_moments(a: Moments, b: Moments) -> Moments:
    """Pairwise merge of two moments (Chan, Golub and LeVeque, 1979)."""
    if a.p != b.p:
        raise MnfError(f"cannot merge statistics of {a.p} and {b.p} bands")
    if a.n == 0:
        return b
    if b.n == 0:
        return a
    n = a.n + b.n
    delta = b.mean - a.mean
    mean = a.mean + delta * (b.n / n)
    m2 = a.m2 + b.m2 + np.outer(delta, delta) * (a.n * b.n / n)
    return Moments(n, mean, m2)


@dataclass(frozen=True)
class Strip:
    """One border row or column of a tile core, kept until the tile across that border is merged.

    values: (p, L) the pixels as read (stored values in the engine); mask: (L,) the pixels that may
    enter a difference pair (as its first pixel for ``first`` strips, its second otherwise).
    """

    values: np.ndarray
    mask: np.ndarray
    first: bool


@dataclass(frozen=True)
class MnfAccumulator:
    """What one tile (or a merged group of tiles) contributes to the fit.

    data: moments of the valid pixels; noise: direction -> moments of the shift differences (empty for
    PCA); tiles: indices of the tiles seen; edges: border strips still waiting for their neighbour,
    keyed by (direction, border coordinate, start): a border between two tiles has the same key on
    both sides; stored: whether the values are stored values (scaled in :func:`finalize`).
    """

    data: Moments
    noise: Mapping[str, Moments] = field(default_factory=dict)
    tiles: tuple[tuple[int, int], ...] = ()
    edges: Mapping[tuple[str, int, int], Strip] = field(default_factory=dict)
    stored: bool = False


# --------------------------------------------------------------------------------------------------
# accumulate / merge / select / finalize


def _polygon(spec: Sequence[Sequence[float]] | str):
    import shapely
    import shapely.wkt
    from shapely.geometry import Polygon

    try:
        geom = shapely.wkt.loads(spec) if isinstance(spec, str) else Polygon([tuple(p) for p in spec])
    except Exception as exc:  # shapely raises several types
        raise ValueError(f"noise_area polygon is not a valid polygon: {exc}. Got {spec!r}") from exc
    if geom.geom_type not in ("Polygon", "MultiPolygon") or geom.is_empty or geom.area <= 0:
        raise ValueError(f"noise_area polygon must be a polygon with a positive area. Got {geom.wkt[:200]}")
    return geom


def _area_mask(block: Block, area: NoiseArea | None) -> np.ndarray | None:
    """Boolean mask (padded rows, cols) of the noise area, or None when there is no area."""
    if area is None:
        return None
    pr, pc = block.tile.padded.row, block.tile.padded.col
    rows, cols = block.tile.padded.shape
    if area.window is not None:
        r0, c0, nr, nc = (int(v) for v in area.window)
        return Window(r0, c0, nr, nc).contains(np.arange(pr, pr + rows)[:, None], np.arange(pc, pc + cols)[None, :])
    import shapely

    geom = _polygon(area.polygon)
    t = block.grid.transform
    jj, ii = np.meshgrid(np.arange(cols) + 0.5, np.arange(rows) + 0.5)
    x = t.a * jj + t.b * ii + t.c
    y = t.d * jj + t.e * ii + t.f
    return shapely.contains_xy(geom, x, y)


def _ok_mask(x: np.ndarray, valid: np.ndarray, nodata: Any) -> np.ndarray:
    """Pixels that are valid, finite in every band and not on the nodata value in any band."""
    ok = valid.copy()
    if np.issubdtype(x.dtype, np.floating):
        ok &= np.isfinite(x).all(axis=0)
    if nodata is not None and not (isinstance(nodata, float) and np.isnan(nodata)):
        ok &= ~(x == np.asarray(nodata).astype(x.dtype)).any(axis=0)
    return ok


def accumulate(block: Block) -> MnfAccumulator:
    """Moments of the valid pixels of the tile core and of the shift differences inside it.

    ``block.data["cube"]`` is (bands, rows, cols) over the tile (stored values in the engine, decoded
    values also work); ``block.params`` is the step's :class:`MnfConfig`. A pixel is valid where
    ``block.valid`` holds and no band is non-finite or nodata. Pairs
    across the tile's borders are left to :func:`merge`: the accumulator keeps the border rows and
    columns (:class:`Strip`) that such pairs need, so no tile reads its neighbours' pixels.
    """
    params = block.params
    if CUBE not in block.data:
        raise MnfError(f"the MNF fit needs an input named {CUBE!r}. Got {sorted(block.data)}")
    x = block.data[CUBE]
    if x.ndim != 3:
        raise MnfError(f"input {CUBE!r} must be (bands, rows, cols). Got shape {x.shape} on {block.tile.name}")
    p, hp, wp = x.shape
    if block.valid.shape != (hp, wp):
        raise MnfError(f"valid mask {block.valid.shape} does not match the data {(hp, wp)} on {block.tile.name}")
    rs, cs = block.tile.crop
    x = x[:, rs, cs]
    nodata = block.meta[CUBE].spec.nodata if CUBE in block.meta else None
    ok = _ok_mask(x, block.valid[rs, cs], nodata)
    core = block.tile.core
    h, w = core.rows, core.cols
    seed, frac = params.seed, params.pixel_fraction
    keep = pixel_sample_mask(np.arange(core.row, core.row + h)[:, None],
                             np.arange(core.col, core.col + w)[None, :], seed, frac)
    use = ok & keep  # pixels (and first pixels of pairs) that enter the statistics
    method = params.method
    directions = _DIRECTIONS[params.noise_direction] if method == "mnf" else ()
    area = _area_mask(block, params.noise_area) if method == "mnf" else None
    pair_ok = ok if area is None else ok & area[rs, cs]

    data = Moments.empty(p)
    noise = {d: Moments.empty(p) for d in directions}
    x = np.ascontiguousarray(x)
    flat = x.reshape(p, h * w)
    step = max(1, _CHUNK_VALUES // max(1, p * w))
    for a in range(0, h, step):
        b = min(a + step, h)
        m = use[a:b]
        if m.all():
            data = merge_moments(data, _moments_inplace(flat[:, a * w:b * w].astype(np.float64)))
        elif m.any():
            data = merge_moments(data, _moments_inplace(np.take(flat, np.flatnonzero(m) + a * w, axis=1)
                                                        .astype(np.float64)))
        for d in directions:
            if d == "horizontal":  # pair (r, c) - (r, c + 1) inside the tile
                rows, cols, shift = slice(a, b), slice(0, w - 1), 1
                sr, sc = rows, slice(1, w)
            else:  # vertical: (r, c) - (r + 1, c) inside the tile
                rows, cols, shift = slice(a, min(b, h - 1)), slice(0, w), w
                sr, sc = slice(a + 1, min(b, h - 1) + 1), cols
            pm = use[rows, cols] & pair_ok[rows, cols] & pair_ok[sr, sc]
            if pm.size == 0:
                continue
            if pm.all():  # every pair: one pass over two shifted views, no gather
                diff = np.subtract(x[:, rows, cols], x[:, sr, sc], dtype=np.float64).reshape(p, -1)
            elif pm.any():
                rr, cc = np.nonzero(pm)
                idx = (rr + rows.start) * w + cc  # first pixels, in the flattened tile
                diff = np.take(flat, idx, axis=1).astype(np.float64)
                diff -= np.take(flat, idx + shift, axis=1)  # exact: stored or float32 values in float64
            else:
                continue
            noise[d] = merge_moments(noise[d], _moments_inplace(diff))
    edges: dict[tuple[str, int, int], Strip] = {}

    def strip(key, values, mask, first):
        if mask.any():  # a strip with no usable pixel can pair with nothing
            edges[key] = Strip(np.ascontiguousarray(values), mask.copy(), first)

    r0, r1, c0, c1 = core.row, core.row + h, core.col, core.col + w
    if "vertical" in directions:
        strip(("vertical", r1, c0), x[:, h - 1, :], use[h - 1] & pair_ok[h - 1], True)  # above the border
        strip(("vertical", r0, c0), x[:, 0, :], pair_ok[0], False)  # below the border
    if "horizontal" in directions:
        strip(("horizontal", c1, r0), x[:, :, w - 1], use[:, w - 1] & pair_ok[:, w - 1], True)
        strip(("horizontal", c0, r0), x[:, :, 0], pair_ok[:, 0], False)
    return MnfAccumulator(data, noise, (tuple(int(i) for i in block.tile.index),), edges,
                          stored=not block.decoded)


def merge(a: MnfAccumulator, b: MnfAccumulator) -> MnfAccumulator:
    """Merge two accumulators (associative; any tree order gives the same result up to round-off).

    Border strips of ``a`` and ``b`` with the same key are the two sides of one border: their
    difference pairs join the noise moments and the strips are dropped.
    """
    if set(a.noise) != set(b.noise):
        raise MnfError(f"cannot merge noise statistics of directions {sorted(a.noise)} and {sorted(b.noise)}")
    if a.stored != b.stored:
        raise MnfError("cannot merge statistics of stored values with statistics of decoded values")
    noise = {d: merge_moments(a.noise[d], b.noise[d]) for d in a.noise}
    small, big = (a.edges, b.edges) if len(a.edges) <= len(b.edges) else (b.edges, a.edges)
    edges = dict(big)
    for key, s1 in small.items():
        s2 = edges.pop(key, None)
        if s2 is None:
            edges[key] = s1
            continue
        if s1.first == s2.first:
            raise MnfError(f"a tile was counted twice: two {key[0]} border strips at {key[1:]} on the same side")
        top, bottom = (s1, s2) if s1.first else (s2, s1)
        if top.values.shape != bottom.values.shape:
            raise MnfError(f"the tiles on both sides of the {key[0]} border at {key[1:]} do not line up: "
                           f"{top.values.shape} and {bottom.values.shape}")
        pm = top.mask & bottom.mask
        if pm.any():
            diff = top.values[:, pm].astype(np.float64)
            diff -= bottom.values[:, pm]
            noise[key[0]] = merge_moments(noise[key[0]], _moments_inplace(diff))
    return MnfAccumulator(merge_moments(a.data, b.data), noise, a.tiles + b.tiles, edges, a.stored)


def select_tiles(tiles: list[Tile], params: MnfConfig) -> list[Tile]:
    """A seeded random subset of ``tile_fraction`` of the tiles (at least one), in their given order."""
    frac = params.tile_fraction
    if frac >= 1 or len(tiles) <= 1:
        return list(tiles)
    n = max(1, int(round(frac * len(tiles))))
    rng = np.random.default_rng(params.seed)
    idx = np.sort(rng.choice(len(tiles), size=n, replace=False))
    return [tiles[i] for i in idx]


def screen_noise_bands(noise: np.ndarray, data: np.ndarray, bands: Sequence[str],
                       tolerance: float = 1e-8) -> dict[str, str]:
    """Bands that make the noise covariance (near) singular, with the reason for each.

    A band is flagged when its noise variance is at most ``tolerance`` times the median noise
    variance ("constant" when its data variance is also that small, else "no noise variance
    (saturated?)"), or when, in correlation units, the earlier unflagged bands explain its noise up to
    a residual variance of at most ``tolerance`` ("duplicates <band>" or "linear combination of
    earlier bands"), found by a Cholesky factorization in band order.
    """
    noise = np.asarray(noise, dtype=np.float64)
    data = np.asarray(data, dtype=np.float64)
    p = noise.shape[0]
    if len(bands) != p:
        raise MnfError(f"{len(bands)} band names for a {p} x {p} noise covariance")
    nv, dv = np.diag(noise).copy(), np.diag(data).copy()
    pos_n, pos_d = nv[nv > 0], dv[dv > 0]
    ref_n = float(np.median(pos_n)) if pos_n.size else 0.0
    ref_d = float(np.median(pos_d)) if pos_d.size else 0.0
    out: dict[str, str] = {}
    for j in range(p):
        if not np.isfinite(nv[j]) or nv[j] <= tolerance * ref_n:
            if dv[j] <= tolerance * ref_d:
                out[bands[j]] = "constant (no variance)"
            else:
                out[bands[j]] = "no noise variance (saturated or flat)"
    kept: list[int] = []
    chol = np.zeros((p, p))  # rows of the Cholesky factor of the correlation matrix over the kept bands
    for j in range(p):
        if bands[j] in out:
            continue
        s = math.sqrt(nv[j])
        if kept:
            k = np.array(kept)
            r = noise[k, j] / (np.sqrt(nv[k]) * s)  # correlations with the kept bands
            lk = chol[np.ix_(k, k)]
            y = scipy.linalg.solve_triangular(lk, r, lower=True)
            resid = 1.0 - float(y @ y)
        else:
            r, y, resid = np.zeros(0), np.zeros(0), 1.0
        if resid <= tolerance:
            i = int(np.argmax(np.abs(r)))
            if abs(r[i]) >= 1 - tolerance:
                out[bands[j]] = f"duplicates {bands[kept[i]]} (noise correlation {r[i]:.9f})"
            else:
                out[bands[j]] = "linear combination of earlier bands"
            continue
        if kept:
            chol[j, np.array(kept)] = y
        chol[j, j] = math.sqrt(resid)
        kept.append(j)
    return out


def keep_components(eigenvalues: np.ndarray, params: MnfConfig) -> int:
    """How many components to keep: by ``components``, ``min_eigenvalue`` or ``cumulative_fraction``."""
    lam = np.asarray(eigenvalues, dtype=np.float64)
    p = lam.size
    if params.components is not None:
        k = params.components
        if k > p:
            raise MnfError(f"components = {k} but only {p} bands enter the transform")
        return k
    if params.min_eigenvalue is not None:
        thr = params.min_eigenvalue
        k = int(np.sum(lam >= thr))
        if k == 0:
            raise MnfError(f"no component has an eigenvalue >= min_eigenvalue = {thr}; the largest is {lam[0]:.6g}")
        return k
    if params.cumulative_fraction is not None:
        f = params.cumulative_fraction
        pos = np.clip(lam, 0, None)
        total = pos.sum()
        if total <= 0:
            raise MnfError("all eigenvalues are zero: the data have no variance")
        cum = np.cumsum(pos) / total
        return int(min(p, np.searchsorted(cum, f * (1 - 1e-12)) + 1))
    return p


def _noise_covariance(acc: MnfAccumulator, p: int) -> tuple[np.ndarray, dict[str, int]]:
    estimates, counts = [], {}
    for d, m in acc.noise.items():
        counts[d] = int(m.n)
        if m.n >= 2:
            estimates.append(0.5 * m.covariance())  # Cov(z(x) - z(x+d)) = 2 N (Green et al., 1988)
    if not estimates:
        raise MnfError(f"the noise estimate has no usable difference pairs (counts {counts}): the valid "
                       "area (or the noise area) has no two neighbouring valid pixels")
    n = sum(estimates) / len(estimates)
    return 0.5 * (n + n.T), counts


def _scale_offset(spec: OutputSpec) -> tuple[float, float]:
    """The CF scale_factor and add_offset of an input (1 and 0 when absent)."""
    scale, offset = scale_offset(spec)
    return (1.0 if scale is None else scale), (0.0 if offset is None else offset)


def _to_physical(acc: MnfAccumulator, spec: OutputSpec) -> MnfAccumulator:
    """Moments of stored values turned into moments of physical values (x = scale * stored + offset):
    means scale and shift, M2 scales by scale squared; differences do not see the offset."""
    s, o = _scale_offset(spec)
    if s == 1.0 and o == 0.0:
        return acc
    data = Moments(acc.data.n, acc.data.mean * s + o, acc.data.m2 * (s * s))
    noise = {d: Moments(m.n, m.mean * s, m.m2 * (s * s)) for d, m in acc.noise.items()}
    return MnfAccumulator(data, noise, acc.tiles, {}, stored=False)


def finalize(acc: MnfAccumulator, params: MnfConfig, meta: Mapping[str, InputMeta]) -> dict:
    """The MNF (or PCA) model from the merged statistics; see the module docstring for its keys."""
    method = params.method
    spec = meta[CUBE].spec if CUBE in meta else None
    p = acc.data.p
    bands = list(spec.bands) if spec is not None else [f"band_{i + 1}" for i in range(p)]
    if len(bands) != p:
        raise MnfError(f"the input {CUBE!r} names {len(bands)} bands but the statistics have {p}")
    if acc.stored and spec is not None:
        acc = _to_physical(acc, spec)
    n = acc.data.n
    if n <= p:
        raise MnfError(f"the {method.upper()} fit saw {n} valid pixel(s); it needs more than the number of "
                       f"bands ({p}). Raise pixel_fraction/tile_fraction or check the valid area")
    s_full = acc.data.covariance()
    tol = params.singular_tolerance
    flagged: dict[str, str] = {}
    ridge = 0.0
    if method == "pca":
        n_full, counts = np.eye(p), {}
        used = np.arange(p)
    else:
        n_full, counts = _noise_covariance(acc, p)
        flagged = screen_noise_bands(n_full, s_full, bands, tol)
        mode = params.singular
        used = np.array([i for i, b in enumerate(bands) if b not in flagged], dtype=int)
        if flagged:
            listing = "; ".join(f"{b}: {why}" for b, why in flagged.items())
            if mode == "error":
                raise MnfError(f"the noise covariance is singular because of band(s) {listing}. Drop them, or "
                               "set singular: exclude or singular: regularize")
            if mode == "exclude":
                if used.size == 0:
                    raise MnfError(f"every band makes the noise covariance singular ({listing})")
                warnings.warn(f"MNF: band(s) left out of the transform (singular noise covariance): {listing}",
                              MnfWarning, stacklevel=2)
            else:
                used = np.arange(p)
                diag = np.diag(n_full)
                scale = float(np.mean(diag[diag > 0])) if (diag > 0).any() else 1.0
                ridge = params.regularization * scale
                warnings.warn(f"MNF: noise covariance regularized (+{ridge:.3g} on the diagonal) because of "
                              f"band(s) {listing}", MnfWarning, stacklevel=2)
    s = s_full[np.ix_(used, used)]
    if method == "pca":
        lam, vec = scipy.linalg.eigh(s)
        nn = np.eye(used.size)
    else:
        nn = n_full[np.ix_(used, used)] + ridge * np.eye(used.size)
        try:
            lam, vec = scipy.linalg.eigh(s, nn)
        except np.linalg.LinAlgError as exc:
            raise MnfError(f"the noise covariance over bands {[bands[i] for i in used][:10]}... is not positive "
                           f"definite ({exc}); set singular: regularize or raise singular_tolerance "
                           f"(now {tol})") from exc
    lam, vec = lam[::-1].copy(), vec[:, ::-1].copy()
    big = np.argmax(np.abs(vec), axis=0)
    vec *= np.where(vec[big, np.arange(vec.shape[1])] < 0, -1.0, 1.0)[None, :]
    inv = vec.T if method == "pca" else vec.T @ nn  # V^-1 = V' N since V' N V = I
    k = keep_components(lam, params)
    used_names = {bands[i] for i in used}
    selection = {
        "tile_fraction": float(params.tile_fraction),
        "pixel_fraction": float(params.pixel_fraction),
        "seed": int(params.seed),
        "n_tiles": len(acc.tiles),
    }
    if selection["tile_fraction"] < 1:
        selection["tiles"] = sorted([list(t) for t in acc.tiles])
    return {
        "method": method,
        "bands": bands,
        "used_bands": [bands[i] for i in used],
        "band_index": used.astype(np.int64),
        "excluded_bands": {b: flagged[b] for b in bands if b in flagged and b not in used_names},
        "flagged_bands": flagged,
        "mean": acc.data.mean[used].copy(),
        "eigenvalues": lam,
        "eigenvectors": vec,
        "inverse": inv,
        "data_covariance": s_full,
        "noise_covariance": n_full,
        "regularization": ridge,
        "n_components": int(k),
        "n_pixels": int(n),
        "n_noise_pairs": counts,
        "selection": selection,
    }


# --------------------------------------------------------------------------------------------------
# transforms (pure) and kernels


def _pixels(x: np.ndarray) -> tuple[np.ndarray, tuple[int, ...]]:
    x = np.asarray(x)
    return x.reshape(x.shape[0], -1), x.shape[1:]


def _check_bands(x: np.ndarray, model: Mapping[str, Any], what: str) -> None:
    nb = len(model["bands"])
    if x.shape[0] != nb:
        raise MnfError(f"{what} has {x.shape[0]} bands; the model was fitted on {nb} ({model['bands'][0]}.."
                       f"{model['bands'][-1]})")


def forward(x: np.ndarray, model: Mapping[str, Any], k: int | None = None) -> np.ndarray:
    """Components (k, ...) of a cube (bands, ...): ``V[:, :k]' (x - mu)`` over the used bands, float32.

    Computed in float64 in pixel chunks; NaN pixels give NaN components.
    """
    _check_bands(x, model, "the input")
    k = int(model["n_components"]) if k is None else int(k)
    flat, shp = _pixels(x)
    idx = np.asarray(model["band_index"], dtype=np.int64)
    mu = np.asarray(model["mean"], dtype=np.float64)[:, None]
    w = np.ascontiguousarray(np.asarray(model["eigenvectors"], dtype=np.float64)[:, :k].T)
    out = np.empty((k, flat.shape[1]), dtype=np.float32)
    step = max(1, _CHUNK_VALUES // max(1, idx.size))
    for a in range(0, flat.shape[1], step):
        xs = flat[idx, a:a + step].astype(np.float64) - mu
        out[:, a:a + step] = w @ xs
    return out.reshape((k,) + shp)


def inverse(y: np.ndarray, model: Mapping[str, Any], k: int | None = None,
            passthrough: np.ndarray | None = None) -> np.ndarray:
    """Reflectance (bands, ...) rebuilt from the first k components ``y`` (>= k, ...), float32.

    ``x = mu + V^-1[:k]' y[:k]`` over the used bands. Excluded bands are copied from ``passthrough``
    (the input cube) when given, else NaN.
    """
    k = int(y.shape[0]) if k is None else int(k)
    if y.shape[0] < k:
        raise MnfError(f"the inverse with k = {k} needs at least {k} components. Got {y.shape[0]}")
    flat, shp = _pixels(y)
    idx = np.asarray(model["band_index"], dtype=np.int64)
    nb = len(model["bands"])
    mu = np.asarray(model["mean"], dtype=np.float64)[:, None]
    rows = np.ascontiguousarray(np.asarray(model["inverse"], dtype=np.float64)[:k].T)  # (p_used, k)
    out = np.full((nb, flat.shape[1]), np.nan, dtype=np.float32)
    if passthrough is not None:
        _check_bands(passthrough, model, "the pass-through cube")
        other = np.setdiff1d(np.arange(nb), idx)
        out[other] = _pixels(passthrough)[0][other]
    step = max(1, _CHUNK_VALUES // max(1, idx.size))
    for a in range(0, flat.shape[1], step):
        out[idx, a:a + step] = mu + rows @ flat[:k, a:a + step].astype(np.float64)
    return out.reshape((nb,) + shp)


def denoise(x: np.ndarray, model: Mapping[str, Any], k: int) -> np.ndarray:
    """The cube rebuilt from its first k components (excluded bands pass through), float32."""
    return inverse(forward(x, model, k), model, k, passthrough=x)


def forward_stored(x: np.ndarray, model: Mapping[str, Any], spec: OutputSpec, valid: np.ndarray,
                   k: int | None = None) -> np.ndarray:
    """:func:`forward` of stored values (``x = scale * stored + offset``, CF), float32 (k, ...).

    The scale goes into the rows of the transform and the offset and mean into one bias per component,
    ``y = (scale V') stored + V' (offset - mu)``, in float64 over pixel chunks copied band run by band
    run; pixels outside ``valid``, non-finite or on nodata in a used band give NaN.
    """
    _check_bands(x, model, "the input")
    k = int(model["n_components"]) if k is None else int(k)
    flat, shp = _pixels(x)
    scale, offset = _scale_offset(spec)
    vt = np.asarray(model["eigenvectors"], dtype=np.float64)[:, :k].T  # (k, p_used)
    w = np.ascontiguousarray(vt * scale)
    bias = (vt @ (offset - np.asarray(model["mean"], dtype=np.float64)))[:, None]
    runs = index_runs(model["band_index"])
    ok_all = np.asarray(valid, dtype=bool).ravel()
    is_float = np.issubdtype(flat.dtype, np.floating)
    p_used = w.shape[1]
    chunk = max(1, min(flat.shape[1], _CHUNK_VALUES // max(1, p_used) // 4))
    buf = np.empty((p_used, chunk), dtype=np.float64)
    out = np.empty((k, flat.shape[1]), dtype=np.float32)
    for a in range(0, flat.shape[1], chunk):
        e = min(a + chunk, flat.shape[1])
        xb = buf[:, : e - a]
        ok = ok_all[a:e].copy()
        on_nodata = copy_bands(flat, runs, slice(a, e), xb, spec.nodata)
        if on_nodata is not None:
            ok &= ~on_nodata
        if is_float:
            ok &= np.isfinite(xb).all(axis=0)
        y = w @ xb
        y += bias
        y[:, ~ok] = np.nan
        out[:, a:e] = y
    return out.reshape((k,) + shp)


def forward_kernel(block: Block, model: Mapping[str, Any] | None) -> dict[str, np.ndarray]:
    """Engine kernel: the ``components`` of the block's cube, float32 (k, rows, cols)."""
    if model is None:
        raise MnfError("the MNF/PCA kernel needs a fitted model")
    if block.decoded:
        return {COMPONENTS: forward(block.data[CUBE], model)}
    return {COMPONENTS: forward_stored(block.data[CUBE], model, block.meta[CUBE].spec, block.valid)}


def _transform_attrs(model: Mapping[str, Any]) -> dict:
    """The components' ``inverse_transform`` attribute: what the denoising step needs."""
    k = int(model["n_components"])
    return {
        "method": model["method"],
        "bands": list(model["bands"]),
        "band_index": [int(i) for i in np.asarray(model["band_index"])],
        "mean": [float(v) for v in np.asarray(model["mean"])],
        "inverse": np.asarray(model["inverse"], dtype=np.float64)[:k].tolist(),
        "n_components": k,
    }


def _coord_values(values: Sequence[Any] | None) -> list[float | None] | None:
    """A coordinate of the cube as JSON floats (non-finite values as null); None when absent or not numeric."""
    if values is None:
        return None
    out: list[float | None] = []
    for v in values:
        try:
            f = float(v) if v is not None else math.nan
        except (TypeError, ValueError):
            return None
        out.append(f if math.isfinite(f) else None)
    return out


def _forward_attrs(model: Mapping[str, Any], spec: OutputSpec | None) -> dict:
    """The components' ``forward_transform`` attribute: ``y = (x[band_index] - mean) @ matrix`` with
    ``matrix`` the first ``n_components`` eigenvectors as columns (used bands x components), and the
    wavelengths and FWHM of the cube's bands (null where unknown), so that a later step can move
    spectra (e.g. library endmembers) into component space from the metadata alone."""
    k = int(model["n_components"])
    coords = {} if spec is None else spec.coords
    return {
        "method": model["method"],
        "bands": list(model["bands"]),
        "band_index": [int(i) for i in np.asarray(model["band_index"])],
        "mean": [float(v) for v in np.asarray(model["mean"])],
        "matrix": np.asarray(model["eigenvectors"], dtype=np.float64)[:, :k].tolist(),
        "n_components": k,
        "wavelength": _coord_values(coords.get("wavelength")),
        "fwhm": _coord_values(coords.get("fwhm")),
    }


def denoise_kernel(block: Block, model: Mapping[str, Any] | None) -> dict[str, np.ndarray]:
    """Engine kernel: reflectance rebuilt from the first ``denoise_components`` components.

    Reads the forward step's ``components`` (alias ``components``) and the cube (alias ``cube``, for
    the bands left out of the transform); the mean and inverse rows come from the components' output
    attribute ``inverse_transform``.
    """
    info = block.meta[COMPONENTS].spec.attrs.get(INVERSE_TRANSFORM) if COMPONENTS in block.meta else None
    if not info:
        raise MnfError(f"input {COMPONENTS!r} carries no {INVERSE_TRANSFORM!r} attribute: it must be the "
                       "'components' output of an MNF/PCA step")
    k = block.params.denoise_components
    if k is None:
        raise MnfError("the denoising kernel needs denoise_components in its MnfConfig")
    y = block.data[COMPONENTS]
    if k > y.shape[0]:
        raise MnfError(f"denoise_components = {k} but the forward step keeps {y.shape[0]} components")
    tmodel = {"bands": info["bands"], "band_index": np.asarray(info["band_index"]),
              "mean": np.asarray(info["mean"]), "inverse": np.asarray(info["inverse"])}
    return {"reflectance": inverse(y, tmodel, k, passthrough=block.data[CUBE])}


# --------------------------------------------------------------------------------------------------
# step factories


def _component_outputs(meta: Mapping[str, InputMeta], model: Mapping[str, Any] | None,
                       params: MnfConfig) -> dict[str, OutputSpec]:
    if model is None:
        raise StepError(f"the {params.method} step's outputs depend on its fitted model")
    k = int(model["n_components"])
    prefix = str(model["method"])
    lam = np.asarray(model["eigenvalues"], dtype=np.float64)[:k]
    return {COMPONENTS: OutputSpec(
        role=Role.COMPONENTS,
        bands=tuple(f"{prefix}_{i + 1}" for i in range(k)),
        dtype="float32",
        nodata=float("nan"),
        coords={"eigenvalue": tuple(float(v) for v in lam)},
        attrs={"long_name": f"{prefix.upper()} components", "units": "1", "used_bands": list(model["used_bands"]),
               "excluded_bands": dict(model["excluded_bands"]), INVERSE_TRANSFORM: _transform_attrs(model),
               FORWARD_TRANSFORM: _forward_attrs(model, meta[CUBE].spec if CUBE in meta else None)},
    )}


def _denoised_outputs(meta: Mapping[str, InputMeta], model: Mapping[str, Any] | None,
                      params: MnfConfig) -> dict[str, OutputSpec]:
    if CUBE not in meta:
        raise StepError(f"the denoising step needs its input {CUBE!r}")
    spec = meta[CUBE].spec
    return {"reflectance": OutputSpec(
        role=Role.REFLECTANCE,
        bands=tuple(spec.bands), dtype="float32", nodata=float("nan"),
        coords={k: tuple(v) for k, v in spec.coords.items()},
        # the cube's bands, their coordinates and units (name, wavelength, FWHM, source band) unchanged
        attrs={"long_name": f"reflectance rebuilt from {params.denoise_components} "
                            f"{params.method.upper()} components",
               "units": spec.attrs.get("units", "1"),
               **{k: v for k, v in spec.attrs.items() if k.endswith("_units")}},
    )}


def mnf_steps(section: MnfConfig, input_ref: str = "mosaic/reflectance") -> list[Step]:
    """Steps for the ``mnf`` section: the fit+forward step and, if asked, the denoising step.

    Parameters
    ----------
    section : MnfConfig
        The validated section.
    input_ref : str
        The cube, as "step/output".

    Returns
    -------
    list of Step
        ``[forward]`` or ``[forward, denoise]``. The forward step is named ``section.step_name``
        ("mnf" or "pca" by default) with output ``components``; the denoising step
        ``<name>_denoised`` with output ``reflectance`` (float32, the cube's bands and coordinates).
    """
    name = section.step_name
    fit = Fit(accumulate=accumulate, merge=merge, finalize=finalize, select=select_tiles, halo=0)
    steps = [Step(name=name, kernel=forward_kernel, outputs=_component_outputs, inputs={CUBE: input_ref},
                  params=section, halo=0, fit=fit, decode=False, version="2")]
    if section.denoise_components is not None:
        steps.append(Step(
            name=f"{name}_denoised", kernel=denoise_kernel, outputs=_denoised_outputs,
            inputs={COMPONENTS: f"{name}/{COMPONENTS}", CUBE: input_ref},
            params=section, halo=0))
    return steps
