"""Spectral library CSV: reading, writing, errors, resampling to a cube's bands (real lab spectra)."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.io import loadmat

from swathmill.workflows.inputs.library import (
    LibraryError,
    SpectralLibrary,
    check_coverage,
    hex_to_rgb,
    read_library,
    resample_library,
    write_library,
)
from swathmill.workflows.spectral.spectra import resample_gaussian

LEAVES = "Example_Spectra_ASD_JPL_vegetation.csv"


def write(tmp_path: Path, text: str, name: str = "lib.csv") -> Path:
    p = tmp_path / name
    p.write_text(text)
    return p


def test_read_format_with_metadata_and_comments(tmp_path: Path) -> None:
    p = write(tmp_path, "# site library, invented\n"
                        "wavelength_nm,clay A,clay B,grass\n"
                        "class,clay,clay,vegetation\n"
                        "color,#cc6677,#CC6677,#117733\n"
                        "\n"
                        "500,0.30,0.31,0.08\n"
                        "400,0.20,0.21,0.05\n"
                        "600,0.40,0.41,0.10\n")
    lib = read_library(p)
    assert lib.names == ("clay A", "clay B", "grass")
    np.testing.assert_array_equal(lib.wavelengths, [400, 500, 600])  # rows sorted by wavelength
    np.testing.assert_array_equal(lib.spectra[2], [0.05, 0.08, 0.10])
    assert lib.class_names == ("clay", "vegetation")
    assert lib.class_codes.tolist() == [1, 1, 2]
    assert lib.class_colors() == ((204, 102, 119), (17, 119, 51))
    assert hex_to_rgb("#117733") == (17, 119, 51)
    assert lib.source == str(p)
    sub = lib.subset(["grass", "clay A"])
    assert sub.names == ("grass", "clay A") and sub.classes == ("vegetation", "clay")


def test_round_trip(tmp_path: Path, rng: np.random.Generator) -> None:
    wl = np.sort(rng.choice(np.arange(400.0, 2500.0, 0.5), 300, replace=False))
    lib = SpectralLibrary(("a", "b,with comma", "c"), wl, rng.uniform(0, 1, (3, 300)),
                          classes=("x", "y", "x"), colors=("#000000", "#ffffff", "#123456"))
    back = read_library(write_library(lib, tmp_path / "out.csv", precision=0))
    assert back.names == lib.names and back.classes == lib.classes and back.colors == lib.colors
    np.testing.assert_array_equal(back.wavelengths, lib.wavelengths)
    np.testing.assert_array_equal(back.spectra, lib.spectra)  # repr() floats round-trip exactly


@pytest.mark.parametrize("text, match", [
    ("wavelength_nm,a,a\n400,1,2\n500,1,2\n", r"'a' appears twice \(materials number 1 and 2"),
    ("wavelength_nm,a, \n400,1,2\n500,1,2\n", r"material\(s\) number \[2\] \(counted after the wavelength column\) have an empty name"),
    ("wl,a\n400,1\n500,1\n", "first column must be headed 'wavelength_nm'. Got 'wl'"),
    ("wavelength_nm,a,b\n400,1,\n500,1,2\n", r"line 2: material 'b' \(column 3\) has no value at 400 nm"),
    ("wavelength_nm,a\n400,x\n500,1\n", "line 2, column 2: the value of 'a' must be a number. Got 'x'"),
    ("wavelength_nm,a\n400,1\n400,2\n", "wavelength 400 nm appears more than once"),
    ("wavelength_nm,a\n400,1\nclass,c\n", "'class' row must come before the data rows"),
    ("wavelength_nm,a\ncolor,red\n400,1\n500,1\n", "colour of 'a' must be written #rrggbb. Got 'red'"),
    ("wavelength_nm,a\n400,1\n", "needs at least 2 data rows"),
    ("wavelength_nm,a\n400,1,2\n500,1\n", "line 2: 3 cells for 2 columns"),
])
def test_malformed_libraries_name_file_and_place(tmp_path: Path, text: str, match: str) -> None:
    p = write(tmp_path, text, "bad.csv")
    with pytest.raises(LibraryError, match=match) as info:
        read_library(p)
    assert "bad.csv" in str(info.value)


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(LibraryError, match="does not exist"):
        read_library(tmp_path / "nope.csv")


def test_coverage_error_names_file_and_ranges(tmp_path: Path) -> None:
    p = write(tmp_path, "wavelength_nm,a\n" + "".join(f"{w},{0.3}\n" for w in range(450, 2401)), "site.csv")
    lib = read_library(p)
    cube_wl = np.arange(400.0, 2501.0, 10.0)
    with pytest.raises(LibraryError, match=r"site.csv covers 450-2400 nm but the cube's bands span 400-2500 nm: "
                                           r"15 band\(s\) not covered"):
        resample_library(lib, cube_wl, 10.0)
    check_coverage(lib, cube_wl[(cube_wl >= 450) & (cube_wl <= 2400)], 10.0)  # covered: no error


def test_resample_real_leaf_table(shared_data: Path, tmp_path: Path) -> None:
    """The field-spectrometer leaf table (one spectrum per row, wavelengths in um as columns) written
    in our format, read back, and resampled to an airborne sensor's bands."""
    raw = (shared_data / "lab_spectra" / LEAVES).read_text().splitlines()
    header = raw[0].split(",")
    wl = np.array([float(h) for h in header[1:]]) * 1000.0
    ids = [line.split(",")[0] for line in raw[1:] if line.strip()]
    vals = np.array([[float(v) for v in line.split(",")[1:]] for line in raw[1:] if line.strip()])
    assert vals.shape == (len(ids), wl.size) and len(ids) == 14
    scale = 100.0 if vals.max() > 1.5 else 1.0  # percent or fraction
    lib = SpectralLibrary(tuple(ids), wl, vals / scale, source=LEAVES)
    back = read_library(write_library(lib, tmp_path / "leaves.csv", precision=0))
    np.testing.assert_array_equal(back.spectra, lib.spectra)
    # the sensor's band centres from the mineral library (same sensor family; README of the data)
    d = loadmat(shared_data / "mineral_library" / "usgs_minerals_aviris224.mat")
    cube_wl = d["waveLength"].ravel() * 1000.0
    inside = (cube_wl >= wl.min() + 10) & (cube_wl <= wl.max() - 10)
    cube_wl = cube_wl[inside]
    res = resample_library(back, cube_wl, 10.0)
    assert res.spectra.shape == (14, cube_wl.size) and res.names == lib.names
    np.testing.assert_allclose(res.spectra, resample_gaussian(wl, vals / scale, cube_wl, 10.0), rtol=1e-12)
    # green leaves: red-edge position between ~700 and 730 nm (common practice), linear method of
    # Guyot and Baret (1988): REP = 700 + 40 ((R670 + R780)/2 - R700) / (R740 - R700)
    r = {w: resample_library(back, np.array([float(w)]), 10.0).spectra[:, 0] for w in (670, 700, 740, 780)}
    rep = 700 + 40 * ((r[670] + r[780]) / 2 - r[700]) / (r[740] - r[700])
    print("red-edge positions (nm):", np.round(rep, 1))
    assert np.all((rep > 695) & (rep < 735))
    # without FWHM: linear interpolation, exact at the library's own wavelengths
    lin = resample_library(back, wl[100:110], None)
    np.testing.assert_array_equal(lin.spectra, back.spectra[:, 100:110])
