"""Continuum removal against scipy's convex hull, the worked check spectrum and real mineral spectra."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.io import loadmat
from scipy.spatial import ConvexHull

from swathmill.workflows.spectral.continuum import (
    band_depth,
    band_minimum,
    continuum_removed,
    parabola_vertex,
    range_mask,
    upper_hull_mask,
)

# METHODS.md check spectrum (Clark and Roush 1984 definition, values recomputed there with numpy)
CHECK_WL = np.arange(2100.0, 2301.0, 20.0)
CHECK_R = np.array([0.50, 0.51, 0.50, 0.46, 0.40, 0.35, 0.41, 0.47, 0.50, 0.51, 0.52])


def scipy_continuum(wl: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Oracle: upper hull from scipy.spatial.ConvexHull with two anchor points far below the spectrum."""
    x = (wl - wl[0]) / (wl[-1] - wl[0])
    low = y.min() - 10.0 * (np.ptp(y) + 1.0)
    pts = np.column_stack([np.r_[x, 0.0, 1.0], np.r_[y, low, low]])
    hull = ConvexHull(pts)
    verts = np.sort([v for v in hull.vertices if v < x.size])
    cont = np.interp(x, x[verts], y[verts])
    return verts, cont


def test_check_spectrum_values() -> None:
    # METHODS.md [R]: hull vertices 0, 1, 10; min CR at 2200 nm = 0.680346, depth 0.319654;
    # three-point parabola centre 2199.25 nm
    x = (CHECK_WL - CHECK_WL[0]) / (CHECK_WL[-1] - CHECK_WL[0])
    assert np.flatnonzero(upper_hull_mask(x, CHECK_R[None])[0]).tolist() == [0, 1, 10]
    cr, hull = continuum_removed(CHECK_WL, CHECK_R)
    assert np.argmin(cr) == 5
    assert cr[5] == pytest.approx(0.680346, abs=5e-7)
    assert band_depth(cr)[5] == pytest.approx(0.319654, abs=5e-7)
    pos, depth, idx = band_minimum(CHECK_WL, cr)
    assert pos == pytest.approx(2199.25, abs=0.005)
    assert idx == 5
    assert depth >= 0.319654 - 1e-6  # the parabola vertex is at least as deep as the sampled minimum
    verts, cont = scipy_continuum(CHECK_WL, CHECK_R)
    assert verts.tolist() == [0, 1, 10]
    np.testing.assert_allclose(hull, cont, rtol=1e-12)


def test_against_scipy_convex_hull_random(rng: np.random.Generator) -> None:
    wl = np.sort(rng.uniform(400, 2500, 60))
    wl = np.unique(np.round(wl, 3))
    b = wl.size
    base = 0.3 + 0.2 * np.sin(wl[None, :] / rng.uniform(80, 400, (200, 1)) + rng.uniform(0, 6, (200, 1)))
    spectra = base + rng.normal(0, 0.02, (200, b))
    cr, hull = continuum_removed(wl, spectra)
    for i in range(spectra.shape[0]):
        verts, cont = scipy_continuum(wl, spectra[i])
        mask = upper_hull_mask((wl - wl[0]) / (wl[-1] - wl[0]), spectra[i][None])[0]
        assert np.flatnonzero(mask).tolist() == verts.tolist()
        np.testing.assert_allclose(hull[i], cont, rtol=1e-12)  # scipy.spatial.ConvexHull oracle
        np.testing.assert_allclose(cr[i], spectra[i] / cont, rtol=1e-12)
    assert np.all(cr <= 1.0)


def test_range_shape_scale_and_degenerate_cases(rng: np.random.Generator) -> None:
    wl = np.arange(400.0, 2500.0, 10.0)
    spectra = rng.uniform(0.1, 0.6, (3, 4, wl.size))
    cr, hull = continuum_removed(wl, spectra, (2000, 2400))
    k = int(range_mask(wl, (2000, 2400)).sum())
    assert cr.shape == hull.shape == (3, 4, k) == (3, 4, 41)
    # continuum removal is a ratio: invariant to scaling the spectrum (Clark and Roush 1984)
    cr2, _ = continuum_removed(wl, 3.7 * spectra, (2000, 2400))
    np.testing.assert_allclose(cr2, cr, rtol=1e-12)
    # flat and collinear spectra are their own hull: CR = 1 (METHODS.md)
    flat = np.full(wl.size, 0.4)
    line = 0.1 + 2e-4 * wl
    cr3, _ = continuum_removed(wl, np.stack([flat, line]))
    np.testing.assert_allclose(cr3, 1.0, atol=1e-12)
    # NaN anywhere in the range gives NaN for that spectrum only
    s = spectra[0].copy()
    s[1, 170] = np.nan  # 2100 nm, inside the range
    cr4, _ = continuum_removed(wl, s, (2000, 2400))
    assert np.isnan(cr4[1]).all() and np.isfinite(cr4[[0, 2, 3]]).all()
    pos, depth, idx = band_minimum(wl[range_mask(wl, (2000, 2400))], cr4)
    assert np.isnan(pos[1]) and idx[1] == -1 and np.isfinite(pos[0])


def test_band_minimum_edges_and_parabola() -> None:
    wl = np.array([1000.0, 1010.0, 1020.0, 1030.0])
    cr = np.array([[0.5, 0.7, 0.9, 1.0], [1.0, 0.9, 0.8, 0.6]])
    pos, depth, idx = band_minimum(wl, cr)
    assert pos.tolist() == [1000.0, 1030.0] and idx.tolist() == [0, 3]
    np.testing.assert_allclose(depth, [0.5, 0.4])
    # parabola through points of y = 2 (x - 3.3)^2 + 1 on an uneven grid (exact for a parabola)
    x = np.array([1.0, 3.0, 7.0])
    xv, yv = parabola_vertex(x, 2 * (x - 3.3) ** 2 + 1)
    assert xv == pytest.approx(3.3) and yv == pytest.approx(1.0)
    with pytest.raises(ValueError, match="holds 1 band"):
        range_mask(wl, (1005, 1015))
    with pytest.raises(ValueError, match="band 2 at 1010 nm is followed by 1005 nm"):
        range_mask(np.array([1000.0, 1010.0, 1005.0, 1020.0]), None)


# (mineral, low, high): facts of the trade listed in ../shared/data/README.md (Hunt 1977, Clark 1999,
# from memory there)
MINERAL_POSITIONS = [
    ("Alunite", 2165, 2175),
    ("Buddingtonite", 2120, 2120),
    ("Kaolinite_1", 2200, 2210),
    ("Kaolinite_2", 2200, 2210),
    ("Muscovite", 2200, 2210),
    ("Montmorillonite", 2205, 2215),
    ("Nontronite", 2285, 2295),
]


def test_mineral_library_band_minima(shared_data: Path) -> None:
    d = loadmat(shared_data / "mineral_library" / "usgs_minerals_aviris224.mat")
    wl = d["waveLength"].ravel() * 1000.0
    spectra = d["M"].T
    names = [str(c[0][0]).split(" ", 1)[1] for c in d["cood"]]
    rng_nm = (2050.0, 2450.0)
    mask = range_mask(wl, rng_nm)
    cr, _ = continuum_removed(wl, spectra, rng_nm)
    pos, depth, idx = band_minimum(wl[mask], cr)
    step = np.median(np.diff(wl[mask]))
    for name, lo, hi in MINERAL_POSITIONS:
        i = names.index(name)
        print(f"{name}: CR minimum at {pos[i]:.1f} nm, depth {depth[i]:.3f}")
        # within one band of the README position range
        assert lo - step <= pos[i] <= hi + step, (name, pos[i])
        assert depth[i] > 0.1, (name, depth[i])
