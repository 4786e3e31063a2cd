"""Resampling spectra: Gaussian responses against a direct numpy convolution, linear against np.interp."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from swathmill.workflows.spectral.spectra import (
    SpectralCoverageError,
    fwhm_to_sigma,
    resample,
    resample_gaussian,
    resample_linear,
    uncovered_bands,
)

AGAVE = "vegetation.shrub.agave.attenuata.all.jpl060.jpl.asdnicolet.spectrum.txt"
MICROCLINE = "mineral.silicate.tectosilicate.medium.vswir.ts-17a.jpl.perkin.spectrum.txt"


def read_lab_spectrum(path: Path) -> tuple[np.ndarray, np.ndarray]:
    """Header lines (``Key: value``) up to the first blank line, then micrometre / percent columns."""
    lines = path.read_text(encoding="latin-1").splitlines()
    start = next(i for i, line in enumerate(lines) if not line.strip()) + 1
    data = np.loadtxt(lines[start:])
    return data[:, 0] * 1000.0, data[:, 1] / 100.0  # nm, reflectance 0-1


def test_fwhm_to_sigma() -> None:
    # a Gaussian's FWHM is 2 sqrt(2 ln 2) sigma (common practice)
    assert fwhm_to_sigma(2.3548200450309493) == pytest.approx(1.0, rel=1e-12)


def test_gaussian_matches_direct_convolution_on_lab_spectrum(shared_data: Path) -> None:
    wl, refl = read_lab_spectrum(shared_data / "lab_spectra" / AGAVE)
    keep = wl <= 2500.0 + 1e-9  # the 1 nm field-spectrometer part (the file continues past 2.5 um)
    wl, refl = wl[keep], refl[keep]
    assert np.allclose(np.diff(wl), 1.0, atol=1e-6), "expected a uniform 1 nm grid in the lab file"
    for fwhm in (6.0, 10.0, 17.0):
        # oracle: np.convolve with a sampled Gaussian kernel out to 8 sigma, normalised to unit sum,
        # read at integer-nm band centres well inside the spectrum (numpy only, independent code path)
        sigma = fwhm / (2.0 * np.sqrt(2.0 * np.log(2.0)))
        half = int(np.ceil(8 * sigma))
        k = np.exp(-0.5 * (np.arange(-half, half + 1) / sigma) ** 2)
        k /= k.sum()
        conv = np.convolve(refl, k, mode="same")
        centres = np.arange(400.0, 2451.0, 10.0)
        idx = np.abs(wl[:, None] - centres[None, :]).argmin(axis=0)  # float wavelengths: nearest sample
        assert np.abs(wl[idx] - centres).max() < 1e-6
        expected = conv[idx]
        got = resample_gaussian(wl, refl, centres, fwhm)
        # truncating at 4 sigma drops 6e-5 of the response mass: 1e-4 relative is the resulting bound
        np.testing.assert_allclose(got, expected, rtol=1e-4, atol=0)


def test_gaussian_descending_source_and_stack_of_spectra(shared_data: Path) -> None:
    wl, refl = read_lab_spectrum(shared_data / "lab_spectra" / MICROCLINE)
    assert wl[0] > wl[-1]  # this file lists wavelengths from long to short
    centres = np.linspace(420.0, 2480.0, 120)
    fwhm = np.linspace(8.0, 14.0, 120)
    desc = resample_gaussian(wl, refl, centres, fwhm)
    asc = resample_gaussian(wl[::-1], refl[::-1], centres, fwhm)
    np.testing.assert_array_equal(desc, asc)
    stack = np.stack([refl, 0.5 * refl, refl + 0.1])[None]  # (1, 3, n)
    out = resample_gaussian(wl, stack, centres, fwhm)
    assert out.shape == (1, 3, 120)
    # linearity of the response-weighted mean (common practice)
    np.testing.assert_allclose(out[0, 1], 0.5 * desc, rtol=1e-12)
    np.testing.assert_allclose(out[0, 2], desc + 0.1, rtol=1e-12)


def test_gaussian_on_linear_and_constant_spectra(rng: np.random.Generator) -> None:
    # on an irregular grid, a symmetric response averages a linear spectrum to its value at the centre
    src = np.sort(rng.uniform(300, 2600, 4000))
    centres = np.array([500.0, 1200.5, 2100.25])
    fwhm = np.array([9.0, 11.0, 20.0])
    lin = 0.2 + 1e-4 * src
    got = resample_gaussian(src, lin, centres, fwhm)
    np.testing.assert_allclose(got, 0.2 + 1e-4 * centres, rtol=2e-4)
    np.testing.assert_allclose(resample_gaussian(src, np.full_like(src, 0.3), centres, fwhm), 0.3, rtol=1e-12)


def test_nan_source_samples_are_skipped() -> None:
    src = np.arange(400.0, 1001.0, 1.0)
    vals = 0.2 + 0.1 * np.sin(src / 50.0)
    ref = resample_gaussian(src, vals, [500.0, 800.0], 10.0)
    holed = vals.copy()
    holed[src == 900.0] = np.nan  # far (> 4 sigma) from both bands: no effect
    np.testing.assert_array_equal(resample_gaussian(src, holed, [500.0, 800.0], 10.0), ref)
    holed[src == 801.0] = np.nan  # inside the second band: still finite and close
    got = resample_gaussian(src, holed, [500.0, 800.0], 10.0)
    assert np.isfinite(got).all()
    assert abs(got[1] - ref[1]) < 1e-3


def test_linear_matches_np_interp(rng: np.random.Generator) -> None:
    src = np.sort(rng.uniform(400, 2500, 300))
    vals = rng.uniform(0, 1, (4, 300))
    dst = rng.uniform(src[0], src[-1], 50)
    got = resample_linear(src, vals, dst)
    for i in range(4):
        np.testing.assert_allclose(got[i], np.interp(dst, src, vals[i]), rtol=1e-12)  # numpy oracle
    vals[2, 10:20] = np.nan
    got = resample_linear(src, vals, dst)
    ok = np.isfinite(vals[2])
    np.testing.assert_allclose(got[2], np.interp(dst, src[ok], vals[2, ok]), rtol=1e-12)


def test_mixed_fwhm_uses_gaussian_where_known() -> None:
    src = np.arange(400.0, 1001.0, 0.5)
    vals = 0.2 + 0.1 * np.sin(src / 20.0)
    dst = np.array([500.0, 600.0, 700.0])
    fwhm = np.array([10.0, np.nan, 10.0])
    got = resample(src, vals, dst, fwhm)
    np.testing.assert_allclose(got[[0, 2]], resample_gaussian(src, vals, dst[[0, 2]], 10.0))
    np.testing.assert_allclose(got[1], np.interp(600.0, src, vals))
    np.testing.assert_allclose(resample(src, vals, dst, None), np.interp(dst, src, vals))


def test_coverage_errors_and_nan_mode() -> None:
    src = np.arange(400.0, 2001.0, 1.0)
    vals = np.ones_like(src)
    with pytest.raises(SpectralCoverageError, match=r"band\(s\) \[3\] at \[2100.0\]"):
        resample_gaussian(src, vals, [500.0, 1500.0, 2100.0], 10.0)
    with pytest.raises(SpectralCoverageError, match="400-2000"):
        resample_linear(src, vals, [390.0, 1000.0])
    out = resample_linear(src, vals, [390.0, 1000.0], on_uncovered="nan")
    assert np.isnan(out[0]) and out[1] == 1.0
    # a gap in the source wider than the band: the band is not covered
    gap = (src < 1200) | (src > 1300)
    assert uncovered_bands(src[gap], [1250.0, 1100.0], [10.0, 10.0]).tolist() == [True, False]
    with pytest.raises(ValueError, match="FWHM must be positive"):
        resample_gaussian(src, vals, [500.0], 0.0)
    with pytest.raises(ValueError, match="samples on their last axis"):
        resample_linear(src, vals[:-1], [500.0])
    with pytest.raises(ValueError, match="repeat"):
        resample_linear(np.array([400.0, 400.0, 500.0]), np.ones(3), [450.0])
