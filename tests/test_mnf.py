"""MNF and PCA: tiled statistics, the generalized eigenproblem, transforms and step wiring.

Oracles (see ../shared/METHODS.md): an independent whole-array reference built here with numpy
(np.cov) and scipy.linalg.eigh; the two-step definition of MNF (noise whitening, then PCA) with
sklearn.decomposition.PCA; sklearn PCA(svd_solver="full") for PCA; the theoretical MNF eigenvalues
SNR + 1 (Green, Berman, Switzer and Craig, 1988, IEEE TGRS 26(1):65-74); the pairwise moment update
(Chan, Golub and LeVeque, 1979) checked against np.cov.
"""
from __future__ import annotations


import numpy as np
import pytest
import scipy.linalg
import scipy.ndimage
from affine import Affine
from sklearn.decomposition import PCA

from swathmill.tiles.grid import Grid, Tiling
from swathmill.tiles.step import Block, InputMeta, OutputSpec
from swathmill.workflows.methods.mnf import (
    MnfConfig,
    MnfError,
    MnfWarning,
    Moments,
    accumulate,
    denoise,
    denoise_kernel,
    finalize,
    forward,
    inverse,
    keep_components,
    merge,
    merge_moments,
    mnf_steps,
    moments,
    pixel_sample_mask,
    select_tiles,
)

GRID_T = Affine(2.0, 0.0, 500000.0, 0.0, -2.0, 4100000.0)


# ------------------------------------------------------------------------------------------------
# helpers


def _grid(rows: int, cols: int) -> Grid:
    return Grid(rows, cols, GRID_T, "EPSG:32611")


def _meta(p: int, grid: Grid) -> dict[str, InputMeta]:
    wl = tuple(400.0 + 10.0 * i for i in range(p))
    spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(p)), dtype="float32", nodata=float("nan"),
                      coords={"wavelength": wl, "fwhm": tuple(10.0 for _ in range(p))})
    return {"cube": InputMeta("mosaic/reflectance", grid, spec)}


def _params(**kw) -> MnfConfig:
    return MnfConfig(**kw)


def _blocks(cube: np.ndarray, valid: np.ndarray, size: int, params: MnfConfig, nan_invalid: bool = True):
    """Blocks as the engine builds them: the padded window (halo 1) of each tile of a Tiling."""
    p, rows, cols = cube.shape
    grid = _grid(rows, cols)
    meta = _meta(p, grid)
    for tile in Tiling(grid, size, 1):
        rs, cs = tile.padded.slices
        data = cube[:, rs, cs].copy()
        v = valid[rs, cs].copy()
        if nan_invalid:
            data[:, ~v] = np.nan
        yield Block(data={"cube": data}, valid=v, tile=tile, grid=grid.window(tile.padded), params=params,
                    static={}, meta=meta)


def _fit_tiled(cube, valid, size, params, order: str = "left", seed: int = 0, nan_invalid: bool = True):
    accs = [accumulate(b) for b in _blocks(cube, valid, size, params, nan_invalid)]
    if order == "right":
        accs = accs[::-1]
    elif order == "shuffle":
        accs = [accs[i] for i in np.random.default_rng(seed).permutation(len(accs))]
    if order == "tree":
        while len(accs) > 1:
            accs = [merge(accs[i], accs[i + 1]) if i + 1 < len(accs) else accs[i] for i in range(0, len(accs), 2)]
        return accs[0]
    acc = accs[0]
    for a in accs[1:]:
        acc = merge(acc, a)
    return acc


def _fit(cube, valid=None, size=None, params=None, **kw):
    params = params or _params(**kw)
    valid = np.ones(cube.shape[1:], bool) if valid is None else valid
    size = size or max(cube.shape[1:])
    acc = _fit_tiled(cube, valid, size, params)
    return finalize(acc, params, _meta(cube.shape[0], _grid(*cube.shape[1:])))


def _reference(cube: np.ndarray, valid: np.ndarray, directions=("horizontal", "vertical")):
    """Whole-array statistics with plain numpy: np.cov of valid pixels, half np.cov of differences."""
    ok = valid & np.isfinite(cube).all(axis=0)
    s = np.cov(cube[:, ok].astype(np.float64))  # oracle: numpy np.cov (ddof 1)
    est = []
    for d in directions:
        if d == "horizontal":
            a, b, m = cube[:, :, :-1], cube[:, :, 1:], ok[:, :-1] & ok[:, 1:]
        else:
            a, b, m = cube[:, :-1, :], cube[:, 1:, :], ok[:-1, :] & ok[1:, :]
        diffs = a[:, m].astype(np.float64) - b[:, m].astype(np.float64)
        est.append(0.5 * np.cov(diffs))  # Cov(z(x) - z(x+d)) = 2N (Green et al., 1988)
    n = sum(est) / len(est)  # average of the directions (common practice)
    return s, n, int(ok.sum())


def _scene(rng, rows=48, cols=40, p=8, n_signal=3, noise=0.01, sigma=3.0, offset=0.3):
    """Smooth signal (blurred random fields times random spectra) plus correlated band noise, float32."""
    fields = np.stack([scipy.ndimage.gaussian_filter(rng.standard_normal((rows, cols)), sigma)
                       for _ in range(n_signal)])
    fields /= fields.std(axis=(1, 2), keepdims=True)
    spectra = rng.uniform(0.02, 0.1, (p, n_signal)) * np.linspace(1, 2, n_signal)[None, :]
    truth = offset + np.einsum("pk,krc->prc", spectra, fields)
    scales = noise * rng.uniform(0.5, 2.0, p)
    corr = 0.3 ** np.abs(np.subtract.outer(np.arange(p), np.arange(p)))
    cov_n = corr * np.outer(scales, scales)
    eps = np.einsum("pq,qrc->prc", np.linalg.cholesky(cov_n), rng.standard_normal((p, rows, cols)))
    return (truth + eps).astype(np.float32), truth.astype(np.float32), cov_n


def _sign_fix(v: np.ndarray) -> np.ndarray:
    big = np.argmax(np.abs(v), axis=0)
    return v * np.sign(v[big, np.arange(v.shape[1])])[None, :]


# ------------------------------------------------------------------------------------------------
# moments and merging


def test_pairwise_merge_equals_np_cov_with_large_mean(rng):
    # Oracle: np.cov of all rows; merge formula of Chan, Golub and LeVeque (1979) as in METHODS.md.
    x = (12000.0 + 50.0 * rng.standard_normal((6, 1000))).round()  # int16-like values, large mean
    cuts = [0, 1, 7, 300, 301, 650, 1000]
    parts = [moments(x[:, a:b]) for a, b in zip(cuts[:-1], cuts[1:])]
    parts.insert(2, Moments.empty(6))  # an empty part changes nothing
    left = parts[0]
    for m in parts[1:]:
        left = merge_moments(left, m)
    right = parts[-1]
    for m in parts[-2::-1]:
        right = merge_moments(m, right)
    ref = np.cov(x)
    for m in (left, right):
        assert m.n == 1000
        np.testing.assert_allclose(m.mean, x.mean(axis=1), rtol=1e-14)
        np.testing.assert_allclose(m.covariance(), ref, rtol=1e-12, atol=1e-12 * np.abs(ref).max())


def test_moments_of_a_single_column_and_mismatch():
    m = moments(np.ones((3, 1)))
    assert m.n == 1 and np.all(m.m2 == 0)
    with pytest.raises(MnfError, match="3 and 4 bands"):
        merge_moments(m, moments(np.ones((4, 2))))


# ------------------------------------------------------------------------------------------------
# tiled statistics


@pytest.fixture
def scene(rng):
    cube, truth, _ = _scene(rng, rows=37, cols=29, p=6)
    valid = np.ones(cube.shape[1:], bool)
    valid[5:9, 3:20] = False  # a nodata strip crossing tile borders
    valid[30:, 25:] = False  # a corner with no data at all
    return cube, valid


@pytest.mark.parametrize("size", [3, 8, 16, 37])
@pytest.mark.parametrize("order", ["left", "right", "tree", "shuffle"])
def test_tiled_statistics_equal_whole_array_reference(scene, size, order):
    cube, valid = scene
    params = _params()
    acc = _fit_tiled(cube, valid, size, params, order=order)
    s_ref, n_ref, count = _reference(cube, valid)  # oracle: np.cov on the whole array
    ok = valid
    n_h = int((ok[:, :-1] & ok[:, 1:]).sum())
    n_v = int((ok[:-1, :] & ok[1:, :]).sum())
    assert acc.data.n == count
    assert acc.noise["horizontal"].n == n_h and acc.noise["vertical"].n == n_v  # each pair once
    np.testing.assert_allclose(acc.data.covariance(), s_ref, rtol=1e-11, atol=1e-13)
    model = finalize(acc, params, _meta(6, _grid(37, 29)))
    np.testing.assert_allclose(model["noise_covariance"], n_ref, rtol=1e-11, atol=1e-15)
    assert model["n_noise_pairs"] == {"horizontal": n_h, "vertical": n_v}


def test_tiled_statistics_keep_precision_with_a_large_mean(scene):
    # int16-like values (scaled reflectance plus a large offset), held exactly in float32: the
    # per-tile centring and pairwise merge (Chan et al., 1979) keep np.cov's answer (oracle: numpy).
    cube, valid = scene
    big = np.round(cube * 1e4 + 20000.0).astype(np.float32)
    acc = _fit_tiled(big, valid, 5, _params())
    s_ref, _, _ = _reference(big, valid)
    np.testing.assert_allclose(acc.data.covariance(), s_ref, rtol=1e-11, atol=1e-11 * np.abs(s_ref).max())
    diffs = big[:, :, :-1] - big[:, :, 1:]  # exact in float32 for these integers
    m = valid[:, :-1] & valid[:, 1:]
    np.testing.assert_allclose(acc.noise["horizontal"].covariance(), np.cov(diffs[:, m].astype(np.float64)),
                               rtol=1e-11)


def test_tiling_does_not_change_the_model_beyond_round_off(scene):
    cube, valid = scene
    params = _params()
    models = [finalize(_fit_tiled(cube, valid, s, params, order="tree"), params, _meta(6, _grid(37, 29)))
              for s in (4, 11, 37)]
    for m in models[1:]:
        np.testing.assert_allclose(m["eigenvalues"], models[0]["eigenvalues"], rtol=1e-10)
        np.testing.assert_allclose(m["eigenvectors"], models[0]["eigenvectors"], rtol=1e-7, atol=1e-9)


def test_nodata_pixels_never_enter_the_statistics(scene):
    cube, valid = scene
    dirty = cube.copy()
    dirty[:, ~valid] = 3.0e4  # finite garbage under the nodata mask
    dirty[2, 20, 10] = np.nan  # one non-finite band in a pixel the mask calls valid
    params = _params()
    acc = _fit_tiled(dirty, valid, 8, params, nan_invalid=False)
    also_bad = valid.copy()
    also_bad[20, 10] = False
    s_ref, n_ref, count = _reference(cube, also_bad)  # oracle: np.cov without those pixels
    assert acc.data.n == count
    np.testing.assert_allclose(acc.data.covariance(), s_ref, rtol=1e-11)
    model = finalize(acc, params, _meta(6, _grid(37, 29)))
    np.testing.assert_allclose(model["noise_covariance"], n_ref, rtol=1e-11)


def test_a_tile_with_no_valid_pixel_is_fine(scene):
    cube, valid = scene
    params = _params()
    empty = next(b for b in _blocks(cube, valid, 4, params) if not b.core_valid.any())
    acc = accumulate(empty)
    assert acc.data.n == 0 and all(m.n == 0 for m in acc.noise.values())
    whole = _fit_tiled(cube, valid, 37, params)
    merged = merge(merge(acc, whole), acc)
    np.testing.assert_allclose(merged.data.m2, whole.data.m2, rtol=0, atol=0)
    assert merged.tiles[0] == empty.tile.index


def test_too_few_pixels_is_a_clear_error():
    cube = np.ones((4, 3, 3), np.float32)
    valid = np.zeros((3, 3), bool)
    valid[0, :2] = True
    with pytest.raises(MnfError, match="saw 2 valid pixel"):
        _fit(cube, valid)


# ------------------------------------------------------------------------------------------------
# the eigenproblem against references


def test_mnf_matches_whole_array_scipy_reference(rng):
    cube, _, _ = _scene(rng, rows=40, cols=40, p=7, n_signal=4)
    valid = np.ones((40, 40), bool)
    valid[::7, ::5] = False
    model = _fit(cube, valid, size=9)
    s, n, _ = _reference(cube, valid)
    lam, vec = scipy.linalg.eigh(s, n)  # oracle: scipy.linalg.eigh(S, N), ascending
    lam, vec = lam[::-1], _sign_fix(vec[:, ::-1])
    np.testing.assert_allclose(model["eigenvalues"], lam, rtol=1e-8)
    np.testing.assert_allclose(model["eigenvectors"], vec, rtol=1e-6, atol=1e-8 * np.abs(vec).max())
    v = model["eigenvectors"]
    # Definition (Green et al., 1988; METHODS.md): V'NV = I and V'SV = diag(lambda), lambda >= ~1.
    np.testing.assert_allclose(v.T @ n @ v, np.eye(7), atol=1e-9)
    np.testing.assert_allclose(v.T @ s @ v, np.diag(lam), atol=1e-8 * lam.max())
    assert np.all(np.diff(model["eigenvalues"]) <= 0)
    np.testing.assert_allclose(model["inverse"] @ v, np.eye(7), atol=1e-9)  # V^-1 = V'N


def test_mnf_equals_noise_whitening_then_sklearn_pca(rng):
    cube, _, _ = _scene(rng, rows=40, cols=36, p=8, n_signal=3)
    valid = np.ones((40, 36), bool)
    model = _fit(cube, valid, size=12, components=3)
    _, n, _ = _reference(cube, valid)
    # Two-step definition (Green et al., 1988): whiten the noise with N^-1/2, then PCA (sklearn).
    w = scipy.linalg.fractional_matrix_power(n, -0.5).real
    x = cube.reshape(8, -1).T.astype(np.float64)
    pca = PCA(svd_solver="full").fit(x @ w)
    np.testing.assert_allclose(model["eigenvalues"], pca.explained_variance_, rtol=1e-8)
    sub_ref = w @ pca.components_[:3].T  # directions in the original coordinates
    angles = scipy.linalg.subspace_angles(model["eigenvectors"][:, :3], sub_ref)
    assert np.max(angles) < 1e-7


def test_pca_matches_sklearn_full_svd(rng):
    cube, _, _ = _scene(rng, rows=30, cols=30, p=6, n_signal=4)
    valid = np.ones((30, 30), bool)
    valid[10:12] = False
    model = _fit(cube, valid, size=7, method="pca")
    x = cube[:, valid].T.astype(np.float64)
    ref = PCA(svd_solver="full").fit(x)  # oracle: sklearn.decomposition.PCA(svd_solver="full")
    np.testing.assert_allclose(model["eigenvalues"], ref.explained_variance_, rtol=1e-8)
    np.testing.assert_allclose(model["eigenvectors"], _sign_fix(ref.components_.T), rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(model["noise_covariance"], np.eye(6))
    y = forward(cube, model)
    y_ref = _sign_fix(ref.components_.T).T @ (x - ref.mean_).T
    np.testing.assert_allclose(y[:, valid], y_ref, atol=1e-5 * np.abs(y_ref).max())
    assert model["n_noise_pairs"] == {}


def test_eigenvalues_are_snr_plus_one_on_known_covariances(rng):
    # Green et al. (1988): with S = Sigma_s + Sigma_n, eig(S, Sigma_n) = SNR + 1. The signal is
    # constant along each row and drawn independently per row, so horizontal differences are
    # pure noise; the generalized SNRs of Sigma_s against Sigma_n are 100, 30, 10 and 0.
    p, rows, cols = 8, 3000, 30
    snr = np.array([100.0, 30.0, 10.0] + [0.0] * (p - 3))
    a = rng.standard_normal((p, p))
    cov_n = 1e-4 * (a @ a.T / p + 0.5 * np.eye(p))
    ln = np.linalg.cholesky(cov_n)
    q, _ = np.linalg.qr(rng.standard_normal((p, p)))
    sig = ln @ q @ (np.sqrt(snr)[:, None] * rng.standard_normal((p, rows)))  # Cov = L Q diag(snr) Q' L'
    cube = 0.25 + sig[:, :, None] + np.einsum("pq,qrc->prc", ln, rng.standard_normal((p, rows, cols)))
    model = _fit(cube.astype(np.float64), np.ones((rows, cols), bool), size=1000,
                 noise_direction="horizontal")
    lam = model["eigenvalues"]
    # Sampling error (common practice, asymptotic): a covariance eigenvalue from n independent draws
    # has relative standard error sqrt(2/n); the signal has n = rows draws. Allow 4 standard errors.
    se = snr[:3] * np.sqrt(2.0 / rows)
    assert np.all(np.abs(lam[:3] - (snr[:3] + 1)) < 4 * se + 0.05), (lam[:3], snr[:3] + 1)
    # Noise-only components: a ratio of two covariance estimates from ~9e4 samples each; the
    # spread of its eigenvalues is of order 2 sqrt(p / n) ~ 0.02 (Marchenko-Pastur, from memory).
    np.testing.assert_allclose(lam[3:], 1.0, atol=0.03)


# ------------------------------------------------------------------------------------------------
# transforms


def test_forward_then_inverse_with_all_components_returns_the_input(rng):
    cube, _, _ = _scene(rng, rows=32, cols=32, p=8)
    model = _fit(cube, size=10)
    y = forward(cube, model, k=8)
    assert y.dtype == np.float32 and y.shape == (8, 32, 32)
    back = inverse(y, model)
    assert back.dtype == np.float32
    # float32 components: round-off of about 1e-7 of their magnitude, carried back through V^-1.
    np.testing.assert_allclose(back, cube, rtol=0, atol=2e-6)


def test_denoising_with_k_components_lowers_the_error(rng):
    cube, truth, _ = _scene(rng, rows=64, cols=64, p=10, n_signal=3, noise=0.01, sigma=4.0)
    model = _fit(cube, size=16, components=3)
    clean = denoise(cube, model, 3)
    rmse_in = np.sqrt(np.mean((cube - truth) ** 2))  # RMSE (common practice)
    rmse_out = np.sqrt(np.mean((clean - truth) ** 2))
    assert rmse_out < 0.6 * rmse_in, (rmse_out, rmse_in)


def test_transform_of_nan_pixels_stays_nan(rng):
    cube, _, _ = _scene(rng, rows=16, cols=16, p=5)
    model = _fit(cube, size=16)
    cube[:, 3, 4] = np.nan
    y = forward(cube, model)
    assert np.isnan(y[:, 3, 4]).all() and np.isfinite(np.delete(y.reshape(5, -1), 3 * 16 + 4, axis=1)).all()
    with pytest.raises(MnfError, match="has 4 bands; the model was fitted on 5"):
        forward(cube[:4], model)


# ------------------------------------------------------------------------------------------------
# singular noise covariance


def _singular_cube(rng):
    cube, _, _ = _scene(rng, rows=30, cols=30, p=8)
    cube[0] = 0.2 + 0.001 * np.arange(30, dtype=np.float32)[None, :]  # a noise-free ramp
    cube[2] = 0.5  # constant band
    cube[5] = cube[4]  # duplicated band
    cube[7] = 1.0  # saturated: every pixel at the ceiling
    return cube


def test_singular_bands_are_excluded_and_named(rng):
    cube = _singular_cube(rng)
    with pytest.warns(MnfWarning) as rec:
        model = _fit(cube, size=10)
    msg = " ".join(str(r.message) for r in rec if issubclass(r.category, MnfWarning))
    assert "b001: no noise variance" in msg and "b003: constant" in msg and "b008: constant" in msg
    assert "b006: duplicates b005" in msg
    assert set(model["excluded_bands"]) == {"b001", "b003", "b006", "b008"}
    assert model["used_bands"] == ["b002", "b004", "b005", "b007"]
    assert model["eigenvectors"].shape == (4, 4)
    # Excluded bands pass through the denoising unchanged; the others come back with all components.
    back = denoise(cube, model, 4)
    np.testing.assert_allclose(back, cube, atol=2e-6)


def test_singular_bands_error_mode_names_them(rng):
    with pytest.raises(MnfError, match=r"b003: constant.*b006: duplicates b005"):
        _fit(_singular_cube(rng), size=10, singular="error")


def test_singular_bands_regularized(rng):
    cube = _singular_cube(rng)
    with pytest.warns(MnfWarning, match="regularized.*b003"):
        model = _fit(cube, size=30, singular="regularize")
    assert model["excluded_bands"] == {} and model["regularization"] > 0
    assert set(model["flagged_bands"]) == {"b001", "b003", "b006", "b008"}
    assert model["eigenvectors"].shape == (8, 8)
    # The transform stays invertible: forward then inverse with all components returns the input.
    np.testing.assert_allclose(inverse(forward(cube, model, 8), model), cube, atol=1e-5)


def test_plain_eigh_fails_on_such_data(rng):
    # Why the screening exists (METHODS.md): scipy.linalg.eigh refuses a singular N.
    cube = _singular_cube(rng)
    s, n, _ = _reference(cube, np.ones((30, 30), bool))
    with pytest.raises(np.linalg.LinAlgError):
        scipy.linalg.eigh(s, n)


# ------------------------------------------------------------------------------------------------
# keeping components, sampling, noise area


def test_keep_components_by_count_threshold_and_fraction():
    lam = np.array([50.0, 20.0, 5.0, 1.2, 1.0, 0.9])
    assert keep_components(lam, MnfConfig(components=2)) == 2
    assert keep_components(lam, MnfConfig(min_eigenvalue=1.1)) == 4
    assert keep_components(lam, MnfConfig(cumulative_fraction=70 / lam.sum())) == 2  # exactly reached at 2
    assert keep_components(lam, MnfConfig(cumulative_fraction=0.9)) == 3
    assert keep_components(lam, MnfConfig()) == 6
    with pytest.raises(MnfError, match="largest is 50"):
        keep_components(lam, MnfConfig(min_eigenvalue=60))
    with pytest.raises(MnfError, match="components = 7 but only 6"):
        keep_components(lam, MnfConfig(components=7))


def test_pixel_sample_is_seeded_and_independent_of_tiling(rng):
    cube, _, _ = _scene(rng, rows=40, cols=40, p=5)
    valid = np.ones((40, 40), bool)
    params = _params(pixel_fraction=0.3, seed=7)
    a = _fit_tiled(cube, valid, 6, params)
    b = _fit_tiled(cube, valid, 40, params)
    keep = pixel_sample_mask(np.arange(40)[:, None], np.arange(40)[None, :], 7, 0.3)
    assert a.data.n == b.data.n == int(keep.sum())
    assert 0.2 < keep.mean() < 0.4
    np.testing.assert_allclose(a.data.covariance(), np.cov(cube[:, keep].astype(np.float64)), rtol=1e-11)
    assert a.noise["horizontal"].n == int(keep[:, :-1].sum())  # pairs sampled by their first pixel
    other = pixel_sample_mask(np.arange(40)[:, None], np.arange(40)[None, :], 8, 0.3)
    assert (other != keep).any()
    model = finalize(a, params, _meta(5, _grid(40, 40)))
    assert model["selection"] == {"tile_fraction": 1.0, "pixel_fraction": 0.3, "seed": 7, "n_tiles": 49}


def test_tile_selection_is_seeded_and_recorded(rng):
    grid = _grid(64, 64)
    tiles = list(Tiling(grid, 8, 1))
    params = _params(tile_fraction=0.25, seed=3)
    chosen = select_tiles(tiles, params)
    assert len(chosen) == 16 and chosen == select_tiles(tiles, params)
    assert chosen != select_tiles(tiles, _params(tile_fraction=0.25, seed=4))
    assert select_tiles(tiles, _params()) == tiles
    cube, _, _ = _scene(rng, rows=64, cols=64, p=4)
    blocks = {b.tile.index: b for b in _blocks(cube, np.ones((64, 64), bool), 8, params)}
    acc = accumulate(blocks[chosen[0].index])
    for t in chosen[1:]:
        acc = merge(acc, accumulate(blocks[t.index]))
    model = finalize(acc, params, _meta(4, grid))
    assert model["selection"]["tiles"] == sorted([list(t.index) for t in chosen])
    assert model["selection"]["n_tiles"] == 16


def test_noise_area_window_and_polygon(rng):
    cube, _, _ = _scene(rng, rows=40, cols=40, p=5)
    valid = np.ones((40, 40), bool)
    win = (10, 5, 12, 20)  # row, col, rows, cols
    model = _fit(cube, valid, size=7, noise_area={"window": list(win)})
    sub = cube[:, 10:22, 5:25]
    _, n_ref, _ = _reference(sub, np.ones(sub.shape[1:], bool))  # oracle: np.cov inside the window
    np.testing.assert_allclose(model["noise_covariance"], n_ref, rtol=1e-11)
    # The same window as a polygon in map coordinates (pixel centres inside it), GRID_T: 2 m pixels.
    x0, y0 = GRID_T * (5, 10)
    x1, y1 = GRID_T * (25, 22)
    poly = [[x0, y0], [x1, y0], [x1, y1], [x0, y1]]
    model_p = _fit(cube, valid, size=7, noise_area={"polygon": poly})
    np.testing.assert_allclose(model_p["noise_covariance"], n_ref, rtol=1e-11)
    wkt = f"POLYGON (({x0} {y0}, {x1} {y0}, {x1} {y1}, {x0} {y1}, {x0} {y0}))"
    np.testing.assert_allclose(_fit(cube, valid, size=7, noise_area={"polygon": wkt})["noise_covariance"],
                               n_ref, rtol=1e-11)
    # The data covariance still uses every pixel.
    np.testing.assert_allclose(model["data_covariance"], np.cov(cube.reshape(5, -1).astype(np.float64)), rtol=1e-11)


def test_noise_area_with_no_pairs_is_a_clear_error(rng):
    cube, _, _ = _scene(rng, rows=20, cols=20, p=3)
    with pytest.raises(MnfError, match="no usable difference pairs"):
        _fit(cube, size=20, noise_area={"window": [50, 50, 5, 5]})


# ------------------------------------------------------------------------------------------------
# configuration and steps


def test_config_validation():
    with pytest.raises(ValueError, match="at most one of"):
        MnfConfig(components=3, cumulative_fraction=0.9)
    with pytest.raises(ValueError, match="no effect with method 'pca'"):
        MnfConfig(method="pca", noise_area={"window": [0, 0, 5, 5]})
    with pytest.raises(ValueError, match="exactly one of 'window' or 'polygon'"):
        MnfConfig(noise_area={})
    with pytest.raises(ValueError, match="cannot exceed components"):
        MnfConfig(components=3, denoise_components=4)
    with pytest.raises(ValueError, match="not a valid polygon"):
        MnfConfig(noise_area={"polygon": "POLYGON ((0 0, 1"})
    with pytest.raises(ValueError, match="extra"):
        MnfConfig(colour="red")
    assert MnfConfig().step_name == "mnf" and MnfConfig(method="pca").step_name == "pca"


def test_step_declarations_and_kernels(rng):
    section = MnfConfig(components=3, denoise_components=2)
    fwd, den = mnf_steps(section)
    assert fwd.name == "mnf" and den.name == "mnf_denoised"
    # the fit reads no halo (border pairs meet in merge) and both phases read stored values
    assert fwd.inputs == {"cube": "mosaic/reflectance"} and fwd.fit.halo == 0 and fwd.halo == 0
    assert fwd.decode is False
    assert den.inputs == {"components": "mnf/components", "cube": "mosaic/reflectance"}
    assert [s.name for s in mnf_steps(MnfConfig(method="pca"), "x/y")] == ["pca"]
    cube, _, _ = _scene(rng, rows=20, cols=20, p=6)
    grid = _grid(20, 20)
    meta = _meta(6, grid)
    model = _fit(cube, size=20, params=fwd.params)
    spec = fwd.resolve_outputs(meta, model)["components"]
    assert spec.bands == ("mnf_1", "mnf_2", "mnf_3") and spec.dtype == "float32"
    np.testing.assert_allclose(spec.coords["eigenvalue"], model["eigenvalues"][:3])
    block = next(_blocks(cube, np.ones((20, 20), bool), 20, fwd.params))
    y = fwd.kernel(block, model)["components"]
    np.testing.assert_array_equal(y, forward(cube, model, 3))
    # The forward transform travels in the components' attributes, with the cube's wavelengths and FWHM:
    # (x[band_index] - mean) @ matrix, by plain numpy, gives the components.
    ft = spec.attrs["forward_transform"]
    assert ft["n_components"] == 3 and ft["bands"] == list(meta["cube"].spec.bands)
    assert ft["wavelength"] == list(meta["cube"].spec.coords["wavelength"]) and ft["fwhm"] == [10.0] * 6
    flat = cube.reshape(6, -1).T.astype(np.float64)
    by_attrs = ((flat[:, ft["band_index"]] - np.array(ft["mean"])) @ np.array(ft["matrix"])).T.reshape(3, 20, 20)
    np.testing.assert_allclose(y, by_attrs, rtol=1e-5, atol=1e-5 * np.abs(by_attrs).max())
    # The denoising step gets the inverse through the components' attributes.
    dmeta = {"components": InputMeta("mnf/components", grid, spec), "cube": meta["cube"]}
    out_spec = den.resolve_outputs(dmeta, None)["reflectance"]
    assert out_spec.bands == meta["cube"].spec.bands
    assert out_spec.coords["wavelength"] == meta["cube"].spec.coords["wavelength"]
    dblock = Block(data={"components": y, "cube": cube}, valid=np.ones((20, 20), bool), tile=block.tile,
                   grid=grid, params=den.params, static={}, meta=dmeta)
    got = den.kernel(dblock, None)["reflectance"]
    np.testing.assert_allclose(got, denoise(cube, model, 2), atol=1e-6)
    assert got.dtype == np.float32


def test_denoise_kernel_without_transform_attrs_is_refused(rng):
    cube, _, _ = _scene(rng, rows=8, cols=8, p=3)
    grid = _grid(8, 8)
    spec = OutputSpec(bands=("a", "b"), dtype="float32", nodata=float("nan"))
    tile = next(iter(Tiling(grid, 8)))
    block = Block(data={"components": cube[:2], "cube": cube}, valid=np.ones((8, 8), bool), tile=tile, grid=grid,
                  params=MnfConfig(denoise_components=2), static={},
                  meta={"components": InputMeta("x/components", grid, spec), **_meta(3, grid)})
    with pytest.raises(MnfError, match="no 'inverse_transform'"):
        denoise_kernel(block, None)


# ------------------------------------------------------------------------------------------------
# through the engine (swathmill.tiles.testing.run_on_arrays)


def _engine_inputs(rng, rows=40, cols=48, p=6):
    cube, truth, _ = _scene(rng, rows=rows, cols=cols, p=p, n_signal=3, sigma=3.0)
    valid = np.ones((rows, cols), bool)
    valid[12:15, 5:30] = False
    valid[:, 44:] = False  # whole tiles without data at the smallest tile size
    spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(p)), dtype="float32", nodata=float("nan"),
                      coords={"wavelength": tuple(500.0 + 7.5 * i for i in range(p))})
    return cube, truth, valid, spec


def _engine_run(steps, cube, spec, valid, tmp_path, tile, executor="local", name="run"):
    from swathmill.tiles.testing import run_on_arrays

    return run_on_arrays(steps, {"reflectance": (cube, spec)}, tmp_path, tile=tile, valid=valid,
                         executor=executor, run_name=name)


def test_engine_matches_pure_functions(rng, tmp_path):
    # tiled equals untiled for these steps is checked by tests/test_contract.py (cases mnf, pca, mnf_denoise)
    cube, _, valid, spec = _engine_inputs(rng)
    steps = mnf_steps(MnfConfig(components=4, denoise_components=3), input_ref="src/reflectance")
    small = _engine_run(steps, cube, spec, valid, tmp_path, 8, name="t8")[0]
    assert set(small) == {"mnf/components", "mnf_denoised/reflectance"}
    # The engine's result (8-pixel tiles) equals the pure functions on the whole array.
    model = _fit(cube, valid, size=48, params=steps[0].params)
    y = forward(cube, model)
    np.testing.assert_allclose(small["mnf/components"][:, valid], y[:, valid], rtol=1e-6, atol=1e-6)
    assert np.isnan(small["mnf/components"][:, ~valid]).all()
    np.testing.assert_allclose(small["mnf_denoised/reflectance"][:, valid], denoise(cube, model, 3)[:, valid],
                               atol=2e-6)
    # The model is saved in the run directory as JSON + npz, and the eigenvalues match the fit.
    saved = list((tmp_path / "t8" / "models").glob("mnf-*.npz"))
    assert len(saved) == 1 and saved[0].with_suffix(".json").is_file()
    with np.load(saved[0]) as z:
        np.testing.assert_allclose(z["eigenvalues"], model["eigenvalues"], rtol=1e-10)


@pytest.mark.parametrize("offset,duplicate", [(0.0, False), (-0.05, False), (0.0, True)])
def test_engine_on_stored_int16_equals_scipy_on_decoded_values(rng, tmp_path, offset, duplicate):
    """The step works on stored integers (scale_factor, add_offset, nodata in single bands) and scales
    the moments at the end: the model equals an independent whole-array reference on the decoded
    values, and the components equal the pure transform of the decoded cube. With a duplicated band
    the transform leaves it out, so the forward pass copies two runs of bands."""
    cube, _, valid, _ = _engine_inputs(rng, p=7)
    p, rows, cols = cube.shape
    scale = 1e-4
    phys = 0.3 + 0.02 * cube  # reflectance-like values
    stored = np.round((phys - offset) / scale).astype(np.int16)
    if duplicate:
        stored[4] = stored[2]  # b005 duplicates b003: singular noise covariance, excluded
    stored[3, 20, 10] = -9999  # one band on nodata in a valid pixel: the pixel leaves the statistics
    stored[:, 30, 40] = -9999
    spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(p)), dtype="int16", nodata=-9999,
                      attrs={"scale_factor": scale, **({"add_offset": offset} if offset else {})})
    steps = mnf_steps(MnfConfig(components=4), input_ref="src/reflectance")
    name = f"int16{offset}{duplicate}"
    if duplicate:
        with pytest.warns(MnfWarning, match=r"b005: duplicates b003"):
            out, _ = _engine_run(steps, stored, spec, valid, tmp_path, 8, name=name)
    else:
        out, _ = _engine_run(steps, stored, spec, valid, tmp_path, 8, name=name)
    used = np.array([i for i in range(p) if not (duplicate and i == 4)])
    decoded = stored * scale + offset  # float64, as a user would decode
    ok = valid & (stored != -9999).all(axis=0)
    # whole-array reference (METHODS.md oracle): np.cov of the data and of both shift differences,
    # noise = half the mean of the two difference covariances, scipy.linalg.eigh(S, N)
    X = decoded[used][:, ok]
    dh = (decoded[used][:, :, :-1] - decoded[used][:, :, 1:])[:, ok[:, :-1] & ok[:, 1:]]
    dv = (decoded[used][:, :-1, :] - decoded[used][:, 1:, :])[:, ok[:-1, :] & ok[1:, :]]
    s_ref = np.cov(X)
    n_ref = 0.25 * (np.cov(dh) + np.cov(dv))
    lam_ref = scipy.linalg.eigh(s_ref, n_ref, eigvals_only=True)[::-1]
    saved = next((tmp_path / name / "models").glob("mnf-*.npz"))
    with np.load(saved) as z:
        np.testing.assert_allclose(z["eigenvalues"], lam_ref, rtol=1e-8)
        np.testing.assert_allclose(z["mean"], X.mean(axis=1), rtol=1e-12)
        model = {k: z[k] for k in ("eigenvectors", "mean", "band_index")}
    model.update(bands=list(spec.bands), n_components=4)
    y = forward(np.where(ok, decoded, np.nan).astype(np.float64), model)
    got = out["mnf/components"]
    assert np.isnan(got[:, ~ok]).all()
    np.testing.assert_allclose(got[:, ok], y[:, ok], rtol=1e-6, atol=1e-6 * np.abs(y[:, ok]).max())


@pytest.mark.slow
def test_engine_worker_count_does_not_change_the_fit(rng, tmp_path):
    from swathmill.tiles.executors import DaskExecutor

    cube, _, valid, spec = _engine_inputs(rng)
    steps = mnf_steps(MnfConfig(method="pca", components=3), input_ref="src/reflectance")
    local, _ = _engine_run(steps, cube, spec, valid, tmp_path, 8, name="local")
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        ex = DaskExecutor(client=client)
        dask_out, _ = _engine_run(steps, cube, spec, valid, tmp_path, 8, executor=ex, name="dask")
    a, b = local["pca/components"], dask_out["pca/components"]
    np.testing.assert_allclose(a[:, valid], b[:, valid], rtol=1e-6, atol=1e-6 * np.nanmax(np.abs(a)))
    models = [np.load(next((tmp_path / r / "models").glob("pca-*.npz"))) for r in ("local", "dask")]
    np.testing.assert_allclose(models[0]["data_covariance"], models[1]["data_covariance"], rtol=1e-12)
