"""Calibration against scikit-learn: OLS, PLS, cross-validated predictions, and the tiled step."""
from __future__ import annotations

import numpy as np
import pytest
import sklearn.metrics as skm
from sklearn.cross_decomposition import PLSRegression
from sklearn.linear_model import LinearRegression
from sklearn.model_selection import GroupKFold, KFold, cross_val_predict

from swathmill.tiles.step import OutputSpec
from swathmill.workflows.methods.calibration import (
    CalibrationConfig,
    CalibrationError,
    CalibrationSamples,
    build_steps,
    fit_calibration,
    predict_calibration,
)


def _linear_data(rng, n=60, p=2, noise=0.1):
    X = rng.uniform(0.0, 1.0, (n, p))
    y = 5.0 + X @ np.array([3.0, -2.0, 1.0][:p]) + rng.normal(0, noise, n)
    return X, y


def _spectral_data(rng, n=80, bands=40, noise=0.01):
    """Spectra mixing three smooth shapes; the quantity is the weight of the first."""
    wl = np.linspace(0, 1, bands)
    shapes = np.stack([np.exp(-((wl - c) ** 2) / 0.02) for c in (0.3, 0.5, 0.8)])
    w = rng.uniform(0, 1, (n, 3))
    X = 0.2 + w @ shapes * 0.1 + rng.normal(0, noise, (n, bands))
    return X, 10 * w[:, 0] + rng.normal(0, 0.05, n)


def test_linear_matches_sklearn(rng):
    X, y = _linear_data(rng)
    m = fit_calibration(X, y, method="linear", predictor_names=["a", "b"], folds=5, seed=3)
    ref = LinearRegression().fit(X, y)  # sklearn.linear_model.LinearRegression
    np.testing.assert_allclose(m["coef"], ref.coef_, rtol=1e-10)
    assert float(m["intercept"]) == pytest.approx(ref.intercept_, rel=1e-10)
    # sklearn.model_selection.cross_val_predict with the same shuffled KFold
    cv = cross_val_predict(LinearRegression(), X, y, cv=KFold(5, shuffle=True, random_state=3))
    np.testing.assert_allclose(m["cv_predicted"], cv, rtol=1e-10)
    # sklearn.metrics on the cross-validated predictions
    assert m["cv"]["r2"] == pytest.approx(skm.r2_score(y, cv), rel=1e-10)
    assert m["cv"]["rmse"] == pytest.approx(np.sqrt(skm.mean_squared_error(y, cv)), rel=1e-10)
    assert m["cv"]["bias"] == pytest.approx(np.mean(cv - y), abs=1e-12)
    Xn = rng.uniform(0.1, 0.9, (30, 2))
    value, sigma, outside = predict_calibration(m, Xn)
    np.testing.assert_allclose(value, ref.predict(Xn), rtol=1e-10)
    assert not outside.any() and np.all(sigma > 0)


def test_pls_matches_sklearn(rng):
    X, y = _spectral_data(rng)
    m = fit_calibration(X, y, method="pls", predictor_names=[f"b{i}" for i in range(X.shape[1])],
                        n_components=3, folds=4, seed=1)
    ref = PLSRegression(n_components=3).fit(X, y)  # sklearn.cross_decomposition.PLSRegression
    Xn, _ = _spectral_data(rng, n=25)
    value, _, _ = predict_calibration(m, Xn)
    np.testing.assert_allclose(value, ref.predict(Xn).ravel(), rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(Xn @ m["score_map"] + m["score_offset"], ref.transform(Xn), rtol=1e-9, atol=1e-9)
    cv = cross_val_predict(PLSRegression(n_components=3), X, y, cv=KFold(4, shuffle=True, random_state=1)).ravel()
    np.testing.assert_allclose(m["cv_predicted"], cv, rtol=1e-9, atol=1e-9)
    assert m["cv"]["r2"] == pytest.approx(skm.r2_score(y, cv), rel=1e-9)
    assert m["cv"]["r2"] > 0.9  # the quantity is built into the spectra


def test_pls_chooses_components_by_cv(rng):
    X, y = _spectral_data(rng)
    m = fit_calibration(X, y, method="pls", predictor_names=[f"b{i}" for i in range(X.shape[1])],
                        n_components=None, max_components=6, folds=5, seed=0)
    kf = KFold(5, shuffle=True, random_state=0)
    rmse = [np.sqrt(skm.mean_squared_error(y, cross_val_predict(PLSRegression(k), X, y, cv=kf).ravel()))
            for k in range(1, 7)]  # sklearn as the oracle of the CV curve
    np.testing.assert_allclose(m["cv_rmse_by_components"], rmse, rtol=1e-9)
    assert m["n_components"] == int(np.argmin(rmse)) + 1


def test_grouped_cross_validation(rng):
    X, y = _linear_data(rng, n=48)
    groups = np.repeat(np.arange(8), 6)
    m = fit_calibration(X, y, method="linear", predictor_names=["a", "b"], groups=groups, folds=4)
    cv = cross_val_predict(LinearRegression(), X, y, cv=GroupKFold(4), groups=groups)  # sklearn GroupKFold
    np.testing.assert_allclose(m["cv_predicted"], cv, rtol=1e-10)
    assert m["cv"]["grouped"] is True
    with pytest.raises(CalibrationError, match="5 folds need at least 5 sample groups. Got 2"):
        fit_calibration(X, y, method="linear", predictor_names=["a", "b"], groups=groups % 2, folds=5)


def test_uncertainty_follows_cv_residuals(rng):
    n = 200
    x = rng.uniform(0, 1, (n, 1))
    y = 10 * x[:, 0] + rng.normal(0, 0.05 + 1.0 * x[:, 0])  # error grows with the value
    m = fit_calibration(x, y, method="linear", predictor_names=["a"], folds=5)
    resid = m["cv_predicted"] - y
    # the bins hold the RMS of CV residuals (definition in the module docstring)
    order = np.argsort(m["cv_predicted"], kind="stable")
    np.testing.assert_allclose(m["sigma"], [np.sqrt(np.mean(resid[p] ** 2)) for p in np.array_split(order, 5)])
    _, sigma, _ = predict_calibration(m, np.array([[0.05], [0.95]]))
    assert sigma[1] > 3 * sigma[0]
    # few samples: a single value, the CV RMSE
    m_small = fit_calibration(x[:15], y[:15], method="linear", predictor_names=["a"], folds=5)
    _, s, _ = predict_calibration(m_small, np.array([[0.1], [0.9]]))
    np.testing.assert_allclose(s, m_small["cv"]["rmse"])


def test_out_of_range(rng):
    X, y = _linear_data(rng)
    m = fit_calibration(X, y, method="linear", predictor_names=["a", "b"], range_margin=0.1)
    lo, hi = X.min(0), X.max(0)
    pts = np.array([[lo[0], hi[1]], [hi[0] + 0.05 * (hi[0] - lo[0]), lo[1]],
                    [hi[0] + 0.15 * (hi[0] - lo[0]), lo[1]], [np.nan, 0.5]])
    value, sigma, outside = predict_calibration(m, pts)
    np.testing.assert_array_equal(outside, [False, False, True, False])
    assert np.isnan(value[3]) and np.isnan(sigma[3])
    Xs, ys = _spectral_data(rng)
    mp = fit_calibration(Xs, ys, method="pls", predictor_names=[str(i) for i in range(Xs.shape[1])], n_components=2)
    _, _, out = predict_calibration(mp, np.vstack([Xs[:5], Xs[:1] * 3.0]))
    np.testing.assert_array_equal(out, [False] * 5 + [True])


def test_config_errors():
    with pytest.raises(ValueError, match="needs 'bands'"):
        CalibrationConfig(name="c", quantity="clay", method="linear", input="features/features")
    with pytest.raises(ValueError, match="either 'bands' or 'wavelength_ranges'"):
        CalibrationConfig(name="c", quantity="clay", method="pls", input="m/r", bands=["a"],
                          wavelength_ranges=[(2000, 2400)])
    with pytest.raises(CalibrationError, match="needs at least 5 samples"):
        fit_calibration(np.ones((4, 1)), np.arange(4.0), method="linear", predictor_names=["a"])


def _predictor_map(rng, rows=48, cols=40):
    f = np.stack([rng.uniform(0, 1, (rows, cols)), rng.uniform(0, 1, (rows, cols)),
                  rng.uniform(0, 1, (rows, cols))]).astype(np.float32)
    spec = OutputSpec(bands=("depth", "area", "unused"), dtype="float32", nodata=float("nan"))
    return f, spec


@pytest.mark.parametrize("tile", [16])  # other tilings: tests/test_contract.py (calibration_*)
def test_step_equals_the_whole_array_fit(tmp_path, rng, tile):
    from swathmill.tiles.tasks import load_model
    from swathmill.tiles.testing import run_on_arrays

    f, spec = _predictor_map(rng)
    rows, cols = rng.integers(0, 48, 60), rng.integers(0, 40, 60)
    keep = np.unique(rows * 40 + cols, return_index=True)[1]
    rows, cols = rows[keep], cols[keep]
    values = 2.0 + 4.0 * f[0, rows, cols] - 1.5 * f[1, rows, cols] + rng.normal(0, 0.05, rows.size)
    valid = np.ones((48, 40), bool)
    valid[rows[0], cols[0]] = False  # one sample on a nodata pixel: dropped, named in the model
    f[:, rows[0], cols[0]] = np.nan
    samples = CalibrationSamples(rows=rows, cols=cols, values=values, ids=[f"s{i}" for i in range(rows.size)])
    section = {"name": "clay_map", "quantity": "clay", "units": "%", "method": "linear",
               "input": "src/feat", "bands": ["depth", "area"], "cv": {"folds": 5, "seed": 2}}
    out, _ = run_on_arrays(build_steps(section, samples), {"feat": (f, spec)}, tmp_path, tile=tile, valid=valid)
    model = load_model(next((tmp_path / "run" / "models").glob("clay_map-*.json")).with_suffix(""))
    assert model["dropped_samples"] == ["s0"]
    # the whole-array reference: fit on the sample pixels directly, predict every pixel
    ok = np.arange(rows.size) != 0
    whole = fit_calibration(f[:2, rows[ok], cols[ok]].T, values[ok], method="linear",
                            predictor_names=["depth", "area"], folds=5, seed=2)
    np.testing.assert_allclose(model["coef"], whole["coef"], rtol=1e-10)
    np.testing.assert_allclose(model["cv_predicted"], whole["cv_predicted"], rtol=1e-10)
    v, s, o = predict_calibration(whole, f[:2].reshape(2, -1).T)
    # the tiled step equals the whole-array fit and prediction (floats to 1e-6 relative)
    np.testing.assert_allclose(out["clay_map/quantity"][0].ravel(), v, rtol=1e-6, equal_nan=True)
    np.testing.assert_allclose(out["clay_map/uncertainty"][0].ravel(), s, rtol=1e-6, equal_nan=True)
    flags = out["clay_map/out_of_range"][0].ravel()
    np.testing.assert_array_equal(flags[np.isfinite(v)], np.where(o[np.isfinite(v)], 2, 1))
    assert np.isnan(out["clay_map/quantity"][0, rows[0], cols[0]])


def test_step_rejects_sample_outside_grid(tmp_path, rng):
    from swathmill.tiles.testing import run_on_arrays

    f, spec = _predictor_map(rng, 20, 20)
    samples = CalibrationSamples(rows=np.array([1, 2, 3, 4, 5, 25]), cols=np.array([1, 2, 3, 4, 5, 6]),
                                 values=np.arange(6.0))
    section = {"name": "q", "quantity": "q", "method": "linear", "input": "src/feat", "bands": ["depth"]}
    with pytest.raises(Exception, match="row 25, col 6 lies outside the 20 x 20 grid"):
        run_on_arrays(build_steps(section, samples), {"feat": (f, spec)}, tmp_path, tile=16)


# SVR ---------------------------------------------------------------------------------------------
def test_svr_matches_sklearn_on_same_samples_and_parameters(rng):
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVR

    X, y = _spectral_data(rng, n=70, bands=12)
    groups = np.repeat(np.arange(14), 5)
    m = fit_calibration(X, y, method="svr", predictor_names=[f"b{i}" for i in range(12)], groups=groups,
                        folds=5, C=[10.0], gamma=[0.05], epsilon=[0.1])
    # sklearn.svm.SVR in a StandardScaler pipeline, fitted directly on the same samples and parameters
    ref = make_pipeline(StandardScaler(), SVR(C=10.0, gamma=0.05, epsilon=0.1)).fit(X, y)
    Xn = X + rng.normal(0, 0.01, X.shape)
    v, s, _o = predict_calibration(m, Xn)
    np.testing.assert_allclose(v, ref.predict(Xn), rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(m["fitted"], ref.predict(X), rtol=1e-9, atol=1e-9)
    # cross-validated predictions: sklearn's cross_val_predict on the same GroupKFold (blocked) folds
    cvp = cross_val_predict(make_pipeline(StandardScaler(), SVR(C=10.0, gamma=0.05, epsilon=0.1)), X, y,
                            groups=groups, cv=GroupKFold(5))
    np.testing.assert_allclose(m["cv_predicted"], cvp, rtol=1e-9, atol=1e-9)
    assert m["cv"]["rmse"] == pytest.approx(np.sqrt(skm.mean_squared_error(y, cvp)))
    # uncertainty: binned CV residual combined with the jackknife spread of the fold models (module notes)
    folds = [make_pipeline(StandardScaler(), SVR(C=10.0, gamma=0.05, epsilon=0.1)).fit(X[tr], y[tr])
             for tr, _te in GroupKFold(5).split(X, y, groups)]
    preds = np.array([f.predict(Xn) for f in folds])
    jack = 4 / 5 * np.sum((preds - preds.mean(0)) ** 2, axis=0)
    s_cv = np.interp(v, m["sigma_at"], m["sigma"])
    np.testing.assert_allclose(s, np.sqrt(s_cv ** 2 + jack), rtol=1e-8)
    assert np.all(s >= s_cv)


def test_svr_scale_gamma_and_grid_choice(rng):
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVR

    X, y = _spectral_data(rng, n=60, bands=8)
    m = fit_calibration(X, y, method="svr", predictor_names=list("abcdefgh"), folds=4, seed=1,
                        C=[1.0, 100.0], gamma=["scale"], epsilon=None)
    assert len(m["svr_grid"]) == 2 * 4  # C x default epsilon grid
    best = m["svr_best"]
    assert m["cv"]["rmse"] == pytest.approx(min(m["svr_grid"].values()))
    ref = make_pipeline(StandardScaler(), SVR(C=best["C"], gamma="scale", epsilon=best["epsilon"])).fit(X, y)
    np.testing.assert_allclose(predict_calibration(m, X)[0], ref.predict(X), rtol=1e-9, atol=1e-9)


def test_svr_out_of_range_flags_far_pixels(rng):
    X, y = _spectral_data(rng, n=60, bands=8)
    m = fit_calibration(X, y, method="svr", predictor_names=list("abcdefgh"), folds=4, C=[10.0], gamma=[0.1],
                        epsilon=[0.1])
    _v, _s, out = predict_calibration(m, np.vstack([X[:5], X[:5] + 1.0]))
    assert not out[:5].any() and out[5:].all()


@pytest.mark.parametrize("tile", [16])  # other tilings: tests/test_contract.py (calibration_svr)
def test_svr_step_equals_the_whole_array_fit(tmp_path, rng, tile):
    from swathmill.tiles.tasks import load_model
    from swathmill.tiles.testing import run_on_arrays

    f, spec = _predictor_map(rng)
    rows, cols = rng.integers(0, 48, 60), rng.integers(0, 40, 60)
    keep = np.unique(rows * 40 + cols, return_index=True)[1]
    rows, cols = rows[keep], cols[keep]
    values = 2.0 + 4.0 * f[0, rows, cols] ** 2 - 1.5 * f[1, rows, cols] + rng.normal(0, 0.05, rows.size)
    samples = CalibrationSamples(rows=rows, cols=cols, values=values, groups=np.arange(rows.size) % 6)
    section = {"name": "clay_svr", "quantity": "clay", "method": "svr", "input": "src/feat",
               "bands": ["depth", "area"], "C": [10.0], "gamma": ["scale", 0.5], "epsilon": [0.05],
               "cv": {"folds": 3, "grouped": True}}
    out, _ = run_on_arrays(build_steps(section, samples), {"feat": (f, spec)}, tmp_path, tile=tile)
    model = load_model(next((tmp_path / "run" / "models").glob("clay_svr-*.json")).with_suffix(""))
    whole = fit_calibration(f[:2, rows, cols].T, values, method="svr", predictor_names=["depth", "area"],
                            groups=np.arange(rows.size) % 6, folds=3, C=[10.0], gamma=["scale", 0.5], epsilon=[0.05])
    np.testing.assert_allclose(model["cv_predicted"], whole["cv_predicted"], rtol=1e-10)
    v, s, o = predict_calibration(whole, f[:2].reshape(2, -1).T)
    # the tiled step equals the whole-array fit and prediction (floats to 1e-6 relative)
    np.testing.assert_allclose(out["clay_svr/quantity"][0].ravel(), v, rtol=1e-6, equal_nan=True)
    np.testing.assert_allclose(out["clay_svr/uncertainty"][0].ravel(), s, rtol=1e-6, equal_nan=True)
    np.testing.assert_array_equal(out["clay_svr/out_of_range"][0].ravel(), np.where(o, 2, 1))


def test_calibration_curve_peaks_at_the_informative_count():
    # the quantity depends on the first 3 predictors; 17 noise predictors follow, few samples: the
    # blocked-CV R2 of OLS rises to 3, stays on a plateau and then falls (Hughes phenomenon for
    # regression, common practice); the one-standard-error rule gives the informative count
    from swathmill.workflows.methods.calibration import calibration_curve

    rng = np.random.default_rng(0)
    n = 30
    X = rng.normal(size=(n, 20))
    y = X[:, :3] @ np.array([2.0, 1.5, 1.0]) + rng.normal(0, 0.3, n)
    groups = np.arange(n) % 6
    m = fit_calibration(X, y, method="linear", predictor_names=[f"p{i}" for i in range(20)], groups=groups,
                        folds=3)
    curve = calibration_curve(X, y, m, groups, folds=3, seed=0)
    assert curve["one_se"] == 3 and curve["peak"] >= 3
    mean = np.array(curve["mean"])
    assert mean[2] > mean[-1]
    # one fold's R2 at 3 predictors, recomputed with scikit-learn directly (LinearRegression, GroupKFold)
    tr, te = next(iter(GroupKFold(3).split(X, y, groups)))
    r2 = skm.r2_score(y[te], LinearRegression().fit(X[tr, :3], y[tr]).predict(X[te, :3]))
    folds = [skm.r2_score(y[b], LinearRegression().fit(X[a, :3], y[a]).predict(X[b, :3]))
             for a, b in GroupKFold(3).split(X, y, groups)]
    assert curve["mean"][2] == pytest.approx(np.mean(folds)) and r2 in folds
