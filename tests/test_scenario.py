"""The invented demo scenario: deterministic, complete, physically sensible, and usable by the pipeline."""
from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
import rasterio
from rasterio.crs import CRS
from scipy.spatial import ConvexHull

from swathmill.workflows.app.scenario import MATERIALS, generate_scenario


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    return generate_scenario(tmp_path_factory.mktemp("scenario"), "small", seed=7)


def _digest(paths) -> str:
    h = hashlib.sha256()
    for p in paths:
        h.update(Path(p).read_bytes())
    return h.hexdigest()


def test_deterministic_from_the_seed(scenario, tmp_path):
    again = generate_scenario(tmp_path / "again", "small", seed=7)
    files = lambda s: [*s.lines, s.wavelength_table, s.library, s.ground_reference, s.truth_abundance,  # noqa: E731
                       s.truth_classes]
    assert _digest(files(scenario)) == _digest(files(again))
    other = generate_scenario(tmp_path / "other", "small", seed=8)
    assert _digest(other.lines) != _digest(scenario.lines)


def test_lines_are_overlapping_projected_int16_with_wavelengths(scenario):
    assert len(scenario.lines) >= 3
    table = np.genfromtxt(scenario.wavelength_table, delimiter=",", names=True)
    valid = []
    for p in scenario.lines:
        with rasterio.open(p) as ds:
            assert CRS.from_user_input(ds.crs).is_projected
            assert ds.dtypes[0] == "int16" and ds.nodata == -9999 and ds.count >= 150
            wl = np.array([float(ds.tags(b)["wavelength"]) for b in range(1, ds.count + 1)])
            fw = np.array([float(ds.tags(b)["fwhm"]) for b in range(1, ds.count + 1)])
            np.testing.assert_allclose(wl, table["wavelength_nm"])
            np.testing.assert_allclose(fw, table["fwhm_nm"])
            assert wl[0] <= 400 + 1e-6 and wl[-1] >= 2500 - 1e-6 and np.all(np.diff(wl) > 0)
            band = ds.read(80)
            ok = band != -9999
            assert 0.5 < ok.mean() < 1.0  # nodata outside the swath, inside the raster
            full = np.zeros((scenario.facts["grid"]["rows"], scenario.facts["grid"]["cols"]), bool)
            c0 = int(round((ds.transform.c - scenario.facts["grid"]["transform"][2]) / ds.transform.a))
            r0 = int(round((scenario.facts["grid"]["transform"][5] - ds.transform.f) / -ds.transform.e))
            full[r0:r0 + ds.height, c0:c0 + ds.width] = ok
            valid.append(full)
    for a, b in zip(valid, valid[1:]):
        assert (a & b).sum() > 0.05 * a.sum()  # neighbouring lines overlap
    assert np.any(valid, axis=0).mean() > 0.95  # and together cover the site


def test_brightness_differs_between_lines_as_stated(scenario):
    """In the overlap of lines 1 and 2 the band means differ by the stated gain and offset."""
    truth = np.load(scenario.truth_npz)
    g, o = truth["gains"], truth["offsets"]
    cubes = []
    for p in scenario.lines[:2]:
        with rasterio.open(p) as ds:
            arr = ds.read().astype(np.float64)
            full = np.full((ds.count, 200, 200), np.nan)
            c0 = int(round((ds.transform.c - scenario.facts["grid"]["transform"][2]) / ds.transform.a))
            full[:, :, c0:c0 + ds.width] = np.where(arr == -9999, np.nan, arr * 1e-4)
            cubes.append(full)
    both = np.all(np.isfinite(cubes[0]), axis=0) & np.all(np.isfinite(cubes[1]), axis=0)
    m1, m2 = cubes[0][:, both].mean(axis=1), cubes[1][:, both].mean(axis=1)
    good = truth["noise_sigma"] < 0.006
    expected = g[1] * m1 + o[1]  # line 1 is the truth (gain 1, offset 0) plus noise
    np.testing.assert_allclose(m2[good], expected[good], rtol=0.01)
    assert abs(g[1].mean() - 1) > 0.02 and np.all(g[0] == 1) and np.all(o[0] == 0)


def _continuum_removed(wl: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Reflectance over its upper convex hull (Clark and Roush 1984), hull from scipy.spatial.ConvexHull."""
    x = (wl - wl[0]) / (wl[-1] - wl[0])
    pts = np.column_stack([np.concatenate([x, [x[0], x[-1]]]), np.concatenate([r, [-10.0, -10.0]])])
    hull = ConvexHull(pts)
    upper = sorted(v for v in hull.vertices if v < len(x))
    return r / np.interp(x, x[upper], r[upper])


def _minimum(wl, r, lo, hi) -> float:
    sel = (wl >= lo) & (wl <= hi)
    cr = _continuum_removed(wl[sel], r[sel])
    return float(wl[sel][np.argmin(cr)])


def test_material_spectra_have_features_where_the_trade_expects_them(scenario):
    t = np.load(scenario.truth_npz)
    wl, spec = t["wavelength"], dict(zip([str(m) for m in t["materials"]], t["spectra"]))
    step = wl[1] - wl[0]
    assert len(spec) >= 6 and wl.size >= 150
    # positions: common practice (Hunt 1977; Clark 1999; from memory), checked within one band
    assert abs(_minimum(wl, spec["pallid_clay"], 2100, 2300) - 2205) <= step      # Al-OH
    assert abs(_minimum(wl, spec["chalk_pan"], 2250, 2450) - 2340) <= step        # carbonate
    assert abs(_minimum(wl, spec["rust_crust"], 750, 1300) - 900) <= 2 * step     # ferric iron (broad)
    assert abs(_minimum(wl, spec["reed_meadow"], 600, 750) - 675) <= 2 * step     # chlorophyll
    assert abs(_minimum(wl, spec["reed_meadow"], 900, 1060) - 975) <= 2 * step    # liquid water
    assert abs(_minimum(wl, spec["reed_meadow"], 1100, 1300) - 1190) <= 2 * step  # liquid water
    # red-edge position by the linear method (Guyot and Baret 1988; METHODS.md), green leaves 700-730 nm
    r670, r700, r740, r780 = np.interp([670, 700, 740, 780], wl, spec["reed_meadow"])
    rep = 700 + 40 * ((r670 + r780) / 2 - r700) / (r740 - r700)
    assert 700 <= rep <= 730
    assert spec["cinder_flow"].mean() < 0.12 and spec["brine_pond"][wl > 900].max() < 0.02
    assert all(np.all((v > 0) & (v < 1)) for v in spec.values())


def test_ground_reference_matches_the_truth(scenario):
    from rasterio.warp import transform as wt

    doc = json.loads(scenario.ground_reference.read_text())
    truth = np.load(scenario.truth_npz)
    names = [str(m) for m in truth["materials"]]
    feats = doc["features"]
    kinds = {f["geometry"]["type"] for f in feats}
    assert kinds == {"Point", "Polygon"}
    labels = [f["properties"]["label"] for f in feats]
    for m in MATERIALS:
        for split in ("train", "validation"):
            assert sum(1 for f in feats if f["properties"]["label"] == m and f["properties"]["split"] == split) >= 5
    fr = np.array([[f["properties"][f"frac_{m}"] for m in names] for f in feats])
    np.testing.assert_allclose(fr.sum(axis=1), 1.0, atol=2e-3)
    clay = np.array([f["properties"]["clay_pct"] for f in feats])
    assert np.corrcoef(clay, fr[:, names.index("pallid_clay")])[0, 1] > 0.9
    # every point lies on a truth pixel whose dominant material is its label
    t = scenario.facts["grid"]["transform"]
    pts = [(f, f["geometry"]["coordinates"]) for f in feats if f["geometry"]["type"] == "Point"]
    xs, ys = wt("EPSG:4326", scenario.facts["crs"], [c[0] for _, c in pts], [c[1] for _, c in pts])
    cols = np.floor((np.array(xs) - t[2]) / t[0]).astype(int)
    rows = np.floor((np.array(ys) - t[5]) / t[4]).astype(int)
    got = [names[truth["classes"][r, c] - 1] for r, c in zip(rows, cols)]
    assert got == [f["properties"]["label"] for f, _ in pts]
    assert len(set(labels)) == len(MATERIALS)


def test_ground_reference_and_library_read_by_the_project_readers(scenario):
    from swathmill.workflows.inputs.library import read_library
    from swathmill.workflows.inputs.reference import read_reference

    ref = read_reference(scenario.ground_reference)
    assert set(ref.labels) == set(MATERIALS)
    assert set(ref.split) == {"train", "validation"}
    assert "clay_pct" in ref.properties and "frac_pallid_clay" in ref.properties
    lib = read_library(scenario.library)
    assert list(lib.names) == list(MATERIALS) and lib.colors is not None
    assert lib.wavelengths.min() <= 400 and lib.wavelengths.max() >= 2500


def test_scenario_mosaic_recovers_the_truth_within_the_noise(scenario, tmp_path):
    """The whole small scenario through the mosaic step: reflectance equals the truth within the noise."""
    from swathmill.tiles.executors import LocalExecutor
    from swathmill.tiles.run import Run, RunOptions
    from swathmill.tiles.testing import read_output
    from swathmill.workflows.methods.mosaic import MosaicConfig, build_mosaic_step

    section = scenario.mosaic_section()
    step = build_mosaic_step(MosaicConfig.model_validate(section), scenario.root)
    with Run(tmp_path / "run", RunOptions(tile=64, export=False)) as run:
        result = run.execute([step], LocalExecutor())
    assert result.ok
    refl = read_output(tmp_path / "run", "mosaic/reflectance")
    src = read_output(tmp_path / "run", "mosaic/source", raw=True)[0]
    t = np.load(scenario.truth_npz)
    keep = np.isin(t["wavelength"], step.resolve_outputs({}, None)["reflectance"].coords["wavelength"])
    true = np.tensordot(t["spectra"][:, keep].T, t["abundance"], axes=(1, 0))
    assert refl.shape == true.shape
    assert set(np.unique(src)) <= {0, 1, 2, 3} and (src > 0).mean() > 0.95
    covered = src > 0
    err = refl[:, covered] - true[:, covered]
    sigma = t["noise_sigma"][keep]
    rms = np.sqrt(np.mean(err ** 2, axis=1))
    bias = np.abs(err.mean(axis=1))
    # RMS error is the noise (plus int16 rounding), the bias after matching is a small part of it
    assert np.all(rms < 1.3 * np.sqrt(sigma ** 2 + (1e-4) ** 2 / 12) + 2e-4)
    assert np.median(bias) < 0.002
