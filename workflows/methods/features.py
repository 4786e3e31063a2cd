"""Spectral features measured pixel by pixel: band depth, band area, band minimum, ratios, slopes.

Each feature is declared in the config as a typed record with a ``kind`` (a pydantic discriminated
union; there is no formula language). Wavelengths are in nanometres, like the cube's
``wavelength`` coordinate. The kinds:

``band_depth``
    ``1 - CR`` of the continuum-removed spectrum over ``range`` (Clark and Roush 1984), at the band
    of smallest CR, or at the band nearest ``at``. The continuum is the upper convex hull of the
    spectrum over the range (``shoulders: hull``, the shoulders found on the hull) or the straight
    line between the first and last band of the range (``shoulders: fixed``).
``band_area``
    The integral of ``1 - CR`` over the range, trapezoid rule in nm (unit: nm).
``band_minimum``
    Wavelength (nm) of the smallest CR in the range, refined by the parabola through it and its two
    neighbours; NaN where the discrete depth is not above ``min_depth`` (no feature).
``ratio``
    ``A / B`` of two bands or band ranges. A band is a single wavelength (the nearest band, which
    must lie within one band spacing) or a ``[low, high]`` range (the mean of the bands inside).
``normalized_difference``
    ``(A - B) / (A + B)``.
``slope``
    Least-squares slope of reflectance against wavelength over the range (reflectance per nm).

Everything is vectorised over blocks ``(bands, rows, cols)``: :func:`compute_features` takes a block
and returns ``(n_features, rows, cols)`` float32. :func:`build_steps` wraps it into one engine step
whose output ``features`` has one band per feature, named after the feature.

Where a feature's bands hold NaN for a pixel, that feature is NaN there. With fixed shoulders CR
is not clipped: values above the shoulder line give CR > 1 (negative depth).
"""
from __future__ import annotations

import re
from typing import Annotated, Any, Literal, Mapping, Sequence, Union

import numpy as np
from pydantic import Field, field_validator, model_validator

from swathmill.workflows.roles import Role
from swathmill.tiles.step import Block, OutputSpec, Step, StepError

from swathmill.workflows.params import Section, check_ref
from swathmill.workflows.spectral.continuum import band_minimum, continuum_removed
from swathmill.errors import SwathmillError

__all__ = [
    "BandDepth",
    "BandArea",
    "BandMinimum",
    "BandRatio",
    "NormalizedDifference",
    "Slope",
    "Feature",
    "FeaturesConfig",
    "FeatureError",
    "feature_units",
    "compute_feature",
    "compute_features",
    "features_kernel",
    "build_steps",
]

_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_\-]*$")

BandSpec = Union[float, tuple[float, float]]
"""One band (nearest to a wavelength, nm) or a band range ``[low, high]`` (mean of its bands)."""


class FeatureError(SwathmillError, ValueError):
    """A feature cannot be measured on the given bands; the message names the feature and band."""


class _Feature(Section):

    name: str = Field(description="name of the output band")

    @field_validator("name")
    @classmethod
    def _name(cls, v: str) -> str:
        if not _NAME.match(v):
            raise ValueError(f"a feature name starts with a letter and holds letters, digits, '_' or '-'. Got {v!r}")
        return v


def _check_range(v: tuple[float, float]) -> tuple[float, float]:
    if not (np.isfinite(v[0]) and np.isfinite(v[1]) and v[0] < v[1]):
        raise ValueError(f"a wavelength range is [low, high] in nm with low < high. Got {list(v)}")
    return v


def _check_band(v: BandSpec) -> BandSpec:
    if isinstance(v, tuple):
        return _check_range(v)
    if not np.isfinite(v) or v <= 0:
        raise ValueError(f"a band wavelength must be positive (nm). Got {v}")
    return v


class _ContinuumFeature(_Feature):
    range: tuple[float, float] = Field(description="[low, high] nm: the feature window (and fixed shoulders)")
    shoulders: Literal["hull", "fixed"] = "hull"

    @field_validator("range")
    @classmethod
    def _valid_range(cls, v: tuple[float, float]) -> tuple[float, float]:
        return _check_range(v)


class BandDepth(_ContinuumFeature):
    """Continuum-removed band depth ``1 - CR`` at the minimum (or at ``at``)."""

    kind: Literal["band_depth"] = "band_depth"
    at: float | None = Field(None, description="nm; depth at the band nearest this wavelength")

    @model_validator(mode="after")
    def _at_inside(self) -> "BandDepth":
        if self.at is not None and not self.range[0] <= self.at <= self.range[1]:
            raise ValueError(f"feature {self.name!r}: 'at' must lie inside range {list(self.range)}. Got {self.at}")
        return self


class BandArea(_ContinuumFeature):
    """Integral of ``1 - CR`` over the range (nm)."""

    kind: Literal["band_area"] = "band_area"


class BandMinimum(_ContinuumFeature):
    """Position (nm) of the CR minimum, refined by a three-point parabola."""

    kind: Literal["band_minimum"] = "band_minimum"
    min_depth: float = Field(0.001, ge=0.0, description="NaN where the depth is not above this")


class BandRatio(_Feature):
    """``numerator / denominator``."""

    kind: Literal["ratio"] = "ratio"
    numerator: BandSpec
    denominator: BandSpec

    @field_validator("numerator", "denominator")
    @classmethod
    def _valid_bands(cls, v: BandSpec) -> BandSpec:
        return _check_band(v)


class NormalizedDifference(_Feature):
    """``(a - b) / (a + b)``."""

    kind: Literal["normalized_difference"] = "normalized_difference"
    a: BandSpec
    b: BandSpec

    @field_validator("a", "b")
    @classmethod
    def _valid_bands(cls, v: BandSpec) -> BandSpec:
        return _check_band(v)


class Slope(_Feature):
    """Least-squares slope of reflectance over the range, per nm."""

    kind: Literal["slope"] = "slope"
    range: tuple[float, float]

    @field_validator("range")
    @classmethod
    def _valid_range(cls, v: tuple[float, float]) -> tuple[float, float]:
        return _check_range(v)


Feature = Annotated[
    Union[BandDepth, BandArea, BandMinimum, BandRatio, NormalizedDifference, Slope],
    Field(discriminator="kind"),
]


class FeaturesConfig(Section):
    """The ``features`` section: which features to measure on which input.

    YAML::

        features:
          name: features              # step name (store stores/features.zarr)
          input: mosaic/reflectance   # "step/output" with a wavelength coordinate (nm)
          features:
            - {kind: band_depth, name: aloh_depth, range: [2120, 2250]}
            - {kind: band_minimum, name: aloh_pos, range: [2120, 2250]}
            - {kind: band_area, name: aloh_area, range: [2120, 2250], shoulders: fixed}
            - {kind: ratio, name: ferric, numerator: [750, 800], denominator: 550}
            - {kind: normalized_difference, name: ndvi, a: 860, b: 660}
            - {kind: slope, name: red_slope, range: [680, 750]}
    """

    name: str = "features"
    input: str = "mosaic/reflectance"
    features: list[Feature] = Field(min_length=1)

    @field_validator("features")
    @classmethod
    def _unique(cls, v: list) -> list:
        names = [f.name for f in v]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ValueError(f"feature names must be unique. Got duplicates {dup}")
        return v

    @field_validator("input")
    @classmethod
    def _ref(cls, v: str) -> str:
        return check_ref(v)


def feature_units(feature: Any) -> str:
    """Unit of a feature's values (for band attributes and the report)."""
    return {"band_depth": "1", "band_area": "nm", "band_minimum": "nm", "ratio": "1",
            "normalized_difference": "1", "slope": "1/nm"}[feature.kind]


# ----------------------------------------------------------------------------------------------
# band selection
# ----------------------------------------------------------------------------------------------

def _band_index(wl: np.ndarray, band: BandSpec, feature: str) -> np.ndarray:
    """Indices of the bands for a band spec: the nearest band, or all bands in a range."""
    if isinstance(band, tuple):
        idx = np.flatnonzero((wl >= band[0]) & (wl <= band[1]))
        if idx.size == 0:
            raise FeatureError(f"feature {feature!r}: no band lies in {band[0]:g}-{band[1]:g} nm "
                               f"(bands span {wl.min():g}-{wl.max():g} nm)")
        return idx
    i = int(np.argmin(np.abs(wl - band)))
    others = np.abs(np.delete(wl, i) - wl[i])
    spacing = float(others.min()) if others.size else np.inf
    if abs(wl[i] - band) > spacing:
        raise FeatureError(f"feature {feature!r}: no band within one band spacing ({spacing:g} nm) of "
                           f"{band:g} nm; nearest is {wl[i]:g} nm")
    return np.array([i])


def _range_index(wl: np.ndarray, rng: tuple[float, float], feature: str, need: int = 3) -> np.ndarray:
    idx = np.flatnonzero((wl >= rng[0]) & (wl <= rng[1]))
    if idx.size < need:
        raise FeatureError(f"feature {feature!r}: range {rng[0]:g}-{rng[1]:g} nm holds {idx.size} band(s); "
                           f"at least {need} are needed (bands span {wl.min():g}-{wl.max():g} nm)")
    sub = wl[idx]
    if not np.all(np.diff(sub) > 0):
        k = int(np.flatnonzero(np.diff(sub) <= 0)[0])
        raise FeatureError(f"feature {feature!r}: wavelengths in {rng[0]:g}-{rng[1]:g} nm must increase; "
                           f"band {idx[k]} at {sub[k]:g} nm is followed by {sub[k + 1]:g} nm")
    return idx


# ----------------------------------------------------------------------------------------------
# the measurements, on (n_pixels, bands) spectra
# ----------------------------------------------------------------------------------------------

def _continuum(wl: np.ndarray, spectra: np.ndarray, shoulders: str) -> np.ndarray:
    """CR over all given bands: hull or the line between the first and last band."""
    if shoulders == "hull":
        return continuum_removed(wl, spectra)[0]
    t = (wl - wl[0]) / (wl[-1] - wl[0])
    line = spectra[:, :1] + (spectra[:, -1:] - spectra[:, :1]) * t[None, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(line > 0, spectra / np.where(line > 0, line, 1.0), np.nan)


def _mean_bands(spectra: np.ndarray, idx: np.ndarray) -> np.ndarray:
    return spectra[:, idx].mean(axis=1)


def compute_feature(wavelengths: np.ndarray, spectra: np.ndarray, feature: Any) -> np.ndarray:
    """One feature for many spectra.

    Parameters
    ----------
    wavelengths
        (b,) band centres in nm.
    spectra
        (n, b) reflectance, spectral axis last.
    feature
        One of the feature models (``BandDepth``, ... ``Slope``).

    Returns
    -------
    numpy.ndarray
        (n,) float64 values; NaN where the feature's bands hold NaN (or no band minimum exists).
    """
    wl = np.asarray(wavelengths, dtype=np.float64)
    x = np.asarray(spectra, dtype=np.float64)
    if x.ndim != 2 or x.shape[1] != wl.size:
        raise FeatureError(f"feature {feature.name!r}: spectra must be (n, {wl.size}). Got shape {x.shape}")
    kind = feature.kind
    if kind in ("band_depth", "band_area", "band_minimum"):
        idx = _range_index(wl, feature.range, feature.name)
        w, sub = wl[idx], x[:, idx]
        cr = _continuum(w, sub, feature.shoulders)
        ok = np.all(np.isfinite(cr), axis=1)
        if kind == "band_depth":
            if feature.at is not None:
                val = cr[:, int(np.argmin(np.abs(w - feature.at)))]
            else:
                val = np.min(np.where(ok[:, None], cr, np.inf), axis=1)
            return np.where(ok, 1.0 - val, np.nan)
        if kind == "band_area":
            d = 1.0 - cr
            area = np.sum(0.5 * (d[:, 1:] + d[:, :-1]) * np.diff(w)[None, :], axis=1)
            return np.where(ok, area, np.nan)
        pos, _, j = band_minimum(w, np.where(ok[:, None], cr, np.nan))
        discrete_depth = 1.0 - np.take_along_axis(cr, np.maximum(j, 0)[:, None], axis=1)[:, 0]
        return np.where(ok & (discrete_depth > feature.min_depth), pos, np.nan)
    if kind == "ratio":
        a = _mean_bands(x, _band_index(wl, feature.numerator, feature.name))
        b = _mean_bands(x, _band_index(wl, feature.denominator, feature.name))
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(b != 0, a / np.where(b != 0, b, 1.0), np.nan)
    if kind == "normalized_difference":
        a = _mean_bands(x, _band_index(wl, feature.a, feature.name))
        b = _mean_bands(x, _band_index(wl, feature.b, feature.name))
        s = a + b
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(s != 0, (a - b) / np.where(s != 0, s, 1.0), np.nan)
    if kind == "slope":
        idx = _range_index(wl, feature.range, feature.name, need=2)
        w, sub = wl[idx], x[:, idx]
        wc = w - w.mean()
        return (sub - sub.mean(axis=1, keepdims=True)) @ wc / float(wc @ wc)
    raise FeatureError(f"unknown feature kind {kind!r}")


def compute_features(wavelengths: Sequence[float] | np.ndarray, block: np.ndarray,
                     features: Sequence[Any], valid: np.ndarray | None = None) -> np.ndarray:
    """All features of a block.

    Parameters
    ----------
    wavelengths
        (bands,) band centres in nm.
    block
        (bands, rows, cols) reflectance.
    features
        Feature models, in output order.
    valid
        Optional (rows, cols) mask; pixels outside it are NaN and not computed.

    Returns
    -------
    numpy.ndarray
        (len(features), rows, cols) float32.
    """
    wl = np.asarray(wavelengths, dtype=np.float64)
    cube = np.asarray(block)
    if cube.ndim != 3 or cube.shape[0] != wl.size:
        raise FeatureError(f"a block must be (bands={wl.size}, rows, cols). Got shape {cube.shape}")
    _, rows, cols = cube.shape
    mask = np.ones((rows, cols), bool) if valid is None else np.asarray(valid, bool)
    out = np.full((len(features), rows * cols), np.nan, dtype=np.float32)
    pix = np.flatnonzero(mask.ravel())
    if pix.size:
        spectra = cube.reshape(wl.size, -1)[:, pix].T
        for k, f in enumerate(features):
            out[k, pix] = compute_feature(wl, spectra, f)
    return out.reshape(len(features), rows, cols)


# ----------------------------------------------------------------------------------------------
# the step
# ----------------------------------------------------------------------------------------------

_ALIAS = "cube"


def _wavelengths(block: Block) -> np.ndarray:
    meta = block.meta[_ALIAS]
    wl = meta.spec.coords.get("wavelength")
    if wl is None:
        raise StepError(f"features: input {meta.ref!r} has no 'wavelength' coordinate; "
                        f"its coordinates are {sorted(meta.spec.coords)}")
    return np.asarray(wl, dtype=np.float64)


def features_kernel(block: Block, model: Any) -> dict[str, np.ndarray]:
    """Kernel of the features step: ``{"features": (n_features, rows, cols) float32}``."""
    params: FeaturesConfig = block.params
    return {"features": compute_features(_wavelengths(block), block.data[_ALIAS], list(params.features), block.valid)}


def build_steps(section: FeaturesConfig | Mapping[str, Any], ctx: Any = None) -> list[Step]:
    """The features step for a ``features`` config section.

    Output ``features``: float32, NaN as nodata, one band per feature named after it, with the
    units (``attrs["units"]``) and kinds (``attrs["kinds"]``) of each band.
    """
    cfg = section if isinstance(section, FeaturesConfig) else FeaturesConfig.model_validate(section)
    feats = list(cfg.features)
    spec = OutputSpec(
        role=Role.FEATURE,
        bands=tuple(f.name for f in feats), dtype="float32", nodata=float("nan"),
        attrs={"units": [feature_units(f) for f in feats], "kinds": [f.kind for f in feats]},
    )
    return [Step(
        name=cfg.name, kernel=features_kernel, outputs={"features": spec}, inputs={_ALIAS: cfg.input},
        params=cfg,
    )]
