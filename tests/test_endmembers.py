"""Endmember extraction: published volume check values, pure pixels found by each method, the same
endmembers whatever the tiling, the suggested count from MNF eigenvalues, and the products."""
from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest
import scipy.linalg

from swathmill.tiles.grid import Tiling
from swathmill.tiles.step import Block, InputMeta, OutputSpec
from swathmill.tiles.testing import default_grid, run_on_arrays
from swathmill.workflows.methods.endmembers import (EndmemberError, EndmemberExtractionConfig, EndmemberParams,
                                  ExtractionSettings, atgp, build_steps, candidate_accumulate, extraction_settings,
                                  candidate_merge, endmember_fit_step, endmember_library, endmember_points,
                                  extract_endmembers, extraction_params, nfindr, simplex_volume,
                                  suggest_endmember_count, vca, write_endmember_products)
from swathmill.workflows.inputs.library import read_library

METHODS = ["atgp", "nfindr", "vca"]


def simplex_scene(rng, p=4, bands=40, rows=48, cols=40, noise=0.0):
    """Mixtures of p random endmembers with one pure pixel each at known places; PCA-reduced data."""
    m = 0.05 + 0.8 * rng.random((bands, p))
    a = rng.dirichlet(np.ones(p), rows * cols).T
    a = 0.85 * a + 0.15 / p  # keep the mixtures away from the vertices
    pure = [(int(r), int(c)) for r, c in zip(rng.choice(rows, p, replace=False), rng.choice(cols, p, replace=False))]
    for j, (r, c) in enumerate(pure):
        a[:, r * cols + c] = np.eye(p)[j]
    x = m @ a + rng.normal(0.0, noise, (bands, rows * cols))
    flat = x.T
    w, v = np.linalg.eigh(np.cov(flat.T))  # PCA by numpy
    red = ((flat - flat.mean(axis=0)) @ v[:, ::-1][:, : p - 1]).T
    return (x.reshape(bands, rows, cols).astype(np.float32), red.reshape(p - 1, rows, cols).astype(np.float32),
            sorted(pure), m)


def test_simplex_volume_check_values():
    # METHODS.md, N-FINDR check values [R]
    assert simplex_volume(np.array([[0, 0], [1, 0], [0, 1.0]])) == pytest.approx(0.5, abs=1e-12)
    tri = np.array([[0, 0], [1, 0], [0.5, math.sqrt(3) / 2]])
    assert simplex_volume(tri) == pytest.approx(0.4330127, abs=1e-7)
    tet = np.array([[1, 1, 1], [1, -1, -1], [-1, 1, -1], [-1, -1, 1.0]]) / math.sqrt(8)  # edge 1
    assert simplex_volume(tet) == pytest.approx(0.1178511, abs=1e-7)
    assert simplex_volume(np.array([[0, 0], [1, 1], [2, 2.0]])) == 0.0


def test_atgp_on_noiseless_simplex_returns_pure_pixels(rng):
    # METHODS.md: on noiseless simplex data ATGP returns the pure pixels (positive reflectance-like data)
    m = 0.05 + 0.8 * rng.random((30, 5))
    a = np.c_[np.eye(5), rng.dirichlet(np.ones(5), 300).T]
    idx = atgp((m @ a).T, 5)
    assert sorted(idx.tolist()) == [0, 1, 2, 3, 4]


def test_nfindr_finds_the_largest_simplex(rng):
    """Brute force over all 3-subsets of 14 points (itertools) is the oracle of the largest triangle."""
    pts = rng.normal(size=(14, 2))
    best = max(itertools.combinations(range(14), 3), key=lambda s: simplex_volume(pts[list(s)]))
    idx, vol = nfindr(pts, 3, seed=1, restarts=10)
    assert vol == pytest.approx(simplex_volume(pts[list(best)]), rel=1e-12)
    assert sorted(idx.tolist()) == sorted(best)


def test_vca_both_projections_find_pure_pixels(rng):
    m = 0.05 + 0.8 * rng.random((30, 4))
    a = np.c_[np.eye(4), (0.8 * rng.dirichlet(np.ones(4), 500) + 0.05).T]
    x = (m @ a).T
    for snr in (None, 5.0):  # estimated (noise-free: infinite, projective) and forced low (PCA branch)
        idx, info = vca(x, 4, seed=0, snr=snr)
        assert sorted(idx.tolist()) == [0, 1, 2, 3], info
    assert info["projection"] == "pca"


@pytest.mark.parametrize("method", METHODS)
def test_each_method_finds_the_pure_pixels(rng, method):
    x, red, pure, m = simplex_scene(rng, noise=0.002)
    model = extract_endmembers(red, x, method=method, n_endmembers=4, seed=3)
    assert sorted(zip(model["rows"].tolist(), model["cols"].tolist())) == pure
    # the spectra are the input's at those pixels
    for i, (r, c) in enumerate(zip(model["rows"], model["cols"])):
        np.testing.assert_array_equal(model["spectra"][i], x[:, r, c])


@pytest.mark.parametrize("method", METHODS)
def test_same_seed_same_endmembers_whatever_the_tiling(rng, tmp_path, method):
    x, red, pure, _m = simplex_scene(rng, noise=0.01, rows=48, cols=40)
    red[:, 20:23, 30:34] = np.nan  # nodata
    models = []
    for tile in (8, 24):
        step = endmember_fit_step("em", "src/red", "src/cube", method=method, n_endmembers=4, seed=7)
        out, result = run_on_arrays([step], {"red": red, "cube": x}, tmp_path / f"t{tile}", tile=tile)
        assert result.ok
        from swathmill.tiles.tasks import load_model
        base = next((tmp_path / f"t{tile}" / "run" / "models").glob("em-*.json")).with_suffix("")
        models.append(load_model(base))
        loc = out["em/locations"][0]
        for i, (r, c) in enumerate(zip(models[-1]["rows"], models[-1]["cols"])):
            assert loc[r, c] == i + 1
        assert np.count_nonzero(np.nan_to_num(loc)) == 4
    whole = extract_endmembers(red, x, method=method, n_endmembers=4, seed=7)
    assert sorted(zip(whole["rows"].tolist(), whole["cols"].tolist())) == pure
    for mdl in models:
        assert mdl["rows"].tolist() == whole["rows"].tolist()
        assert mdl["cols"].tolist() == whole["cols"].tolist()
        np.testing.assert_array_equal(mdl["spectra"], whole["spectra"])


def _blocks(red: np.ndarray, size: int, params: dict):
    grid = default_grid(red.shape[1], red.shape[2])
    meta = {"reduced": InputMeta("src/red", grid, OutputSpec(tuple(f"c{i}" for i in range(red.shape[0])),
                                                             "float32", float("nan")))}
    for t in Tiling(grid, size):
        sl = t.padded.slices
        d = red[:, sl[0], sl[1]]
        yield Block(data={"reduced": d}, valid=np.isfinite(d).all(axis=0), tile=t, grid=grid.window(t.padded),
                    params=params, static={}, meta=meta)


def test_merge_is_order_independent(rng):
    _x, red, _pure, _m = simplex_scene(rng, noise=0.01)
    red[:, 10:14, 5:9] = np.nan  # nodata
    red[:, 0, 0] = red[:, 47, 39] = 5 * np.nanmax(np.abs(red))  # an exact tie far out: the smaller (row, col) wins
    params = extraction_params("atgp", 4, n_directions=64)
    accs = [candidate_accumulate(b) for b in _blocks(red, 12, params)]
    left = accs[0]
    for a in accs[1:]:
        left = candidate_merge(left, a)
    right = accs[-1]
    for a in accs[-2::-1]:
        right = candidate_merge(a, right)
    shuffled = [accs[i] for i in rng.permutation(len(accs))]
    tree = shuffled
    while len(tree) > 1:
        tree = [candidate_merge(tree[i], tree[i + 1]) if i + 1 < len(tree) else tree[i] for i in range(0, len(tree), 2)]
    whole = candidate_accumulate(next(_blocks(red, 48, params)))
    for acc in (left, right, tree[0]):
        for k in ("max_key", "min_key", "top_key", "cand_key"):
            np.testing.assert_array_equal(acc[k], whole[k])
        np.testing.assert_array_equal(acc["cand_y"], whole["cand_y"])
        assert acc["n"] == whole["n"] == 48 * 40 - 16
    first, last = 0, (47 << 32) | 39  # keys of pixels (0, 0) and (47, 39)
    assert first in whole["max_key"].tolist() and last not in whole["max_key"].tolist()
    top = whole["top_key"].tolist()
    assert top[:2] == [first, last]


def test_suggested_count_from_mnf_eigenvalues(rng):
    """MNF eigenvalues by scipy.linalg.eigh(S, N) (Green et al., 1988) with the true noise covariance,
    on p-endmember mixtures plus white noise: the rule returns p."""
    for p in (3, 5, 7):
        bands, n, sigma = 60, 20000, 0.01
        m = 0.1 + 0.6 * rng.random((bands, p))
        x = (m @ rng.dirichlet(np.ones(p), n).T).T + rng.normal(0, sigma, (n, bands))
        lam = scipy.linalg.eigh(np.cov(x.T), sigma**2 * np.eye(bands), eigvals_only=True)[::-1]
        k, info = suggest_endmember_count(lam)
        assert k == p, (p, info, lam[: p + 2])
        assert 0.9 < info["floor"] < 1.1  # noise components: lambda = SNR + 1 ~ 1
    with pytest.raises(EndmemberError, match="at least 4"):
        suggest_endmember_count([5.0, 1.0])


def test_count_suggested_in_the_step_from_eigenvalue_coordinate(rng, tmp_path):
    x, red, pure, _m = simplex_scene(rng, noise=0.002, rows=32, cols=32)
    eig = (400.0, 150.0, 60.0, 1.03, 1.01, 1.0, 0.99, 0.98, 0.97, 0.96)  # three signal components
    red10 = np.concatenate([red, rng.normal(0, 1e-3, (7,) + red.shape[1:]).astype(np.float32)])
    spec = OutputSpec(tuple(f"mnf_{i + 1}" for i in range(10)), "float32", float("nan"), coords={"eigenvalue": eig})
    with pytest.warns(UserWarning, match="do not look like noise"):  # only leading components kept
        suggest_endmember_count(eig[:3] + (300.0,))
    model = extract_endmembers(red, x, method="nfindr", eigenvalues=eig, seed=0)
    assert model["n_endmembers"] == 4 and model["suggestion"]["signal_components"] == 3
    with pytest.raises(EndmemberError, match="n_endmembers is not given"):
        extract_endmembers(red, x, method="nfindr")
    step = endmember_fit_step("em", "src/red", method="vca")
    out, result = run_on_arrays([step], {"red": (red10, spec)}, tmp_path, tile=16)
    loc = np.nan_to_num(out["em/locations"][0])  # decoded: 0 (no endmember) is the nodata value
    assert result.ok and loc.max() == 4
    found = sorted((int(r), int(c)) for r, c in zip(*np.nonzero(loc > 0)))
    assert found == pure


def test_errors_name_the_problem(rng):
    x, red, _pure, _m = simplex_scene(rng)
    with pytest.raises(EndmemberError, match="needs at least 4 reduced dimensions. Got n_dims = 2"):
        extract_endmembers(red, x, method="nfindr", n_endmembers=5, n_dims=2)
    with pytest.raises(EndmemberError, match="uses 6 reduced dimensions but input 'src/reduced' has 3 bands"):
        extract_endmembers(red, x, method="atgp", n_endmembers=7)
    with pytest.raises(EndmemberError, match="unknown extraction method 'ppx'"):
        extraction_params("ppx", 3)
    with pytest.raises(EndmemberError, match="too few valid pixels"):
        extract_endmembers(np.full((3, 4, 4), np.nan, np.float32), method="atgp", n_endmembers=4)


def test_products_library_and_points(rng, tmp_path):
    x, red, pure, _m = simplex_scene(rng, noise=0.002, rows=32, cols=32)
    wl = np.linspace(420, 2400, x.shape[0])
    grid = default_grid(32, 32, res=5.0)
    spec = OutputSpec(tuple(f"b{i + 1:03d}" for i in range(x.shape[0])), "float32", float("nan"),
                      coords={"wavelength": tuple(wl)})
    step = endmember_fit_step("em", "src/red", "src/cube", method="nfindr", n_endmembers=4)
    run_on_arrays([step], {"red": red, "cube": (x, spec)}, tmp_path, tile=16, grid=grid)
    from swathmill.tiles.tasks import load_model
    model = load_model(next((tmp_path / "run" / "models").glob("em-*.json")).with_suffix(""))
    lib = endmember_library(model)
    assert lib.names == ("em_1", "em_2", "em_3", "em_4")
    np.testing.assert_allclose(lib.wavelengths, wl)
    pts = endmember_points(model)
    for f, r, c in zip(pts["features"], model["rows"], model["cols"]):
        xy = grid.transform @ (c + 0.5, r + 0.5)  # pixel centre by the affine transform
        assert f["geometry"]["coordinates"] == pytest.approx(list(xy))
        assert (f["properties"]["row"], f["properties"]["col"]) == (r, c)
    paths = write_endmember_products(model, tmp_path / "products", "em")
    back = read_library(paths[1])
    np.testing.assert_allclose(back.spectra, lib.spectra, rtol=1e-12)
    assert json.loads(paths[0].read_text())["type"] == "FeatureCollection"


def test_config_builds_the_step():
    cfg = EndmemberExtractionConfig.model_validate({"method": "vca", "n_endmembers": 5, "seed": 3})
    (step,) = build_steps(cfg)
    assert step.inputs == {"reduced": "mnf/components", "spectra": "mosaic/reflectance"}
    assert step.params.extraction.method == "vca" and step.params.extraction.seed == 3
    assert step.params.step == "endmembers" and step.params.extraction.n_directions == 512
    with pytest.raises(ValueError, match="step/output"):
        EndmemberExtractionConfig.model_validate({"input": "mnf"})
    with pytest.raises(ValueError):
        EndmemberExtractionConfig.model_validate({"n_endmembers": 1})


def test_extraction_on_reflectance_warns(rng):
    x, _red, _pure, _m = simplex_scene(rng, rows=16, cols=16)
    from swathmill.workflows.methods.endmembers import candidate_accumulate as acc_fn, extraction_finalize
    grid = default_grid(16, 16)
    spec = OutputSpec(tuple(f"b{i}" for i in range(x.shape[0])), "float32", float("nan"),
                      coords={"wavelength": tuple(np.linspace(400, 900, x.shape[0]))})
    meta = {"reduced": InputMeta("mosaic/reflectance", grid, spec)}
    params = extraction_params("atgp", 4)
    block = Block(data={"reduced": x}, valid=np.ones((16, 16), bool), tile=Tiling(grid, 16)[0, 0], grid=grid,
                  params=params, static={}, meta=meta)
    with pytest.warns(UserWarning, match="looks like reflectance, not reduced data"):
        extraction_finalize(acc_fn(block), params, meta)


def test_settings_are_declared_once_and_are_the_step_parameters():
    by_keywords = endmember_fit_step("em", "src/red", "src/cube", method="vca", n_endmembers=5, seed=3)
    by_object = endmember_fit_step("em", "src/red", "src/cube",
                                   settings=ExtractionSettings(method="vca", n_endmembers=5, seed=3))
    assert isinstance(by_keywords.params, EndmemberParams) and by_keywords.params.step == "em"
    assert by_keywords.describe() == by_object.describe()  # the same step key either way
    assert endmember_fit_step("em", "src/red").params.extraction == ExtractionSettings()  # defaults: the fields'
    cfg = EndmemberExtractionConfig.model_validate({"name": "em", "input": "src/red", "spectra": "src/cube",
                                                    "method": "vca", "n_endmembers": 5, "seed": 3})
    (step,) = build_steps(cfg)
    assert type(step.params.extraction) is ExtractionSettings and step.describe() == by_keywords.describe()
    # the settings are found in the parameter object, or are it; an untyped mapping is refused
    settings = extraction_params("atgp", 4)
    assert extraction_settings(settings) is settings and extraction_settings(by_keywords.params).method == "vca"
    with pytest.raises(EndmemberError, match="no extraction settings"):
        extraction_settings({"extraction": {"method": "atgp", "n_endmembers": 4}})
    with pytest.raises(EndmemberError, match=r"n_directions: .*greater than or equal to 1"):
        extraction_params("atgp", 4, n_directions=0)
    with pytest.raises(EndmemberError, match="not both"):
        endmember_fit_step("em", "src/red", settings=settings, seed=1)
