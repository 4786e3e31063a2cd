"""Spectral feature fitting: the fit, its R2, the class rule, the tiled kernel and the step.

Spectral feature fitting (Clark, Gallagher and Swayze, 1990; scale-and-RMSE form, common practice)
    Pixels and references are continuum-removed over one wavelength range (upper convex hull,
    :mod:`swathmill.workflows.spectral.continuum`); ``d = 1 - CR`` is the feature depth. Per reference,
    the least-squares scale without intercept ``s = (d_r . d_o) / (d_r . d_r)`` maps the reference's
    depth onto the pixel's, and ``RMSE = sqrt(mean((d_o - s d_r)^2))`` (both the method's published
    outputs).

Fit figure: the coefficient of determination of the continuum-removed fit
    ``R2 = 1 - sum((d_o - s d_r)^2) / sum((d_o - mean(d_o))^2)`` over the feature's bands: the share
    of the pixel's depth variation that the scaled reference explains (1 a perfect match, 0 no better
    than a flat line at the pixel's mean depth, negative worse). NaN for a pixel whose depth does not
    vary over the feature (no feature to fit). A reference is eligible when ``s > min_scale`` and, if
    set, ``RMSE <= max_rmse`` and ``R2 >= min_r2``; the pixel takes the class of the eligible
    reference with the highest R2, else 0 (unclassified).

Step outputs: ``classes`` (legend codes), ``scale`` (1), ``rmse`` (reflectance, continuum-removed),
``r2`` (1) (one band per reference each).
"""
from __future__ import annotations

from typing import Any, Mapping

import numpy as np
from pydantic import Field, field_validator

from swathmill.tiles.step import Block, InputMeta, OutputSpec, Step
from swathmill.workflows.inputs.library import SpectralLibrary
from swathmill.workflows.inputs.reference import SampleTable
from swathmill.workflows.params import Section
from swathmill.workflows.roles import Role
from swathmill.workflows.spectral.continuum import continuum_removed, range_mask

from .references import ReferenceSpectraConfig, reference_set, reference_spectra
from .legend import Legend
from .shared import (ClassifierParams, ClassifyError, band_names, blank, check_ranges, class_spec, field_default,
                     input_wavelengths, make_settings, pixel_chunks, to_legend_codes)

__all__ = [
    "SffSettings",
    "SffConfig",
    "sff_fit",
    "sff_r2",
    "assign_best_fit",
    "sff_step",
]


# settings ------------------------------------------------------------------------------------------
class SffSettings(Section):
    """The parameters of a spectral feature fitting step (defaults and bounds declared here only)."""

    range: tuple[float, float] = Field(description="wavelength range of the feature (nm), [low, high]")
    min_scale: float = 0.0
    max_rmse: float | None = Field(None, gt=0)
    min_r2: float | None = Field(None, le=1, description="least R2 of the continuum-removed fit for a class")
    exclude: list[tuple[float, float]] = Field(default_factory=list)

    @field_validator("exclude")
    @classmethod
    def _exclude(cls, v: list[tuple[float, float]]) -> list[tuple[float, float]]:
        return check_ranges(v)

    @field_validator("range")
    @classmethod
    def _range(cls, v: tuple[float, float]) -> tuple[float, float]:
        return check_ranges([v])[0]


class SffConfig(SffSettings):
    """Spectral feature fitting step. YAML::

        sff:
          input: mosaic/reflectance
          references: {library: libraries/site.csv, materials: [kaolinite, muscovite]}
          range: [2120, 2250]
          max_rmse: 0.02
    """

    name: str = "sff"
    input: str = "mosaic/reflectance"
    references: ReferenceSpectraConfig


# the maths -----------------------------------------------------------------------------------------
def sff_fit(obs_depth: np.ndarray, ref_depth: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares scale (no intercept) and RMSE of each reference depth against each pixel depth.

    Parameters
    ----------
    obs_depth : (n, k) ``1 - CR`` of the pixels over the feature.
    ref_depth : (m, k) ``1 - CR`` of the references over the same bands.

    Returns
    -------
    scale, rmse : (n, m) float64. A reference with no depth (all zeros) gives scale NaN.
    """
    d_o = np.asarray(obs_depth, dtype=np.float64)
    d_r = np.asarray(ref_depth, dtype=np.float64)
    if d_o.ndim != 2 or d_r.ndim != 2 or d_o.shape[1] != d_r.shape[1]:
        raise ClassifyError(f"depths must be (n, k) and (m, k). Got {d_o.shape} and {d_r.shape}")
    rr = np.einsum("mk,mk->m", d_r, d_r)
    n, m = d_o.shape[0], d_r.shape[0]
    scale = np.full((n, m), np.nan)
    rmse = np.full((n, m), np.nan)
    for j in range(m):
        if not rr[j] > 0:
            continue
        s = d_o @ d_r[j] / rr[j]
        res = d_o - s[:, None] * d_r[j][None, :]
        scale[:, j] = s
        rmse[:, j] = np.sqrt(np.mean(res * res, axis=1))
    return scale, rmse


def sff_r2(obs_depth: np.ndarray, rmse: np.ndarray) -> np.ndarray:
    """Coefficient of determination of each fit: ``1 - SS_res / SS_tot``.

    Parameters
    ----------
    obs_depth : (n, k) ``1 - CR`` of the pixels over the feature.
    rmse : (n, m) RMSE of the fits (:func:`sff_fit`), so ``SS_res = k RMSE^2``.

    Returns
    -------
    (n, m) float64; ``SS_tot = sum((d_o - mean(d_o))^2)`` per pixel; NaN where ``SS_tot`` is zero.
    """
    d_o = np.asarray(obs_depth, dtype=np.float64)
    rmse = np.asarray(rmse, dtype=np.float64)
    if d_o.ndim != 2 or rmse.ndim != 2 or rmse.shape[0] != d_o.shape[0]:
        raise ClassifyError(f"depths (n, k) and RMSE (n, m) must share n. Got {d_o.shape} and {rmse.shape}")
    k = d_o.shape[1]
    ss_tot = np.sum((d_o - d_o.mean(axis=1, keepdims=True)) ** 2, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        r2 = 1.0 - k * rmse * rmse / ss_tot[:, None]
    r2[~(ss_tot > 0)] = np.nan
    return r2


def assign_best_fit(r2: np.ndarray, scale: np.ndarray, rmse: np.ndarray, ref_class: np.ndarray, *,
                    min_scale: float = field_default(SffSettings, "min_scale"), max_rmse: float | None = None,
                    min_r2: float | None = None) -> np.ndarray:
    """Class code (uint8) of the eligible reference with the highest R2, 0 where none is eligible.

    ``max_rmse`` and ``min_r2`` of None set no limit; ``min_scale``'s default is :class:`SffSettings`'.
    """
    score = np.asarray(r2, dtype=np.float64)
    ok = np.isfinite(score) & np.isfinite(scale) & (np.asarray(scale) > min_scale)
    if max_rmse is not None:
        ok &= np.asarray(rmse) <= max_rmse
    if min_r2 is not None:
        ok &= score >= min_r2
    s = np.where(ok, score, -np.inf)
    j = np.argmax(s, axis=1) if s.shape[1] else np.zeros(s.shape[0], int)
    any_ok = ok.any(axis=1)
    out = np.zeros(score.shape[0], dtype=np.uint8)
    out[any_ok] = np.asarray(ref_class)[j[any_ok]]
    return out


# the step ------------------------------------------------------------------------------------------
def _finalize_sff(acc: dict | None, params: ClassifierParams, meta: Mapping[str, InputMeta], *,
                  library: SpectralLibrary | None, table: SampleTable | None) -> dict:
    """References on the feature's bands (less the excluded ranges) and their continuum-removed depth."""
    settings: SffSettings = params.settings
    refs, keep, model = reference_spectra(acc, params, meta, library=library, table=table)
    wl_all, _ = input_wavelengths(meta, "spectral feature fitting")
    lo, hi = settings.range
    sel = np.flatnonzero(range_mask(wl_all, (lo, hi)) & (keep if keep.size else True))
    cr, _ = continuum_removed(wl_all[sel], refs[:, sel])
    depth = 1.0 - cr
    flat = np.flatnonzero(~(np.abs(depth).max(axis=1) > 0))
    if flat.size:
        raise ClassifyError(
            f"step {params.step!r}: reference(s) {[params.names[i] for i in flat]} have no absorption feature "
            f"over {lo:g}-{hi:g} nm (continuum-removed depth is zero)")
    model["ref_depth"] = depth
    model["band_index"] = sel.astype(np.int64)
    model["references"] = refs[:, sel]
    return model


def _sff_kernel(block: Block, model: dict) -> dict:
    p: ClassifierParams = block.params
    settings: SffSettings = p.settings
    shape = block.valid.shape
    sel = np.asarray(model["band_index"])
    ref_depth = np.asarray(model["ref_depth"], dtype=np.float64)
    ref_class = np.asarray(p.ref_class)
    m = ref_depth.shape[0]
    wl, _ = input_wavelengths(block.meta, "spectral feature fitting")
    cls = blank(1, shape, 0, np.uint8)
    out = {k: blank(m, shape, np.nan, np.float32) for k in ("scale", "rmse", "r2")}
    for s, e, X, ok in pixel_chunks(block, sel):
        if not ok.any():
            continue
        cr, _ = continuum_removed(wl[sel], X[:, ok].T)
        d_o = 1.0 - cr
        scale, rmse = sff_fit(d_o, ref_depth)
        r2 = sff_r2(d_o, rmse)
        cols = np.arange(s, e)[ok]
        out["scale"][:, cols] = scale.T
        out["rmse"][:, cols] = rmse.T
        out["r2"][:, cols] = r2.T
        cls[0, cols] = assign_best_fit(r2, scale, rmse, ref_class, min_scale=settings.min_scale,
                                       max_rmse=settings.max_rmse, min_r2=settings.min_r2)
    res = {k: v.reshape(m, *shape) for k, v in out.items()}
    res["classes"] = to_legend_codes(cls, p).reshape(1, *shape)
    return res


def _sff_outputs(meta: Mapping[str, InputMeta], model: dict | None, params: ClassifierParams
                 ) -> dict[str, OutputSpec]:
    names = band_names(params.names)
    lo, hi = params.settings.range
    rng = f"{lo:g}-{hi:g} nm"
    return {"classes": class_spec(params),
            "scale": OutputSpec(bands=names, dtype="float32", nodata=float("nan"), role=Role.SCORE,
                                attrs={"quantity": "feature depth scale", "units": "1", "range": rng}),
            "rmse": OutputSpec(bands=names, dtype="float32", nodata=float("nan"), role=Role.DIAGNOSTIC,
                               attrs={"quantity": "feature fit RMSE (continuum-removed reflectance)",
                                      "units": "1", "range": rng}),
            "r2": OutputSpec(bands=names, dtype="float32", nodata=float("nan"), role=Role.SCORE,
                             attrs={"quantity": "coefficient of determination R2 of the continuum-removed fit",
                                    "units": "1", "range": rng})}


def sff_step(name: str, input_ref: str, *, wl_range: tuple[float, float] | None = None,
             library: SpectralLibrary | None = None, samples: SampleTable | None = None,
             settings: SffSettings | None = None, legend: Legend | None = None, **fields: Any) -> Step:
    """Spectral feature fitting over a wavelength range against library or image-derived references.

    Parameters
    ----------
    name, input_ref : the step's name and the "step/output" it classifies.
    wl_range : the feature's range (low, high) in nm (the settings' ``range``).
    library, samples : the references: exactly one of a spectral library or ground reference samples.
    settings : an :class:`SffSettings` (or a section derived from it); or its fields as keywords:
        ``min_scale``, ``max_rmse``, ``min_r2``, ``exclude``.
    legend : the run's legend (the class map's codes); default: a legend of these references alone.
    """
    if wl_range is not None:
        fields["range"] = wl_range
    cfg: SffSettings = make_settings(SffSettings, name, settings, fields)
    refs = reference_set(library, samples, name)
    return Step(name=name, kernel=_sff_kernel, outputs=_sff_outputs, inputs={"x": input_ref},
                params=refs.params(name, cfg, legend), fit=refs.fit(_finalize_sff), static=refs.static,
                version="2")
