"""Spectral libraries as plain CSV tables, and their resampling to a cube's bands.

File format (our own, written by hand or exported from a spreadsheet)
---------------------------------------------------------------------
A comma-separated text file, UTF-8::

    # lines whose first cell starts with '#' are comments
    wavelength_nm,kaolinite,muscovite,dry grass
    class,clay,mica,vegetation
    color,#cc6677,#332288,#117733
    400,0.231,0.198,0.051
    401,0.233,0.199,0.052
    ...

- The header row's first cell is ``wavelength_nm``; every other cell names one material (unique,
  non-empty, compared after stripping spaces).
- Optional metadata rows follow the header, in any order, each at most once: a row whose first cell
  is ``class`` gives a class name per material (materials sharing a class map to one class code);
  a row whose first cell is ``color`` gives a colour per material as ``#rrggbb``.
- Data rows: a wavelength in nanometres, then one reflectance (0-1) per material. Every cell is
  filled; wavelengths are unique (rows may come in any order; they are sorted on reading).

Errors name the file, the row (1-based line number) and the column at fault.
"""
from __future__ import annotations

import csv
import io
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np

from swathmill.tiles.palette import hex_to_rgb as palette_rgb
from swathmill.workflows.spectral.spectra import resample, uncovered_bands
from swathmill.errors import SwathmillError

__all__ = [
    "LibraryError",
    "SpectralLibrary",
    "read_library",
    "write_library",
    "resample_library",
    "check_coverage",
    "hex_to_rgb",
]

WAVELENGTH_HEADER = "wavelength_nm"
_HEX = re.compile(r"^#[0-9a-fA-F]{6}$")


class LibraryError(SwathmillError, ValueError):
    """A spectral library is malformed or does not fit the cube; the message names the file."""


def hex_to_rgb(color: str) -> tuple[int, int, int]:
    """``"#rrggbb"`` -> (r, g, b) in 0-255."""
    if not _HEX.match(color):
        raise LibraryError(f"a colour must be written #rrggbb. Got {color!r}")
    return palette_rgb(color)


@dataclass(frozen=True, eq=False)
class SpectralLibrary:
    """Reference spectra of named materials.

    Attributes
    ----------
    names : material names, unique and non-empty.
    wavelengths : (b,) band centres in nm, distinct (increasing when read from a file; a library
        resampled to a sensor whose detectors overlap keeps the sensor's band order).
    spectra : (n, b) reflectance, one row per material.
    classes : optional class name per material (several materials may share a class).
    colors : optional ``#rrggbb`` colour per material.
    source : where the library came from (file path), used in error messages.
    """

    names: tuple[str, ...]
    wavelengths: np.ndarray
    spectra: np.ndarray
    classes: tuple[str, ...] | None = None
    colors: tuple[str, ...] | None = None
    source: str = "<memory>"
    fwhm: np.ndarray | None = field(default=None)

    def __post_init__(self) -> None:
        names = tuple(str(n).strip() for n in self.names)
        object.__setattr__(self, "names", names)
        where = f"spectral library {self.source}"
        if not names:
            raise LibraryError(f"{where}: no materials")
        empty = [i + 1 for i, n in enumerate(names) if not n]
        if empty:
            raise LibraryError(f"{where}: material(s) number {empty} (counted after the wavelength column) "
                               "have an empty name")
        seen: dict[str, int] = {}
        for i, n in enumerate(names):
            if n in seen:
                raise LibraryError(
                    f"{where}: material name {n!r} appears twice (materials number {seen[n] + 1} and {i + 1}, "
                    "counted after the wavelength column); names must be unique")
            seen[n] = i
        wl = np.asarray(self.wavelengths, dtype=np.float64)
        sp = np.atleast_2d(np.asarray(self.spectra, dtype=np.float64))
        if wl.ndim != 1 or wl.size < 1:
            raise LibraryError(f"{where}: needs at least 1 wavelength. Got shape {wl.shape}")
        if sp.shape != (len(names), wl.size):
            raise LibraryError(
                f"{where}: spectra must be (materials, wavelengths) = ({len(names)}, {wl.size}). Got {sp.shape}")
        if not np.all(np.isfinite(wl)):
            raise LibraryError(f"{where}: wavelengths must be finite numbers")
        if np.unique(wl).size != wl.size:
            raise LibraryError(f"{where}: wavelengths must be distinct")
        if not np.all(np.isfinite(sp)):
            i, j = np.argwhere(~np.isfinite(sp))[0]
            raise LibraryError(f"{where}: material {names[i]!r} has no finite value at {wl[j]:g} nm")
        object.__setattr__(self, "wavelengths", wl)
        object.__setattr__(self, "spectra", sp)
        for attr in ("classes", "colors"):
            v = getattr(self, attr)
            if v is None:
                continue
            v = tuple(str(x).strip() for x in v)
            if len(v) != len(names):
                raise LibraryError(f"{where}: {len(v)} {attr} for {len(names)} materials")
            if attr == "classes" and any(not c for c in v):
                bad = [names[i] for i, c in enumerate(v) if not c]
                raise LibraryError(f"{where}: empty class name for material(s) {bad}")
            if attr == "colors":
                for n, c in zip(names, v):
                    if not _HEX.match(c):
                        raise LibraryError(f"{where}: colour of {n!r} must be written #rrggbb. Got {c!r}")
            object.__setattr__(self, attr, v)
        if self.fwhm is not None:
            object.__setattr__(self, "fwhm", np.asarray(self.fwhm, dtype=np.float64))

    def __len__(self) -> int:
        return len(self.names)

    @property
    def class_names(self) -> tuple[str, ...]:
        """Distinct class names in order of first appearance (material names when no classes)."""
        src = self.classes if self.classes is not None else self.names
        return tuple(dict.fromkeys(src))

    @property
    def class_codes(self) -> np.ndarray:
        """(n,) class code 1..k of each material, following :attr:`class_names`."""
        src = self.classes if self.classes is not None else self.names
        order = {c: i + 1 for i, c in enumerate(self.class_names)}
        return np.array([order[c] for c in src], dtype=np.int32)

    def class_colors(self) -> tuple[tuple[int, int, int], ...] | None:
        """RGB colour of each class: that of its first material, or None without colours."""
        if self.colors is None:
            return None
        src = self.classes if self.classes is not None else self.names
        first: dict[str, str] = {}
        for c, col in zip(src, self.colors):
            first.setdefault(c, col)
        return tuple(hex_to_rgb(first[c]) for c in self.class_names)

    def subset(self, names: Sequence[str]) -> "SpectralLibrary":
        """The materials ``names`` in that order."""
        missing = [n for n in names if n not in self.names]
        if missing:
            raise LibraryError(f"spectral library {self.source}: no material(s) {missing}; it has {list(self.names)}")
        idx = [self.names.index(n) for n in names]
        return SpectralLibrary(
            tuple(names), self.wavelengths, self.spectra[idx],
            tuple(self.classes[i] for i in idx) if self.classes else None,
            tuple(self.colors[i] for i in idx) if self.colors else None, self.source, self.fwhm)


def _float(text: str, path: str, line: int, col: int, what: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise LibraryError(f"{path}, line {line}, column {col}: {what} must be a number. Got {text!r}") from None
    if not math.isfinite(v):
        raise LibraryError(f"{path}, line {line}, column {col}: {what} must be finite. Got {text!r}")
    return v


def read_library(path: str | Path) -> SpectralLibrary:
    """Read a spectral library CSV (format in the module docstring)."""
    path = Path(path)
    p = str(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise LibraryError(f"spectral library {p} does not exist") from None
    except UnicodeDecodeError as exc:
        raise LibraryError(f"spectral library {p} is not UTF-8 text: {exc}") from None
    rows = [(i + 1, r) for i, r in enumerate(csv.reader(io.StringIO(text)))]
    rows = [(n, [c.strip() for c in r]) for n, r in rows if r and any(c.strip() for c in r)
            and not r[0].strip().startswith("#")]
    if not rows:
        raise LibraryError(f"spectral library {p} is empty")
    line, header = rows[0]
    if header[0].lower() != WAVELENGTH_HEADER:
        raise LibraryError(
            f"{p}, line {line}: the first column must be headed {WAVELENGTH_HEADER!r}. Got {header[0]!r}")
    names = header[1:]
    ncol = len(header)
    meta: dict[str, tuple[int, list[str]]] = {}
    wl: list[float] = []
    values: list[list[float]] = []
    for line, r in rows[1:]:
        # spreadsheets drop or pad trailing empty cells: pad to the header's width, refuse extra cells
        if len(r) > ncol and any(r[ncol:]):
            raise LibraryError(f"{p}, line {line}: {len(r)} cells for {ncol} columns in the header")
        r = (r + [""] * ncol)[:ncol]
        key = r[0].lower()
        if key in ("class", "color", "colour"):
            key = "color" if key == "colour" else key
            if values:
                raise LibraryError(f"{p}, line {line}: the {key!r} row must come before the data rows")
            if key in meta:
                raise LibraryError(f"{p}, line {line}: a second {key!r} row (the first is line {meta[key][0]})")
            meta[key] = (line, r[1:])
            continue
        wl.append(_float(r[0], p, line, 1, "the wavelength"))
        row = []
        for j, cell in enumerate(r[1:]):
            if cell == "":
                raise LibraryError(
                    f"{p}, line {line}: material {names[j]!r} (column {j + 2}) has no value at {r[0]} nm")
            row.append(_float(cell, p, line, j + 2, f"the value of {names[j]!r}"))
        values.append(row)
    if len(wl) < 2:
        raise LibraryError(f"spectral library {p}: needs at least 2 data rows. Got {len(wl)}")
    wl_arr = np.array(wl)
    order = np.argsort(wl_arr, kind="stable")
    wl_arr = wl_arr[order]
    dup = np.flatnonzero(np.diff(wl_arr) == 0)
    if dup.size:
        raise LibraryError(f"spectral library {p}: wavelength {wl_arr[dup[0]]:g} nm appears more than once")
    spectra = np.array(values, dtype=np.float64)[order].T
    classes = tuple(meta["class"][1]) if "class" in meta else None
    colors = tuple(meta["color"][1]) if "color" in meta else None
    return SpectralLibrary(tuple(names), wl_arr, spectra, classes, colors, source=p)


def write_library(lib: SpectralLibrary, path: str | Path, *, precision: int = 6) -> Path:
    """Write ``lib`` as a library CSV that :func:`read_library` reads back to the same values."""
    path = Path(path)
    for n in lib.names:
        if n.startswith("#") or n.lower() in ("class", "color", "colour"):
            raise LibraryError(f"material name {n!r} cannot be written: it would read as a comment or metadata")
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([WAVELENGTH_HEADER, *lib.names])
    if lib.classes is not None:
        w.writerow(["class", *lib.classes])
    if lib.colors is not None:
        w.writerow(["color", *lib.colors])
    for j, x in enumerate(lib.wavelengths):
        w.writerow([repr(float(x)), *(f"{v:.{precision}g}" if precision else repr(float(v))
                                      for v in lib.spectra[:, j])])
    path.write_text(buf.getvalue(), encoding="utf-8")
    return path


def check_coverage(lib: SpectralLibrary, target_wavelengths: np.ndarray,
                   target_fwhm: np.ndarray | None = None) -> None:
    """Raise :class:`LibraryError` if the library does not cover every target band.

    Coverage follows :func:`swathmill.workflows.spectral.spectra.uncovered_bands`: each band centre inside the library's
    range and, for bands with a known FWHM, a library sample within one FWHM of the centre.
    """
    tw = np.asarray(target_wavelengths, dtype=np.float64)
    fw = None if target_fwhm is None else np.broadcast_to(np.asarray(target_fwhm, dtype=np.float64), tw.shape)
    if fw is not None and not np.isfinite(fw).all():
        fw = np.where(np.isfinite(fw), fw, np.inf)  # unknown widths: range test only
    bad = uncovered_bands(lib.wavelengths, tw, fw)
    if bad.any():
        idx = np.flatnonzero(bad)
        raise LibraryError(
            f"spectral library {lib.source} covers {lib.wavelengths[0]:g}-{lib.wavelengths[-1]:g} nm but the "
            f"cube's bands span {tw.min():g}-{tw.max():g} nm: {idx.size} band(s) not covered, e.g. band(s) "
            f"{(idx + 1).tolist()[:8]} at {np.round(tw[idx], 2).tolist()[:8]} nm. Extend the library or "
            "restrict the bands used")


def resample_library(lib: SpectralLibrary, target_wavelengths: np.ndarray,
                     target_fwhm: np.ndarray | float | None = None) -> SpectralLibrary:
    """The library resampled to target bands.

    Gaussian spectral responses where ``target_fwhm`` is known and finite, linear interpolation where
    it is None or NaN (:func:`swathmill.workflows.spectral.spectra.resample`). Raises :class:`LibraryError` naming the
    file and the ranges when the library does not cover the target bands.
    """
    tw = np.asarray(target_wavelengths, dtype=np.float64)
    fw = None if target_fwhm is None else np.broadcast_to(np.asarray(target_fwhm, dtype=np.float64), tw.shape)
    check_coverage(lib, tw, fw)
    spectra = resample(lib.wavelengths, lib.spectra, tw, fw, on_uncovered="nan")
    if not np.isfinite(spectra).all():  # defensive: coverage was checked above
        raise LibraryError(f"spectral library {lib.source}: resampling gave NaN values")
    return SpectralLibrary(lib.names, tw, spectra, lib.classes, lib.colors, lib.source,
                           None if fw is None else np.array(fw))
