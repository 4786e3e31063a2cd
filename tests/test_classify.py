"""Classification: spectral angle, feature fitting and SVM against formulas, numpy, scikit-learn, the
engine (tiled equals untiled) and the Jasper Ridge scene."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import shapely
from scipy.io import loadmat
from sklearn.metrics.pairwise import cosine_similarity
from sklearn.model_selection import GridSearchCV, GroupKFold
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from swathmill.tiles.palette import default_class_colors
from swathmill.tiles.step import OutputSpec
from swathmill.tiles.testing import default_grid, run_on_arrays
from swathmill.workflows.methods.classify import (
    ClassifierParams,
    ClassifyError,
    SamConfig,
    SamSettings,
    SffSettings,
    SvmSettings,
    SffConfig,
    SvmConfig,
    assign_best_fit,
    assign_min_angle,
    blocked_folds,
    build_steps,
    class_thresholds,
    fit_svm,
    load_svm,
    predict_svm,
    sam_step,
    sff_fit,
    sff_r2,
    sff_step,
    spectral_angle,
    svm_step,
)
from swathmill.workflows.spectral.continuum import continuum_removed
from swathmill.workflows.inputs.library import LibraryError, SpectralLibrary, read_library, write_library
from swathmill.workflows.inputs.reference import GroundReference, SampleTable, samples_on_grid
from swathmill.workflows.spectral.spectra import resample_gaussian

# --------------------------------------------------------------------------------------------------
# spectral angle


def test_angle_against_formula_and_sklearn(rng: np.random.Generator) -> None:
    X = rng.uniform(0.01, 0.8, (500, 50))
    R = rng.uniform(0.01, 0.8, (6, 50))
    got = spectral_angle(X, R)
    # the direct formula of Kruse et al. (1993), one pair at a time
    direct = np.array([[np.arccos(np.clip(x @ r / (np.linalg.norm(x) * np.linalg.norm(r)), -1, 1)) for r in R]
                       for x in X])
    np.testing.assert_allclose(got, direct, rtol=1e-12, atol=1e-14)
    # oracle named in METHODS.md: arccos(clip(sklearn cosine_similarity))
    np.testing.assert_allclose(got, np.arccos(np.clip(cosine_similarity(X, R), -1, 1)), rtol=1e-10, atol=1e-12)
    # invariant to multiplying a spectrum by a positive factor (illumination; common practice)
    scaled = spectral_angle(X * rng.uniform(0.2, 5.0, (500, 1)), R * 3.0)
    np.testing.assert_allclose(scaled, got, rtol=1e-9, atol=1e-12)


def test_angle_check_values_and_edge_cases() -> None:
    # METHODS.md [R]: (1, 0) against (1, 1) = 0.785398 rad; parallel spectra = 0 exactly
    assert spectral_angle(np.array([[1.0, 0.0]]), np.array([[1.0, 1.0]]))[0, 0] == pytest.approx(0.785398, abs=5e-7)
    t = np.array([[0.3, 0.3, 0.3]])
    a = spectral_angle(t, 0.1 * t)  # cosine rounds to 1.0000000000000002: must be clipped, not NaN
    assert a[0, 0] == 0.0
    # random parallel spectra: zero to double precision (plain arccos would give ~1e-8)
    rng = np.random.default_rng(3)
    x = rng.uniform(0.01, 1, (50, 100))
    par = spectral_angle(x, x[:5] * 0.37)
    assert np.abs(par[np.arange(5), np.arange(5)]).max() < 1e-14
    # a small known angle: (1, 0) against (cos e, sin e) is e (common practice)
    e = 1e-6
    assert spectral_angle(np.array([[1.0, 0.0]]), np.array([[np.cos(e), np.sin(e)]]))[0, 0] == pytest.approx(e, rel=1e-9)
    z = spectral_angle(np.array([[0.0, 0.0, 0.0], [np.nan, 1, 1]]), t)
    assert np.isnan(z).all()
    with pytest.raises(ClassifyError, match="zero norm"):
        spectral_angle(t, np.zeros((1, 3)))


@pytest.mark.parametrize("offset,exclude", [(None, ()), (0.01, ()), (None, ((1300, 1500), (1790, 1960)))])
def test_angle_step_on_stored_int16_against_sklearn(tmp_path: Path, offset: float | None, exclude) -> None:
    """The step computes in float32 from the stored integers (float64 below 0.1 rad): its angles
    against the float64 oracle, with near-parallel pixels, a CF offset, a band on nodata, and
    excluded wavelength windows (three runs of bands)."""
    rng = np.random.default_rng(11)
    b, size = 60, 40
    wl = np.linspace(400, 2500, b)
    refs = rng.uniform(0.05, 0.7, (5, b))
    n = size * size
    refl = rng.uniform(0.02, 0.8, (n, b))
    near = rng.choice(n, 600, replace=False)  # scaled references plus a little noise: angles of 1e-4-0.1 rad
    refl[near] = refs[near % 5] * rng.uniform(0.5, 1.5, (600, 1)) + rng.normal(0, 1, (600, 1)) * \
        rng.uniform(1e-4, 3e-2, (600, 1)) * rng.normal(size=(600, b))
    refl = np.clip(refl, 0.0, 1.0)
    scale, off = 1e-4, (offset or 0.0)
    stored = np.round((refl - off) / scale).astype(np.int16)
    stored[near[:3], 7] = -9999  # one band on nodata in three pixels: those pixels get no angle
    cube = stored.T.reshape(b, size, size)
    attrs = {"scale_factor": scale} | ({"add_offset": offset} if offset else {})
    spec = OutputSpec(bands=tuple(f"b{i:02d}" for i in range(b)), dtype="int16", nodata=-9999, attrs=attrs,
                      coords={"wavelength": tuple(wl)})  # no FWHM: the library is taken as is on equal centres
    lib = SpectralLibrary(tuple(f"m{i}" for i in range(5)), wl, refs)
    out, _ = run_on_arrays([sam_step("sam", "src/cube", library=lib, threshold=0.1, exclude=exclude)],
                           {"cube": (cube, spec)}, tmp_path, tile=16, raw=True)
    got = out["sam/angle"].reshape(5, n).T.astype(np.float64)
    phys = stored * scale + off
    keep = np.ones(b, bool)
    for lo, hi in exclude:
        keep &= ~((wl >= lo) & (wl <= hi))
    assert keep.sum() < b if exclude else keep.all()
    # oracle named in METHODS.md: arccos(clip(sklearn cosine_similarity)), on the decoded values
    expect = np.arccos(np.clip(cosine_similarity(phys[:, keep], refs[:, keep]), -1, 1))
    bad = np.zeros(n, bool)
    bad[near[:3]] = True
    assert np.isnan(got[bad]).all() and np.isfinite(got[~bad]).all()
    got, expect = got[~bad], expect[~bad]
    small = expect < 0.09
    assert small.sum() > 300  # the near-parallel pixels are exercised
    # below 0.1 rad: float64 arithmetic, stored as float32 (relative 6e-8); arccos in float64 itself
    # is good to ~1e-8 rad near zero (METHODS.md), hence the absolute term
    np.testing.assert_allclose(got[small], expect[small], rtol=2e-7, atol=2e-8)
    # elsewhere float32 rounding of the cosine (~1e-6) moves the angle by ~1e-6 / sin(angle)
    np.testing.assert_allclose(got[~small], expect[~small], rtol=0, atol=2e-5)
    cls = out["sam/classes"][0].reshape(n)[~bad]
    best = expect.argmin(axis=1)
    far_from_threshold = np.abs(expect.min(axis=1) - 0.1) > 1e-4
    np.testing.assert_array_equal(cls[far_from_threshold],
                                  np.where(expect.min(axis=1) <= 0.1, best + 1, 0)[far_from_threshold])


def test_assign_min_angle_thresholds() -> None:
    ang = np.array([[0.05, 0.20, 0.30], [0.30, 0.12, 0.50], [0.40, 0.45, 0.16], [np.nan] * 3])
    ref_class = np.array([1, 2, 2])
    assert assign_min_angle(ang, ref_class, 0.1).tolist() == [1, 0, 0, 0]
    thr = class_thresholds(ref_class, ["soil", "water"], 0.1, {"water": 0.2})
    assert thr.tolist() == [0.1, 0.2, 0.2]
    assert assign_min_angle(ang, ref_class, thr).tolist() == [1, 2, 2, 0]
    assert assign_min_angle(ang, ref_class, np.inf).tolist() == [1, 2, 2, 0]
    with pytest.raises(ClassifyError, match=r"unknown class\(es\) \['grass'\]"):
        class_thresholds(ref_class, ["soil", "water"], 0.1, {"grass": 0.2})


# --------------------------------------------------------------------------------------------------
# spectral feature fitting

CHECK_WL = np.arange(2100.0, 2301.0, 20.0)
CHECK_R = np.array([0.50, 0.51, 0.50, 0.46, 0.40, 0.35, 0.41, 0.47, 0.50, 0.51, 0.52])


def test_scale_and_rmse_against_lstsq(rng: np.random.Generator) -> None:
    d_o = rng.uniform(0, 0.4, (40, 25))
    d_r = rng.uniform(0, 0.4, (3, 25))
    scale, rmse = sff_fit(d_o, d_r)
    for i in range(40):
        for j in range(3):
            # least squares without intercept: numpy.linalg.lstsq on one column
            coef, res, *_ = np.linalg.lstsq(d_r[j][:, None], d_o[i], rcond=None)
            assert scale[i, j] == pytest.approx(coef[0], rel=1e-12)
            assert rmse[i, j] == pytest.approx(np.sqrt(res[0] / 25), rel=1e-10)
    # the fit figure: R2 of the continuum-removed fit against scikit-learn's r2_score (the textbook
    # 1 - SS_res / SS_tot with SS_tot about the mean) and the formula written out with numpy
    from sklearn.metrics import r2_score

    r2 = sff_r2(d_o, rmse)
    for i in range(40):
        for j in range(3):
            fitted = scale[i, j] * d_r[j]
            by_hand = 1.0 - np.sum((d_o[i] - fitted) ** 2) / np.sum((d_o[i] - d_o[i].mean()) ** 2)
            assert r2[i, j] == pytest.approx(by_hand, rel=1e-10, abs=1e-12)
            assert r2[i, j] == pytest.approx(r2_score(d_o[i], fitted), rel=1e-10, abs=1e-12)


def test_r2_of_a_perfect_and_a_flat_fit() -> None:
    # a pixel that is the reference scaled has R2 = 1 (SS_res = 0); a pixel without depth variation
    # has no R2 (SS_tot = 0, the formula is undefined): NaN, never eligible (common practice)
    d_r = np.array([[0.0, 0.1, 0.3, 0.1, 0.0]])
    d_o = np.vstack([0.5 * d_r[0], np.full(5, 0.2)])
    scale, rmse = sff_fit(d_o, d_r)
    r2 = sff_r2(d_o, rmse)
    assert r2[0, 0] == pytest.approx(1.0, abs=1e-12)
    assert np.isnan(r2[1, 0])
    assert assign_best_fit(r2, scale, rmse, np.array([1])).tolist() == [1, 0]


def test_half_depth_reference_gives_scale_two() -> None:
    # METHODS.md [R]: a reference of half the depth of the check spectrum gives s = 2.000, RMSE ~ 0
    cr, hull = continuum_removed(CHECK_WL, CHECK_R)
    ref = hull * (1 - 0.5 * (1 - cr))
    cr_ref, _ = continuum_removed(CHECK_WL, ref)
    scale, rmse = sff_fit((1 - cr)[None], (1 - cr_ref)[None])
    assert scale[0, 0] == pytest.approx(2.0, abs=1e-9)
    assert rmse[0, 0] < 1e-12


def test_feature_scaled_by_0p4_is_recovered(rng: np.random.Generator) -> None:
    wl = np.arange(2000.0, 2401.0, 10.0)
    feature = 0.5 * np.exp(-0.5 * ((wl - 2200) / 25) ** 2)  # depth profile of a synthetic absorption
    continuum_ref = 0.6 - 1e-4 * (wl - 2000)
    reference = continuum_ref * (1 - feature)
    continuum_pix = 0.3 + 2e-4 * (wl - 2000)  # another brightness and slope
    pixel = continuum_pix * (1 - 0.4 * feature)
    cr_p, _ = continuum_removed(wl, pixel)
    cr_r, _ = continuum_removed(wl, reference)
    scale, rmse = sff_fit((1 - cr_p)[None], (1 - cr_r)[None])
    assert scale[0, 0] == pytest.approx(0.4, abs=1e-6)
    assert rmse[0, 0] < 1e-6
    # with noise the scale stays near 0.4 (common practice: least squares is unbiased under white noise)
    noisy = pixel[None] + rng.normal(0, 0.002, (200, wl.size))
    cr_n, _ = continuum_removed(wl, noisy)
    s, _ = sff_fit(1 - cr_n, (1 - cr_r)[None])
    assert abs(np.median(s) - 0.4) < 0.03


def test_assign_best_fit_thresholds() -> None:
    scale = np.array([[0.8, 0.3], [-0.2, 0.5], [0.9, 1.1]])
    rmse = np.array([[0.01, 0.001], [0.01, 0.05], [0.02, 0.01]])
    r2 = np.array([[0.90, 0.95], [0.99, 0.40], [0.70, 0.80]])
    rc = np.array([1, 2])
    # the eligible reference (scale above min_scale, RMSE and R2 within their limits) of highest R2
    assert assign_best_fit(r2, scale, rmse, rc).tolist() == [2, 2, 2]
    assert assign_best_fit(r2, scale, rmse, rc, max_rmse=0.03).tolist() == [2, 0, 2]
    assert assign_best_fit(r2, scale, rmse, rc, min_scale=0.5).tolist() == [1, 0, 2]
    assert assign_best_fit(r2, scale, rmse, rc, min_r2=0.9).tolist() == [2, 0, 0]


# --------------------------------------------------------------------------------------------------
# synthetic scene of pure patches

NAMES = ["alpha", "beta", "gamma", "delta"]
FINE = np.arange(350.0, 2551.0, 1.0)
WL = np.arange(400.0, 2501.0, 10.0)
FWHM = np.full(WL.size, 10.0)


def _material(base: float, slope: float, centre: float, depth: float, width: float) -> np.ndarray:
    b = base + slope * (FINE - 400) / 2100
    return b * (1 - depth * np.exp(-0.5 * ((FINE - centre) / width) ** 2))


def library() -> SpectralLibrary:
    m = np.stack([_material(.5, 0, 2165, .25, 20), _material(.3, .2, 2205, .3, 15),
                  _material(.4, .1, 2330, .2, 25), _material(.6, -.2, 2250, .15, 20)])
    return SpectralLibrary(tuple(NAMES), FINE, m, colors=("#cc6677", "#332288", "#ddcc77", "#117733"))


def scene(noise: float, seed: int = 1, size: int = 48) -> tuple[np.ndarray, OutputSpec, np.ndarray]:
    """Pure 12 x 12 patches of four materials (Gaussian-resampled from 1 nm spectra), random
    illumination factor 0.7-1.3 per pixel and white noise."""
    rng = np.random.default_rng(seed)
    spectra = resample_gaussian(FINE, library().spectra, WL, FWHM)
    r, c = np.mgrid[:size, :size]
    labels = ((r // 12) + 2 * (c // 12)) % 4 + 1
    illum = rng.uniform(0.7, 1.3, (size, size, 1))
    cube = spectra[labels - 1] * illum + rng.normal(0, noise, (size, size, WL.size))
    spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(WL.size)), dtype="float32", nodata=float("nan"),
                      coords={"wavelength": tuple(WL), "fwhm": tuple(FWHM)})
    return cube.transpose(2, 0, 1).astype(np.float32), spec, labels


def patch_samples(size: int = 48, validation: bool = False) -> SampleTable:
    """Ground reference: a 4 x 4 pixel square inside each 12 x 12 patch, read through samples_on_grid."""
    grid = default_grid(size, size)
    geoms, labels, split = [], [], []
    for pr in range(0, size, 12):
        for pc in range(0, size, 12):
            lab = ((pr // 12) + 2 * (pc // 12)) % 4 + 1
            r0, c0 = pr + 3 + (pc // 12) % 3, pc + 2 + (pr // 12) % 4
            x0, y0 = grid.transform @ (c0, r0)
            x1, y1 = grid.transform @ (c0 + 4, r0 + 4)
            geoms.append(shapely.box(min(x0, x1), min(y0, y1), max(x0, x1), max(y0, y1)))
            labels.append(NAMES[lab - 1])
            split.append("validation" if validation and (pr // 12 + pc // 12) % 3 == 0 else "train")
    ref = GroundReference(np.array(geoms, dtype=object), tuple(labels), grid.crs, tuple(split))
    table, issues = samples_on_grid(ref, grid, classes=NAMES)
    assert issues == [] and len(table) == 16 * len(geoms)
    return table


SVM_GRID = {"C": [1.0, 100.0], "gamma": [1e-3, 1e-1], "folds": 3}


def test_pure_patches_each_method(tmp_path: Path) -> None:
    # tiled equals untiled for each classifier is checked by tests/test_contract.py (sam, sam_image, sff, svm)
    cube, spec, labels = scene(noise=0.004)
    table = patch_samples()

    def steps():
        return [sam_step("sam", "src/cube", library=library(), threshold=0.1),
                sff_step("sff", "src/cube", library=library(), wl_range=(2100, 2400)),
                sam_step("sam_img", "src/cube", samples=table, threshold=0.1),
                sff_step("sff_img", "src/cube", samples=table, wl_range=(2100, 2400)),
                svm_step("svm", "src/cube", samples=table, probability=True, **SVM_GRID)]

    tiled, res = run_on_arrays(steps(), {"cube": (cube, spec)}, tmp_path, tile=16, raw=True, run_name="tiled")
    for method in ("sam", "sff", "sam_img", "sff_img", "svm"):
        acc = float(np.mean(tiled[f"{method}/classes"][0] == labels))
        print(f"synthetic pure patches, {method}: {acc:.4f} correct")
        assert acc >= 0.99, method  # issue 5: at least 99% of pure pixels
    # class map metadata: names and the library's colours; image references use the default palette
    models = {p.name.split("-")[0]: p for p in (tmp_path / "tiled" / "models").glob("*.json")}
    assert set(models) == {"sam", "sff", "sam_img", "sff_img", "svm"}
    from swathmill.tiles.store import open_store
    st = open_store(tmp_path / "tiled" / "stores" / "sam.zarr")
    assert st.specs["classes"].class_names == tuple(NAMES)
    assert st.specs["classes"].colors == ((204, 102, 119), (51, 34, 136), (221, 204, 119), (17, 119, 51))
    assert st.specs["angle"].bands == tuple(NAMES)
    st2 = open_store(tmp_path / "tiled" / "stores" / "sam_img.zarr")
    assert st2.specs["classes"].colors == default_class_colors(4)
    # probabilities sum to one
    p = tiled["svm/probability"]
    np.testing.assert_allclose(p.sum(axis=0), 1.0, rtol=1e-5)


def test_svm_step_equals_sklearn_on_same_samples(tmp_path: Path) -> None:
    cube, spec, labels = scene(noise=0.06, seed=7)  # noisy: the decision boundaries matter
    table = patch_samples(validation=True)
    step = svm_step("svm", "src/cube", samples=table, C=[0.1, 10.0], gamma=[1e-3, 3e-2], folds=4)
    out, _ = run_on_arrays([step], {"cube": (cube, spec)}, tmp_path, tile=16, raw=True)
    got = out["svm/classes"][0]
    from swathmill.tiles.tasks import load_model
    model = load_model(next((tmp_path / "run" / "models").glob("svm-*.json")).with_suffix(""))
    train = table.split != 2
    X = cube[:, table.row, table.col].T.astype(np.float64)
    Xt, yt, gt = X[train], table.label[train], table.group[train]
    # oracle: scikit-learn's own grid search with GroupKFold on the same samples and groups
    search = GridSearchCV(Pipeline([("s", StandardScaler()), ("svc", SVC(kernel="rbf"))]),
                          {"svc__C": [0.1, 10.0], "svc__gamma": [1e-3, 3e-2]}, cv=GroupKFold(4))
    search.fit(Xt, yt, groups=gt)
    assert model["best"] == {"C": search.best_params_["svc__C"], "gamma": search.best_params_["svc__gamma"]}
    np.testing.assert_allclose(sorted(model["cv_scores"].values()), sorted(search.cv_results_["mean_test_score"]))
    # refit by hand with the chosen parameters: identical predictions on every pixel
    ref = Pipeline([("s", StandardScaler()), ("svc", SVC(kernel="rbf", C=model["best"]["C"],
                                                         gamma=model["best"]["gamma"]))]).fit(Xt, yt)
    expected = ref.predict(cube.reshape(cube.shape[0], -1).T.astype(np.float64)).reshape(labels.shape)
    np.testing.assert_array_equal(got, expected)
    acc = float(np.mean(got == labels))
    assert 0.5 < acc < 1.0, acc  # a real boundary, far better than chance (0.25)
    assert model["validation"]["n"] == int((~train).sum())
    assert model["validation"]["overall_accuracy"] == pytest.approx(np.mean(ref.predict(X[~train]) == table.label[~train]))


def test_blocked_folds_never_share_a_polygon() -> None:
    table = patch_samples()
    splits = blocked_folds(table.label, table.group, 5)
    assert len(splits) == 5
    for tr, te in splits:
        assert not set(table.feature[tr]) & set(table.feature[te])
        assert len(tr) + len(te) == len(table)
    # every sample is tested exactly once
    np.testing.assert_array_equal(np.sort(np.concatenate([te for _, te in splits])), np.arange(len(table)))


def test_svm_model_is_safe_to_load(rng: np.random.Generator) -> None:
    import skops.io as sio

    X = rng.normal(size=(120, 4))
    y = (X[:, 0] > 0).astype(int) + 1
    g = np.arange(120) // 10
    model = fit_svm(X, y, g, class_names=["a", "b"], C=[1.0], gamma=[0.1], folds=3)
    again = fit_svm(X, y, g, class_names=["a", "b"], C=[1.0], gamma=[0.1], folds=3)
    assert model["sha256"] == again["sha256"]  # deterministic bytes: the same fit keeps the same step key
    labels, _ = predict_svm(load_svm(model), X)
    assert np.mean(labels == y) > 0.9
    tampered = dict(model, skops=model["skops"].copy())
    tampered["skops"][-40] ^= 0xFF
    with pytest.raises(ClassifyError, match="do not match their recorded SHA-256"):
        load_svm(tampered)
    import hashlib
    import functools
    evil = np.frombuffer(sio.dumps({"classifier": functools.partial(print, "x")}), dtype=np.uint8)
    with pytest.raises(ClassifyError, match="not trusted"):
        load_svm({"skops": evil, "sha256": hashlib.sha256(evil.tobytes()).hexdigest()})


# --------------------------------------------------------------------------------------------------
# bad input


def test_bad_input_errors(tmp_path: Path) -> None:
    table = patch_samples()
    few = table.subset((table.label != 3) | (np.cumsum(table.label == 3) <= 2))  # 2 'gamma' pixels left
    with pytest.raises(ClassifyError, match=r"fewer samples than the 5 cross-validation folds: \{'gamma': 2\}"):
        svm_step("svm", "src/cube", samples=few)
    four_groups = SampleTable(table.row, table.col, table.label, table.label.astype(np.int64), table.feature,
                              table.split, table.class_names)
    with pytest.raises(ClassifyError, match=r"4 spatial group\(s\) \(polygons or blocks\) for 5 folds"):
        svm_step("svm", "src/cube", samples=four_groups, folds=5)
    with pytest.raises(ClassifyError, match=r"thresholds for unknown class\(es\) \['reed'\]"):
        sam_step("sam", "src/cube", library=library(), class_thresholds={"reed": 0.2})
    with pytest.raises(ClassifyError, match="exactly one of a spectral library or ground reference"):
        sam_step("sam", "src/cube")
    # a library that does not cover the cube: the fit names the file and the ranges
    lib = library()
    short = SpectralLibrary(lib.names, lib.wavelengths[100:2000], lib.spectra[:, 100:2000])
    path = write_library(short, tmp_path / "short.csv")
    cube, spec, _ = scene(noise=0.004, size=16)
    with pytest.raises(LibraryError, match=r"short.csv covers 450-2349 nm but the cube's bands span 400-2500 nm"):
        run_on_arrays([sam_step("sam", "src/cube", library=read_library(path))], {"cube": (cube, spec)},
                      tmp_path, tile=16)
    # feature fitting needs wavelengths: components without them are refused
    bare = OutputSpec(bands=spec.bands, dtype="float32", nodata=float("nan"))
    with pytest.raises(ClassifyError, match="needs band wavelengths"):
        run_on_arrays([sff_step("sff", "src/cube", library=library(), wl_range=(2100, 2400))],
                      {"cube": (cube, bare)}, tmp_path, tile=16, run_name="bare")
    # ... while the spectral angle with image-derived references needs none (e.g. MNF components)
    cube48, spec48, labels48 = scene(noise=0.004)
    bare48 = OutputSpec(bands=spec48.bands, dtype="float32", nodata=float("nan"))
    out, _ = run_on_arrays([sam_step("sam", "src/cube", samples=patch_samples())], {"cube": (cube48, bare48)},
                           tmp_path, tile=16, raw=True, run_name="bare_sam")
    assert np.mean(out["sam/classes"][0] == labels48) >= 0.99


def test_config_models_and_build_steps(tmp_path: Path) -> None:
    write_library(library(), tmp_path / "lib.csv")
    (tmp_path / "pts.csv").write_text("x,y,label\n400005,4999995,alpha\n")
    ctx = {"grid": default_grid(16, 16), "base_dir": tmp_path}
    [s] = build_steps(SamConfig(references={"library": "lib.csv", "materials": ["beta", "alpha"]},
                                class_thresholds={"alpha": 0.2}), ctx)
    assert s.name == "sam" and s.params.names == ("beta", "alpha") and s.inputs == {"x": "mosaic/reflectance"}
    assert s.params.settings.class_thresholds == {"alpha": 0.2} and s.params.settings.threshold == 0.1
    [s] = build_steps(SffConfig(name="sff_clay", references={"library": str(tmp_path / "lib.csv")},
                                range=(2100, 2400), max_rmse=0.02), ctx)
    assert s.params.settings.range == (2100.0, 2400.0) and s.params.settings.max_rmse == 0.02
    with pytest.raises(ClassifyError, match=r"fewer samples than the 5 cross-validation folds"):
        build_steps(SvmConfig(reference={"path": "pts.csv", "crs": "EPSG:32633"}), ctx)
    from swathmill.workflows.inputs.reference import GroundReferenceError
    with pytest.raises(GroundReferenceError, match=r"label\(s\) \['alpha'\] are not in the class list \['beta'\]"):
        build_steps(SvmConfig(reference={"path": "pts.csv", "crs": "EPSG:32633", "classes": ["beta"]}), ctx)
    with pytest.raises(ValueError, match="exactly one of 'library' or 'samples'"):
        SamConfig(references={})
    with pytest.raises(ValueError, match="extra"):
        SffConfig(references={"library": "x"}, range=(1, 2), treshold=1)
    with pytest.raises(ValueError, match="low < high"):
        SffConfig(references={"library": "x"}, range=(2, 1))


# --------------------------------------------------------------------------------------------------
# real data: Jasper Ridge


def jasper(shared: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str], np.ndarray]:
    """Cube (198, 100, 100) as reflectance, reference endmembers (198, 4), labels, names, wavelengths."""
    d = loadmat(shared / "jasper_ridge" / "JasperRidge2_R198.mat")
    e = loadmat(shared / "jasper_ridge" / "JasperRidge2_end4.mat")
    cube = (d["Y"].astype(np.float64) / 5000.0).reshape(198, 100, 100, order="F")  # data README
    A = e["A"].reshape(4, 100, 100, order="F")
    names = [str(c[0][0]).split("-", 1)[1] for c in e["cood"]]
    labels = np.where(A.max(axis=0) >= 0.9, A.argmax(axis=0) + 1, 0)  # near-pure pixels (data README)
    # band centres: the mineral library's wavelengths of the same sensor family stand in (from memory,
    # as the data README says); only the library resampling needs them, and it is exact on equal centres
    wl = loadmat(shared / "mineral_library" / "usgs_minerals_aviris224.mat")["waveLength"].ravel() * 1000.0
    wl = wl[d["SlectBands"].ravel().astype(int) - 1]
    return cube, e["M"], labels, names, wl


@pytest.mark.slow
def test_jasper_ridge_sam_and_svm(shared_data: Path, tmp_path: Path) -> None:
    cube, M, labels, names, wl = jasper(shared_data)
    spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(198)), dtype="float32", nodata=float("nan"),
                      coords={"wavelength": tuple(wl), "fwhm": (float("nan"),) * 198})
    lib = read_library(write_library(SpectralLibrary(tuple(names), wl, M.T), tmp_path / "jasper_end.csv",
                                     precision=0))
    # spatial blocks of 20 x 20 pixels; validation on a checkerboard of blocks, training on the rest
    r, c = np.mgrid[:100, :100]
    block = (r // 20) * 5 + c // 20
    val = ((r // 20 + c // 20) % 2) == 1
    lab = labels > 0
    table = SampleTable(row=r[lab].astype(np.int64), col=c[lab].astype(np.int64), label=labels[lab].astype(np.int32),
                        group=block[lab].astype(np.int64), feature=block[lab].astype(np.int64),
                        split=np.where(val[lab], 2, 1).astype(np.uint8), class_names=tuple(names))
    steps = [sam_step("sam", "src/cube", library=lib, threshold=None),
             svm_step("svm", "src/cube", samples=table, C=[10.0, 100.0], gamma=[1e-3, 1e-2], folds=3,
                      max_per_class=400)]
    n_train = int(np.sum(SampleTable.from_static(steps[1].static).split == 1))  # after the cap per class
    out, _ = run_on_arrays(steps, {"cube": (cube.astype(np.float32), spec)}, tmp_path, tile=50, raw=True)
    sam = out["sam/classes"][0]
    svm = out["svm/classes"][0]
    oa_sam = float(np.mean(sam[lab] == labels[lab]))
    vmask = lab & val
    oa_svm = float(np.mean(svm[vmask] == labels[vmask]))
    per_class = {n: int(np.sum(labels == k + 1)) for k, n in enumerate(names)}
    print(f"Jasper Ridge near-pure pixels {per_class}: SAM with reference endmembers overall accuracy "
          f"{oa_sam:.4f} on {int(lab.sum())} px; SVM trained on {n_train} px of training blocks, "
          f"overall accuracy {oa_svm:.4f} on {int(vmask.sum())} px of validation blocks")
    # Floors. The labels are pixels with a reference abundance >= 0.9, and those abundances were
    # estimated with these very endmembers, so a nearest-angle rule should rarely disagree; the four
    # materials (tree, water, dirt, road) are spectrally far apart. 0.95 allows ~200 disagreements
    # (mixed-edge pixels, the small road class) while still failing on any systematic error such as a
    # band-order or pixel-order mistake (which drops accuracy towards chance, ~0.25-0.5).
    assert oa_sam >= 0.95
    # The SVM is validated on blocks it never saw, and blocks differ (the road is in few of them),
    # so it gets the same floor rather than a tighter one.
    assert oa_svm >= 0.95


def test_settings_are_declared_once_and_are_the_step_parameters(tmp_path: Path) -> None:
    lib = library()
    by_keywords = sam_step("sam", "src/cube", library=lib, threshold=0.2, exclude=[[1340, 1450]])
    by_object = sam_step("sam", "src/cube", library=lib, settings=SamSettings(threshold=0.2, exclude=[(1340, 1450)]))
    assert isinstance(by_keywords.params, ClassifierParams)
    assert by_keywords.describe() == by_object.describe()  # the same step key either way
    assert by_keywords.params.class_names == tuple(NAMES) and by_keywords.params.ref_class == (1, 2, 3, 4)
    # defaults come from the settings' fields only
    assert sam_step("sam", "src/cube", library=lib).params.settings == SamSettings()
    assert sff_step("sff", "src/cube", library=lib, wl_range=(2100, 2400)).params.settings == SffSettings(range=(2100, 2400))
    table = patch_samples()
    assert svm_step("svm", "src/cube", samples=table, folds=3).params.settings == SvmSettings(folds=3)
    # a section builds the step with its settings fields (name, input and references are not parameters)
    write_library(lib, tmp_path / "lib.csv")
    [s] = build_steps(SamConfig(name="sam2", references={"library": "lib.csv"}, threshold=0.2,
                                exclude=[(1340, 1450)]), {"base_dir": tmp_path})
    assert type(s.params.settings) is SamSettings and s.params.settings == by_keywords.params.settings
    # a changed setting changes the step's identity (its key)
    assert sam_step("sam", "src/cube", library=lib, threshold=0.21, exclude=[[1340, 1450]]).describe() != \
        by_keywords.describe()
    # bad settings name the step and the key
    with pytest.raises(ClassifyError, match=r"step 'sam': bad setting\(s\): threshold: .*greater than 0"):
        sam_step("sam", "src/cube", library=lib, threshold=-0.1)
    with pytest.raises(ClassifyError, match=r"step 'sff': bad setting\(s\): treshold: Extra inputs"):
        sff_step("sff", "src/cube", library=lib, wl_range=(2100, 2400), treshold=1)
    with pytest.raises(ClassifyError, match=r"step 'svm': bad setting\(s\): C: .*at least 1 item"):
        svm_step("svm", "src/cube", samples=table, C=[])
    with pytest.raises(ClassifyError, match="not both"):
        sam_step("sam", "src/cube", library=lib, settings=SamSettings(), threshold=0.2)
