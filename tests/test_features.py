"""Spectral features: known synthetic features, the METHODS check spectrum, real mineral spectra."""
from __future__ import annotations

import numpy as np
import pytest
from pydantic import ValidationError

from swathmill.tiles.step import OutputSpec
from swathmill.workflows.methods.features import (
    BandArea,
    BandDepth,
    BandMinimum,
    BandRatio,
    FeatureError,
    FeaturesConfig,
    NormalizedDifference,
    Slope,
    build_steps,
    compute_feature,
    compute_features,
)

WL = np.arange(2000.0, 2400.1, 10.0)  # 10 nm spacing


def _gaussian_feature(center: float, depth: float, sigma: float = 20.0) -> np.ndarray:
    """A sloped linear continuum times (1 - depth * Gaussian): CR = 1 - depth * Gaussian."""
    continuum = 0.30 + 0.0004 * (WL - 2000.0)
    return continuum * (1.0 - depth * np.exp(-((WL - center) ** 2) / (2 * sigma ** 2)))


@pytest.mark.parametrize("shoulders", ["hull", "fixed"])
def test_band_depth_and_area_of_gaussian(shoulders):
    spectra = np.stack([_gaussian_feature(2200.0, d) for d in (0.05, 0.25, 0.6)])
    rng_ = (2080.0, 2320.0)  # +-6 sigma: the Gaussian is below 1e-7 of its depth at the shoulders
    depth = compute_feature(WL, spectra, BandDepth(name="d", range=rng_, shoulders=shoulders))
    # the depth of the synthetic feature is known by construction (band at the centre)
    np.testing.assert_allclose(depth, [0.05, 0.25, 0.6], atol=1e-6)
    area = compute_feature(WL, spectra, BandArea(name="a", range=rng_, shoulders=shoulders))
    # integral of depth * exp(-x^2 / 2 sigma^2) = depth * sigma * sqrt(2 pi) (Gaussian integral)
    np.testing.assert_allclose(area, np.array([0.05, 0.25, 0.6]) * 20.0 * np.sqrt(2 * np.pi), rtol=1e-5)


def test_band_depth_at_fixed_wavelength():
    r = _gaussian_feature(2200.0, 0.4)
    got = compute_feature(WL, r[None], BandDepth(name="d", range=(2080, 2320), at=2230.0))
    # depth 0.4 * exp(-30^2 / (2 * 20^2)) at 2230 nm, by construction
    assert got[0] == pytest.approx(0.4 * np.exp(-900 / 800), abs=1e-6)


def test_band_minimum_within_tenth_of_band_spacing():
    centres = np.linspace(2180.0, 2190.0, 11)  # on, between and off the bands
    spectra = np.stack([_gaussian_feature(c, 0.3) for c in centres])
    pos = compute_feature(WL, spectra, BandMinimum(name="m", range=(2060, 2340)))
    # the requirement: within a tenth of a band spacing (10 nm here)
    np.testing.assert_array_less(np.abs(pos - centres), 1.0)


def test_methods_check_spectrum():
    # ../shared/METHODS.md [R]: hull vertices 0, 1, 10; minimum CR at 2200 nm = 0.680346,
    # depth 0.319654; the three-point parabola puts the centre at 2199.25 nm.
    wl = np.arange(2100.0, 2300.1, 20.0)
    r = np.array([.50, .51, .50, .46, .40, .35, .41, .47, .50, .51, .52])[None]
    assert compute_feature(wl, r, BandDepth(name="d", range=(2100, 2300)))[0] == pytest.approx(0.319654, abs=1e-6)
    assert compute_feature(wl, r, BandMinimum(name="m", range=(2100, 2300)))[0] == pytest.approx(2199.25, abs=5e-3)


def test_band_minimum_nan_without_feature():
    flat = np.full((2, WL.size), 0.4)
    flat[1] = 0.2 + 0.001 * (WL - 2000)  # a straight sloped line is its own hull
    pos = compute_feature(WL, flat, BandMinimum(name="m", range=(2050, 2350)))
    assert np.all(np.isnan(pos))
    assert np.all(compute_feature(WL, flat, BandDepth(name="d", range=(2050, 2350))) == pytest.approx(0, abs=1e-12))


def test_ratio_normalized_difference_slope(rng):
    wl = np.arange(400.0, 1000.1, 10.0)
    x = rng.uniform(0.05, 0.6, (50, wl.size))
    i550, i860, i660 = (int(np.flatnonzero(wl == w)[0]) for w in (550, 860, 660))
    in_range = (wl >= 750) & (wl <= 800)
    # numpy on the selected bands (common practice definitions)
    np.testing.assert_allclose(
        compute_feature(wl, x, BandRatio(name="r", numerator=(750, 800), denominator=552.0)),
        x[:, in_range].mean(1) / x[:, i550], rtol=1e-12)
    np.testing.assert_allclose(
        compute_feature(wl, x, NormalizedDifference(name="nd", a=860, b=660)),
        (x[:, i860] - x[:, i660]) / (x[:, i860] + x[:, i660]), rtol=1e-12)
    sl = (wl >= 680) & (wl <= 750)
    expected = np.polyfit(wl[sl], x[:, sl].T, 1)[0]  # numpy.polyfit least-squares slope
    np.testing.assert_allclose(compute_feature(wl, x, Slope(name="s", range=(680, 750))), expected, rtol=1e-9)


def test_nan_pixels_give_nan(rng):
    x = np.stack([_gaussian_feature(2200.0, 0.3)] * 3)
    x[1, 20] = np.nan
    for f in (BandDepth(name="d", range=(2080, 2320)), BandMinimum(name="m", range=(2080, 2320)),
              BandArea(name="a", range=(2080, 2320)), Slope(name="s", range=(2080, 2320))):
        v = compute_feature(WL, x, f)
        assert np.isnan(v[1]) and np.isfinite(v[0]) and v[0] == v[2]


def test_errors_name_the_feature():
    x = np.ones((1, WL.size))
    with pytest.raises(FeatureError, match="'shallow'.*2001-2009"):
        compute_feature(WL, x, BandDepth(name="shallow", range=(2001, 2009)))
    with pytest.raises(FeatureError, match="'far'.*2600"):
        compute_feature(WL, x, BandRatio(name="far", numerator=2600, denominator=2200))
    with pytest.raises(ValidationError, match="unique"):
        FeaturesConfig(features=[{"kind": "slope", "name": "a", "range": [1, 2]}] * 2)
    with pytest.raises(ValidationError, match="low < high"):
        FeaturesConfig(features=[{"kind": "band_depth", "name": "a", "range": [2300, 2100]}])
    with pytest.raises(ValidationError):
        FeaturesConfig(features=[{"kind": "band_depht", "name": "a", "range": [2100, 2300]}])


def test_mineral_library_band_minima(shared_data):
    import scipy.io as sio

    d = sio.loadmat(shared_data / "mineral_library" / "usgs_minerals_aviris224.mat")
    wl = d["waveLength"].ravel() * 1000.0  # waveLength is in micrometres
    names = [str(c[0][0]).split(" ", 1)[1].lower() for c in d["cood"]]
    spectra = d["M"].T
    pos = dict(zip(names, compute_feature(wl, spectra, BandMinimum(name="m", range=(2050, 2450)))))
    # ../shared/data/README.md (Hunt 1977, Clark 1999, from memory there): Al-OH of kaolinite and
    # muscovite near 2200-2210 nm, montmorillonite 2205-2215, alunite 2165-2175; NH4 of
    # buddingtonite near 2120; Fe-OH of nontronite 2285-2295; each within one band over 2050-2450 nm.
    expected = {"kaolinite_1": (2200, 2210), "kaolinite_2": (2200, 2210), "muscovite": (2200, 2210),
                "montmorillonite": (2205, 2215), "alunite": (2165, 2175), "buddingtonite": (2120, 2120),
                "nontronite": (2285, 2295)}
    for mineral, (lo, hi) in expected.items():
        i = int(np.argmin(np.abs(wl - pos[mineral])))
        band = max(wl[i + 1] - wl[i], wl[i] - wl[i - 1])
        assert lo - band <= pos[mineral] <= hi + band, f"{mineral}: minimum at {pos[mineral]:.1f} nm"


def test_compute_features_block_and_valid(rng):
    feats = [BandDepth(name="d", range=(2080, 2320)), BandMinimum(name="m", range=(2080, 2320))]
    cube = np.stack([_gaussian_feature(c, 0.3) for c in rng.uniform(2180, 2220, 12)]).T.reshape(WL.size, 3, 4)
    valid = np.ones((3, 4), bool)
    valid[0, 0] = False
    out = compute_features(WL, cube.astype(np.float32), feats, valid)
    assert out.shape == (2, 3, 4) and out.dtype == np.float32
    assert np.isnan(out[:, 0, 0]).all()
    flat = cube.reshape(WL.size, -1).T.astype(np.float32)
    np.testing.assert_allclose(out[1].ravel()[1:], compute_feature(WL, flat, feats[1])[1:], rtol=1e-6)


def test_step_equals_the_whole_array_functions(tmp_path, rng):
    # tiled equals untiled through the engine is checked by tests/test_contract.py (case features)
    from swathmill.tiles.testing import run_on_arrays

    rows, cols = 40, 56
    centres = rng.uniform(2150, 2250, (rows, cols))
    depths = rng.uniform(0.02, 0.5, (rows, cols))
    cube = np.stack([_gaussian_feature(c, d) for c, d in zip(centres.ravel(), depths.ravel())]).T
    cube = cube.reshape(WL.size, rows, cols).astype(np.float32)
    cube *= rng.uniform(0.8, 1.2, (1, rows, cols)).astype(np.float32)
    spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(WL.size)), dtype="float32", nodata=float("nan"),
                      coords={"wavelength": tuple(WL.tolist())})
    section = {"input": "src/cube", "features": [
        {"kind": "band_depth", "name": "depth", "range": [2080, 2320]},
        {"kind": "band_minimum", "name": "minimum", "range": [2080, 2320]},
        {"kind": "band_area", "name": "area", "range": [2080, 2320], "shoulders": "fixed"},
        {"kind": "normalized_difference", "name": "nd", "a": 2100, "b": [2190, 2210]},
        {"kind": "slope", "name": "slope", "range": [2300, 2400]},
    ]}
    steps = build_steps(section)
    out, _ = run_on_arrays(steps, {"cube": (cube, spec)}, tmp_path, tile=16)
    whole = compute_features(WL, cube, FeaturesConfig.model_validate(section).features)
    got = out["features/features"]
    assert got.shape == whole.shape == (5, rows, cols)
    # 16-pixel tiles equal compute_features on the whole array (floats to 1e-6 relative)
    np.testing.assert_allclose(got, whole, rtol=1e-6, equal_nan=True)
    # and the depth is the one built in (band-centred minima only: off-band centres are shallower)
    assert np.all(got[0] <= depths + 1e-5)
