"""What the three classifiers share: their error, their parameter object, class colours, band and
pixel plumbing of the kernels, and the training samples gathered tile by tile.

Parameter object
    :class:`ClassifierParams` is every classifier step's :attr:`swathmill.tiles.step.Step.params`: the
    step's typed settings section (:class:`~swathmill.workflows.methods.classify.sam.SamSettings`,
    ``SffSettings`` or ``SvmSettings``; defaults and bounds live on their fields only) plus what the
    factory derived from the references when it built the step (reference names, class names, the
    class of each reference, colours). Kernels, finalizers and output declarations read its
    attributes; the step key hashes its canonical dump.

Class codes and colours
    uint8 class maps in the codes of the run's legend (:mod:`.legend`): 0 unclassified, 1..k the
    legend's classes, 255 nodata. A step built without a legend makes one from its own references
    (library colours kept, else the colour-blind-safe default palette of
    :mod:`swathmill.tiles.palette`). :data:`TOL_MUTED` and :func:`class_palette` remain for figures.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator, Mapping, Sequence

import numpy as np
from pydantic import BaseModel, ValidationError

from swathmill.errors import SwathmillError
from swathmill.tiles.palette import CLASS_NODATA, UNCLASSIFIED
from swathmill.tiles.paths import resolve
from swathmill.tiles.samples import gather
from swathmill.tiles.step import Block, InputMeta, OutputSpec
from swathmill.workflows.inputs.library import hex_to_rgb
from swathmill.workflows.inputs.reference import GroundReferenceConfig, Split, SampleTable, load_samples
from swathmill.workflows.params import Section, ctx_get, validation_message
from swathmill.workflows.roles import Role

__all__ = [
    "ClassifyError",
    "ClassifierParams",
    "TOL_MUTED",
    "class_palette",
    "check_ranges",
    "field_default",
    "make_settings",
    "training_mask",
    "accumulate_samples",
    "gathered_samples",
    "input_coord",
    "input_wavelengths",
    "exclude_mask",
    "pixel_chunks",
    "blank",
    "class_spec",
    "to_legend_codes",
    "band_names",
    "resolve_path",
    "load_reference_samples",
]


class ClassifyError(SwathmillError, ValueError):
    """Bad input to a classifier; the message names the class, reference, band or key at fault."""


# Paul Tol's muted qualitative scheme (SRON/EPS/TN/09-002; from memory): rose, indigo, sand, green,
# cyan, wine, teal, olive, purple
TOL_MUTED = ("#CC6677", "#332288", "#DDCC77", "#117733", "#88CCEE", "#882255", "#44AA99", "#999933", "#AA4499")


def class_palette(n: int) -> tuple[tuple[int, int, int], ...]:
    """RGB colours for classes 1..n from :data:`TOL_MUTED` (repeating beyond nine)."""
    return tuple(hex_to_rgb(TOL_MUTED[i % len(TOL_MUTED)]) for i in range(n))


@dataclass(frozen=True)
class ClassifierParams:
    """The parameter object of a classifier step (its ``Step.params``).

    Attributes
    ----------
    step : the step's name (quoted in errors).
    settings : the step's typed settings section (SAM, SFF or SVM).
    names : one name per reference spectrum (the bands of the angle, scale, RMSE and R2 outputs);
        for the SVM, the class names.
    class_names : the step's own classes 1..k (its references' classes, or the training labels).
    ref_class : the step's own class (1..k) of each reference.
    legend : the run's legend (:class:`~swathmill.workflows.methods.classify.legend.Legend`); the
        class map is written in its codes.
    class_codes : the legend code of each of the step's own classes 1..k.
    """

    step: str
    settings: Section
    names: tuple[str, ...]
    class_names: tuple[str, ...]
    ref_class: tuple[int, ...]
    legend: Any
    class_codes: tuple[int, ...]

    @classmethod
    def make(cls, step: str, settings: Section, names: Sequence[str], class_names: Sequence[str],
             ref_class: Sequence[int], legend: Any) -> "ClassifierParams":
        """The parameter object, the class codes looked up in ``legend`` (a :class:`.legend.Legend`)."""
        return cls(step=step, settings=settings, names=tuple(names), class_names=tuple(class_names),
                   ref_class=tuple(int(c) for c in ref_class), legend=legend,
                   class_codes=legend.codes(class_names, f"step {step!r}"))


def check_ranges(v: Sequence[tuple[float, float]]) -> list[tuple[float, float]]:
    """Wavelength ranges ``[low, high]`` with low < high (a field validator's body)."""
    for lo, hi in v:
        if not lo < hi:
            raise ValueError(f"a wavelength range is [low, high] with low < high. Got [{lo}, {hi}]")
    return list(v)


def field_default(model: type[BaseModel], name: str) -> Any:
    """The default declared on a settings field (so a plain function's default is that one declaration)."""
    return model.model_fields[name].get_default(call_default_factory=True)


def make_settings(model: type[Section], step: str, settings: Section | None, fields: Mapping[str, Any]) -> Section:
    """The settings of a step from a settings object or from keyword fields (not both).

    Raises :class:`ClassifyError` naming the step and the key(s) at fault when a field is unknown or
    out of its bounds.
    """
    if settings is not None:
        if fields:
            raise ClassifyError(f"step {step!r}: give the settings object or keyword settings, not both. "
                                f"Got settings and {sorted(fields)}")
        if not isinstance(settings, model):
            raise ClassifyError(f"step {step!r}: settings must be a {model.__name__}. Got {type(settings).__name__}")
        if type(settings) is model:
            return settings
        return model.model_validate(settings.model_dump(include=set(model.model_fields)))
    try:
        return model(**fields)
    except ValidationError as e:
        raise ClassifyError(f"step {step!r}: bad setting(s): {validation_message(e)}") from None


def training_mask(table: SampleTable, idx: np.ndarray | None = None) -> np.ndarray:
    """True for samples that may shape a classifier (train or unassigned), False for validation ones."""
    split = table.split if idx is None else table.split[idx]
    return split != Split.VALIDATION


# samples gathered tile by tile ---------------------------------------------------------------------
def accumulate_samples(block: Block) -> dict:
    """Spectra at the sample pixels inside this tile's core (each sample counted once)."""
    return gather(block, "x", block.static["samples.row"], block.static["samples.col"], np.float32)


def gathered_samples(acc: dict | None, table: SampleTable, n_bands: int, step: str
                     ) -> tuple[np.ndarray, np.ndarray, dict]:
    """Samples sorted by their index in the table (independent of tiling) and a report of skipped ones."""
    if acc is None:
        acc = {"idx": np.empty(0, np.int64), "X": np.empty((0, n_bands), np.float32), "bad": np.empty(0, np.int64)}
    order = np.argsort(acc["idx"], kind="stable")
    idx, X = acc["idx"][order], acc["X"][order]
    bad = np.sort(acc["bad"])
    report = {"n_samples": int(len(table)), "n_used": int(idx.size), "n_nodata": int(bad.size),
              "nodata_features": sorted({int(f) for f in table.feature[bad]})[:50]}
    if bad.size:
        warnings.warn(f"step {step!r}: {bad.size} reference pixel(s) lie on nodata or non-finite values and are "
                      f"left out (features {report['nodata_features'][:10]})", UserWarning, stacklevel=2)
    return idx, X.astype(np.float64), report


# bands and pixels -----------------------------------------------------------------------------------
def input_coord(spec: OutputSpec, name: str, ref: str) -> np.ndarray | None:
    """A per-band coordinate of an input as float64 (None when absent; None values become NaN)."""
    v = spec.coords.get(name)
    if v is None:
        return None
    try:
        return np.array([float(x) if x is not None else np.nan for x in v], dtype=np.float64)
    except (TypeError, ValueError):
        raise ClassifyError(f"input {ref!r}: coordinate {name!r} is not numeric") from None


def input_wavelengths(meta: Mapping[str, InputMeta], need: str) -> tuple[np.ndarray, np.ndarray | None]:
    """Wavelengths (required, finite) and FWHM (or None) of input ``x``; ``need`` says who asks."""
    m = meta["x"]
    wl = input_coord(m.spec, "wavelength", m.ref)
    if wl is None or not np.isfinite(wl).all():
        raise ClassifyError(f"{need} needs band wavelengths: input {m.ref!r} has no numeric 'wavelength' "
                            "coordinate (use reflectance, not transformed components)")
    return wl, input_coord(m.spec, "fwhm", m.ref)


def exclude_mask(wl: np.ndarray | None, exclude: Sequence[Sequence[float]], ref: str) -> np.ndarray:
    """Bands kept after leaving out the ``exclude`` ranges (nm); an empty mask when nothing is excluded."""
    if not exclude:
        return np.ones(0 if wl is None else wl.size, dtype=bool)
    if wl is None:
        raise ClassifyError(f"excluded wavelength ranges need a 'wavelength' coordinate on input {ref!r}")
    keep = np.ones(wl.size, dtype=bool)
    for lo, hi in exclude:
        keep &= ~((wl >= lo) & (wl <= hi))
    if keep.sum() < 2:
        raise ClassifyError(f"excluding {[list(r) for r in exclude]} nm leaves {int(keep.sum())} band(s) of "
                            f"input {ref!r}")
    return keep


CHUNK = 16384  # pixels per work chunk in the kernels: bounds the float64 workspace to a few tens of MB


def pixel_chunks(block: Block, band_index: np.ndarray | None = None, chunk: int = CHUNK
                 ) -> Iterator[tuple[int, int, np.ndarray, np.ndarray]]:
    """Yield (start, stop, X (b, c) float64, ok (c,)) over the flattened padded window, bands first.

    ``ok`` marks valid pixels whose selected bands are all finite; columns of other pixels hold
    whatever the input holds (callers mask their results with ``ok``).
    """
    x = block.data["x"]
    flat = x.reshape(x.shape[0], -1)
    valid = block.valid.ravel()
    sel = None if band_index is None else np.asarray(band_index)
    for s in range(0, flat.shape[1], chunk):
        e = min(s + chunk, flat.shape[1])
        X = (flat[:, s:e] if sel is None else flat[sel, s:e]).astype(np.float64)
        ok = valid[s:e] & np.isfinite(X.sum(axis=0))  # NaN or inf in any band makes the sum non-finite
        yield s, e, X, ok


def blank(m: int, shape: tuple[int, int], fill: Any, dtype: Any) -> np.ndarray:
    """An (m, rows * cols) output buffer filled with ``fill``."""
    return np.full((m, shape[0] * shape[1]), fill, dtype=dtype)


def to_legend_codes(local: np.ndarray, params: ClassifierParams) -> np.ndarray:
    """Class codes of the step's own classes (0 unclassified, 1..k) as the legend's codes (uint8)."""
    lut = np.array([UNCLASSIFIED, *params.class_codes], dtype=np.uint8)
    return lut[np.asarray(local, dtype=np.intp)]


def class_spec(params: ClassifierParams) -> OutputSpec:
    """The declaration of a classifier's class map: uint8 in the legend's codes (every legend class
    named and coloured, also those this step cannot produce), 0 unclassified, 255 nodata."""
    legend = params.legend
    produced = [legend.names[c - 1] for c in sorted(set(params.class_codes))]
    return OutputSpec(bands=("class",), dtype="uint8", nodata=CLASS_NODATA, kind="categorical",
                      role=Role.CLASS_MAP, class_names=legend.names, colors=legend.colors,
                      attrs={"unclassified": UNCLASSIFIED, "classes_produced": produced})


def band_names(names: Sequence[str]) -> tuple[str, ...]:
    """Band names of a per-reference or per-class output."""
    return tuple(str(n) for n in names)


# configuration helpers --------------------------------------------------------------------------------
def resolve_path(p: str, ctx: Any) -> Path:
    """``p`` as given when absolute, else relative to the factory context's ``base_dir`` (if any)."""
    return resolve(ctx_get(ctx, "base_dir"), p)


def load_reference_samples(cfg: GroundReferenceConfig, ctx: Any) -> SampleTable:
    """The ground reference of a section as samples on the mosaic grid (``ctx.grid`` is required)."""
    grid = ctx_get(ctx, "grid")
    if grid is None:
        raise ClassifyError("ground reference needs the mosaic grid: build_steps was called without ctx.grid")
    table, _issues = load_samples(cfg, grid, base_dir=ctx_get(ctx, "base_dir"), valid=ctx_get(ctx, "valid"))
    return table
