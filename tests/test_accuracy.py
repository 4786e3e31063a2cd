"""Accuracy assessment against scikit-learn and published worked examples."""
from __future__ import annotations

import numpy as np
import pytest
import sklearn.metrics as skm

from swathmill.workflows.methods.accuracy import (
    AccuracyError,
    abundance_metrics,
    area_estimate,
    class_accuracy,
    confusion_matrix,
    count_classes,
    count_classes_in_raster,
    kappa,
    regression_metrics,
    values_at,
)

# Olofsson et al. (2014), Remote Sens. Environ. 148:42-57, Section 5 worked example (as given in
# ../shared/METHODS.md): sample counts (map rows x reference columns) and mapped pixels.
OLOFSSON_SAMPLES = np.array([[66, 0, 5, 4], [0, 55, 8, 12], [1, 0, 153, 11], [2, 1, 9, 313]])
OLOFSSON_MAPPED = np.array([200_000, 150_000, 3_200_000, 6_450_000])

# Lunetta and Lyon (eds.), Remote Sensing and GIS Accuracy Assessment, CRC 2004, Table 9.4
# (as given in ../shared/METHODS.md).
TABLE_9_4 = np.array([
    [19, 1, 0, 0, 0, 0, 0, 0, 0], [3, 35, 0, 1, 0, 0, 0, 0, 0], [0, 0, 17, 3, 19, 0, 1, 0, 2],
    [0, 0, 12, 77, 12, 0, 1, 0, 2], [0, 0, 8, 13, 74, 0, 0, 0, 0], [0, 0, 0, 1, 1, 19, 2, 0, 0],
    [0, 0, 1, 4, 3, 2, 9, 1, 0], [0, 0, 0, 5, 3, 0, 0, 13, 0], [0, 0, 3, 10, 7, 0, 0, 0, 0],
])


def _random_labels(rng: np.random.Generator, n: int = 500, k: int = 5):
    ref = rng.integers(1, k + 1, n)
    mapped = np.where(rng.random(n) < 0.7, ref, rng.integers(1, k + 1, n))
    return mapped, ref


def test_confusion_matrix_is_sklearn_transposed(rng):
    mapped, ref = _random_labels(rng)
    labels = [1, 2, 3, 4, 5, 6]  # class 6 absent: keeps an empty row and column
    ours = confusion_matrix(mapped, ref, labels)
    # sklearn.metrics.confusion_matrix: rows are the reference (y_true); ours are map rows.
    expected = skm.confusion_matrix(ref, mapped, labels=labels).T
    np.testing.assert_array_equal(ours, expected)
    assert ours[5].sum() == 0 and ours[:, 5].sum() == 0


def test_confusion_matrix_label_order_and_excluded_values(rng):
    mapped, ref = _random_labels(rng)
    mapped[:20] = 0  # unclassified, not in labels: left out
    labels = [3, 1, 5, 2, 4]
    keep = mapped != 0
    expected = skm.confusion_matrix(ref[keep], mapped[keep], labels=labels).T  # sklearn.metrics
    np.testing.assert_array_equal(confusion_matrix(mapped, ref, labels), expected)


def test_accuracies_and_kappa_match_sklearn(rng):
    mapped, ref = _random_labels(rng)
    labels = [1, 2, 3, 4, 5]
    acc = class_accuracy(confusion_matrix(mapped, ref, labels), labels)
    # sklearn.metrics: accuracy_score, precision (= user's, per predicted/map class),
    # recall (= producer's, per reference class), f1_score, cohen_kappa_score.
    assert acc.overall == pytest.approx(skm.accuracy_score(ref, mapped), rel=1e-12)
    np.testing.assert_allclose(acc.users, skm.precision_score(ref, mapped, labels=labels, average=None), rtol=1e-12)
    np.testing.assert_allclose(acc.producers, skm.recall_score(ref, mapped, labels=labels, average=None), rtol=1e-12)
    np.testing.assert_allclose(acc.f1, skm.f1_score(ref, mapped, labels=labels, average=None), rtol=1e-12)
    assert acc.kappa == pytest.approx(skm.cohen_kappa_score(ref, mapped), rel=1e-12)


def test_kappa_textbook_example():
    # Lunetta and Lyon (2004), Table 9.4: published overall 68%, kappa 0.61, SE 0.029;
    # recomputed values 0.684896, 0.611544, 0.029262 from ../shared/METHODS.md [R].
    acc = class_accuracy(TABLE_9_4)
    assert acc.n == 384
    assert acc.overall == pytest.approx(0.684896, abs=1e-6)
    assert acc.kappa == pytest.approx(0.611544, abs=1e-6)
    assert acc.kappa_se == pytest.approx(0.029262, abs=1e-6)
    assert round(acc.overall, 2) == 0.68 and round(acc.kappa, 2) == 0.61 and round(acc.kappa_se, 3) == 0.029


def test_kappa_from_samples_matches_matrix():
    # expand Table 9.4 back into samples; sklearn.metrics.cohen_kappa_score as the oracle
    i, j = np.nonzero(TABLE_9_4)
    reps = TABLE_9_4[i, j]
    mapped, ref = np.repeat(i + 1, reps), np.repeat(j + 1, reps)
    assert kappa(TABLE_9_4)[0] == pytest.approx(skm.cohen_kappa_score(ref, mapped), rel=1e-12)


def test_olofsson_worked_example():
    est = area_estimate(OLOFSSON_SAMPLES, OLOFSSON_MAPPED, pixel_area=0.09, area_unit="ha",
                        names=["deforestation", "forest gain", "stable forest", "stable non-forest"])
    # Olofsson et al. (2014), Section 5: areas 21,158 +- 6,158 ha, 11,686 +- 3,756,
    # 285,770 +- 15,510, 581,386 +- 16,282 (published, rounded to the hectare).
    np.testing.assert_allclose(est.area, [21158, 11686, 285770, 581386], atol=0.5)
    np.testing.assert_allclose(est.area_ci, [6158, 3756, 15510, 16282], atol=0.5)
    # user's 0.88 +- 0.07, 0.73 +- 0.10, 0.93 +- 0.04, 0.96 +- 0.02 (published, two decimals)
    np.testing.assert_allclose(est.users, [0.88, 0.73, 0.93, 0.96], atol=0.005)
    np.testing.assert_allclose(est.users_ci, [0.07, 0.10, 0.04, 0.02], atol=0.005)
    # overall 0.95 +- 0.02 published; recomputed 0.9465 +- 0.0185 ([R] in ../shared/METHODS.md)
    assert est.overall == pytest.approx(0.9465, abs=5e-5)
    assert est.overall_ci == pytest.approx(0.0185, abs=5e-5)
    # Producer's accuracy: the paper's eq. 7 gives 0.7487 +- 0.2133, 0.8472 +- 0.2544,
    # 0.9345 +- 0.0343, 0.9616 +- 0.0184 ([R] in ../shared/METHODS.md). The paper prints +-0.23 for
    # forest gain and +-0.01 for stable non-forest, which do not follow from its own formula (rounding
    # in the paper is suspected), so the test checks the values the formula gives.
    np.testing.assert_allclose(est.producers, [0.7487, 0.8472, 0.9345, 0.9616], atol=5e-5)
    np.testing.assert_allclose(est.producers_ci, [0.2133, 0.2544, 0.0343, 0.0184], atol=5e-5)
    # the published rounded producer's accuracies (0.75, 0.85, 0.93, 0.96) and the CIs that do agree
    np.testing.assert_allclose(est.producers, [0.75, 0.85, 0.93, 0.96], atol=0.005)
    np.testing.assert_allclose(est.producers_ci[[0, 2]], [0.21, 0.03], atol=0.005)
    # the estimated areas sum to the mapped total (an identity of the estimator)
    assert est.area.sum() == pytest.approx(est.mapped_area.sum(), rel=1e-12)


def test_olofsson_rejects_undersampled_class():
    m = OLOFSSON_SAMPLES.copy()
    m[1] = [0, 1, 0, 0]
    with pytest.raises(AccuracyError, match="forest gain"):
        area_estimate(m, OLOFSSON_MAPPED, names=["a", "forest gain", "c", "d"])


def test_olofsson_equal_weights_reduces_to_sample_accuracy(rng):
    # With mapped areas proportional to the row totals the stratified estimate of overall and
    # producer's accuracy equals the plain sample estimate (common practice: proportional allocation).
    mapped, ref = _random_labels(rng, n=800)
    m = confusion_matrix(mapped, ref, [1, 2, 3, 4, 5])
    est = area_estimate(m, m.sum(1) * 1000)
    acc = class_accuracy(m)
    assert est.overall == pytest.approx(acc.overall, rel=1e-12)
    np.testing.assert_allclose(est.producers, acc.producers, rtol=1e-12)


def test_regression_metrics_match_sklearn(rng):
    obs = rng.normal(10, 3, 200)
    pred = obs + rng.normal(0.4, 1.0, 200)
    met = regression_metrics(obs, pred)
    # sklearn.metrics.mean_squared_error / r2_score
    assert met.rmse == pytest.approx(np.sqrt(skm.mean_squared_error(obs, pred)), rel=1e-12)
    assert met.r2 == pytest.approx(skm.r2_score(obs, pred), rel=1e-12)
    assert met.bias == pytest.approx(np.mean(pred - obs), rel=1e-12)
    assert met.n == 200
    pred[:5] = np.nan
    assert regression_metrics(obs, pred).n == 195


def test_abundance_metrics_match_sklearn(rng):
    ref = rng.dirichlet([1, 1, 1], 300).T
    est = np.clip(ref + rng.normal(0, 0.05, ref.shape), 0, 1)
    mets = abundance_metrics(ref, est, ["tree", "water", "soil"])
    # sklearn.metrics with multioutput="raw_values": one figure per endmember (columns)
    rmse = np.sqrt(skm.mean_squared_error(ref.T, est.T, multioutput="raw_values"))
    r2 = skm.r2_score(ref.T, est.T, multioutput="raw_values")
    np.testing.assert_allclose([m.rmse for m in mets[:3]], rmse, rtol=1e-12)
    np.testing.assert_allclose([m.r2 for m in mets[:3]], r2, rtol=1e-12)
    assert mets[3].name == "all" and mets[3].n == 900
    assert mets[3].rmse == pytest.approx(np.sqrt(skm.mean_squared_error(ref.ravel(), est.ravel())), rel=1e-12)


def test_count_classes_window_by_window(rng):
    cmap = rng.integers(0, 5, (3, 301, 517)).astype(np.uint8)
    cmap[1, :10, :10] = 255
    counts = count_classes(cmap, 4, band=1, window=64, nodata=255)
    expected = np.bincount(cmap[1][cmap[1] != 255], minlength=5)  # numpy on the whole array
    np.testing.assert_array_equal(counts, expected)
    with pytest.raises(AccuracyError, match="class value 255"):
        count_classes(cmap, 4, band=1, window=64)


def test_count_classes_zarr_and_raster(tmp_path, rng):
    import rasterio
    import zarr
    from affine import Affine

    cmap = rng.integers(0, 4, (200, 300)).astype(np.uint8)
    z = zarr.create_array(tmp_path / "c.zarr", shape=(1, 200, 300), chunks=(1, 64, 64), dtype="uint8")
    z[0] = cmap
    expected = np.bincount(cmap.ravel(), minlength=4)
    np.testing.assert_array_equal(count_classes(z, 3, window=64), expected)
    path = tmp_path / "c.tif"
    with rasterio.open(path, "w", driver="GTiff", width=300, height=200, count=1, dtype="uint8",
                       tiled=True, blockxsize=64, blockysize=64, nodata=3,
                       transform=Affine(30, 0, 0, 0, -30, 0), crs="EPSG:32611") as ds:
        ds.write(cmap, 1)
    got = count_classes_in_raster(path, 3)
    np.testing.assert_array_equal(got[:3], expected[:3])
    assert got[3] == 0  # the nodata value is not counted


def test_class_counts_fit_counts_each_pixel_once(rng):
    from functools import reduce

    from swathmill.tiles.grid import Tiling
    from swathmill.tiles.step import Block
    from swathmill.tiles.testing import default_grid
    from swathmill.workflows.methods.accuracy import class_counts_fit

    cmap = rng.integers(0, 6, (1, 70, 45)).astype(np.float32)
    valid = rng.random((70, 45)) > 0.1
    fit = class_counts_fit("classes", 5)
    grid = default_grid(70, 45)
    accs = []
    for t in Tiling(grid, 16, halo=3):  # a halo: the padded windows overlap, the cores do not
        sl = t.padded.slices
        accs.append(fit.accumulate(Block(data={"classes": cmap[:, sl[0], sl[1]]}, valid=valid[sl], tile=t,
                                         grid=grid.window(t.padded), params={}, static={}, meta={})))
    counts = fit.finalize(reduce(fit.merge, accs), {}, {})["counts"]
    np.testing.assert_array_equal(counts, np.bincount(cmap[0][valid].astype(int), minlength=6))  # numpy


def test_values_at(rng):
    arr = rng.random((2, 130, 70))
    rows, cols = rng.integers(0, 130, 50), rng.integers(0, 70, 50)
    np.testing.assert_array_equal(values_at(arr, rows, cols, band=1, window=32), arr[1, rows, cols])
    with pytest.raises(AccuracyError, match="row 130"):
        values_at(arr, [130], [0])
