"""Linear unmixing: against scipy.optimize.nnls, closed forms, an exact enumeration oracle, published
check values, least-squares theory, the open Jasper Ridge scene, and the engine (tiled = untiled)."""
from __future__ import annotations

import itertools
import math
import warnings

import numpy as np
import pytest
import scipy.io
import scipy.optimize

from swathmill.tiles.testing import run_on_arrays
from swathmill.workflows.methods import unmix as um
from swathmill.workflows.methods.endmembers import extract_endmembers
from swathmill.workflows.inputs.library import LibraryError, SpectralLibrary
from swathmill.workflows.methods.unmix import (HAVE_NUMBA, IllConditionedWarning, LinearTransform, UnmixConfig, UnmixError, Unmixer,
                             build_steps, check_endmembers, condition_number, fcls_pixel, kkt_violation, unmix,
                             unmix_cube, unmix_step)

ENGINES = ["numpy"] + (["compiled"] if HAVE_NUMBA else [])

# METHODS.md, "Linear unmixing" check values [R]
M5x3 = np.array([[.10, .50, .30], [.20, .55, .35], [.30, .60, .20], [.40, .58, .10], [.50, .52, .05]])
Y5 = np.array([.05, .10, .12, .15, .20])
CHECK = {
    "unconstrained": [0.487367, -0.103271, 0.172756],
    "sum_to_one": [0.848488, -0.453758, 0.605270],
    "nonnegative": [0.381498, 0.0, 0.049671],
    "fully_constrained": [0.443836, 0.0, 0.556164],
}


def heinz_chang(m: np.ndarray, x: np.ndarray, scale: float = 1e5) -> np.ndarray:
    """scipy.optimize.nnls on Heinz and Chang's augmented system [M; d 1'] a = [x; d] (Heinz and Chang,
    2001). With a finite d the sum holds to O(|mu|/d^2): d = 1e5 max|M| (above METHODS.md's 10-1000
    range) makes that gap ~1e-8 here, below the 1e-6 the comparison asks for."""
    d = scale * np.abs(m).max()
    aug = np.vstack([m, np.full((1, m.shape[1]), d)])
    return scipy.optimize.nnls(aug, np.r_[x, d])[0]


def enumerate_supports(m: np.ndarray, x: np.ndarray, sum_to_one: bool) -> np.ndarray:
    """Exact oracle for few endmembers (METHODS.md): on every support solve the (sum-to-one) least
    squares by the KKT system with numpy.linalg.lstsq, keep the feasible solution of least residual."""
    p = m.shape[1]
    best, best_r = None, math.inf
    for k in range(1, p + 1):
        for sup in itertools.combinations(range(p), k):
            ms = m[:, sup]
            if sum_to_one:
                kkt = np.block([[ms.T @ ms, np.ones((k, 1))], [np.ones((1, k)), np.zeros((1, 1))]])
                sol = np.linalg.lstsq(kkt, np.r_[ms.T @ x, 1.0], rcond=None)[0][:k]
            else:
                sol = np.linalg.lstsq(ms, x, rcond=None)[0]
            if sol.min() < -1e-12:
                continue
            a = np.zeros(p)
            a[list(sup)] = sol
            r = float(np.sum((x - m @ a) ** 2))
            if r < best_r:
                best, best_r = a, r
    return best


def random_problem(rng: np.random.Generator, bands: int = 40, p: int = 5, n: int = 400, noise: float = 0.03):
    """Well-conditioned smooth-ish endmembers; abundances with many zeros, some outside the simplex."""
    m = 0.1 + 0.6 * rng.random((bands, p))
    a = rng.dirichlet(np.full(p, 0.4), n).T
    a[:, : n // 4] *= rng.uniform(0.6, 1.4, n // 4)  # sums off one: constraints bind differently
    x = m @ a + rng.normal(0.0, noise, (bands, n))
    x[:, -20:] = rng.random((bands, 20))  # arbitrary pixels
    return m, a, x


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("method", list(CHECK))
def test_methods_check_values(method, engine):
    res = Unmixer(M5x3, method, engine=engine).solve(np.c_[Y5, M5x3 @ [.2, .5, .3]])
    # METHODS.md check values [R], quoted to 6 decimals
    np.testing.assert_allclose(res.abundances[:, 0], CHECK[method], atol=1e-6)
    # x = M [.2 .5 .3] gives [.2 .5 .3] for all four variants (METHODS.md)
    np.testing.assert_allclose(res.abundances[:, 1], [.2, .5, .3], atol=1e-12)
    assert res.n_fallback == 0


@pytest.mark.parametrize("engine", ENGINES)
def test_nonnegative_matches_scipy_nnls(rng, engine):
    m, _a, x = random_problem(rng)
    res = Unmixer(m, "nonnegative", engine=engine).solve(x)
    ref = np.stack([scipy.optimize.nnls(m, x[:, i])[0] for i in range(x.shape[1])], axis=1)  # scipy oracle
    active = np.mean(np.any(ref == 0.0, axis=0))
    assert active > 0.3, f"the problem should have active constraints on many pixels; got {active:.0%}"
    np.testing.assert_allclose(res.abundances, ref, atol=1e-6)
    assert np.array_equal(res.abundances == 0.0, ref == 0.0)


@pytest.mark.parametrize("engine", ENGINES)
def test_fully_constrained_matches_heinz_chang_nnls(rng, engine):
    m, _a, x = random_problem(rng)
    res = Unmixer(m, "fully_constrained", engine=engine).solve(x)
    ref = np.stack([heinz_chang(m, x[:, i]) for i in range(x.shape[1])], axis=1)
    assert np.mean(np.any(ref < 1e-9, axis=0)) > 0.3
    np.testing.assert_allclose(res.abundances, ref, atol=1e-6)
    np.testing.assert_allclose(res.abundances.sum(axis=0), 1.0, atol=1e-12)
    assert res.abundances.min() >= 0.0


@pytest.mark.parametrize("method", ["nonnegative", "fully_constrained"])
def test_matches_exact_support_enumeration(rng, method):
    m, _a, x = random_problem(rng, bands=25, p=4, n=150)
    res = unmix(x, m, method)
    ref = np.stack([enumerate_supports(m, x[:, i], method == "fully_constrained") for i in range(x.shape[1])], axis=1)
    np.testing.assert_allclose(res.abundances, ref, atol=1e-9)
    rss = np.sum((x - m @ ref) ** 2, axis=0)
    np.testing.assert_allclose(res.rmse, np.sqrt(rss / m.shape[0]), rtol=1e-9)


def test_closed_forms_match_lstsq_and_formula(rng):
    m, _a, x = random_problem(rng, n=100)
    ls = np.linalg.lstsq(m, x, rcond=None)[0]  # numpy least squares
    np.testing.assert_allclose(unmix(x, m, "unconstrained").abundances, ls, rtol=1e-9, atol=1e-12)
    g = np.linalg.inv(m.T @ m)
    one = np.ones(m.shape[1])
    s2o = ls + np.outer(g @ one, 1.0 - one @ ls) / (one @ g @ one)  # METHODS.md sum-to-one formula
    np.testing.assert_allclose(unmix(x, m, "sum_to_one").abundances, s2o, rtol=1e-9, atol=1e-12)
    out = unmix_cube(x.reshape(m.shape[0], 10, 10), m, "unconstrained")
    np.testing.assert_allclose(out["sum"].ravel(), ls.sum(axis=0), rtol=1e-6)


@pytest.mark.parametrize("method", um.METHODS)
def test_noise_free_mixtures_recovered(rng, method):
    p, bands, n = 5, 60, 2000
    m = 0.05 + 0.7 * rng.random((bands, p))
    a = rng.dirichlet(np.ones(p), n).T
    if method in ("nonnegative", "fully_constrained"):
        a[:, : n // 2] = rng.dirichlet(np.full(p, 0.3), n // 2).T  # many tiny abundances
        a[rng.random((p, n)) < 0.3] = 0.0  # exact zeros: constraints active at the solution
        a /= np.maximum(a.sum(axis=0), 1e-12)
        a[:, a.sum(axis=0) == 0] = np.eye(p)[:, [0]]
    res = unmix(m @ a, m, method)
    np.testing.assert_allclose(res.abundances, a, atol=1e-8)  # issue 6: noise-free recovery to 1e-8
    assert res.rmse.max() < 1e-10


@pytest.mark.parametrize("method", ["unconstrained", "sum_to_one", "fully_constrained"])
def test_abundance_error_matches_least_squares_theory(rng, method):
    """With white noise of variance s^2 the least-squares abundance error has covariance
    s^2 (M'M)^-1 (Gauss-Markov); under 1'a = 1 it is s^2 (G - G 1 1'G / 1'G 1) with G = (M'M)^-1
    (common practice). The fully constrained solution equals the sum-to-one one while no bound is
    active, so interior abundances with small noise follow the same law."""
    p, bands, n, sigma = 4, 50, 20000, 0.01
    m = 0.1 + 0.5 * rng.random((bands, p))
    a = 0.2 + 0.2 * rng.dirichlet(np.ones(p), n).T  # >= 0.2: far from the bounds
    a /= a.sum(axis=0)
    res = unmix(m @ a + rng.normal(0.0, sigma, (bands, n)), m, method)
    g = np.linalg.inv(m.T @ m)
    cov = sigma**2 * g
    if method != "unconstrained":
        one = np.ones(p)
        cov = sigma**2 * (g - np.outer(g @ one, g @ one) / (one @ g @ one))
    expected = math.sqrt(np.trace(cov) / p)
    measured = float(np.sqrt(np.mean((res.abundances - a) ** 2)))
    # relative standard error of an MSE over n p draws is about sqrt(2 / (n p)) = 0.5%: 5% margin
    assert abs(measured / expected - 1) < 0.05, (measured, expected)


def test_fallback_resolves_pixels_exactly(rng):
    m, _a, x = random_problem(rng, n=120)
    for method, oracle in (("nonnegative", lambda i: scipy.optimize.nnls(m, x[:, i])[0]),
                           ("fully_constrained", lambda i: heinz_chang(m, x[:, i]))):
        u = Unmixer(m, method, max_rounds=0, engine="numpy")  # no rounds: every constrained pixel falls back
        res = u.solve(x)
        assert res.n_fallback > 50
        ref = np.stack([oracle(i) for i in range(x.shape[1])], axis=1)
        np.testing.assert_allclose(res.abundances, ref, atol=1e-6)


def test_kkt_violation_detects_non_optimal_points(rng):
    m, _a, x = random_problem(rng, n=50)
    g, b = m.T @ m, m.T @ x
    res = unmix(x, m, "fully_constrained")
    assert kkt_violation(g, b, res.abundances, "fully_constrained").max() < 1e-9
    moved = res.abundances.copy()
    moved[0] += 0.01
    moved[1] -= 0.01
    moved = np.clip(moved, 0, None)
    moved /= moved.sum(axis=0)
    assert np.median(kkt_violation(g, b, moved, "fully_constrained")) > 1e-5


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba is not installed")
def test_engines_agree(rng):
    m, _a, x = random_problem(rng, n=3000)
    for method in ("nonnegative", "fully_constrained"):
        a = Unmixer(m, method, engine="numpy").solve(x)
        b = Unmixer(m, method, engine="compiled").solve(x)
        np.testing.assert_allclose(a.abundances, b.abundances, atol=1e-12)
        np.testing.assert_allclose(a.rmse, b.rmse, rtol=1e-10)


def test_fcls_pixel_is_exact(rng):
    m, _a, x = random_problem(rng, bands=20, p=4, n=30)
    for i in range(x.shape[1]):
        np.testing.assert_allclose(fcls_pixel(m, x[:, i]), enumerate_supports(m, x[:, i], True), atol=1e-10)


def test_nan_pixels_give_nan(rng):
    m, a, x = random_problem(rng, n=50)
    x[3, 7] = np.nan
    res = unmix(x, m, "fully_constrained")
    assert np.isnan(res.abundances[:, 7]).all() and np.isnan(res.rmse[7])
    assert np.isfinite(res.abundances[:, 6]).all() and res.n_valid == 49


# endmember sets ------------------------------------------------------------------------------------
def test_ill_conditioned_set_warns_with_condition_number(rng):
    m = 0.1 + 0.5 * rng.random((30, 3))
    m[:, 2] = m[:, 1] * 1.001 + rng.normal(0, 1e-5, 30)  # near duplicate of the second
    with pytest.warns(IllConditionedWarning, match=r"condition number [0-9.e+]+ exceeds 1000.*'em_2' and 'em_3'"):
        Unmixer(m, "unconstrained")
    cond = condition_number(m)
    s = np.linalg.svd(m, compute_uv=False)  # numpy: ratio of extreme singular values
    assert cond == pytest.approx(s[0] / s[-1], rel=1e-12)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        Unmixer(M5x3, "fully_constrained")  # well conditioned: silent


def test_rank_deficient_and_bad_sets_refused(rng):
    m = 0.1 + 0.5 * rng.random((30, 3))
    dup = np.c_[m, m[:, 0]]
    with pytest.raises(UnmixError, match="rank-deficient.*'em_1' and 'em_4'"):
        check_endmembers(dup, ["em_1", "em_2", "em_3", "em_4"], "unconstrained")
    bad = m.copy()
    bad[4, 1] = np.nan
    with pytest.raises(UnmixError, match="'b' has a non-finite value in band 5"):
        check_endmembers(bad, ["a", "b", "c"], "nonnegative")
    with pytest.raises(UnmixError, match="pixels must be \\(30 bands, n\\)"):
        Unmixer(m, "nonnegative").solve(np.zeros((29, 4)))
    with pytest.raises(UnmixError, match="shade endmember needs a sum-to-one variant"):
        unmix(m @ np.ones((3, 2)), m, "nonnegative", shade=True)


def test_shade_endmember(rng):
    m = 0.2 + 0.5 * rng.random((40, 3))
    a = rng.dirichlet(np.ones(3), 200).T
    bright = rng.uniform(0.5, 1.0, 200)
    res = unmix(m @ (a * bright), m, "fully_constrained", shade=True, names=["a", "b", "c"])
    # x = sum(bright a_i e_i) + (1 - bright) * 0: the shade endmember takes the missing brightness
    np.testing.assert_allclose(res.abundances[:3], a * bright, atol=1e-9)
    np.testing.assert_allclose(res.abundances[3], 1 - bright, atol=1e-9)


def test_transformed_space_gives_same_sum_to_one_abundances(rng):
    """An invertible affine transform (like MNF with all components) preserves sum-to-one solutions
    up to the metric: with an orthogonal matrix the least-squares problem is identical."""
    m, _a, x = random_problem(rng, bands=12, p=3, n=80)
    q, _ = np.linalg.qr(rng.normal(size=(12, 12)))
    tf = LinearTransform(offset=rng.random(12), matrix=q)
    comp = tf(x.T).T
    for method in ("sum_to_one", "fully_constrained"):
        direct = unmix(x, m, method).abundances
        moved = unmix(comp, m, method, transform=tf).abundances
        np.testing.assert_allclose(moved, direct, atol=1e-10)


# the step ------------------------------------------------------------------------------------------
def _scene(rng, bands=24, rows=40, cols=36, p=3):
    m = 0.1 + 0.6 * rng.random((bands, p))
    a = rng.dirichlet(np.full(p, 0.6), rows * cols).T
    x = (m @ a + rng.normal(0, 0.01, (bands, rows * cols))).reshape(bands, rows, cols).astype(np.float32)
    x[:, 3, 5] = np.nan
    return m, x


@pytest.mark.parametrize("method", ["unconstrained", "fully_constrained"])
def test_step_equals_unmix_cube_on_the_whole_array(rng, tmp_path, method):
    # tiled equals untiled for every method is checked by tests/test_contract.py (cases unmix_*)
    m, x = _scene(rng)
    names = ["soil", "grass", "water"]
    ref = unmix_cube(x, m, method, names=names)
    for tile in (8,):
        step = unmix_step("unmix", "src/cube", method=method, endmembers=m, names=names)
        out, result = run_on_arrays([step], {"cube": x}, tmp_path / f"t{tile}", tile=tile)
        assert result.ok
        for key in ref:
            got = out[f"unmix/{key}"]
            assert np.array_equal(np.isnan(got), np.isnan(ref[key]))
            np.testing.assert_allclose(got, ref[key], rtol=1e-6, atol=1e-7)  # the engine = the whole-array solve
        assert np.isnan(out["unmix/abundance"][:, 3, 5]).all()


def test_step_band_names_and_outputs(rng, tmp_path):
    m, x = _scene(rng)
    step = unmix_step("u", "src/cube", method="unconstrained", endmembers=m, names=["soil", "grass", "water"])
    out, _ = run_on_arrays([step], {"cube": x}, tmp_path, tile=16)
    assert set(out) == {"u/abundance", "u/rmse", "u/sum"}
    from swathmill.tiles.store import open_store
    store = open_store(tmp_path / "run" / "stores" / "u.zarr")
    assert store.specs["abundance"].bands == ("soil", "grass", "water")
    assert store.specs["abundance"].dtype == "float32"


def test_library_endmembers_resampled_and_uncovered_refused(rng, tmp_path):
    wl_cube = np.linspace(450.0, 950.0, 24)
    coords = {"wavelength": tuple(wl_cube), "fwhm": tuple(np.full(24, np.nan))}  # unknown widths: linear
    from swathmill.tiles.step import OutputSpec
    spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(24)), dtype="float32", nodata=float("nan"),
                      coords=coords)
    lib_wl = np.arange(400.0, 1001.0, 1.0)
    spectra = np.stack([0.2 + 0.1 * np.sin(lib_wl / 60.0), 0.5 - 0.0003 * (lib_wl - 400), 0.05 + 0 * lib_wl])
    lib = SpectralLibrary(("rock", "leaf", "water"), lib_wl, spectra, source="lib.csv")
    m = np.stack([np.interp(wl_cube, lib_wl, s) for s in spectra], axis=1)  # numpy linear interpolation
    a = rng.dirichlet(np.ones(3), 30 * 20).T
    x = (m @ a).reshape(24, 30, 20).astype(np.float32)
    step = unmix_step("u", "src/cube", library=lib)
    out, result = run_on_arrays([step], {"cube": (x, spec)}, tmp_path / "ok", tile=16)
    assert result.ok
    np.testing.assert_allclose(out["u/abundance"].reshape(3, -1), a, atol=1e-5)  # float32 data
    short = SpectralLibrary(("rock", "leaf", "water"), lib_wl[:400], spectra[:, :400], source="short.csv")
    with pytest.raises(LibraryError, match="short.csv covers 400-799 nm"):
        run_on_arrays([unmix_step("u2", "src/cube", library=short)], {"cube": (x, spec)}, tmp_path / "bad", tile=16)


def test_config_and_build_steps(tmp_path):
    lib = SpectralLibrary(("a", "b"), np.array([400.0, 500.0, 600.0]), np.array([[.1, .2, .3], [.3, .2, .1]]),
                          source="x")
    from swathmill.workflows.inputs.library import write_library
    write_library(lib, tmp_path / "lib.csv")
    cfg = UnmixConfig.model_validate({"method": "sum_to_one", "shade": True, "endmembers": {"library": "lib.csv"}})
    steps = build_steps(cfg, {"base_dir": tmp_path})
    assert steps[0].name == "unmix" and steps[0].params.settings.shade is True
    img = UnmixConfig.model_validate({"endmembers": {"image": {"method": "vca", "n_endmembers": 4,
                                                               "reduced": "mnf/components"}}})
    step = build_steps(img)[0]
    assert step.inputs == {"x": "mosaic/reflectance", "reduced": "mnf/components"}
    with pytest.raises(ValueError, match="exactly one of library, samples or image"):
        UnmixConfig.model_validate({"endmembers": {"library": "a.csv", "image": {"n_endmembers": 3}}})
    with pytest.raises(ValueError, match="shade needs method"):
        UnmixConfig.model_validate({"method": "nonnegative", "shade": True, "endmembers": {"library": "a.csv"}})
    with pytest.raises(ValueError, match="extra"):
        UnmixConfig.model_validate({"endmembers": {"library": "a.csv"}, "bogus": 1})


# open data: Jasper Ridge -----------------------------------------------------------------------------
@pytest.fixture
def jasper(shared_data):
    d = shared_data / "jasper_ridge"
    y = scipy.io.loadmat(d / "JasperRidge2_R198.mat")["Y"].astype(np.float64) / 5000.0  # data README: Y/5000
    e = scipy.io.loadmat(d / "JasperRidge2_end4.mat")
    return y, e["M"], e["A"]


def test_jasper_ridge_fcls_against_nnls_and_reference(jasper):
    y, m, a_ref = jasper
    res = unmix(y, m, "fully_constrained")
    sub = np.arange(0, y.shape[1], 4)  # every fourth pixel keeps the nnls loop short
    ref = np.stack([heinz_chang(m, y[:, i]) for i in sub], axis=1)
    np.testing.assert_allclose(res.abundances[:, sub], ref, atol=1e-6)
    rmse = float(np.sqrt(np.mean((res.abundances - a_ref) ** 2)))
    # data README: FCLS with the reference M on Y/5000 gives an abundance RMSE of about 0.085 (scipy)
    assert abs(rmse - 0.085) < 0.005, rmse


def _match(e: np.ndarray, m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Extracted endmembers (bands, p) reordered to the reference's by least total spectral angle
    (scipy's linear_sum_assignment), and the angles."""
    cos = (e.T @ m) / np.outer(np.linalg.norm(e, axis=0), np.linalg.norm(m, axis=0))
    ang = np.arccos(np.clip(cos, -1.0, 1.0))  # spectral angle, Kruse et al. (1993)
    r, c = scipy.optimize.linear_sum_assignment(ang)
    out = np.empty_like(e)
    out[:, c] = e[:, r]
    return out, ang[r, c][np.argsort(c)]


@pytest.mark.parametrize("method", ["atgp", "nfindr", "vca"])
def test_jasper_ridge_extracted_endmembers(jasper, method):
    y, m, a_ref = jasper
    cube = y.reshape(198, 100, 100, order="F")  # data README: MATLAB column order
    a_img = a_ref.reshape(4, 100, 100, order="F").reshape(4, -1)
    flat = cube.reshape(198, -1).T
    w, v = np.linalg.eigh(np.cov(flat.T))  # PCA by numpy: the reduced data for extraction
    red = ((flat - flat.mean(axis=0)) @ v[:, ::-1][:, :3]).T.reshape(3, 100, 100)
    model = extract_endmembers(red, cube, method=method, n_endmembers=4, seed=0)
    e, angles = _match(model["spectra"].T, m)
    a = unmix(cube.reshape(198, -1), e, "fully_constrained").abundances
    rmse = float(np.sqrt(np.mean((a - a_img) ** 2)))
    e_rmse = float(np.sqrt(np.mean((e - m) ** 2)))
    print(f"\nJasper Ridge, {method}: abundance RMSE {rmse:.4f} (data README: 0.1-0.3 for extraction "
          f"pipelines, 0.085 with the reference endmembers); spectral angle to the reference endmembers "
          f"{np.round(angles, 3).tolist()} rad (mean {angles.mean():.3f}); endmember RMSE {e_rmse:.4f}")
    # data README: classical pipelines that also extract the endmembers report 0.1-0.3 (from memory)
    assert 0.085 < rmse < 0.3
    assert angles.max() < 0.35


def test_ground_reference_endmembers_are_class_means(rng, tmp_path):
    from swathmill.workflows.inputs.reference import SampleTable
    m, x = _scene(rng, rows=32, cols=32)
    x[:, :4, :6] = m[:, [0]][:, :, None]  # pure patches: the class means are the endmember spectra
    x[:, 20:24, 20:26] = m[:, [1]][:, :, None]
    x[:, 28:, :3] = m[:, [2]][:, :, None]
    rr, cc, lab, split = [], [], [], []
    for k, (r0, r1, c0, c1) in enumerate([(0, 4, 0, 6), (20, 24, 20, 26), (28, 32, 0, 3)]):
        for r in range(r0, r1):
            for c in range(c0, c1):
                rr.append(r), cc.append(c), lab.append(k + 1), split.append(1)
    rr.append(10), cc.append(10), lab.append(1), split.append(2)  # a validation sample: never used
    n = len(rr)
    table = SampleTable(row=np.array(rr), col=np.array(cc), label=np.array(lab, np.int32),
                        group=np.arange(n), feature=np.arange(n), split=np.array(split, np.uint8),
                        class_names=("soil", "grass", "water"))
    ref = unmix_cube(x, m.astype(np.float32).astype(np.float64), "fully_constrained")
    outs = []
    for tile in (8, 32):
        step = unmix_step("u", "src/cube", samples=table)
        out, result = run_on_arrays([step], {"cube": x}, tmp_path / f"t{tile}", tile=tile)
        assert result.ok
        outs.append(out["u/abundance"])
    np.testing.assert_allclose(outs[0], outs[1], rtol=1e-6, atol=1e-7)
    np.testing.assert_allclose(outs[0], ref["abundance"], atol=1e-5)


def test_image_endmembers_step_tiled_equals_untiled(rng, tmp_path):
    m, x = _scene(rng, rows=48, cols=40)
    outs = []
    from swathmill.tiles.step import OutputSpec
    from swathmill.tiles.tasks import load_model
    from swathmill.workflows.methods.endmembers import endmember_library, endmember_points
    wl = np.linspace(400.0, 1000.0, x.shape[0])
    spec = OutputSpec(tuple(f"b{i + 1:03d}" for i in range(x.shape[0])), "float32", float("nan"),
                      coords={"wavelength": tuple(wl)})
    red = _pca(x, 2)
    for tile in (8, 48):
        step = unmix_step("u", "src/cube", image={"method": "nfindr", "n_endmembers": 3, "seed": 2},
                          reduced_ref="src/red", shade=True)
        out, result = run_on_arrays([step], {"cube": (x, spec), "red": red}, tmp_path / f"t{tile}", tile=tile)
        assert result.ok
        outs.append(out["u/abundance"])
    for o in outs[1:]:
        np.testing.assert_allclose(o, outs[0], rtol=1e-6, atol=1e-7)
    model = load_model(next((tmp_path / "t48" / "run" / "models").glob("u-*.json")).with_suffix(""))
    assert list(model["names"]) == ["em_1", "em_2", "em_3", "shade"]
    lib = endmember_library(model)
    for i, (r, c) in enumerate(zip(model["rows"], model["cols"])):
        np.testing.assert_array_equal(lib.spectra[i], x[:, r, c])  # the cube's spectra at the chosen pixels
    assert len(endmember_points(model)["features"]) == 3


def _pca(x: np.ndarray, k: int) -> np.ndarray:
    """First k principal components (numpy eigh of the covariance), NaN pixels kept NaN."""
    flat = x.reshape(x.shape[0], -1).T.astype(np.float64)
    ok = np.isfinite(flat).all(axis=1)
    w, v = np.linalg.eigh(np.cov(flat[ok].T))
    out = np.full((flat.shape[0], k), np.nan)
    out[ok] = (flat[ok] - flat[ok].mean(axis=0)) @ v[:, ::-1][:, :k]
    return out.T.reshape((k,) + x.shape[1:]).astype(np.float32)


def test_library_endmembers_on_mnf_components(rng, tmp_path):
    """Library endmembers moved into component space by the MNF forward transform (mean, eigenvectors
    of scipy.linalg.eigh(S, N), Green et al. 1988) unmix components of noise-free mixtures exactly."""
    import scipy.linalg
    from swathmill.tiles.step import OutputSpec
    bands, k = 24, 6
    wl_cube = np.linspace(450.0, 950.0, bands)
    lib_wl = np.arange(400.0, 1001.0, 2.0)
    spectra = np.stack([0.2 + 0.1 * np.sin(lib_wl / 60.0), 0.5 - 0.0003 * (lib_wl - 400),
                        0.05 + 0.02 * np.cos(lib_wl / 90.0)])
    lib = SpectralLibrary(("rock", "leaf", "water"), lib_wl, spectra, source="lib.csv")
    m = np.stack([np.interp(wl_cube, lib_wl, s) for s in spectra], axis=1)  # numpy linear interpolation
    a = rng.dirichlet(np.ones(3), 400).T
    x = (m @ a + rng.normal(0, 0.01, (bands, 400))).T
    used = np.arange(2, bands)  # the transform leaves two bands out
    s_cov = np.cov(x[:, used].T)
    w, v = scipy.linalg.eigh(s_cov, 1e-4 * np.eye(used.size))  # MNF with white noise of variance 1e-4
    model = {"mean": x[:, used].mean(axis=0), "eigenvectors": v[:, ::-1], "band_index": used, "n_components": k}
    tf = LinearTransform.from_mnf_model(model)
    comp = tf((m @ a).T).T.reshape(k, 20, 20).astype(np.float32)  # noise-free mixtures, in components
    step = unmix_step("u", "src/comp", method="fully_constrained", library=lib, transform=tf,
                      cube_wavelengths=wl_cube)
    out, result = run_on_arrays([step], {"comp": comp}, tmp_path, tile=10)
    assert result.ok
    np.testing.assert_allclose(out["u/abundance"].reshape(3, -1), a, atol=1e-4)  # float32 components
    with pytest.raises(UnmixError, match="cube wavelengths for a transform that uses 24 bands"):
        unmix_step("u", "src/comp", library=lib, transform=tf, cube_wavelengths=wl_cube[:10])


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba is not installed")
def test_compiled_kkt_check_equals_numpy(rng):
    m, _a, x = random_problem(rng, n=300)
    g, b = m.T @ m, m.T @ x
    for method in um.METHODS:
        a = unmix(x, m, method).abundances
        for cand in (a, a + rng.normal(0, 1e-3, a.shape), np.abs(a)):
            np.testing.assert_allclose(um.kkt_violation_compiled(g, b, cand, method), kkt_violation(g, b, cand, method),
                                       rtol=1e-10, atol=1e-15)


def test_step_warns_and_refuses(rng, tmp_path):
    m, x = _scene(rng, rows=16, cols=16)
    near = np.c_[m, m[:, 0] + 1e-6]
    with pytest.warns(IllConditionedWarning, match="condition number"):  # warned when the step is fitted
        out, result = run_on_arrays([unmix_step("u", "src/cube", endmembers=near)], {"cube": x}, tmp_path, tile=16)
    assert result.ok
    with pytest.raises(UnmixError, match="exactly one endmember source"):
        unmix_step("u", "src/cube", endmembers=m, image={"method": "atgp", "n_endmembers": 3})
    with pytest.raises(UnmixError, match="unknown unmixing method 'lsq'"):
        unmix_step("u", "src/cube", method="lsq", endmembers=m)
    with pytest.raises(UnmixError, match=r"step 'u': max_condition: .*greater than 1. Got 0.5"):  # UnmixSettings bound
        unmix_step("u", "src/cube", max_condition=0.5, endmembers=m)
    with pytest.raises(UnmixError, match="shade needs method sum_to_one or fully_constrained. Got 'nonnegative'"):
        unmix_step("u", "src/cube", method="nonnegative", shade=True, endmembers=m)
    with pytest.raises(UnmixError, match="endmembers have 23 bands but input 'src/cube' has 24"):
        run_on_arrays([unmix_step("v", "src/cube", endmembers=m[:-1])], {"cube": x}, tmp_path / "b", tile=16)


@pytest.mark.parametrize("reduction", ["mnf", "pca"])
def test_library_on_components_takes_the_transform_from_the_input_metadata(rng, tmp_path, reduction):
    """Built before anything runs, the unmixing step on MNF/PCA components reads the forward transform
    the components publish (attrs["forward_transform"]) when it is fitted. Its endmembers and
    abundances are identical to the previous route, a second run whose step gets
    LinearTransform.from_mnf_model of the fitted model and the cube's wavelengths. With PCA and every
    component (an orthonormal rotation about the mean) sum-to-one abundances on components equal those
    on reflectance (least squares algebra; common practice)."""
    from swathmill.tiles.step import OutputSpec
    from swathmill.tiles.store import open_store
    from swathmill.tiles.tasks import load_model
    from swathmill.workflows.methods.mnf import FORWARD_TRANSFORM, MnfConfig, mnf_steps
    bands, rows, cols = 16, 24, 20
    wl = np.linspace(450.0, 950.0, bands)
    lib_wl = np.arange(400.0, 1001.0, 2.0)
    spectra = np.stack([0.2 + 0.1 * np.sin(lib_wl / 60.0), 0.5 - 0.0003 * (lib_wl - 400),
                        0.05 + 0.02 * np.cos(lib_wl / 90.0)])
    lib = SpectralLibrary(("rock", "leaf", "water"), lib_wl, spectra, source="lib.csv")
    m = np.stack([np.interp(wl, lib_wl, s) for s in spectra], axis=1)  # numpy linear interpolation
    a = rng.dirichlet(np.ones(3), rows * cols).T
    x = (m @ a + rng.normal(0, 0.01, (bands, rows * cols))).reshape(bands, rows, cols).astype(np.float32)
    spec = OutputSpec(tuple(f"b{i + 1:03d}" for i in range(bands)), "float32", float("nan"),
                      coords={"wavelength": tuple(wl), "fwhm": tuple(np.full(bands, np.nan))})
    mnf = mnf_steps(MnfConfig(method=reduction, components=bands), input_ref="src/refl")
    new = unmix_step("u", f"{reduction}/components", method="sum_to_one", library=lib)
    out, result = run_on_arrays([*mnf, new], {"refl": (x, spec)}, tmp_path / "new", tile=8)
    assert result.ok
    comp = open_store(tmp_path / "new" / "run" / "stores" / f"{reduction}.zarr").specs["components"]
    assert comp.attrs[FORWARD_TRANSFORM]["n_components"] == bands
    assert comp.attrs[FORWARD_TRANSFORM]["wavelength"] == list(wl)
    models = tmp_path / "new" / "run" / "models"
    mnf_model = load_model(next(models.glob(f"{reduction}-*.json")).with_suffix(""))
    tf = LinearTransform.from_mnf_model(mnf_model, bands)
    old = unmix_step("u", "src/comp", method="sum_to_one", library=lib, transform=tf, cube_wavelengths=list(wl))
    prev, result = run_on_arrays([old], {"comp": (out[f"{reduction}/components"], comp)}, tmp_path / "old", tile=8)
    assert result.ok
    new_model = load_model(next(models.glob("u-*.json")).with_suffix(""))
    old_model = load_model(next((tmp_path / "old" / "run" / "models").glob("u-*.json")).with_suffix(""))
    np.testing.assert_array_equal(new_model["endmembers"], old_model["endmembers"])
    for key in ("abundance", "rmse"):
        np.testing.assert_array_equal(out[f"u/{key}"], prev[f"u/{key}"])
    if reduction == "pca":
        ref = unmix_cube(x, m, "sum_to_one")["abundance"]
        np.testing.assert_allclose(out["u/abundance"], ref, atol=1e-4)  # float32 data and components


def test_library_on_components_without_wavelengths_is_refused(rng, tmp_path):
    """Components of a cube with no wavelength coordinate carry a transform with no wavelengths: the
    library cannot be resampled to its bands, and the error says so (naming the step and the input)."""
    from swathmill.workflows.methods.mnf import MnfConfig, mnf_steps
    lib = SpectralLibrary(("a", "b"), np.array([400.0, 700.0, 1000.0]), np.array([[.1, .2, .3], [.3, .2, .1]]),
                          source="lib.csv")
    x = rng.random((6, 16, 16)).astype(np.float32)  # run_on_arrays gives it no coordinates
    steps = [*mnf_steps(MnfConfig(method="pca", components=3), input_ref="src/refl"),
             unmix_step("u", "pca/components", method="sum_to_one", library=lib)]
    with pytest.raises(UnmixError, match="step 'u', input 'pca/components'.*names no band wavelengths"):
        run_on_arrays(steps, {"refl": x}, tmp_path, tile=8)
