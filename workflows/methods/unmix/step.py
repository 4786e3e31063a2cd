"""The linear unmixing step: its settings and configuration section, endmember sources, kernel, outputs, fit.

:func:`unmix_step` declares the engine step (outputs ``abundance``: one float32 band per endmember,
named after it; ``rmse``; ``sum`` for the unconstrained variant). Its fit phase settles the endmember
matrix in the input's space before any tile is unmixed, and saves it in the model (so it is hashed into
the step key):

``library``     resampled to the input's ``wavelength`` (and ``fwhm``) coordinates; no tile is read. On
                MNF/PCA components the library is first resampled to the bands the transform takes and
                then moved into component space by that transform: the one given to :func:`unmix_step`,
                or else the one the components publish in their output attributes
                (``attrs["forward_transform"]``, see :mod:`swathmill.workflows.methods.mnf`), read from
                the input's metadata when the step is fitted.
``samples``     mean spectrum of each ground-reference class (training and unassigned samples).
``image``       extracted by :mod:`swathmill.workflows.methods.endmembers` (candidates per tile, global
                selection); the endmembers take the input's spectra at the chosen pixels.
``endmembers``  a matrix already in the input's space; no tile is read.

The step's parameter object is :class:`UnmixParams`: the step name, the :class:`UnmixSettings` (variant,
shade, checks; their defaults and bounds are declared there only), the endmember source, and the
extraction settings or an explicit transform where they apply. :class:`UnmixConfig` is the YAML section
and :func:`build_steps` its factory.
"""
from __future__ import annotations

import functools
import hashlib
import math
import warnings
from collections import OrderedDict
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Literal, Mapping, Sequence

import numpy as np
from pydantic import Field, ValidationError, model_validator

from swathmill.tiles.paths import resolve
from swathmill.tiles.samples import gather, merge_gathered, select_no_tiles, select_tiles_holding
from swathmill.tiles.step import Block, Fit, InputMeta, OutputSpec, Step, StepError
from swathmill.workflows.inputs.library import SpectralLibrary, read_library, resample_library
from swathmill.workflows.inputs.reference import GroundReferenceConfig, SampleTable, load_samples
from swathmill.workflows.methods import endmembers as _em
from swathmill.workflows.methods.mnf import FORWARD_TRANSFORM
from swathmill.workflows.methods.unmix.solver import (METHODS, SUM_TO_ONE, IllConditionedWarning, LinearTransform,
                                                      Method, UnmixError, Unmixer, _prepare_endmembers,
                                                      check_endmembers, unmix_cube)
from swathmill.workflows.params import Section, check_ref, ctx_get
from swathmill.workflows.roles import Role

__all__ = [
    "UnmixSettings",
    "ComponentTransform",
    "UnmixParams",
    "unmix_step",
    "ImageEndmembersConfig",
    "EndmemberSourceConfig",
    "UnmixConfig",
    "build_steps",
]

X = "x"  # input alias of the data to unmix
Source = Literal["library", "samples", "image", "endmembers"]
_UNMIXERS: "OrderedDict[str, Unmixer]" = OrderedDict()


# --------------------------------------------------------------------------------------------------
# parameters


class UnmixSettings(Section):
    """How pixels are unmixed: the variant, the shade endmember and the checks of the endmember set."""

    method: Method = Field(default="fully_constrained",
                           description="unconstrained | sum_to_one | nonnegative | fully_constrained")
    shade: bool = Field(default=False, description="add a zero (shade) endmember (sum-to-one variants)")
    max_condition: float = Field(default=1e3, gt=1, description="warn above this condition number")
    kkt_rtol: float = Field(default=1e-9, gt=0, lt=1e-3, description="tolerance of the optimality check")

    @model_validator(mode="after")
    def _shade(self) -> "UnmixSettings":
        if self.shade and self.method not in SUM_TO_ONE:
            raise ValueError(f"shade needs method sum_to_one or fully_constrained. Got {self.method!r}")
        return self


@dataclass(frozen=True)
class ComponentTransform:
    """A forward transform into component space and the bands it takes (for library endmembers).

    ``y = (x[band_index] - offset) @ matrix`` (:class:`~swathmill.workflows.methods.unmix.solver.
    LinearTransform`); ``wavelengths`` and ``fwhm`` are those of the full spectra's bands, to which the
    library is resampled first.
    """

    offset: tuple[float, ...]
    matrix: tuple[tuple[float, ...], ...]
    band_index: tuple[int, ...] | None
    wavelengths: tuple[float, ...]
    fwhm: tuple[float, ...] | None = None

    @classmethod
    def of(cls, transform: LinearTransform, wavelengths: Sequence[float],
           fwhm: Sequence[float] | None = None) -> "ComponentTransform":
        return cls(tuple(transform.offset.tolist()), tuple(tuple(r) for r in transform.matrix.tolist()),
                   None if transform.band_index is None else tuple(int(i) for i in transform.band_index),
                   tuple(float(v) for v in wavelengths), None if fwhm is None else tuple(float(v) for v in fwhm))

    @classmethod
    def from_attrs(cls, info: Mapping[str, Any], where: str) -> "ComponentTransform":
        """The transform an MNF/PCA output publishes in ``attrs["forward_transform"]``."""
        try:
            wl = info["wavelength"]
            if wl is None:
                raise UnmixError(f"{where}: the components' transform names no band wavelengths (the cube it "
                                 "was fitted on has no 'wavelength' coordinate): library endmembers cannot be "
                                 "resampled to its bands")
            fwhm = _floats(info.get("fwhm"))
            if fwhm is not None and not np.all(np.isfinite(fwhm)):
                fwhm = None
            return cls(tuple(float(v) for v in info["mean"]), tuple(tuple(float(v) for v in r) for r in info["matrix"]),
                       tuple(int(i) for i in info["band_index"]), tuple(_floats(wl)),
                       None if fwhm is None else tuple(fwhm))
        except KeyError as exc:
            raise UnmixError(f"{where}: attribute {FORWARD_TRANSFORM!r} needs 'mean', 'matrix', 'band_index' and "
                             f"'wavelength'; {exc} is missing") from None

    def linear(self) -> LinearTransform:
        return LinearTransform(np.asarray(self.offset), np.asarray(self.matrix),
                               None if self.band_index is None else np.asarray(self.band_index))


@dataclass(frozen=True)
class UnmixParams:
    """The parameter object of an unmixing step (``Step.params``).

    step: the step name (for messages); settings: :class:`UnmixSettings`; source: where the endmembers
    come from; extraction: the extraction settings of an ``image`` source; transform: an explicit
    transform of ``library`` endmembers (None: taken from the input's metadata when it has one).
    """

    step: str
    settings: UnmixSettings
    source: Source
    extraction: _em.ExtractionSettings | None = None
    transform: ComponentTransform | None = None


def _floats(v: Any) -> list[float] | None:
    """Stored coordinate values as floats (None and "NaN" become NaN); None when absent or not numeric."""
    if v is None:
        return None
    try:
        return [math.nan if (x is None or x == "NaN") else float(x) for x in v]
    except (TypeError, ValueError):
        return None


# --------------------------------------------------------------------------------------------------
# fit


def _accumulate_samples(block: Block) -> dict:
    """Spectra of the input at the sample pixels inside this tile's core (each sample counted once)."""
    return gather(block, X, block.static["samples.row"], block.static["samples.col"], np.float64)


def _image_block(block: Block) -> Block:
    """The block as the extraction sees it: ``reduced`` (its own input, or the data), ``spectra``, and
    the extraction settings as its parameters."""
    data = {"reduced": block.data.get("reduced", block.data[X]), "spectra": block.data[X]}
    meta = {"reduced": block.meta.get("reduced", block.meta.get(X)), "spectra": block.meta.get(X)}
    return replace(block, data=data, meta=meta, params=block.params.extraction)


def _image_meta(meta: Mapping[str, InputMeta]) -> dict:
    return {"reduced": meta.get("reduced", meta[X]), "spectra": meta[X]}


def _accumulate_image(block: Block) -> dict:
    return _em.candidate_accumulate(_image_block(block))


def _coord(meta: InputMeta, name: str) -> np.ndarray | None:
    v = _floats(meta.spec.coords.get(name))
    return None if v is None else np.asarray(v, dtype=np.float64)


def _input_transform(params: UnmixParams, src: InputMeta) -> ComponentTransform | None:
    """The transform of library endmembers into the input's space: given, or published by the input."""
    if params.transform is not None:
        return params.transform
    info = src.spec.attrs.get(FORWARD_TRANSFORM)
    if not info:
        return None
    return ComponentTransform.from_attrs(info, f"step {params.step!r}, input {src.ref!r}")


def _library_endmembers(params: UnmixParams, src: InputMeta, library: Mapping[str, Any]
                        ) -> tuple[np.ndarray, list[str], str, LinearTransform | None]:
    """Library spectra resampled to the input's bands (or to the bands the input's transform takes)."""
    tf = _input_transform(params, src)
    if tf is not None:
        wl = np.asarray(tf.wavelengths, dtype=np.float64)
        fwhm = None if tf.fwhm is None else np.asarray(tf.fwhm, dtype=np.float64)
    else:
        wl, fwhm = _coord(src, "wavelength"), _coord(src, "fwhm")
        if wl is None or not np.isfinite(wl).all():
            raise UnmixError(f"step {params.step!r}: library endmembers need band wavelengths, but input {src.ref!r} "
                             f"has no numeric 'wavelength' coordinate and no {FORWARD_TRANSFORM!r} attribute "
                             "(components need a transform)")
    if fwhm is not None and not np.isfinite(fwhm).any():
        fwhm = None
    lib = SpectralLibrary(tuple(library["names"]), np.asarray(library["wavelengths"]),
                          np.asarray(library["spectra"]), source=library["source"])
    m = resample_library(lib, wl, fwhm).spectra.T
    return m, list(lib.names), ("linear" if fwhm is None else "gaussian"), (None if tf is None else tf.linear())


def _sample_endmembers(acc: Any, params: UnmixParams, table: SampleTable, nb: int, model: dict
                       ) -> tuple[np.ndarray, list[str]]:
    """The mean input spectrum of each ground-reference class (validation samples left out)."""
    if acc is None:
        acc = {"idx": np.empty(0, np.int64), "X": np.empty((0, nb)), "bad": np.empty(0, np.int64)}
    order = np.argsort(acc["idx"], kind="stable")
    idx, xs = acc["idx"][order], acc["X"][order]
    use = ~table.is_validation[idx]  # validation samples never shape the endmembers
    labels = table.label[idx][use]
    k = len(table.class_names)
    counts = np.bincount(labels, minlength=k + 1)[1:]
    empty = [table.class_names[i] for i in range(k) if counts[i] == 0]
    if empty:
        raise UnmixError(f"step {params.step!r}: no valid ground-reference pixel for class(es) {empty}: cannot take "
                         "their mean spectrum")
    sums = np.zeros((k, nb))
    np.add.at(sums, labels - 1, xs[use])
    model["counts"] = counts.astype(np.int64)
    model["n_nodata_samples"] = int(acc["bad"].size)
    return (sums / counts[:, None]).T, list(table.class_names)


def _image_endmembers(acc: Any, params: UnmixParams, meta: Mapping[str, InputMeta], model: dict
                      ) -> tuple[np.ndarray, list[str]]:
    """Endmembers extracted from the image; they take the input's spectra at the chosen pixels."""
    ext = _em.extraction_finalize(acc, params.extraction, _image_meta(meta))
    model["extraction"] = {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in ext.items()
                           if k not in ("spectra", "reduced", "wavelengths")}
    # what swathmill.workflows.methods.endmembers.endmember_library / endmember_points read
    model.update({k: ext[k] for k in ("rows", "cols", "x", "y", "crs", "method", "spectra", "wavelengths")
                  if k in ext})
    model["extracted_names"] = list(ext["names"])
    return np.asarray(ext["spectra"], dtype=np.float64).T, list(ext["names"])


def _finalize(acc: Any, params: UnmixParams, meta: Mapping[str, InputMeta], *,
              library: Mapping[str, Any] | None = None, table: SampleTable | None = None,
              given: Mapping[str, Any] | None = None) -> dict:
    """The endmember model of an unmixing step (see the module notes)."""
    src = meta[X]
    nb = len(src.spec.bands)
    settings = params.settings
    model: dict[str, Any] = {"source": params.source}
    transform = None
    if params.source == "library":
        assert library is not None
        m, names, model["resampling"], transform = _library_endmembers(params, src, library)
    elif params.source == "samples":
        assert table is not None
        m, names = _sample_endmembers(acc, params, table, nb, model)  # in the input's own space
    elif params.source == "image":
        m, names = _image_endmembers(acc, params, meta, model)
    else:
        assert given is not None
        m = np.asarray(given["endmembers"], dtype=np.float64)
        names = list(given["names"])
    if transform is not None:
        m = np.asarray(transform(m.T), dtype=np.float64).T
    if settings.shade:
        m, names_t = _prepare_endmembers(m, names, settings.method, True, None)
        names = list(names_t)
    if m.shape[0] != nb:
        raise UnmixError(f"step {params.step!r}: the endmembers have {m.shape[0]} bands but input {src.ref!r} has {nb}")
    model["condition_number"] = check_endmembers(m, names, settings.method, settings.max_condition)
    model["endmembers"] = m
    model["names"] = names
    return model


# --------------------------------------------------------------------------------------------------
# kernel and outputs


def _unmixer(model: Mapping[str, Any], settings: UnmixSettings) -> Unmixer:
    m = np.ascontiguousarray(model["endmembers"], dtype=np.float64)
    key = hashlib.sha256(m.tobytes() + repr((m.shape, list(model["names"]), settings.method,
                                             settings.kkt_rtol)).encode()).hexdigest()
    u = _UNMIXERS.get(key)
    if u is None:
        with warnings.catch_warnings():  # warned once, when the step was fitted
            warnings.simplefilter("ignore", IllConditionedWarning)
            u = Unmixer(m, settings.method, names=list(model["names"]), max_condition=math.inf,
                        kkt_rtol=settings.kkt_rtol)
        _UNMIXERS[key] = u
        while len(_UNMIXERS) > 4:
            _UNMIXERS.popitem(last=False)
    return u


def _unmix_kernel(block: Block, model: Mapping[str, Any] | None) -> dict[str, np.ndarray]:
    if model is None:
        raise UnmixError("the unmixing kernel needs its fitted endmember model")
    crop = block.tile.crop
    x = block.data[X][:, crop[0], crop[1]]
    u = _unmixer(model, block.params.settings)
    return unmix_cube(x, None, unmixer=u)


def _unmix_outputs(meta: Mapping[str, InputMeta], model: Mapping[str, Any] | None,
                   params: UnmixParams) -> dict[str, OutputSpec]:
    if model is None:
        raise StepError(f"step {params.step!r}: its outputs depend on the fitted endmembers")
    names = tuple(str(n) for n in model["names"])
    method = params.settings.method
    attrs = {"method": method, "endmember_source": model["source"],
             "condition_number": float(model["condition_number"])}
    # the residual is in the unit of the unmixed cube (reflectance: 1)
    in_units = meta[X].spec.attrs.get("units") if X in meta else None
    out = {"abundance": OutputSpec(bands=names, dtype="float32", nodata=float("nan"), role=Role.ABUNDANCE,
                                   attrs={**attrs, "quantity": "abundance (fraction of the pixel)", "units": "1"}),
           "rmse": OutputSpec(bands=("rmse",), dtype="float32", nodata=float("nan"), role=Role.DIAGNOSTIC,
                              attrs={**attrs, "quantity": "root mean square residual over the bands",
                                     "units": in_units if isinstance(in_units, str) else "1"})}
    if method == "unconstrained":
        out["sum"] = OutputSpec(bands=("sum",), dtype="float32", nodata=float("nan"), role=Role.DIAGNOSTIC,
                                attrs={**attrs, "quantity": "sum of the abundances", "units": "1"})
    return out


# --------------------------------------------------------------------------------------------------
# the step


def _library_dict(lib: SpectralLibrary) -> dict:
    return {"names": list(lib.names), "wavelengths": np.asarray(lib.wavelengths, dtype=np.float64),
            "spectra": np.asarray(lib.spectra, dtype=np.float64), "source": Path(lib.source).name}


def _problems(exc: ValidationError) -> str:
    """The problems of a validation error, each naming its key and the value found."""
    return "; ".join(f"{'.'.join(str(p) for p in e['loc'])}: {e['msg']}. Got {e['input']!r}" if e["loc"]
                     else e["msg"] for e in exc.errors())


def _settings(name: str, settings: UnmixSettings | None, given: Mapping[str, Any]) -> UnmixSettings:
    """``settings`` (default: the fields' defaults) with the keyword arguments given to :func:`unmix_step`."""
    if settings is not None and not given:
        return settings
    base = {} if settings is None else settings.model_dump()
    try:
        return UnmixSettings.model_validate({**base, **given})
    except ValidationError as exc:
        raise UnmixError(f"step {name!r}: {_problems(exc)}") from None


def _extraction(name: str, image: Mapping[str, Any] | _em.ExtractionSettings) -> _em.ExtractionSettings:
    if isinstance(image, _em.ExtractionSettings):
        data = image.model_dump(include=set(_em.ExtractionSettings.model_fields))
    else:
        data = dict(image)
    try:
        return _em.ExtractionSettings.model_validate(data)
    except ValidationError as exc:
        raise UnmixError(f"step {name!r}: image endmembers: {_problems(exc)}") from None


def unmix_step(name: str, input_ref: str, *, settings: UnmixSettings | None = None, method: str | None = None,
               library: SpectralLibrary | None = None, samples: SampleTable | None = None,
               image: Mapping[str, Any] | _em.ExtractionSettings | None = None, reduced_ref: str | None = None,
               endmembers: np.ndarray | None = None, names: Sequence[str] | None = None,
               shade: bool | None = None, max_condition: float | None = None, kkt_rtol: float | None = None,
               transform: LinearTransform | None = None, cube_wavelengths: Sequence[float] | None = None,
               cube_fwhm: Sequence[float] | None = None) -> Step:
    """A linear unmixing step of ``input_ref`` with endmembers from exactly one source.

    Parameters
    ----------
    name : step name.
    input_ref : "step/output" of the data to unmix (reflectance, or components).
    settings : :class:`UnmixSettings` (default: its fields' defaults); ``method``, ``shade``,
        ``max_condition`` and ``kkt_rtol``, when given, replace its values.
    library : endmembers from a spectral library, resampled to the input's bands when fitted
        (refused, naming the file and ranges, if it does not cover them). On MNF/PCA components the
        transform the components publish (``attrs["forward_transform"]``) moves them into component
        space, unless ``transform`` is given.
    samples : endmembers as the mean input spectrum of each ground-reference class (samples whose
        split is "validation" are left out).
    image : endmembers extracted from the image: :class:`swathmill.workflows.methods.endmembers.
        ExtractionSettings` or a mapping of its fields (method, n_endmembers, seed, ...). The extraction
        runs on ``reduced_ref`` (MNF or PCA components) if given, else on the input; the endmembers take
        the input's values at the chosen pixels.
    endmembers, names : a (bands, p) matrix already in the input's space, and its names.
    transform : for library endmembers on transformed data: the transform, with the wavelengths (and
        FWHM) of the bands it takes (``cube_wavelengths``, ``cube_fwhm``).

    Returns
    -------
    Step with outputs ``abundance`` (one float32 band per endmember, named after it), ``rmse``
    (1 band) and, for the unconstrained variant, ``sum`` (1 band). Its ``params`` is a
    :class:`UnmixParams`.
    """
    if method is not None and method not in METHODS:
        raise UnmixError(f"step {name!r}: unknown unmixing method {method!r}; choose one of {', '.join(METHODS)}")
    given_settings = {k: v for k, v in (("method", method), ("shade", shade), ("max_condition", max_condition),
                                        ("kkt_rtol", kkt_rtol)) if v is not None}
    sources = [k for k, v in (("library", library), ("samples", samples), ("image", image),
                              ("endmembers", endmembers)) if v is not None]
    if len(sources) != 1:
        raise UnmixError(f"step {name!r}: give exactly one endmember source (library, samples, image or "
                         f"endmembers). Got {sources or 'none'}")
    s = _settings(name, settings, given_settings)
    source = sources[0]
    static: dict[str, Any] = {}
    inputs = {X: input_ref}
    extraction = None
    tf = None
    if transform is not None:
        if source != "library":
            raise UnmixError(f"step {name!r}: a transform applies to library endmembers only (image and sample "
                             "endmembers are taken from the input itself)")
        if cube_wavelengths is None:
            raise UnmixError(f"step {name!r}: with a transform, give cube_wavelengths (the bands it takes)")
        need = transform.offset.size if transform.band_index is None else int(transform.band_index.max()) + 1
        if len(cube_wavelengths) < need:
            raise UnmixError(f"step {name!r}: {len(cube_wavelengths)} cube wavelengths for a transform that uses "
                             f"{need} bands")
        tf = ComponentTransform.of(transform, cube_wavelengths, cube_fwhm)
    if source == "library":
        assert library is not None
        libd = _library_dict(library)
        static.update({"library.wavelengths": libd["wavelengths"], "library.spectra": libd["spectra"],
                       "library.names": libd["names"], "library.source": libd["source"]})
        fit = Fit(accumulate=_accumulate_samples, merge=merge_gathered, select=select_no_tiles,
                  finalize=functools.partial(_finalize, library=libd))
    elif source == "samples":
        assert samples is not None
        if len(samples) == 0:
            raise UnmixError(f"step {name!r}: the ground reference has no sample on the grid")
        static.update(samples.to_static())
        fit = Fit(accumulate=_accumulate_samples, merge=merge_gathered,
                  select=functools.partial(select_tiles_holding, rows=samples.row, cols=samples.col),
                  points=("samples.row", "samples.col"),
                  finalize=functools.partial(_finalize, table=samples))
    elif source == "image":
        assert image is not None
        extraction = _extraction(name, image)
        if reduced_ref is not None and reduced_ref != input_ref:
            inputs["reduced"] = reduced_ref
        fit = Fit(accumulate=_accumulate_image, merge=_em.candidate_merge, finalize=_finalize)
    else:
        m = np.asarray(endmembers, dtype=np.float64)
        if m.ndim != 2:
            raise UnmixError(f"step {name!r}: endmembers must be a (bands, p) matrix. Got shape {m.shape}")
        nm = list(names) if names is not None else [f"em_{i + 1}" for i in range(m.shape[1])]
        if len(nm) != m.shape[1]:
            raise UnmixError(f"step {name!r}: {len(nm)} names for {m.shape[1]} endmembers")
        static.update({"endmembers": m, "endmember_names": nm})
        fit = Fit(accumulate=_accumulate_samples, merge=merge_gathered, select=select_no_tiles,
                  finalize=functools.partial(_finalize, given={"endmembers": m, "names": nm}))
    params = UnmixParams(step=name, settings=s, source=source, extraction=extraction, transform=tf)
    return Step(name=name, kernel=_unmix_kernel, outputs=_unmix_outputs, inputs=inputs, params=params,
                fit=fit, static=static)


# --------------------------------------------------------------------------------------------------
# configuration


class ImageEndmembersConfig(_em.ExtractionSettings):
    """Endmembers found in the image (see :mod:`swathmill.workflows.methods.endmembers`)."""

    model_config = Section.model_config

    reduced: str | None = Field(default=None, description="'step/output' of MNF/PCA components "
                                                          "(null: extract on the input itself)")


class EndmemberSourceConfig(Section):
    """Where the endmembers come from: exactly one of ``library``, ``samples`` or ``image``."""

    library: str | None = Field(default=None, description="spectral library CSV (relative to the config file)")
    materials: list[str] | None = Field(default=None, description="subset of the library's materials, in order")
    samples: GroundReferenceConfig | None = None
    image: ImageEndmembersConfig | None = None

    @model_validator(mode="after")
    def _one(self) -> "EndmemberSourceConfig":
        given = [k for k in ("library", "samples", "image") if getattr(self, k) is not None]
        if len(given) != 1:
            raise ValueError(f"give exactly one of library, samples or image. Got {given or 'none'}")
        if self.materials is not None and self.library is None:
            raise ValueError("materials selects from a library: give library too")
        return self


class UnmixConfig(UnmixSettings):
    """The ``unmix`` section: :class:`UnmixSettings` plus the step name, its input and the endmembers.

    YAML shape::

        unmix:
          name: unmix                     # step name
          input: mosaic/reflectance       # data to unmix ('step/output'): reflectance or MNF/PCA components
          method: fully_constrained       # unconstrained | sum_to_one | nonnegative | fully_constrained
          endmembers:                     # exactly one of:
            library: libraries/site.csv   #   a spectral library (+ optional materials: [a, b])
            # samples: {path: field/plots.gpkg, label: material}   #   ground-reference class means
            # image: {method: nfindr, n_endmembers: 5, reduced: mnf/components, seed: 0}
          shade: false                    # add a zero endmember (sum-to-one variants)
          max_condition: 1000             # warn above this condition number
    """

    name: str = "unmix"
    input: str = "mosaic/reflectance"
    endmembers: EndmemberSourceConfig

    @model_validator(mode="after")
    def _check(self) -> "UnmixConfig":
        check_ref(self.input)
        n = self.name
        if not n or "/" in n or not n.replace("_", "").replace("-", "").isalnum():
            raise ValueError(f"name must be letters, digits, '_' or '-'. Got {n!r}")
        return self

    @property
    def settings(self) -> UnmixSettings:
        """The unmixing settings of this section (the step's parameters besides its endmembers)."""
        return UnmixSettings.model_validate(self.model_dump(include=set(UnmixSettings.model_fields)))


def build_steps(section: UnmixConfig, ctx: Any = None) -> list[Step]:
    """``[unmix_step(...)]`` for the ``unmix`` section.

    ``ctx`` (mapping or object) may provide ``base_dir`` (relative paths) and must provide ``grid``
    (the mosaic's :class:`swathmill.tiles.grid.Grid`) for ground-reference endmembers, optionally ``valid``.
    Library endmembers on MNF/PCA components take the components' transform when the step is fitted.
    """
    if not isinstance(section, UnmixConfig):
        raise UnmixError(f"build_steps takes an UnmixConfig. Got {type(section).__name__}")
    src = section.endmembers
    settings = section.settings
    if src.library is not None:
        lib = read_library(resolve(ctx_get(ctx, "base_dir"), src.library))
        if src.materials is not None:
            lib = lib.subset(src.materials)
        return [unmix_step(section.name, section.input, settings=settings, library=lib)]
    if src.samples is not None:
        grid = ctx_get(ctx, "grid")
        if grid is None:
            raise UnmixError("ground-reference endmembers need the mosaic grid: build_steps was called without "
                             "ctx.grid")
        table, _issues = load_samples(src.samples, grid, base_dir=ctx_get(ctx, "base_dir"), valid=ctx_get(ctx, "valid"))
        return [unmix_step(section.name, section.input, settings=settings, samples=table)]
    img = src.image
    assert img is not None
    return [unmix_step(section.name, section.input, settings=settings, image=img, reduced_ref=img.reduced)]
