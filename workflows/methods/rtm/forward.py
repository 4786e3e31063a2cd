"""The canopy forward model: leaf and canopy radiative transfer behind one function of our own.

:func:`simulate_canopy` wraps the ``prosail`` package (pinned in ``pyproject.toml``; its leaf model is
PROSPECT-D, its canopy model the four-stream SAIL model with hot spot; the coupled model is reviewed in
Jacquemoud et al., 2009, Remote Sensing of Environment 113, S56-S66). Everything else in
:mod:`swathmill.workflows.methods.rtm` calls this function, never ``prosail`` directly, so a change of
implementation touches one place.

:func:`to_bands` convolves simulated spectra (1 nm from 400 to 2500 nm) to a campaign's bands with the
project's own Gaussian band response (:func:`swathmill.workflows.spectral.spectra.resample`).

``prosail`` is licensed GPLv3 (swathmill is BSD-3-Clause); it is imported only when a simulation runs.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from swathmill.errors import SwathmillError
from swathmill.workflows.spectral.spectra import resample, uncovered_bands

__all__ = [
    "RtmError",
    "Geometry",
    "SIM_WAVELENGTHS",
    "simulate_canopy",
    "soil_spectrum",
    "to_bands",
    "covered_bands",
]

SIM_WAVELENGTHS = np.arange(400.0, 2501.0, 1.0)  # nm: the grid of the leaf and canopy model's spectra

_FACTORS = {  # our names -> the package's reflectance-factor codes
    "bidirectional": "SDR",             # what an imaging spectrometer sees (sun -> target -> sensor)
    "directional_hemispherical": "DHR",
    "hemispherical_directional": "HDR",
    "bihemispherical": "BHR",
}


class RtmError(SwathmillError, ValueError):
    """Bad input to the canopy model or its inversion; the message names the parameter, band or key."""


@dataclass(frozen=True)
class Geometry:
    """Sun and view angles in degrees: zeniths from the vertical, relative azimuth sun - view."""

    sun_zenith: float = 35.0
    view_zenith: float = 0.0
    relative_azimuth: float = 0.0

    def __post_init__(self) -> None:
        for name in ("sun_zenith", "view_zenith"):
            v = getattr(self, name)
            if not (0.0 <= v < 90.0):
                raise RtmError(f"{name} must lie in [0, 90) degrees. Got {v}")
        if not np.isfinite(self.relative_azimuth):
            raise RtmError(f"relative_azimuth must be finite. Got {self.relative_azimuth}")


def _prosail():
    try:
        import prosail
    except ImportError as exc:  # pragma: no cover - the dependency is declared
        raise RtmError("the canopy model needs the 'prosail' package (pip install 'swathmill[rtm]')") from exc
    return prosail


def soil_spectrum(brightness: float = 1.0, moisture: float = 0.5) -> np.ndarray:
    """Soil reflectance (2101,) at 1 nm: ``brightness * (moisture_dry_weight * dry + (1 - w) * wet)``.

    The two spectra are the package's reference dry and wet soils; ``moisture`` is the weight of the
    dry one (the package's convention: 1 = dry, 0 = wet).
    """
    lib = _prosail().spectral_lib.soil
    return float(brightness) * (float(moisture) * lib.rsoil1 + (1.0 - float(moisture)) * lib.rsoil2)


_DEFAULTS = {"n": 1.5, "car": 8.0, "cbrown": 0.0, "leaf_angle": 57.0, "hotspot": 0.01,
             "soil_brightness": 1.0, "soil_moisture": 0.5}
_BOUNDS = {  # physical domain of each input (not the table's sampling ranges)
    "lai": (0.0, 20.0), "cab": (0.0, 200.0), "cw": (0.0, 0.2), "cm": (0.0, 0.1), "n": (1.0, 4.0),
    "car": (0.0, 50.0), "cbrown": (0.0, 1.0), "leaf_angle": (0.0, 90.0), "hotspot": (0.0, 1.0),
    "soil_brightness": (0.0, 3.0), "soil_moisture": (0.0, 1.0),
}


def simulate_canopy(
    lai: np.ndarray | float,
    cab: np.ndarray | float,
    cw: np.ndarray | float,
    cm: np.ndarray | float,
    *,
    n: np.ndarray | float = _DEFAULTS["n"],
    car: np.ndarray | float = _DEFAULTS["car"],
    cbrown: np.ndarray | float = _DEFAULTS["cbrown"],
    leaf_angle: np.ndarray | float = _DEFAULTS["leaf_angle"],
    hotspot: np.ndarray | float = _DEFAULTS["hotspot"],
    soil_brightness: np.ndarray | float = _DEFAULTS["soil_brightness"],
    soil_moisture: np.ndarray | float = _DEFAULTS["soil_moisture"],
    geometry: Geometry = Geometry(),
    soil: np.ndarray | None = None,
    leaf: tuple[np.ndarray, np.ndarray] | None = None,
    factor: Literal["bidirectional", "directional_hemispherical", "hemispherical_directional",
                    "bihemispherical"] = "bidirectional",
) -> np.ndarray:
    """Canopy reflectance spectra at 1 nm from 400 to 2500 nm (:data:`SIM_WAVELENGTHS`).

    Parameters
    ----------
    lai : leaf area index (m2 m-2).
    cab : leaf chlorophyll a+b content (ug cm-2).
    cw : leaf equivalent water thickness (g cm-2, i.e. cm).
    cm : leaf dry matter content (g cm-2).
    n : leaf structure parameter (number of layers).
    car : leaf carotenoid content (ug cm-2).
    cbrown : brown pigment content (arbitrary unit, 0-1).
    leaf_angle : mean leaf inclination (degrees; ellipsoidal distribution).
    hotspot : hot spot parameter (leaf size over canopy height).
    soil_brightness, soil_moisture : soil spectrum from the reference dry and wet soils
        (:func:`soil_spectrum`), used when ``soil`` is None.
    geometry : sun and view angles.
    soil : optional soil reflectance (2101,) replacing the reference soils.
    leaf : optional (reflectance, transmittance) of the leaf, each (2101,), replacing the leaf model
        (``n``, ``cab``, ``car``, ``cbrown``, ``cw``, ``cm`` are then unused).
    factor : which reflectance factor: "bidirectional" (the image's; default), "directional_hemispherical",
        "hemispherical_directional" or "bihemispherical".

    All parameters broadcast against each other; the result has their broadcast shape plus the spectral
    axis, ``(..., 2101)``.
    """
    if factor not in _FACTORS:
        raise RtmError(f"factor must be one of {sorted(_FACTORS)}. Got {factor!r}")
    values = {"lai": lai, "cab": cab, "cw": cw, "cm": cm, "n": n, "car": car, "cbrown": cbrown,
              "leaf_angle": leaf_angle, "hotspot": hotspot, "soil_brightness": soil_brightness,
              "soil_moisture": soil_moisture}
    try:
        arrays = np.broadcast_arrays(*[np.asarray(v, dtype=np.float64) for v in values.values()])
    except ValueError as exc:
        raise RtmError(f"canopy parameters do not broadcast together: {exc}") from None
    arrays = dict(zip(values, arrays))
    for name, a in arrays.items():
        lo, hi = _BOUNDS[name]
        bad = ~((a >= lo) & (a <= hi))
        if bad.any():
            raise RtmError(f"{name} must lie in [{lo}, {hi}]; found {a[bad].ravel()[:5].tolist()}")
    if soil is not None:
        soil = np.asarray(soil, dtype=np.float64)
        if soil.shape != SIM_WAVELENGTHS.shape:
            raise RtmError(f"soil spectrum must have {SIM_WAVELENGTHS.size} values (400-2500 nm at 1 nm). "
                           f"Got shape {soil.shape}")
    if leaf is not None:
        leaf = tuple(np.asarray(v, dtype=np.float64) for v in leaf)
        if len(leaf) != 2 or any(v.shape != SIM_WAVELENGTHS.shape for v in leaf):
            raise RtmError(f"leaf must be (reflectance, transmittance), each of {SIM_WAVELENGTHS.size} values")
    ps = _prosail()
    code = _FACTORS[factor]
    shape = arrays["lai"].shape
    flat = {k: v.ravel() for k, v in arrays.items()}
    out = np.empty((flat["lai"].size, SIM_WAVELENGTHS.size))
    for i in range(out.shape[0]):
        p = {k: float(v[i]) for k, v in flat.items()}
        rsoil = soil if soil is not None else soil_spectrum(p["soil_brightness"], p["soil_moisture"])
        if leaf is None:
            _wl, rho, tau = ps.run_prospect(p["n"], p["cab"], p["car"], p["cbrown"], p["cw"], p["cm"],
                                            ant=0.0, prospect_version="D")
        else:
            rho, tau = leaf
        out[i] = ps.run_sail(rho, tau, p["lai"], p["leaf_angle"], p["hotspot"], geometry.sun_zenith,
                             geometry.view_zenith, geometry.relative_azimuth, typelidf=2, factor=code,
                             rsoil0=rsoil)
    return out.reshape(*shape, SIM_WAVELENGTHS.size)


def covered_bands(wavelengths: np.ndarray, fwhm: np.ndarray | None) -> np.ndarray:
    """Boolean mask of the campaign bands the simulated spectra (400-2500 nm) cover."""
    wl = np.asarray(wavelengths, dtype=np.float64)
    fw = None if fwhm is None else np.asarray(fwhm, dtype=np.float64)
    if fw is not None and np.isfinite(fw).all():
        return ~uncovered_bands(SIM_WAVELENGTHS, wl, fw)
    return ~uncovered_bands(SIM_WAVELENGTHS, wl)


def to_bands(spectra: np.ndarray, wavelengths: np.ndarray, fwhm: np.ndarray | None) -> np.ndarray:
    """Convolve simulated spectra ``(..., 2101)`` to the campaign's bands ``(..., m)``.

    Gaussian band responses where the band's FWHM is known, linear interpolation where it is not
    (see :func:`swathmill.workflows.spectral.spectra.resample`). Bands outside 400-2500 nm raise
    :class:`~swathmill.workflows.spectral.spectra.SpectralCoverageError`.
    """
    return resample(SIM_WAVELENGTHS, spectra, np.asarray(wavelengths, dtype=np.float64),
                    None if fwhm is None else np.asarray(fwhm, dtype=np.float64))
