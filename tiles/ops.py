"""Generic steps that know nothing of the data's meaning: per-pixel band transforms and k x k filters.

They prove the engine (halo handling, tiled equals untiled) and are reused by science steps: the modal
filter cleans class maps, the band transform selects or rescales bands.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from .step import Block, InputMeta, OutputSpec, Step, StepError

__all__ = ["BandTransformParams", "FilterParams", "ModalFilterParams", "band_transform_step", "mean_filter_step",
           "modal_filter_step", "modal_filter", "mean_filter"]


# parameter sets ------------------------------------------------------------------------------------
@dataclass(frozen=True)
class BandTransformParams:
    """Parameters of :func:`band_transform_step`: ``out = in[bands] * scale + offset``.

    ``bands`` names the input bands kept, in order (None keeps all); ``dtype`` is the output's dtype.
    """

    scale: float = 1.0
    offset: float = 0.0
    bands: tuple[str, ...] | None = None
    dtype: str = "float32"

    def __post_init__(self) -> None:
        if self.bands is not None:
            object.__setattr__(self, "bands", tuple(self.bands))
        try:
            np.dtype(self.dtype)
        except TypeError as e:
            raise StepError(f"band_transform: dtype must be a numpy dtype name. Got {self.dtype!r}") from e


@dataclass(frozen=True)
class FilterParams:
    """Parameters of the k x k mean filter: ``size`` is the odd side of the window in pixels (>= 1)."""

    size: int = 3

    def __post_init__(self) -> None:
        if isinstance(self.size, bool) or int(self.size) != self.size or self.size < 1 or self.size % 2 == 0:
            raise StepError(f"filter size must be an odd number of pixels >= 1. Got {self.size}")
        object.__setattr__(self, "size", int(self.size))


@dataclass(frozen=True)
class ModalFilterParams(FilterParams):
    """Parameters of the k x k modal filter: ``size`` as for :class:`FilterParams`, and ``n_classes``,
    the largest class value of the map (the input's nodata never votes)."""

    n_classes: int | None = None

    def __post_init__(self) -> None:
        super().__post_init__()
        if self.n_classes is None:
            raise StepError("modal_filter_step needs n_classes (the largest class value)")
        if int(self.n_classes) < 1:
            raise StepError(f"modal filter: n_classes must be >= 1. Got {self.n_classes}")
        object.__setattr__(self, "n_classes", int(self.n_classes))


# band transform ------------------------------------------------------------------------------------
def _band_transform_kernel(block: Block, model) -> dict:
    x = block.data["input"]
    idx = block.static.get("bands")
    if idx is not None:
        x = x[np.asarray(idx)]
    return {"output": x * np.float32(block.params.scale) + np.float32(block.params.offset)}


def _band_transform_outputs(meta: dict[str, InputMeta], model, params: BandTransformParams) -> dict[str, OutputSpec]:
    spec = meta["input"].spec
    bands = list(spec.bands)
    sel = params.bands
    if sel is not None:
        missing = [b for b in sel if b not in bands]
        if missing:
            raise StepError(f"band_transform: bands {missing} are not in the input (it has {bands[:5]}...)")
        idx = [bands.index(b) for b in sel]
    else:
        idx = list(range(len(bands)))
    coords = {k: tuple(v[i] for i in idx) for k, v in spec.coords.items()}
    return {"output": OutputSpec(bands=tuple(bands[i] for i in idx), dtype=params.dtype,
                                 nodata=np.nan if params.dtype.startswith("float") else 0, coords=coords)}


def band_transform_step(name: str, input_ref: str, *, scale: float = 1.0, offset: float = 0.0,
                        bands: list[str] | None = None, band_index: list[int] | None = None,
                        dtype: str = "float32") -> Step:
    """out = in[bands] * scale + offset, per pixel. ``band_index`` must match ``bands`` in the input."""
    return Step(name=name, kernel=_band_transform_kernel, outputs=_band_transform_outputs,
                inputs={"input": input_ref},
                params=BandTransformParams(scale=scale, offset=offset,
                                           bands=tuple(bands) if bands is not None else None, dtype=dtype),
                static={"bands": band_index} if band_index is not None else {})


# k x k filters -------------------------------------------------------------------------------------
def mean_filter(x: np.ndarray, valid: np.ndarray, size: int) -> np.ndarray:
    """k x k mean over valid pixels of each band (nodata neither counted nor propagated)."""
    w = valid.astype(np.float64)
    num = np.stack([ndimage.uniform_filter(np.where(valid, b, 0.0).astype(np.float64), size, mode="constant")
                    for b in x])
    den = ndimage.uniform_filter(w, size, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        out = num / den
    out[:, den <= 0] = np.nan
    return out.astype(np.float32)


def _mean_kernel(block: Block, model) -> dict:
    return {"output": mean_filter(block.data["input"], block.valid, block.params.size)}


def modal_filter(classes: np.ndarray, size: int, n_classes: int, ignore: int = 0) -> np.ndarray:
    """k x k majority filter of an integer class map with values 0..n_classes; ``ignore`` (nodata, which
    may lie outside 0..n_classes) never votes and stays as it is.

    Ties go to the pixel's own class when it is among the tied, else to the smallest class value.
    """
    values = np.array([c for c in range(n_classes + 1) if c != ignore], dtype=np.int64)
    counts = np.stack([ndimage.uniform_filter((classes == c).astype(np.float32), size, mode="constant")
                       for c in values])
    counts = np.rint(counts * size * size).astype(np.int32)
    best = counts.max(axis=0)
    pos = np.searchsorted(values, np.clip(classes, 0, n_classes))
    pos = np.clip(pos, 0, values.size - 1)
    own = np.take_along_axis(counts, pos[None].astype(np.intp), 0)[0]
    out = values[np.argmax(counts, axis=0)].astype(classes.dtype)
    keep = (own == best) & (classes != ignore)
    out[keep] = classes[keep]
    out[classes == ignore] = ignore
    return out


def _modal_kernel(block: Block, model) -> dict:
    x = block.data["input"]
    nd = block.meta["input"].spec.nodata
    ignore = 0 if nd is None or isinstance(nd, str) or (isinstance(nd, float) and nd != nd) else int(nd)
    ok = block.valid & (np.isfinite(x[0]) if x.dtype.kind == "f" else True)
    c = np.where(ok, np.nan_to_num(x[0]) if x.dtype.kind == "f" else x[0], ignore).astype(np.int32)
    return {"output": modal_filter(c, block.params.size, block.params.n_classes, ignore)[None]}


def _modal_outputs(meta: dict[str, InputMeta], model, params) -> dict[str, OutputSpec]:
    spec = meta["input"].spec
    if spec.kind != "categorical":
        raise StepError(f"modal filter needs a class map; input {meta['input'].ref!r} is {spec.kind}")
    return {"output": OutputSpec(bands=spec.bands[:1], dtype=spec.dtype, nodata=spec.nodata, kind="categorical",
                                 role=spec.role, class_names=spec.class_names, colors=spec.colors,
                                 attrs=dict(spec.attrs))}


def mean_filter_step(name: str, input_ref: str, size: int = 3) -> Step:
    """k x k mean over valid pixels, with a halo of size // 2 so tile borders leave no seam."""
    params = FilterParams(size=size)
    return Step(name=name, kernel=_mean_kernel, outputs=_MeanOutputs(), inputs={"input": input_ref},
                params=params, halo=params.size // 2)


class _MeanOutputs:
    """Picklable outputs callable of the mean filter."""

    def __call__(self, meta, model, params):
        s = meta["input"].spec
        return {"output": OutputSpec(bands=s.bands, dtype="float32", nodata=float("nan"), coords=s.coords,
                                     role=s.role, attrs={k: v for k, v in s.attrs.items()
                                                         if k == "units" or k.endswith("_units")})}


def modal_filter_step(name: str, input_ref: str, size: int = 3, n_classes: int | None = None) -> Step:
    """Majority filter of a class map, with a halo of size // 2 so tile borders leave no seam."""
    params = ModalFilterParams(size=size, n_classes=n_classes)
    return Step(name=name, kernel=_modal_kernel, outputs=_modal_outputs, inputs={"input": input_ref},
                params=params, halo=params.size // 2, decode=False)
