"""Resampling spectra from one set of band centres to another.

Two pure functions, no I/O:

- :func:`resample_gaussian` convolves each source spectrum with a Gaussian spectral response per
  target band (centre and full width at half maximum), integrating over the source samples with
  trapezoid weights so irregular or descending source grids are handled.
- :func:`resample_linear` interpolates linearly at the target centres (for targets without a known
  band width).

Both work on arrays of any leading shape ``(..., n)`` with the spectral axis last, ignore NaN source
samples (the response is renormalised over the valid ones) and report target bands the source does
not cover: by raising :class:`SpectralCoverageError` (default) or by returning NaN there.

Coverage rule. A target band is covered when its centre lies inside the source range and a source
sample lies within one FWHM of the centre (Gaussian) or when the centre lies inside the source range
(linear). Wavelengths are compared with a tolerance of ``1e-6`` times the source span.
"""
from __future__ import annotations

from typing import Literal

import numpy as np
from swathmill.errors import SwathmillError

__all__ = [
    "SpectralCoverageError",
    "fwhm_to_sigma",
    "gaussian_response_matrix",
    "uncovered_bands",
    "resample_gaussian",
    "resample_linear",
    "resample",
]

FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))  # 2.3548...; a property of the Gaussian
TRUNCATE_SIGMA = 4.0  # response taken as zero beyond 4 sigma (weight < 3.4e-4 of the peak)


class SpectralCoverageError(SwathmillError, ValueError):
    """Target bands lie outside (or in a gap of) the source wavelengths."""


def fwhm_to_sigma(fwhm: np.ndarray | float) -> np.ndarray:
    """Standard deviation of a Gaussian with the given full width at half maximum."""
    return np.asarray(fwhm, dtype=np.float64) / FWHM_PER_SIGMA


def _sorted_source(src_wl: np.ndarray, src_values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    src_wl = np.asarray(src_wl, dtype=np.float64)
    values = np.asarray(src_values, dtype=np.float64)
    if src_wl.ndim != 1 or src_wl.size < 2:
        raise ValueError(f"source wavelengths must be a 1-D array of at least 2 values. Got shape {src_wl.shape}")
    if values.shape[-1] != src_wl.size:
        raise ValueError(
            f"source values have {values.shape[-1]} samples on their last axis for {src_wl.size} "
            f"source wavelengths. Got values of shape {values.shape}")
    if not np.all(np.isfinite(src_wl)):
        raise ValueError("source wavelengths contain NaN or infinite values")
    order = np.argsort(src_wl, kind="stable")
    src_wl = src_wl[order]
    dup = np.flatnonzero(np.diff(src_wl) == 0)
    if dup.size:
        raise ValueError(f"source wavelengths repeat: {src_wl[dup[:5]].tolist()}")
    return src_wl, values[..., order]


def _check_targets(dst_wl: np.ndarray, dst_fwhm: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray | None]:
    dst_wl = np.atleast_1d(np.asarray(dst_wl, dtype=np.float64))
    if dst_wl.ndim != 1:
        raise ValueError(f"target wavelengths must be 1-D. Got shape {dst_wl.shape}")
    if not np.all(np.isfinite(dst_wl)):
        raise ValueError("target wavelengths contain NaN or infinite values")
    if dst_fwhm is None:
        return dst_wl, None
    fwhm = np.broadcast_to(np.asarray(dst_fwhm, dtype=np.float64), dst_wl.shape).copy()
    bad = np.flatnonzero(~(fwhm > 0))
    if bad.size:
        raise ValueError(
            f"target FWHM must be positive and finite; band(s) {(bad + 1).tolist()[:10]} have "
            f"{fwhm[bad].tolist()[:10]}")
    return dst_wl, fwhm


def uncovered_bands(src_wl: np.ndarray, dst_wl: np.ndarray, dst_fwhm: np.ndarray | None = None) -> np.ndarray:
    """Boolean mask of target bands the source wavelengths do not cover (see the module rule).

    Parameters
    ----------
    src_wl : (n,) source wavelengths (any order).
    dst_wl : (m,) target band centres, same unit.
    dst_fwhm : (m,) target FWHM or None for linear interpolation.
    """
    src = np.sort(np.asarray(src_wl, dtype=np.float64))
    dst_wl, fwhm = _check_targets(dst_wl, dst_fwhm)
    tol = 1e-6 * max(src[-1] - src[0], 1e-12)
    out = (dst_wl < src[0] - tol) | (dst_wl > src[-1] + tol)
    if fwhm is not None:
        pos = np.clip(np.searchsorted(src, dst_wl), 1, src.size - 1)
        nearest = np.minimum(np.abs(src[pos] - dst_wl), np.abs(src[pos - 1] - dst_wl))
        out |= nearest > fwhm + tol
    return out


def _handle_uncovered(mask: np.ndarray, dst_wl: np.ndarray, src_wl: np.ndarray, on_uncovered: str) -> None:
    if on_uncovered not in ("raise", "nan"):
        raise ValueError(f"on_uncovered must be 'raise' or 'nan'. Got {on_uncovered!r}")
    if on_uncovered == "raise" and mask.any():
        idx = np.flatnonzero(mask)
        raise SpectralCoverageError(
            f"{idx.size} target band(s) are not covered by the source wavelengths "
            f"{src_wl.min():g}-{src_wl.max():g}: band(s) {(idx + 1).tolist()[:10]} at "
            f"{np.round(dst_wl[idx], 3).tolist()[:10]}")


def gaussian_response_matrix(src_wl: np.ndarray, dst_wl: np.ndarray, dst_fwhm: np.ndarray) -> np.ndarray:
    """Integration weights (n_src, n_dst) of Gaussian responses on a sorted source grid.

    Column j holds ``g_j(lambda_i) * w_i`` where ``g_j`` is the Gaussian response of target band j
    (truncated at 4 sigma) and ``w_i`` the trapezoid weight of source sample i (half the distance
    between its neighbours). Columns are not normalised: divide by the column sum over valid samples.
    """
    src = np.asarray(src_wl, dtype=np.float64)
    dst_wl, fwhm = _check_targets(dst_wl, dst_fwhm)
    if np.any(np.diff(src) <= 0):
        raise ValueError("source wavelengths must be strictly increasing here; sort them first")
    edges = np.empty(src.size + 1)
    edges[1:-1] = 0.5 * (src[1:] + src[:-1])
    edges[0], edges[-1] = src[0], src[-1]
    width = np.diff(edges)  # trapezoid weights
    sigma = fwhm_to_sigma(fwhm)
    z = (src[:, None] - dst_wl[None, :]) / sigma[None, :]
    g = np.exp(-0.5 * z * z)
    g[np.abs(z) > TRUNCATE_SIGMA] = 0.0
    return g * width[:, None]


def resample_gaussian(
    src_wl: np.ndarray,
    src_values: np.ndarray,
    dst_wl: np.ndarray,
    dst_fwhm: np.ndarray | float,
    *,
    on_uncovered: Literal["raise", "nan"] = "raise",
) -> np.ndarray:
    """Resample spectra to target bands with Gaussian spectral responses.

    ``out_j = sum_i g_j(l_i) w_i v_i / sum_i g_j(l_i) w_i`` over the valid (non-NaN) source samples,
    with ``g_j`` the Gaussian of target centre ``dst_wl[j]`` and ``dst_fwhm[j]`` and ``w_i`` the
    trapezoid weights of the source grid: a discrete form of the band's response-weighted mean
    (common practice for simulating a sensor band from a finer spectrum).

    Parameters
    ----------
    src_wl : (n,) source wavelengths, any order, same unit as the targets.
    src_values : (..., n) spectra, spectral axis last.
    dst_wl : (m,) target band centres.
    dst_fwhm : (m,) or scalar target full widths at half maximum (positive).
    on_uncovered : "raise" (default) raises :class:`SpectralCoverageError` for target bands the
        source does not cover; "nan" returns NaN there.

    Returns
    -------
    (..., m) float64 array.
    """
    src, values = _sorted_source(src_wl, src_values)
    dst_wl, fwhm = _check_targets(dst_wl, dst_fwhm)
    uncovered = uncovered_bands(src, dst_wl, fwhm)
    _handle_uncovered(uncovered, dst_wl, src, on_uncovered)
    weights = gaussian_response_matrix(src, dst_wl, fwhm)
    valid = np.isfinite(values)
    lead = values.shape[:-1]
    flat = np.where(valid, values, 0.0).reshape(-1, src.size)
    num = flat @ weights
    if valid.all():
        den = np.broadcast_to(weights.sum(axis=0), num.shape)
    else:
        den = valid.reshape(-1, src.size).astype(np.float64) @ weights
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)
    out[:, uncovered] = np.nan
    return out.reshape(*lead, dst_wl.size)


def resample_linear(
    src_wl: np.ndarray,
    src_values: np.ndarray,
    dst_wl: np.ndarray,
    *,
    on_uncovered: Literal["raise", "nan"] = "raise",
) -> np.ndarray:
    """Resample spectra to target centres by linear interpolation (NaN source samples skipped).

    Parameters
    ----------
    src_wl : (n,) source wavelengths, any order.
    src_values : (..., n) spectra, spectral axis last.
    dst_wl : (m,) target centres.
    on_uncovered : "raise" or "nan" for targets outside the source range.

    Returns
    -------
    (..., m) float64 array.
    """
    src, values = _sorted_source(src_wl, src_values)
    dst_wl, _ = _check_targets(dst_wl)
    uncovered = uncovered_bands(src, dst_wl)
    _handle_uncovered(uncovered, dst_wl, src, on_uncovered)
    lead = values.shape[:-1]
    flat = values.reshape(-1, src.size)
    tol = 1e-6 * (src[-1] - src[0])
    x = np.clip(dst_wl, src[0], src[-1]) if tol > 0 else dst_wl  # within tolerance of the ends
    out = np.empty((flat.shape[0], dst_wl.size))
    finite_rows = np.all(np.isfinite(flat), axis=1)
    if finite_rows.any():
        # vectorised path for rows without gaps
        pos = np.clip(np.searchsorted(src, x, side="right") - 1, 0, src.size - 2)
        t = (x - src[pos]) / (src[pos + 1] - src[pos])
        rows = flat[finite_rows]
        out[finite_rows] = rows[:, pos] * (1.0 - t) + rows[:, pos + 1] * t
    for r in np.flatnonzero(~finite_rows):
        ok = np.isfinite(flat[r])
        if ok.sum() < 2:
            out[r] = np.nan
            continue
        sw, sv = src[ok], flat[r, ok]
        res = np.interp(x, sw, sv)
        res[(x < sw[0]) | (x > sw[-1])] = np.nan
        out[r] = res
    out[:, uncovered] = np.nan
    return out.reshape(*lead, dst_wl.size)


def resample(
    src_wl: np.ndarray,
    src_values: np.ndarray,
    dst_wl: np.ndarray,
    dst_fwhm: np.ndarray | float | None = None,
    *,
    on_uncovered: Literal["raise", "nan"] = "raise",
) -> np.ndarray:
    """Gaussian resampling where the target FWHM is known and finite, linear interpolation elsewhere.

    ``dst_fwhm`` may be None (all linear), a scalar, or an (m,) array with NaN for bands of unknown
    width (those bands are interpolated linearly).
    """
    dst_wl, _ = _check_targets(dst_wl)
    if dst_fwhm is None:
        return resample_linear(src_wl, src_values, dst_wl, on_uncovered=on_uncovered)
    fwhm = np.broadcast_to(np.asarray(dst_fwhm, dtype=np.float64), dst_wl.shape)
    known = np.isfinite(fwhm)
    if known.all():
        return resample_gaussian(src_wl, src_values, dst_wl, fwhm, on_uncovered=on_uncovered)
    if not known.any():
        return resample_linear(src_wl, src_values, dst_wl, on_uncovered=on_uncovered)
    src, values = _sorted_source(src_wl, src_values)
    out = np.empty(values.shape[:-1] + (dst_wl.size,))
    out[..., known] = resample_gaussian(src, values, dst_wl[known], fwhm[known], on_uncovered=on_uncovered)
    out[..., ~known] = resample_linear(src, values, dst_wl[~known], on_uncovered=on_uncovered)
    return out
