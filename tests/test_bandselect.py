"""Band selection: JM distance, floating selection, linear-prediction selection, the curve, the step."""
from __future__ import annotations

import functools
import itertools
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import integrate
from scipy.stats import multivariate_normal, norm

from swathmill.tiles.step import OutputSpec
from swathmill.tiles.testing import run_on_arrays
from swathmill.workflows.inputs.reference import SampleTable
from swathmill.workflows.methods.bandselect import (
    BandSelectionConfig,
    BandSelectionError,
    average_jm,
    band_selection_step,
    bhattacharyya_distance,
    candidate_bands,
    class_statistics,
    feature_count_curve,
    forward_selection,
    jeffries_matusita,
    linear_prediction_selection,
    sffs,
)
from swathmill.workflows.roles import Role
from swathmill.workflows.spectral.continuum import continuum_removed

MINERALS = Path(__file__).resolve().parents[2] / "shared" / "data" / "mineral_library" / "usgs_minerals_aviris224.mat"


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(15)


# JM distance ------------------------------------------------------------------------------------
def test_jm_1d_against_numerical_bhattacharyya_coefficient() -> None:
    # Bhattacharyya coefficient BC = integral of sqrt(p q), B = -ln BC (Bhattacharyya, 1943), by scipy quad
    for m1, s1, m2, s2 in [(0.0, 1.0, 1.0, 1.0), (0.2, 0.5, 1.5, 2.0), (-1.0, 0.3, 0.4, 0.7)]:
        bc, _ = integrate.quad(lambda x: np.sqrt(norm.pdf(x, m1, s1) * norm.pdf(x, m2, s2)), -30, 30,
                               epsabs=1e-12, points=[m1, m2])
        b = float(bhattacharyya_distance(np.array([m1]), np.array([[s1 ** 2]]), np.array([m2]), np.array([[s2 ** 2]])))
        assert b == pytest.approx(-np.log(bc), rel=1e-7)
        jm = float(jeffries_matusita(np.array([m1]), np.array([[s1 ** 2]]), np.array([m2]), np.array([[s2 ** 2]])))
        assert jm == pytest.approx(2 * (1 - bc), rel=1e-7)


def test_jm_2d_against_numerical_bhattacharyya_coefficient() -> None:
    # the same in two dimensions with correlated covariances, by scipy dblquad
    m1, m2 = np.array([0.0, 0.0]), np.array([1.0, -0.5])
    S1 = np.array([[1.0, 0.3], [0.3, 0.5]])
    S2 = np.array([[0.6, -0.2], [-0.2, 0.9]])
    p, q = multivariate_normal(m1, S1), multivariate_normal(m2, S2)
    bc, _ = integrate.dblquad(lambda y, x: np.sqrt(p.pdf([x, y]) * q.pdf([x, y])), -8, 9, -8, 8, epsabs=1e-10)
    assert float(bhattacharyya_distance(m1, S1, m2, S2)) == pytest.approx(-np.log(bc), rel=1e-6)
    assert float(jeffries_matusita(m1, S1, m2, S2)) == pytest.approx(2 * (1 - bc), rel=1e-6)


def test_jm_limits() -> None:
    # JM is 0 for identical classes and tends to 2 for well separated ones (Richards and Jia, from memory)
    S = np.array([[1.0, 0.2], [0.2, 2.0]])
    m = np.array([0.3, -1.0])
    assert float(jeffries_matusita(m, S, m, S)) == pytest.approx(0.0, abs=1e-12)
    far = float(jeffries_matusita(m, S, m + 40.0, S))
    assert 2.0 - 1e-12 < far + 1e-15 and far <= 2.0
    # monotone in the separation of the means (common practice)
    vals = [float(jeffries_matusita(m, S, m + d, S)) for d in (0.1, 0.5, 1.0, 3.0)]
    assert np.all(np.diff(vals) > 0)


def test_class_statistics_shrinkage_matches_sklearn(rng) -> None:
    from sklearn.covariance import ledoit_wolf

    X = rng.normal(size=(12, 20))  # fewer samples than bands: the raw covariance is singular
    y = np.r_[np.ones(6), 2 * np.ones(6)].astype(int)
    st = class_statistics(X, y)
    for k, c in enumerate((1, 2)):
        cov, _a = ledoit_wolf(X[y == c])  # sklearn's Ledoit-Wolf estimate is the same shrunk matrix
        np.testing.assert_allclose(st["covs"][k], cov, rtol=1e-10, atol=1e-12)
        assert np.linalg.eigvalsh(st["covs"][k]).min() > 0
    with pytest.raises(BandSelectionError, match="singular"):
        class_statistics(X, y, shrinkage=0.0)


# floating selection -----------------------------------------------------------------------------
def _exhaustive(crit, cand, n):
    subsets = np.array(list(itertools.combinations(cand, n)), dtype=np.intp)
    vals = crit(subsets)
    return float(vals.max())


def test_sffs_beats_forward_where_greedy_fails() -> None:
    # a set function built so that forward selection is trapped by a strong single band (band 0) while
    # the best triple {1, 2, 3} works only together
    w = np.array([1.0, 0.3, 0.3, 0.3, 0.1, 0.05])

    def crit(subsets):
        subsets = np.atleast_2d(subsets)
        bonus = np.array([2.0 if {1, 2, 3} <= set(s.tolist()) else 0.0 for s in subsets])
        return w[subsets].sum(axis=1) + bonus

    fwd = forward_selection(crit, range(6), 3)
    res = sffs(crit, range(6), 3)
    assert fwd["values"][-1] == pytest.approx(1.6)
    assert sorted(res["order"]) == [1, 2, 3]
    assert res["values"][-1] == pytest.approx(_exhaustive(crit, range(6), 3))


def _jm_problem(seed: int, p: int = 9, k: int = 3):
    rng = np.random.default_rng(seed)
    X = np.vstack([rng.normal(rng.normal(0, 0.6, p), rng.uniform(0.5, 1.5, p), size=(40, p)) @
                   (np.eye(p) + 0.4 * rng.normal(size=(p, p))) for _ in range(k)])
    y = np.repeat(np.arange(1, k + 1), 40)
    return functools.partial(average_jm, class_statistics(X, y)), p


@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5])
def test_sffs_reaches_exhaustive_optimum_on_jm_problems(seed) -> None:
    # small random Gaussian class problems; exhaustive search over all subsets is the reference. The
    # floating search is a heuristic: on seed 0 at 4 bands it stays at forward selection's 1.036
    # against the optimum 1.077 (measured), so that seed is only in the test below. Seeds 2 and 5
    # are cases where the floating search beats forward selection and reaches the optimum.
    crit, p = _jm_problem(seed)
    for n in (2, 3, 4, 5):
        res = sffs(crit, range(p), n)
        assert res["values"][-1] == pytest.approx(_exhaustive(crit, range(p), n), rel=1e-9)
        assert float(crit(np.sort(res["order"]))) == pytest.approx(res["values"][-1])


@pytest.mark.parametrize("seed", range(8))
def test_sffs_never_worse_than_forward(seed) -> None:
    crit, p = _jm_problem(seed)
    for n in range(1, 7):
        res = sffs(crit, range(p), n)
        fwd = forward_selection(crit, range(p), n)
        assert res["values"][-1] >= fwd["values"][-1] - 1e-12
        assert np.all(np.diff(res["values"]) >= -1e-12)  # best value per size never decreases (JM grows with bands)


def test_sffs_errors() -> None:
    with pytest.raises(BandSelectionError, match="3 bands asked from 2"):
        sffs(lambda s: np.zeros(len(s)), [0, 1], 3)


# unsupervised -----------------------------------------------------------------------------------
def test_linear_prediction_picks_the_independent_bands(rng) -> None:
    # five bands built from three independent sources: two bands are linear combinations of the
    # others, so after three picks every remaining band is predicted exactly (residual ~0)
    S = rng.normal(size=(500, 3)) * np.array([3.0, 2.0, 1.0])
    X = np.column_stack([S[:, 0], S[:, 0] + 0.5 * S[:, 1], S[:, 1], S[:, 2], S[:, 0] - S[:, 2]]) + 5.0
    res = linear_prediction_selection(X, 4)
    assert len(set(res["order"])) == 4
    assert res["values"][2] > 0.5
    assert res["values"][3] < 1e-8
    # the residual of the third band equals an ordinary least-squares residual (numpy lstsq)
    kept = res["order"][:2]
    A = np.column_stack([np.ones(len(X)), X[:, kept]])
    r = X[:, res["order"][2]] - A @ np.linalg.lstsq(A, X[:, res["order"][2]], rcond=None)[0]
    assert res["values"][2] == pytest.approx(np.sqrt(np.mean(r ** 2)), rel=1e-9)


def test_candidate_bands_respect_windows() -> None:
    wl = np.arange(400.0, 2500.0, 10.0)
    c = candidate_bands(wl, wl.size, [(1340, 1460), (1790, 1960)], [(1000, 2450)], "t")
    w = wl[c]
    assert w.min() >= 1000 and w.max() <= 2450
    assert not np.any((w >= 1340) & (w <= 1460)) and not np.any((w >= 1790) & (w <= 1960))


# the dimensionality curve -----------------------------------------------------------------------
def test_curve_peaks_at_the_informative_count() -> None:
    # 4 informative ranked features then 26 pure-noise ones, few samples: the blocked-CV accuracy of an
    # RBF SVM rises to 4 features and then falls as noise dimensions are added (Hughes phenomenon,
    # Hughes 1968, from memory)
    rng = np.random.default_rng(3)
    n_per, k = 12, 3
    centres = rng.normal(0, 1.6, size=(k, 4))
    X_inf = np.vstack([c + rng.normal(0, 1.0, size=(n_per, 4)) for c in centres])
    X = np.column_stack([X_inf, rng.normal(0, 1.0, size=(n_per * k, 26))])
    y = np.repeat(np.arange(1, k + 1), n_per)
    groups = np.tile(np.arange(n_per), k)  # 12 spatial blocks, each holding one sample of every class
    counts = [1, 2, 3, 4, 6, 10, 20, 30]
    curve = feature_count_curve(X, y, groups, counts, folds=4)
    mean = np.array(curve["mean"])
    assert curve["peak"] in (3, 4)
    assert mean[counts.index(4)] > mean[counts.index(30)] + 0.1
    assert curve["one_se"] <= curve["peak"]
    assert len(curve["std"]) == len(counts) and curve["folds"] == 4


def test_curve_pca_mode_matches_sklearn_by_hand(rng) -> None:
    # PCA fitted inside each training fold: recomputed here with scikit-learn directly
    from sklearn.decomposition import PCA
    from sklearn.model_selection import GroupKFold
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    X = rng.normal(size=(60, 8)) + np.repeat(rng.normal(0, 1, (3, 8)), 20, axis=0)
    y = np.repeat([1, 2, 3], 20)
    g = np.tile(np.arange(10), 6)
    curve = feature_count_curve(X, y, g, [2], mode="pca", folds=5)
    acc = []
    for tr, te in GroupKFold(5).split(X, y, g):
        pca = PCA(2, svd_solver="full").fit(X[tr])
        m = make_pipeline(StandardScaler(), SVC(gamma="scale")).fit(pca.transform(X[tr]), y[tr])
        acc.append(np.mean(m.predict(pca.transform(X[te])) == y[te]))
    assert curve["mean"][0] == pytest.approx(np.mean(acc))


# the step ---------------------------------------------------------------------------------------
def _scene(rng, rows=40, cols=36, bands=14):
    wl = np.linspace(1000, 2400, bands)
    labels = np.where(np.arange(cols)[None, :] < cols // 2, 1, 2) * np.ones((rows, 1), int)
    base = np.where(labels[None] == 1, 0.3, 0.3).astype(float) * np.ones((bands, 1, 1))
    base[5] += np.where(labels == 2, 0.08, 0.0)  # band 5 and 9 separate the classes
    base[9] -= np.where(labels == 2, 0.05, 0.0)
    cube = (base + rng.normal(0, 0.01, (bands, rows, cols))).astype(np.float32)
    spec = OutputSpec(bands=tuple(f"b{i}" for i in range(bands)), dtype="float32", nodata=float("nan"),
                      coords={"wavelength": tuple(float(w) for w in wl)})
    rr, cc = np.meshgrid(np.arange(2, rows, 4), np.arange(1, cols, 3), indexing="ij")
    rr, cc = rr.ravel(), cc.ravel()
    table = SampleTable(row=rr, col=cc, label=labels[rr, cc].astype(np.int32), group=(rr // 8) * 10 + cc // 9,
                        feature=np.arange(rr.size), split=np.zeros(rr.size, np.uint8), class_names=("a", "b"))
    return cube, spec, table, wl


@pytest.mark.parametrize("tile", [8, 16])
def test_step_tiled_equals_whole(tmp_path, rng, tile) -> None:
    cube, spec, table, wl = _scene(rng)
    cfg = BandSelectionConfig(name="bands", input="src/cube", n_bands=3, exclude=[(1700, 1800)],
                              reference={"path": "unused.csv"}, curve=True, folds=3)
    step = band_selection_step(cfg, table)
    whole, _ = run_on_arrays([step], {"cube": (cube, spec)}, tmp_path, tile=64, run_name="whole")
    tiled, _ = run_on_arrays([band_selection_step(cfg, table)], {"cube": (cube, spec)}, tmp_path, tile=tile,
                               run_name="tiled")
    np.testing.assert_array_equal(whole["bands/selected"], tiled["bands/selected"])
    out = tiled["bands/selected"]
    assert out.shape[0] == 3
    # the two separating bands are selected first; the output holds the chosen bands of the input
    from swathmill.tiles.store import open_store

    store = open_store(tmp_path / "tiled" / "stores" / "bands.zarr")
    sp = store.specs["selected"]
    assert sp.role == Role.REFLECTANCE
    assert {"b5", "b9"} <= set(sp.bands)
    for i, name in enumerate(sp.bands):
        np.testing.assert_array_equal(out[i], cube[int(name[1:])])
    assert list(sp.attrs["selection_order"])[:2] in (["b5", "b9"], ["b9", "b5"])
    assert all(not (1700 <= w <= 1800) for w in sp.coords["wavelength"])


def test_unsupervised_step_tiled_equals_whole(tmp_path, rng) -> None:
    cube, spec, _table, _ = _scene(rng)
    cfg = BandSelectionConfig(name="lp", input="src/cube", method="linear_prediction", n_bands=4, exclude=[],
                              sample_pixels=300)
    a, _ = run_on_arrays([band_selection_step(cfg)], {"cube": (cube, spec)}, tmp_path, tile=64, run_name="w")
    b, _ = run_on_arrays([band_selection_step(cfg)], {"cube": (cube, spec)}, tmp_path, tile=8, run_name="t")
    assert a["lp/selected"].shape[0] == 4
    np.testing.assert_array_equal(a["lp/selected"], b["lp/selected"])


def test_config_errors() -> None:
    with pytest.raises(ValueError, match="needs 'reference'"):
        BandSelectionConfig(method="sffs")
    with pytest.raises(ValueError, match="low < high"):
        BandSelectionConfig(method="linear_prediction", exclude=[(2000, 1000)])
    with pytest.raises(ValueError, match="extra"):
        BandSelectionConfig(method="linear_prediction", bogus=1)


# open data --------------------------------------------------------------------------------------
# Diagnostic absorption positions (common practice; Hunt 1977, Clark 1999, from memory, as listed in
# ../shared/data/README.md): alunite 2165-2175 nm, buddingtonite (NH4) ~2120 nm, kaolinite and muscovite
# Al-OH 2200-2210 nm, montmorillonite 2205-2215 nm, nontronite (Fe-OH) 2285-2295 nm.
DIAGNOSTIC = {0: ("alunite", 2165, 2175), 2: ("buddingtonite", 2110, 2130), 4: ("kaolinite", 2200, 2210),
              6: ("muscovite", 2200, 2210), 7: ("montmorillonite", 2205, 2215), 8: ("nontronite", 2285, 2295)}


@pytest.mark.skipif(not MINERALS.is_file(), reason="../shared/data/mineral_library is absent")
@pytest.mark.parametrize("col", sorted(DIAGNOSTIC))
def test_mineral_classes_select_their_diagnostic_band(col) -> None:
    # two classes over 2050-2450 nm: the mineral mixed into its own continuum at 30-70 %, against the
    # continuum alone, both with brightness scaled 0.8-1.2 and 0.003 noise; the classes differ only by
    # the mineral's absorption features, so the first band chosen must sit in the diagnostic region
    from scipy.io import loadmat

    d = loadmat(MINERALS)
    wl = d["waveLength"].ravel() * 1000.0  # micrometres in the file
    sel = (wl >= 2050) & (wl <= 2450)
    w, m = wl[sel], d["M"][sel, col]
    _cr, cont = continuum_removed(w, m)
    rng = np.random.default_rng(col)
    n = 60
    X0 = rng.uniform(0.8, 1.2, (n, 1)) * cont + rng.normal(0, 0.003, (n, w.size))
    f = rng.uniform(0.3, 0.7, (n, 1))
    X1 = rng.uniform(0.8, 1.2, (n, 1)) * ((1 - f) * cont + f * m) + rng.normal(0, 0.003, (n, w.size))
    st = class_statistics(np.vstack([X0, X1]), np.repeat([1, 2], n))
    res = sffs(functools.partial(average_jm, st), range(w.size), 3)
    name, lo, hi = DIAGNOSTIC[col]
    first = w[res["order"][0]]
    assert lo - 10 <= first <= hi + 10, f"{name}: first band {first:.1f} nm outside {lo}-{hi} nm (+-1 band)"


# wiring into a run ------------------------------------------------------------------------------
def test_run_config_runs_a_band_selection(tmp_path, capsys) -> None:
    # a whole run from YAML with an unsupervised selection after the mosaic
    from test_cli import WL, _config

    from swathmill.tiles.store import open_store
    from swathmill.workflows.app.cli import main

    cfg = _config(tmp_path, band_selection={"name": "bands", "method": "linear_prediction", "n_bands": 5,
                                            "sample_pixels": 500})
    assert main(["run", str(cfg), "--plain"]) == 0, capsys.readouterr().out
    store = open_store(tmp_path / "run" / "stores" / "bands.zarr")
    spec = store.specs["selected"]
    assert spec.role == "reflectance" and len(spec.bands) == 5
    w = np.asarray(spec.coords["wavelength"], dtype=float)
    assert set(np.round(w, 3)) <= set(np.round(WL, 3))
    assert not np.any((w >= 1340) & (w <= 1460)) and not np.any((w >= 1790) & (w <= 1960))


# the SVM route: the curve in the SVM model and components: auto ----------------------------------
def _ranked_scene(seed: int = 3, rows: int = 24, cols: int = 24, n_noise: int = 26):
    """A components-like cube whose 36 sample pixels hold the samples of
    :func:`test_curve_peaks_at_the_informative_count` (4 informative ranked features, then noise)."""
    rng = np.random.default_rng(seed)
    n_per, k = 12, 3
    centres = rng.normal(0, 1.6, size=(k, 4))
    X_inf = np.vstack([c + rng.normal(0, 1.0, size=(n_per, 4)) for c in centres])
    X = np.column_stack([X_inf, rng.normal(0, 1.0, size=(n_per * k, n_noise))])
    y = np.repeat(np.arange(1, k + 1), n_per)
    labels = (np.arange(cols)[None, :] * k // cols + 1) * np.ones((rows, 1), int)
    cube = rng.normal(0, 1.0, size=(X.shape[1], rows, cols))
    cube[:4] += np.moveaxis(centres[labels - 1], -1, 0)
    # n_per samples per class on distinct rows of the class's columns; group g holds one of every class
    rr = np.tile(np.arange(1, 2 * n_per, 2), k)
    cc = np.repeat([cols // (2 * k) + j * cols // k for j in range(k)], n_per)
    cube[:, rr, cc] = X.T
    cube = cube.astype(np.float32)
    spec = OutputSpec(bands=tuple(f"mnf_{i + 1}" for i in range(cube.shape[0])), dtype="float32",
                      nodata=float("nan"), role=Role.COMPONENTS, attrs={"long_name": "MNF components"})
    table = SampleTable(row=rr, col=cc, label=y.astype(np.int32), group=np.tile(np.arange(n_per), k),
                        feature=np.arange(rr.size), split=np.zeros(rr.size, np.uint8), class_names=("a", "b", "c"))
    return cube, spec, table


def _svm_model(run_dir: Path, name: str = "svm") -> dict:
    from swathmill.tiles.tasks import load_model

    return load_model(next((run_dir / "models").glob(f"{name}-*.json")).with_suffix(""))


def _by_hand_curve(X: np.ndarray, y: np.ndarray, g: np.ndarray, folds: int, C: float) -> tuple[np.ndarray, np.ndarray]:
    # blocked CV computed directly with scikit-learn (GroupKFold, StandardScaler + RBF SVC, gamma "scale")
    from sklearn.model_selection import GroupKFold
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    acc = np.empty((X.shape[1], folds))
    for f, (tr, te) in enumerate(GroupKFold(folds).split(X, y, g)):
        for k in range(1, X.shape[1] + 1):
            m = make_pipeline(StandardScaler(), SVC(C=C, gamma="scale")).fit(X[tr, :k], y[tr])
            acc[k - 1, f] = np.mean(m.predict(X[te, :k]) == y[te])
    return acc.mean(axis=1), acc.std(axis=1, ddof=1)


def test_svm_curve_peaks_at_known_count_and_auto_takes_one_se(tmp_path) -> None:
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    from swathmill.workflows.methods.classify import svm_step

    cube, spec, table = _ranked_scene()
    folds, C = 4, 100.0
    step = svm_step("svm", "src/comp", samples=table, C=[1.0, 100.0], gamma=["scale"], folds=folds,
                    components="auto", curve_max=30, curve_C=C)
    out, _ = run_on_arrays([step], {"comp": (cube, spec)}, tmp_path, tile=8, raw=True)
    model = _svm_model(tmp_path / "run")
    curve = model["curves"][0]
    assert curve["features"] == "MNF components" and curve["ref"] == "src/comp"
    assert curve["counts"] == list(range(1, 31))
    X = cube[:, table.row, table.col].T.astype(np.float64)
    mean, std = _by_hand_curve(X, table.label, table.group, folds, C)
    np.testing.assert_allclose(curve["mean"], mean, atol=1e-12)
    np.testing.assert_allclose(curve["std"], std, atol=1e-12)
    # built to peak at the 4 informative features: more noise dimensions with 36 samples do worse
    # (Hughes phenomenon, Hughes 1968, from memory)
    assert curve["peak"] in (3, 4)
    assert mean[3] > mean[-1] + 0.1
    # one standard error rule (Breiman et al. 1984, from memory): smallest count within std/sqrt(folds)
    p = int(np.argmax(mean))
    one_se = int(np.flatnonzero(mean >= mean[p] - std[p] / np.sqrt(folds))[0]) + 1
    assert curve["one_se"] == one_se
    assert model["components"]["used"] == one_se and model["components"]["asked"] == "auto"
    assert model["feature_index"] == list(range(one_se)) and model["n_features"] == one_se
    # the class map is the SVM refitted by hand on the first one_se features with the chosen C, gamma
    ref = Pipeline([("s", StandardScaler()), ("svc", SVC(kernel="rbf", C=model["best"]["C"],
                                                         gamma=model["best"]["gamma"]))])
    ref.fit(X[:, :one_se], table.label)
    expected = ref.predict(cube[:one_se].reshape(one_se, -1).T.astype(np.float64)).reshape(cube.shape[1:])
    np.testing.assert_array_equal(out["svm/classes"][0], expected)


def test_svm_fixed_components_and_compared_inputs_tiled_equals_whole(tmp_path) -> None:
    from swathmill.workflows.methods.classify import svm_step

    cube, spec, table = _ranked_scene(seed=5, n_noise=6)  # 10 features
    # the same features as a band-selection cube: stored shuffled, ranked by its selection_order
    perm = np.array([7, 2, 9, 0, 5, 1, 8, 3, 6, 4])
    names = [f"b{i}" for i in range(cube.shape[0])]
    sel_spec = OutputSpec(bands=tuple(names[i] for i in perm), dtype="float32", nodata=float("nan"),
                          role=Role.REFLECTANCE, attrs={"selection_order": names})
    refl_spec = OutputSpec(bands=tuple(names), dtype="float32", nodata=float("nan"), role=Role.REFLECTANCE)
    arrays = {"comp": (cube, spec), "sel": (cube[perm], sel_spec), "refl": (cube, refl_spec)}

    def make() -> Any:
        return svm_step("svm", "src/comp", samples=table, C=[10.0], gamma=["scale"], folds=3, components=2,
                        curve=True, curve_compare=["src/sel", "src/refl"], curve_max=6)

    whole, _ = run_on_arrays([make()], arrays, tmp_path, tile=64, run_name="whole")
    tiled, _ = run_on_arrays([make()], arrays, tmp_path, tile=8, run_name="tiled")
    np.testing.assert_array_equal(whole["svm/classes"], tiled["svm/classes"])
    mw, mt = _svm_model(tmp_path / "whole"), _svm_model(tmp_path / "tiled")
    assert mw["curves"] == mt["curves"]
    own, sel, refl = mt["curves"]
    assert [c["features"] for c in mt["curves"]] == ["MNF components", "selected bands", "PCA components"]
    # selected bands in selection order are the input's features in its order: the same curve
    assert sel["mean"] == own["mean"] and sel["std"] == own["std"]
    # PCA in each training fold, recomputed with scikit-learn for 2 components
    X = cube[:, table.row, table.col].T.astype(np.float64)
    check = feature_count_curve(X, table.label, table.group, [2], mode="pca", folds=3,
                                estimator=lambda: _svc(100.0))  # curve_C default
    assert refl["mean"][1] == pytest.approx(check["mean"][0])
    assert mt["components"] == {"asked": 2, "used": 2, "features": "MNF components", "rule": "as configured"}
    assert mt["feature_index"] == [0, 1]


def _svc(C: float) -> Any:
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    return make_pipeline(StandardScaler(), SVC(C=C, gamma="scale"))


def test_svm_curve_settings_errors() -> None:
    from swathmill.workflows.methods.classify import SvmSettings

    with pytest.raises(ValueError, match="curve_compare"):
        SvmSettings(curve_compare=["bands/selected"])
    with pytest.raises(ValueError, match="components"):
        SvmSettings(components=0)
    assert SvmSettings(components="auto", curve_compare=["bands/selected"]).components == "auto"


def test_report_section_shows_curves_and_calibrations_side_by_side() -> None:
    from swathmill.workflows.app.report import model_choice_html, render_html, ReportSummary

    cube, spec, table = _ranked_scene(n_noise=6)
    X = cube[:, table.row, table.col].T.astype(np.float64)
    curve = feature_count_curve(X, table.label, table.group, list(range(1, 11)), folds=4)
    svm = {"curves": [{**curve, "features": "MNF components", "ref": "mnf/components"}],
           "components": {"asked": "auto", "used": curve["one_se"]}}
    pls = {"method": "pls", "n_components": 3, "cv": {"n": 40, "r2": 0.81, "rmse": 4.2}}
    svr = {"method": "svr", "svr_best": {"C": 10.0, "gamma": "scale", "epsilon": 0.5},
           "cv": {"n": 40, "r2": 0.77, "rmse": 4.9}}
    acc = {"quantity_maps": {"clay/quantity": {"metrics": {"n": 12, "r2": 0.7, "rmse": 5.1}},
                             "clay_svr/quantity": {"metrics": {"n": 12, "r2": 0.68, "rmse": 5.4}}}}
    cals = [{"name": "clay", "quantity": "clay", "units": "%"}, {"name": "clay_svr", "quantity": "clay", "units": "%"}]
    html = model_choice_html({"svm": svm, "clay": pls, "clay_svr": svr, "mosaic": None}, acc, cals)
    # the peak, the one-SE count and the count the step took (its own one-SE count)
    assert f"<td>{curve['peak']} (" in html
    assert f"</td><td>{curve['one_se']}</td><td>{curve['one_se']}</td></tr>" in html
    assert "<td>clay_svr</td><td>clay</td><td>svr</td><td>C 10, gamma scale, epsilon 0.5000</td>" in html
    assert "<td>0.810</td><td>4.2</td><td>12</td><td>0.700</td><td>5.1</td>" in html
    assert "<td>0.770</td><td>4.9</td><td>12</td><td>0.680</td><td>5.4</td>" in html
    assert html.count("<img") == 1
    page = render_html(ReportSummary(model_choice=html))
    assert 'id="model-choice"' in page
    assert model_choice_html({"mosaic": None, "x": {"method": "mnf"}}) is None
