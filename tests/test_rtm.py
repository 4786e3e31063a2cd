"""Canopy model inversion: the wrapper against the model's known limits, the table search against a
brute-force loop, the hybrid regressor against scikit-learn applied directly, the engine (tiled equals
untiled, the table reused on a rerun) and retrieval on simulated spectra the table does not contain."""
from __future__ import annotations

import json

import numpy as np
import pytest

pytest.importorskip("prosail", reason="the canopy model needs the pinned 'prosail' package (extra 'rtm')")

from sklearn.ensemble import RandomForestRegressor

from swathmill.errors import SwathmillError
from swathmill.tiles.step import OutputSpec
from swathmill.tiles.testing import run_on_arrays
from swathmill.workflows.methods.rtm import (Geometry, RtmError, SIM_WAVELENGTHS, lut_search, simulate_canopy,
                                             soil_spectrum, to_bands)
from swathmill.workflows.methods.rtm.lut import (TARGETS, add_noise, predict_hybrid, sample_parameters,
                                                 simulate_entries, train_hybrid)
from swathmill.workflows.methods.rtm.step import CanopyConfig, ParameterRanges, canopy_step

WL = np.arange(420.0, 2400.0, 20.0)
FWHM = np.full(WL.size, 20.0)


def _spec(n: int, fwhm=FWHM) -> OutputSpec:
    coords = {"wavelength": tuple(WL)}
    if fwhm is not None:
        coords["fwhm"] = tuple(fwhm)
    return OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(n)), dtype="float32", nodata=float("nan"),
                      coords=coords)


# wrapper ------------------------------------------------------------------------------------------
def test_no_leaves_gives_the_soil_spectrum():
    # with LAI = 0 the canopy is bare Lambertian soil: every reflectance factor equals the soil's
    # (the zero-LAI limit of the four-stream model, Verhoef 1984; common practice)
    soil = soil_spectrum(0.8, 0.3)
    for factor in ("bidirectional", "directional_hemispherical", "bihemispherical"):
        r = simulate_canopy(0.0, 40.0, 0.01, 0.005, soil_brightness=0.8, soil_moisture=0.3, factor=factor,
                            geometry=Geometry(40.0, 10.0, 60.0))
        np.testing.assert_allclose(r, soil, rtol=1e-12, atol=1e-12)
    # the soil mixture itself: brightness * (w dry + (1 - w) wet), checked at two points by hand
    import prosail
    lib = prosail.spectral_lib.soil
    np.testing.assert_allclose(soil[[0, 1000]], 0.8 * (0.3 * lib.rsoil1[[0, 1000]] + 0.7 * lib.rsoil2[[0, 1000]]))


def test_energy_conservation_without_absorption():
    # leaves that absorb nothing (r + t = 1 - eps) over a white soil: all light comes back, so the
    # hemispherical reflectance factors tend to 1 and the loss shrinks in proportion to eps
    # (conservation of energy; common practice)
    soil = np.ones(SIM_WAVELENGTHS.size)
    loss = {}
    for eps in (1e-4, 1e-6):
        leaf = (np.full(SIM_WAVELENGTHS.size, 0.55), np.full(SIM_WAVELENGTHS.size, 0.45 - eps))
        for factor in ("directional_hemispherical", "bihemispherical"):
            r = simulate_canopy(3.0, 40.0, 0.01, 0.005, leaf=leaf, soil=soil, factor=factor,
                                geometry=Geometry(30.0, 0.0, 0.0))
            assert np.all(r <= 1.0 + 1e-12)
            loss[eps, factor] = 1.0 - r.max()
    for factor in ("directional_hemispherical", "bihemispherical"):
        assert 0 < loss[1e-6, factor] < 1e-4
        assert loss[1e-4, factor] / loss[1e-6, factor] == pytest.approx(100.0, rel=0.05)


def test_reflectance_in_unit_range_and_broadcast_shape():
    names, table = sample_parameters(ParameterRanges().model_dump(), 40, seed=3)
    p = {k: table[:, i] for i, k in enumerate(names)}
    r = simulate_canopy(geometry=Geometry(50.0, 20.0, 120.0), **p)
    assert r.shape == (40, SIM_WAVELENGTHS.size)
    assert np.isfinite(r).all() and r.min() >= 0.0 and r.max() <= 1.0  # reflectance factor of absorbing media
    r2 = simulate_canopy(np.array([[1.0], [3.0]]), np.array([20.0, 60.0]), 0.01, 0.005)
    assert r2.shape == (2, 2, SIM_WAVELENGTHS.size)
    # more chlorophyll absorbs more at the red chlorophyll band (670 nm) (common practice)
    assert r2[0, 1, 270] < r2[0, 0, 270]
    with pytest.raises(RtmError, match="lai must lie in"):
        simulate_canopy(-1.0, 40.0, 0.01, 0.005)
    with pytest.raises(SwathmillError, match="sun_zenith"):
        Geometry(95.0)


def test_band_convolution_is_the_gaussian_response_mean():
    r = simulate_canopy(2.0, 40.0, 0.01, 0.005)
    got = to_bands(r, np.array([550.0, 1650.0]), np.array([10.0, 30.0]))
    # direct numpy: response-weighted mean on the uniform 1 nm grid, Gaussian sigma = FWHM / 2.3548
    # (property of the Gaussian), truncated at 4 sigma as the project's resampling documents
    for j, (c, f) in enumerate(((550.0, 10.0), (1650.0, 30.0))):
        s = f / (2.0 * np.sqrt(2.0 * np.log(2.0)))
        g = np.exp(-0.5 * ((SIM_WAVELENGTHS - c) / s) ** 2)
        g[np.abs(SIM_WAVELENGTHS - c) > 4 * s] = 0
        assert got[j] == pytest.approx((g * r).sum() / g.sum(), rel=1e-12)


# table search -------------------------------------------------------------------------------------
def brute_force(x, L, P, k):
    """Per-pixel loop: RMSE to every entry, stable sort, the k best entries' mean and std."""
    est, sd, best = [], [], []
    for xi in x:
        cost = np.sqrt(((L - xi) ** 2).mean(axis=1))
        order = np.argsort(cost, kind="stable")[:k]
        est.append(P[order].mean(axis=0))
        sd.append(P[order].std(axis=0))
        best.append(cost[order[0]])
    return np.array(est), np.array(sd), np.array(best)


@pytest.mark.parametrize("fraction,chunk", [(0.01, None), (0.05, 7), (1.0, 13), (1e-9, 5)])
def test_lut_search_matches_a_brute_force_loop(fraction, chunk):
    rng = np.random.default_rng(1)
    L = rng.uniform(0.0, 0.6, (400, 15))
    P = rng.uniform(0.0, 1.0, (400, 4))
    x = L[rng.integers(0, 400, 60)] + rng.normal(0, 0.02, (60, 15))
    k = max(1, int(round(fraction * 400)))
    est, sd, best = lut_search(x, L, P, fraction, chunk=chunk)
    e2, s2, b2 = brute_force(x, L, P, k)
    np.testing.assert_allclose(est, e2, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(sd, s2, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(best, b2, rtol=1e-7, atol=1e-9)


def test_lut_search_separates_entries_float32_cannot():
    """The search ranks in float32 and settles near ties with exact float64 costs: on a table whose
    entries come in twins 1e-9 apart (below float32 resolution) with different parameters, and an odd
    k (so the k-th place splits a twin pair), the estimates equal a brute-force float64 loop's."""
    rng = np.random.default_rng(4)
    base = rng.uniform(0.0, 0.6, (4096, 6))
    L = np.vstack([base, base + 1e-9 * rng.standard_normal(base.shape)])  # 8192 entries: the prescreen runs
    P = rng.uniform(0.0, 1.0, (L.shape[0], 3))
    x = base[rng.integers(0, 4096, 40)] + rng.normal(0, 0.03, (40, 6))
    for fraction in (41 / 8192, 1 / 8192):
        k = max(1, int(round(fraction * L.shape[0])))
        est, sd, best = lut_search(x, L, P, fraction, chunk=16)
        e2, s2, b2 = brute_force(x, L, P, k)  # the reference: a float64 numpy loop with a stable sort
        np.testing.assert_allclose(est, e2, rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(sd, s2, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(best, b2, rtol=1e-7, atol=1e-9)


def test_lut_search_refuses_mismatched_bands():
    with pytest.raises(RtmError, match="band count"):
        lut_search(np.zeros((2, 3)), np.zeros((5, 4)), np.zeros((5, 1)), 0.1)


# hybrid -------------------------------------------------------------------------------------------
def test_noise_statistics():
    s = np.full((200_000, 1), 0.4)
    d = add_noise(s, 0.05, 0.01, seed=4) - s
    # variance of s * r * N1 + a * N2 with independent standard normals: (s r)^2 + a^2 (common practice)
    assert d.std() == pytest.approx(np.hypot(0.4 * 0.05, 0.01), rel=0.01)
    assert abs(d.mean()) < 1e-3


def test_hybrid_matches_scikit_learn_fitted_directly():
    rng = np.random.default_rng(2)
    L = rng.uniform(0.0, 0.6, (300, 10))
    P = np.column_stack([L[:, 0] * 5 + L[:, 3], L[:, 1] * 80, L[:, 2] * 0.05, L[:, 4] * 0.01])
    model = train_hybrid(L, P, trees=12, min_leaf=3, training_size=1000, noise_relative=0.0, noise_absolute=0.0,
                         seed=5)
    x = rng.uniform(0.0, 0.6, (50, 10))
    est, sd = predict_hybrid(model, x)
    # scikit-learn directly: the same forest on the standardised targets, predicted and rescaled
    mu, scale = P.mean(axis=0), P.std(axis=0)
    rf = RandomForestRegressor(n_estimators=12, min_samples_leaf=3, random_state=5).fit(L, (P - mu) / scale)
    np.testing.assert_allclose(est, rf.predict(x) * scale + mu, rtol=1e-10)
    trees = np.stack([t.predict(x) for t in rf.estimators_])
    np.testing.assert_allclose(sd, trees.std(axis=0) * scale, rtol=1e-10, atol=1e-15)


# the step -----------------------------------------------------------------------------------------
def _scene(rows=10, cols=12, seed=0):
    rng = np.random.default_rng(seed)
    lai = rng.uniform(0.5, 6.0, (rows, cols))
    lai[0, :3] = 0.0  # bare soil: NDVI below the threshold, flagged
    cab = rng.uniform(20.0, 70.0, (rows, cols))
    r = to_bands(simulate_canopy(lai, cab, 0.02, 0.008, soil_moisture=0.8), WL, FWHM)
    return np.moveaxis(r, -1, 0).astype(np.float32), lai, cab


CFG = dict(input="src/cube", lut_size=300, lut_chunks=4, hybrid={"trees": 8, "training_size": 300})


@pytest.mark.slow
def test_step_tiled_equals_untiled_and_reuses_its_table(tmp_path):
    cube, lai, _ = _scene()
    step = canopy_step(CanopyConfig(**CFG))
    whole, res1 = run_on_arrays([step], {"cube": (cube, _spec(WL.size))}, tmp_path / "a", tile=16)
    tiled, res2 = run_on_arrays([step], {"cube": (cube, _spec(WL.size))}, tmp_path / "b", tile=4)
    assert res1.ok and res2.ok and res2.steps[0].fit == "fitted"
    # the table does not depend on the tiling (one fit tile against four)
    ma = np.load(next((tmp_path / "a" / "run" / "models").glob("canopy-*.npz")))
    mb = np.load(next((tmp_path / "b" / "run" / "models").glob("canopy-*.npz")))
    np.testing.assert_allclose(ma["spectra"], mb["spectra"], rtol=1e-6)
    assert set(whole) == {f"canopy/{o}" for o in ("lut", "lut_sd", "hybrid", "hybrid_sd", "vegetation", "fit_rmse")}
    for k in whole:
        np.testing.assert_allclose(tiled[k], whole[k], rtol=1e-5, atol=1e-7, err_msg=k)  # DESIGN.md invariant 1
    veg = whole["canopy/vegetation"][0]
    assert (veg[0, :3] == 2).all() and (veg.ravel()[3:] == 1).all()
    assert np.isnan(whole["canopy/lut"][:, 0, :3]).all() and np.isfinite(whole["canopy/lut"][:, 1:]).all()
    # a rerun in the same run directory loads the table instead of simulating it again
    again, res3 = run_on_arrays([step], {"cube": (cube, _spec(WL.size))}, tmp_path / "b", tile=4)
    assert res3.steps[0].fit == "loaded"
    from swathmill.tiles.store import open_store
    specs = open_store(tmp_path / "b" / "run" / "stores" / "canopy.zarr").specs
    assert {k: specs[k].role for k in specs} == {"lut": "quantity", "lut_sd": "uncertainty", "hybrid": "quantity",
                                                 "hybrid_sd": "uncertainty", "vegetation": "mask",
                                                 "fit_rmse": "diagnostic"}


@pytest.mark.slow
def test_step_hybrid_equals_scikit_learn_on_the_stored_table(tmp_path):
    cube, _, _ = _scene(6, 6, seed=1)
    cfg = CanopyConfig(**{**CFG, "methods": ["hybrid"],
                          "hybrid": {"trees": 6, "training_size": 300, "noise_relative": 0.0, "noise_absolute": 0.0}})
    out, res = run_on_arrays([canopy_step(cfg)], {"cube": (cube, _spec(WL.size))}, tmp_path, tile=4)
    assert res.ok and "canopy/lut" not in out
    m = np.load(next((tmp_path / "run" / "models").glob("canopy-*.npz")))
    L, P, bands = m["spectra"].astype(np.float64), m["targets"], m["bands"]
    # the model's own standardisation, bit for bit: neighbouring bands often split the training entries
    # identically, and the forest breaks such exact ties by rounding, so a mean summed in another order
    # (1e-15 apart) can grow other trees
    mu, scale = m["hybrid_mean"], m["hybrid_scale"]
    np.testing.assert_allclose(mu, P.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(scale, P.std(axis=0), rtol=1e-12)
    rf = RandomForestRegressor(n_estimators=6, min_samples_leaf=5, random_state=0).fit(L, (P - mu) / scale)
    x = cube.reshape(cube.shape[0], -1)[bands].T.astype(np.float64)
    veg = out["canopy/vegetation"][0].ravel() == 1
    want = rf.predict(x[veg]) * scale + mu
    np.testing.assert_allclose(out["canopy/hybrid"].reshape(4, -1)[:, veg].T, want, rtol=1e-5)


def test_step_needs_wavelengths(tmp_path):
    cube, _, _ = _scene(4, 4)
    spec = OutputSpec(bands=tuple(f"b{i}" for i in range(WL.size)), dtype="float32", nodata=float("nan"))
    out, res = None, None
    with pytest.raises(SwathmillError, match="src/cube.*wavelength"):
        run_on_arrays([canopy_step(CanopyConfig(**CFG))], {"cube": (cube, spec)}, tmp_path, tile=4)


def test_config_refuses_reversed_ranges():
    with pytest.raises(ValueError, match="low <= high"):
        ParameterRanges(lai=(5.0, 1.0))
    with pytest.raises(ValueError, match="extra"):
        CanopyConfig(bogus=1)


# retrieval ----------------------------------------------------------------------------------------
@pytest.mark.slow
def test_retrieval_on_spectra_outside_the_table():
    """Table of 1500 entries, 150 test canopies drawn by another seed (not in the table), 2 % relative
    plus 0.005 absolute noise. Prints RMSE per parameter for the README."""
    ranges = ParameterRanges().model_dump()
    names, table = sample_parameters(ranges, 1500, seed=0)
    L = simulate_entries(names, table, np.arange(1500), Geometry(), WL, FWHM)
    Y = table[:, [names.index(t) for t in TARGETS]]
    tn, tt = sample_parameters(ranges, 150, seed=99)
    truth = tt[:, [tn.index(t) for t in TARGETS]]
    assert not np.isin(truth[:, 0], Y[:, 0]).any()  # none of the test canopies is a table entry
    x = add_noise(simulate_entries(tn, tt, np.arange(150), Geometry(), WL, FWHM), 0.02, 0.005, seed=7)
    keep = ~(((WL >= 1330) & (WL <= 1480)) | ((WL >= 1770) & (WL <= 1980)))
    est_l, sd_l, _ = lut_search(x[:, keep], L[:, keep], Y, 0.01)
    hyb = train_hybrid(L[:, keep], Y, trees=50, min_leaf=5, training_size=1500, noise_relative=0.02,
                       noise_absolute=0.005, seed=0)
    est_h, sd_h = predict_hybrid(hyb, x[:, keep])
    prior = truth.std(axis=0)
    for name, est in (("lut", est_l), ("hybrid", est_h)):
        rmse = np.sqrt(((est - truth) ** 2).mean(axis=0))
        print(name, dict(zip(TARGETS, np.round(rmse, 4))), "relative to prior std",
              dict(zip(TARGETS, np.round(rmse / prior, 2))))
        # better than guessing the range's mean for LAI and chlorophyll by a clear margin (the two best
        # constrained parameters in published inversions, e.g. Jacquemoud et al., 2009; from memory)
        assert rmse[0] < 0.6 * prior[0] and rmse[1] < 0.8 * prior[1]
        assert np.all(rmse < prior * 1.05)
    # the uncertainty follows the error: pixels with the larger spread have the larger LAI error
    err = np.abs(est_l[:, 0] - truth[:, 0])
    hi = sd_l[:, 0] > np.median(sd_l[:, 0])
    assert err[hi].mean() > err[~hi].mean()


def test_run_config_takes_a_canopy_section():
    from swathmill.workflows.app.pipeline import RunConfig

    cfg = RunConfig.model_validate({"name": "r", "mosaic": {"lines": ["a.tif"]},
                                    "canopy": {"lut_size": 500, "geometry": {"sun_zenith": 42.0}}})
    assert cfg.canopy.geometry.sun_zenith == 42.0 and cfg.canopy.input == "mosaic/reflectance"
    with pytest.raises(ValueError, match="sun_zenith"):
        RunConfig.model_validate({"name": "r", "mosaic": {"lines": ["a.tif"]}, "canopy": {"geometry": {"sun_zenith": 95}}})


# per-line geometry -----------------------------------------------------------------------------------
def test_line_geometry_from_tags(tmp_path):
    import rasterio
    from affine import Affine

    from swathmill.workflows.methods.rtm.step import GeometryConfig, line_geometry_from_tags, with_line_geometry

    def line(name, **tags):
        p = tmp_path / name
        with rasterio.open(p, "w", driver="GTiff", width=2, height=2, count=1, dtype="uint8",
                           crs="EPSG:32612", transform=Affine(1, 0, 0, 0, -1, 0)) as ds:
            ds.update_tags(**tags)
        return p

    a, b, c = line("a.tif", sun_zenith="41.5", view_zenith="5"), line("b.tif"), line("c.tif", view_zenith="3")
    d = line("d.tif", sun_zenith="north")
    default = GeometryConfig(sun_zenith=30.0, relative_azimuth=20.0)
    assert line_geometry_from_tags(a, default) == GeometryConfig(sun_zenith=41.5, view_zenith=5.0,
                                                                 relative_azimuth=20.0)
    assert line_geometry_from_tags(b, default) is None
    with pytest.raises(SwathmillError, match="c.tif.*sun_zenith"):
        line_geometry_from_tags(c, default)
    with pytest.raises(SwathmillError, match="d.tif.*sun_zenith='north'"):
        line_geometry_from_tags(d, default)
    cfg = with_line_geometry(CanopyConfig(**CFG, geometry=default), [a, b])
    assert cfg.line_geometry == [GeometryConfig(sun_zenith=41.5, view_zenith=5.0, relative_azimuth=20.0), None]
    assert with_line_geometry(CanopyConfig(**CFG), [b, b]).line_geometry is None
    with pytest.raises(SwathmillError, match="2 entries for 3 flight lines"):
        with_line_geometry(cfg, [a, b, b])


@pytest.mark.slow
def test_step_inverts_each_line_on_its_own_geometry(tmp_path):
    """Two lines under different sun angles: each pixel's table search equals a search of the table
    simulated for its own line's geometry, done directly (brute force over the same entries)."""
    cube, lai, cab = _scene(6, 8, seed=3)
    g1, g2 = {"sun_zenith": 20.0}, {"sun_zenith": 60.0}
    # the right half is seen under the second geometry
    right = to_bands(simulate_canopy(lai[:, 4:], cab[:, 4:], 0.02, 0.008, soil_moisture=0.8,
                                     geometry=Geometry(60.0)), WL, FWHM)
    cube[:, :, 4:] = np.moveaxis(right, -1, 0)
    source = np.ones((1, 6, 8), np.uint8)
    source[:, :, 4:] = 2
    src_spec = OutputSpec(bands=("source",), dtype="uint8", nodata=0, kind="categorical", class_names=("l1", "l2"))
    cfg = CanopyConfig(**{**CFG, "methods": ["lut"], "line_geometry": [g1, g2], "source": "src/source"})
    out, res = run_on_arrays([canopy_step(cfg)], {"cube": (cube, _spec(WL.size)), "source": (source, src_spec)},
                             tmp_path, tile=4)
    assert res.ok
    m = np.load(next((tmp_path / "run" / "models").glob("canopy-*.npz")))
    assert m["spectra"].shape[0] == 2 * cfg.lut_size and list(m["geometry_of_source"]) == [0, 0, 1]
    names, table = sample_parameters(ParameterRanges().model_dump(), cfg.lut_size, cfg.seed)
    bands = m["bands"]
    Y = table[:, [names.index(t) for t in TARGETS]]
    veg = out["canopy/vegetation"][0] == 1
    e = cfg.lut_size
    for g, (sun, cols) in enumerate(((20.0, slice(0, 4)), (60.0, slice(4, 8)))):
        stored = m["spectra"][g * e:(g + 1) * e].astype(np.float64)
        L = simulate_entries(names, table, np.arange(e), Geometry(sun), WL[bands], FWHM[bands])
        np.testing.assert_allclose(stored, L, rtol=1e-6, atol=1e-7)  # the table of this line's geometry
        x = cube[:, :, cols][bands].reshape(bands.size, -1).T.astype(np.float64)
        k = veg[:, cols].ravel()
        want = brute_force(x[k], stored, Y, max(1, round(cfg.best_fraction * e)))[0]
        got = out["canopy/lut"][:, :, cols].reshape(4, -1).T[k]
        np.testing.assert_allclose(got, want, rtol=1e-4, atol=1e-6)


# validation in the accuracy report -------------------------------------------------------------------
def test_canopy_maps_validated_against_mapped_reference_columns(tmp_path):
    from types import SimpleNamespace

    from sklearn.metrics import mean_squared_error, r2_score

    from swathmill.tiles.store import open_store
    from swathmill.tiles.testing import default_grid, write_source_store
    from swathmill.workflows.app.finish import _assess_mapped_quantity

    rng = np.random.default_rng(5)
    est = rng.uniform(0.5, 6.0, (4, 8, 8)).astype(np.float32)
    est[:, 0, 0] = np.nan  # not vegetation: left out
    spec = OutputSpec(bands=TARGETS, dtype="float32", nodata=float("nan"), role="quantity",
                      attrs={"units": ["m2 m-2", "ug cm-2", "g cm-2", "g cm-2"],
                             "reference_columns": {"lai": "lai_measured", "cab": "chl", "cw": "cw"}})
    path = write_source_store(tmp_path / "s.zarr", {"lut": (est, spec)}, default_grid(8, 8), shard=8)
    store = open_store(path)
    rows, cols = np.array([0, 1, 2, 3, 5, 7]), np.array([0, 1, 4, 6, 2, 7])
    lai = est[0, rows, cols] + rng.normal(0, 0.3, rows.size)
    lai[3] = np.nan  # no measurement
    chl = est[1, rows, cols] * 1.1
    val = SimpleNamespace(row=rows, col=cols, extras={"lai_measured": lai, "chl": chl})
    view = SimpleNamespace(store=lambda name: store)
    out = {"quantity_maps": {}, "notes": []}
    _assess_mapped_quantity(view, "canopy", "lut", store.specs["lut"], val, out)
    assert set(out["quantity_maps"]) == {"canopy/lut:lai", "canopy/lut:cab"}
    assert any("['cw']" in n for n in out["notes"])  # the mapped column the reference lacks
    for band, obs, b in (("lai", lai, 0), ("cab", chl, 1)):
        e = out["quantity_maps"][f"canopy/lut:{band}"]
        keep = np.isfinite(obs) & np.isfinite(est[b, rows, cols])
        o, p = obs[keep].astype(np.float64), est[b, rows, cols][keep].astype(np.float64)
        assert e["metrics"]["n"] == keep.sum() >= 4
        # RMSE and R2 as scikit-learn computes them; bias = mean(predicted - observed) (common practice)
        assert e["metrics"]["rmse"] == pytest.approx(np.sqrt(mean_squared_error(o, p)), rel=1e-9)
        assert e["metrics"]["r2"] == pytest.approx(r2_score(o, p), rel=1e-9)
        assert e["metrics"]["bias"] == pytest.approx(np.mean(p - o), rel=1e-9)
    assert out["quantity_maps"]["canopy/lut:cab"]["units"] == "ug cm-2"


# the demo scenario's vegetated paddocks ----------------------------------------------------------------
@pytest.mark.slow
def test_scenario_paddocks_follow_the_forward_model_under_each_lines_sun(tmp_path):
    import rasterio

    from swathmill.workflows.app.scenario import generate_scenario, line_geometries

    files = generate_scenario(tmp_path, "small", seed=7, canopy=True)
    truth = np.load(files.truth_npz)
    canopy = np.load(files.root / "truth" / "canopy.npz")
    reed = truth["abundance"][list(truth["materials"]).index("reed_meadow")]
    geoms = line_geometries(len(files.lines))
    # line 1 is the reference line (gain 1, offset 0): its nearly pure vegetation pixels are the paddock
    # canopy under line 1's sun, within the stated band noise
    with rasterio.open(files.lines[0]) as ds:
        assert float(ds.tags()["sun_zenith"]) == geoms[0]["sun_zenith"]
        r0, c0 = files.facts["lines"][0]["window"][:2]
        data = ds.read().astype(np.float64) * 1e-4
        nodata = ds.nodata
    rr, cc = np.nonzero(reed >= 0.999)
    inside = (rr >= r0) & (rr < r0 + data.shape[1]) & (cc >= c0) & (cc < c0 + data.shape[2])
    rr, cc = rr[inside], cc[inside]
    obs = data[:, rr - r0, cc - c0]
    ok = (obs[0] != nodata * 1e-4)
    assert ok.sum() > 50
    pid = canopy["paddock"][rr[ok], cc[ok]]
    want = {}
    for k in (0, 1):
        want[k] = to_bands(simulate_canopy(canopy["lai"][pid], canopy["cab"][pid], canopy["cw"][pid],
                                           canopy["cm"][pid], geometry=Geometry(**geoms[k])),
                           truth["wavelength"], truth["fwhm"]).T
    sigma = truth["noise_sigma"][:, None]
    z = (obs[:, ok] - want[0]) / sigma
    assert abs(z.mean()) < 0.1 and 0.9 < z.std() < 1.1  # white noise of the stated sigma (from the generator)
    # the other line's sun (3 degrees lower) gives a slightly different canopy, which fits line 1 worse
    chi2 = lambda w: float((((obs[:, ok] - w) / sigma) ** 2).sum())  # noqa: E731
    assert chi2(want[0]) < chi2(want[1])
    # the measured LAI of the canopy plots follows the paddocks' LAI (8 % measurement noise)
    import json
    feats = [f["properties"] for f in json.loads(files.ground_reference.read_text())["features"]
             if f["properties"].get("plot") == "canopy"]
    assert len(feats) == files.facts["canopy"]["plots"] > 20
    assert {f["split"] for f in feats} == {"train", "validation"}
