"""The dimensionality curve of the spectral angle on components, components: auto, and its errors."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from swathmill.tiles.step import OutputSpec
from swathmill.tiles.testing import run_on_arrays
from swathmill.workflows.inputs.reference import SampleTable
from swathmill.workflows.methods.classify import ClassifyError, SamConfig, SamSettings, sam_step
from swathmill.workflows.roles import Role

K0 = 3  # informative components of the synthetic scene


def _component_scene(seed: int = 2, rows: int = 24, cols: int = 24, n_per: int = 10, n_noise: int = 9):
    """A components-like cube: three classes separable by direction in the first K0 components (class
    j points along component j), then components of pure noise with a larger spread than the
    informative ones, which tilt every pixel's direction away from its class. 30 training samples,
    10 spatial groups (each holds one sample of every class)."""
    rng = np.random.default_rng(seed)
    k = K0
    centres = 4.0 * np.eye(k)
    nb = k + n_noise

    def draw(labels: np.ndarray) -> np.ndarray:
        inf = centres[labels - 1] + rng.normal(0, 1.0, size=(labels.size, k))
        return np.column_stack([inf, rng.normal(0, 2.5, size=(labels.size, n_noise))])

    labels = (np.arange(cols)[None, :] * k // cols + 1) * np.ones((rows, 1), int)
    cube = draw(labels.ravel()).T.reshape(nb, rows, cols).astype(np.float32)
    rr = np.tile(np.arange(1, 2 * n_per, 2), k)
    cc = np.repeat([cols // (2 * k) + j * cols // k for j in range(k)], n_per)
    y = np.repeat(np.arange(1, k + 1), n_per)
    spec = OutputSpec(bands=tuple(f"mnf_{i + 1}" for i in range(nb)), dtype="float32", nodata=float("nan"),
                      role=Role.COMPONENTS, attrs={"long_name": "MNF components"})
    table = SampleTable(row=rr, col=cc, label=y.astype(np.int32), group=np.tile(np.arange(n_per), k),
                        feature=np.arange(rr.size), split=np.zeros(rr.size, np.uint8), class_names=("a", "b", "c"))
    return cube, spec, table


def _angles(X: np.ndarray, R: np.ndarray) -> np.ndarray:
    # the spectral angle arccos(x.r / (|x| |r|)) (Kruse et al., 1993), in plain numpy
    cos = (X @ R.T) / (np.linalg.norm(X, axis=1)[:, None] * np.linalg.norm(R, axis=1)[None, :])
    return np.arccos(np.clip(cos, -1.0, 1.0))


def _by_hand(X: np.ndarray, y: np.ndarray, g: np.ndarray, folds: int) -> tuple[np.ndarray, np.ndarray]:
    """Blocked CV of the nearest class-mean angle, by hand: scikit-learn's GroupKFold for the folds,
    numpy for the class means, the angles and the accuracy."""
    from sklearn.model_selection import GroupKFold

    acc = np.empty((X.shape[1], folds))
    for f, (tr, te) in enumerate(GroupKFold(folds).split(X, y, g)):
        for k in range(1, X.shape[1] + 1):
            classes = np.unique(y[tr])
            R = np.array([X[tr][y[tr] == c, :k].mean(axis=0) for c in classes])
            pred = classes[np.argmin(_angles(X[te, :k], R), axis=1)]
            acc[k - 1, f] = np.mean(pred == y[te])
    return acc.mean(axis=1), acc.std(axis=1, ddof=1)


def _model(run_dir: Path, name: str) -> dict:
    from swathmill.tiles.tasks import load_model

    return load_model(next((run_dir / "models").glob(f"{name}-*.json")).with_suffix(""))


def test_sam_curve_peaks_at_known_count_and_auto_takes_one_se(tmp_path) -> None:
    from swathmill.workflows.app.report import model_choice_html

    cube, spec, table = _component_scene()
    folds = 5
    step = sam_step("sam", "src/comp", samples=table, threshold=None, components="auto", curve_max=12, folds=folds)
    out, _ = run_on_arrays([step], {"comp": (cube, spec)}, tmp_path, tile=8, raw=True)
    model = _model(tmp_path / "run", "sam")
    curve = model["curves"][0]
    assert curve["features"] == "MNF components" and curve["ref"] == "src/comp"
    assert curve["counts"] == list(range(1, 13))
    X = cube[:, table.row, table.col].T.astype(np.float64)
    mean, std = _by_hand(X, table.label, table.group, folds)
    np.testing.assert_allclose(curve["mean"], mean, atol=1e-12)
    np.testing.assert_allclose(curve["std"], std, atol=1e-12)
    # built to peak at the K0 informative components: each noise component with 30 samples tilts the
    # angle further (Hughes phenomenon, Hughes 1968, from memory)
    assert curve["peak"] == K0
    assert mean[K0 - 1] > mean[-1] + 0.2
    # one standard error rule (Breiman et al. 1984, from memory): smallest count within std/sqrt(folds)
    p = int(np.argmax(mean))
    one_se = int(np.flatnonzero(mean >= mean[p] - std[p] / np.sqrt(folds))[0]) + 1
    assert curve["one_se"] == one_se
    assert model["components"] == {"asked": "auto", "used": one_se, "features": "MNF components",
                                   "rule": "smallest count within one standard error of the peak of the curve"}
    assert model["feature_index"] == list(range(one_se))
    assert model["features_used"] == [f"mnf_{i + 1}" for i in range(one_se)]
    # the class map: nearest angle to the class means of all training samples on the first one_se components
    R = np.array([X[table.label == c, :one_se].mean(axis=0) for c in (1, 2, 3)])
    np.testing.assert_allclose(model["references"], R, rtol=1e-12)
    pix = cube[:one_se].reshape(one_se, -1).T.astype(np.float64)
    expected = (np.argmin(_angles(pix, R), axis=1) + 1).reshape(cube.shape[1:])
    np.testing.assert_array_equal(out["sam/classes"][0], expected)
    # the report plots it like the SVM's: the curve, its peak and one-SE count, the count taken
    html = model_choice_html({"sam": model})
    assert 'alt="dimensionality curve of sam"' in html
    assert f"<td>sam</td><td>MNF components</td><td>src/comp</td><td>{folds}</td><td>{K0} (" in html
    assert f"</td><td>{one_se}</td><td>{one_se}</td></tr>" in html


def test_sam_fixed_components_and_compared_inputs(tmp_path) -> None:
    from sklearn.decomposition import PCA
    from sklearn.model_selection import GroupKFold

    cube, spec, table = _component_scene(seed=4, n_noise=5)  # 8 features
    perm = np.array([5, 2, 7, 0, 4, 1, 6, 3])
    names = list(spec.bands)
    sel_spec = OutputSpec(bands=tuple(names[i] for i in perm), dtype="float32", nodata=float("nan"),
                          role=Role.REFLECTANCE, attrs={"selection_order": names})
    refl_spec = OutputSpec(bands=tuple(names), dtype="float32", nodata=float("nan"), role=Role.REFLECTANCE)
    arrays = {"comp": (cube, spec), "sel": (cube[perm], sel_spec), "refl": (cube, refl_spec)}
    # the SAM on the band-selection cube takes its first 2 bands in selection order
    step = sam_step("sam", "src/sel", samples=table, threshold=None, components=2, curve=True, folds=3,
                    curve_compare=["src/comp", "src/refl"], curve_max=6)
    run_on_arrays([step], arrays, tmp_path, tile=8)
    m = _model(tmp_path / "run", "sam")
    own, comp, refl = m["curves"]
    assert [c["features"] for c in m["curves"]] == ["selected bands", "MNF components", "PCA components"]
    # selected bands in selection order are the components in their order: the same curve
    assert own["mean"] == comp["mean"] and own["std"] == comp["std"]
    assert m["features_used"] == ["mnf_1", "mnf_2"] and m["feature_index"] == [3, 5]
    assert m["components"]["asked"] == 2 and m["components"]["rule"] == "as configured"
    np.testing.assert_array_equal(m["band_index"], [3, 5])
    # PCA fitted in each training fold (scikit-learn), then the nearest class-mean angle on 2 components
    X = cube[:, table.row, table.col].T.astype(np.float64)
    y, g = table.label, table.group
    acc = []
    for tr, te in GroupKFold(3).split(X, y, g):
        pca = PCA(n_components=2, svd_solver="full").fit(X[tr])
        Ftr, Fte = pca.transform(X[tr]), pca.transform(X[te])
        R = np.array([Ftr[y[tr] == c].mean(axis=0) for c in (1, 2, 3)])
        acc.append(np.mean(np.argmin(_angles(Fte, R), axis=1) + 1 == y[te]))
    assert refl["mean"][1] == pytest.approx(np.mean(acc), abs=1e-12)


def _fit_only(step, cube, spec) -> None:
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        run_on_arrays([step], {"comp": (cube, spec)}, Path(d), tile=24)


def test_sam_curve_errors() -> None:
    import test_classify as tc

    cube, spec, table = _component_scene()
    with pytest.raises(ClassifyError, match="references: {samples"):
        sam_step("sam", "src/cube", library=tc.library(), curve=True)
    with pytest.raises(ValueError, match="references: {samples"):
        SamConfig(references={"library": "lib.csv"}, components="auto")
    with pytest.raises(ValueError, match="curve_compare"):
        SamSettings(curve_compare=["bands/selected"])
    with pytest.raises(ClassifyError, match="curve_compare names the step's own input"):
        sam_step("sam", "src/comp", samples=table, curve=True, curve_compare=["src/comp"])
    with pytest.raises(ClassifyError, match=r"step 'sam': training class\(es\) with fewer samples than the 11"):
        sam_step("sam", "src/comp", samples=table, components="auto", folds=11)
    one_group = SampleTable(row=table.row, col=table.col, label=table.label, group=np.zeros(len(table), int),
                            feature=table.feature, split=table.split, class_names=table.class_names)
    with pytest.raises(ClassifyError, match=r"step 'sam': 1 spatial group\(s\)"):
        sam_step("sam", "src/comp", samples=one_group, curve=True, folds=2)
    with pytest.raises(ClassifyError, match="components 13 asked, but input 'src/comp' has 12"):
        _fit_only(sam_step("sam", "src/comp", samples=table, components=13), cube, spec)
    # a fixed count with a library needs no samples
    assert sam_step("sam", "src/cube", library=tc.library(), components=3).params.settings.components == 3
