"""Reference spectra of the spectral angle and feature-fitting steps.

From a spectral library (:mod:`swathmill.workflows.inputs.library`, resampled to the input's bands when
the step is fitted: Gaussian from the input's ``fwhm`` coordinate, else linear) or from the image: the
mean spectrum per class of the training samples of a ground reference
(:mod:`swathmill.workflows.inputs.reference`), gathered tile by tile by a mergeable accumulator.
Validation samples never shape the references.
"""
from __future__ import annotations

import functools
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from pydantic import model_validator

from swathmill.tiles.samples import merge_gathered, select_no_tiles, select_tiles_holding
from swathmill.tiles.step import Fit, InputMeta
from swathmill.workflows.inputs.library import SpectralLibrary, read_library, resample_library
from swathmill.workflows.inputs.reference import GroundReferenceConfig, SampleTable
from swathmill.workflows.params import Section

from .legend import Legend, step_legend
from .shared import (ClassifierParams, ClassifyError, accumulate_samples, exclude_mask, gathered_samples,
                     input_coord, input_wavelengths, load_reference_samples, resolve_path, training_mask)

__all__ = [
    "ReferenceSpectraConfig",
    "ReferenceSet",
    "class_means",
    "reference_set",
    "reference_spectra",
    "load_references",
]


class ReferenceSpectraConfig(Section):
    """Where reference spectra come from: exactly one of ``library`` or ``samples``.

    ``library``: a spectral library CSV (:mod:`swathmill.workflows.inputs.library`), optionally restricted to
    ``materials``. ``samples``: a ground reference whose training pixels are averaged per class.
    """

    library: str | None = None
    materials: list[str] | None = None
    samples: GroundReferenceConfig | None = None

    @model_validator(mode="after")
    def _one(self) -> "ReferenceSpectraConfig":
        if (self.library is None) == (self.samples is None):
            raise ValueError("give exactly one of 'library' or 'samples'")
        if self.materials is not None and self.library is None:
            raise ValueError("'materials' selects from a library; there is none")
        return self


def class_means(X: np.ndarray, labels: np.ndarray, class_names: Sequence[str]) -> np.ndarray:
    """(k, b) mean spectrum of each class 1..k; raises naming classes without samples."""
    X = np.asarray(X, dtype=np.float64)
    labels = np.asarray(labels)
    k = len(class_names)
    counts = np.bincount(labels, minlength=k + 1)[1:k + 1]
    empty = [class_names[i] for i in range(k) if counts[i] == 0]
    if empty:
        raise ClassifyError(f"no valid training sample for class(es) {empty}: cannot take their mean spectrum")
    sums = np.zeros((k, X.shape[1]))
    np.add.at(sums, labels - 1, X)
    return sums / counts[:, None]


@dataclass(frozen=True)
class ReferenceSet:
    """What a step knows of its references when it is built: names, classes, colours, static arrays,
    and the library (None for image-derived references) or the sample table."""

    names: tuple[str, ...]
    class_names: tuple[str, ...]
    ref_class: tuple[int, ...]
    colors: tuple[tuple[int, int, int], ...] | None
    static: dict
    library: SpectralLibrary | None
    table: SampleTable | None

    def params(self, step: str, settings: Section, legend: "Legend | None" = None) -> ClassifierParams:
        """The step's parameter object: its settings plus these derived values, in the codes of
        ``legend`` (default: a legend of these references alone)."""
        source = "library" if self.library is not None else "ground reference"
        legend = step_legend(legend, step, self.class_names, self.colors, source)
        return ClassifierParams.make(step, settings, self.names, self.class_names, self.ref_class, legend)

    def fit(self, finalize: Callable[..., dict], accumulate: Callable[..., dict] = accumulate_samples) -> Fit:
        """The fit of a step using these references; ``finalize(acc, params, meta, library=, table=)``;
        ``accumulate`` gathers the samples (ground reference only; the default gathers input ``x``)."""
        if self.library is not None:
            return Fit(accumulate=accumulate_samples, merge=merge_gathered, select=select_no_tiles,
                       finalize=functools.partial(finalize, library=self.library, table=None))
        assert self.table is not None
        return Fit(accumulate=accumulate, merge=merge_gathered,
                   select=functools.partial(select_tiles_holding, rows=self.table.row, cols=self.table.col),
                   points=("samples.row", "samples.col"),
                   finalize=functools.partial(finalize, library=None, table=self.table))


def reference_set(library: SpectralLibrary | None, samples: SampleTable | None, step: str) -> ReferenceSet:
    """The references of a SAM or SFF step: exactly one of a library or ground reference samples."""
    if (library is None) == (samples is None):
        raise ClassifyError(f"step {step!r}: give exactly one of a spectral library or ground reference samples")
    if library is not None:
        static = {"library.wavelengths": np.asarray(library.wavelengths, dtype=np.float64),
                  "library.spectra": np.asarray(library.spectra, dtype=np.float64),
                  "library.names": list(library.names), "library.source": Path(library.source).name}
        colors = tuple(tuple(int(v) for v in c) for c in library.class_colors()) if library.colors else None
        lib = SpectralLibrary(tuple(library.names), library.wavelengths, library.spectra, source=library.source)
        return ReferenceSet(names=tuple(library.names), class_names=tuple(library.class_names),
                            ref_class=tuple(int(c) for c in library.class_codes), colors=colors, static=static,
                            library=lib, table=None)
    assert samples is not None
    if len(samples) == 0:
        raise ClassifyError(f"step {step!r}: the ground reference has no sample on the grid")
    names = tuple(samples.class_names)
    return ReferenceSet(names=names, class_names=names, ref_class=tuple(range(1, len(names) + 1)), colors=None,
                        static=samples.to_static(), library=None, table=samples)


def reference_spectra(acc: dict | None, params: ClassifierParams, meta: Mapping[str, InputMeta], *,
                      library: SpectralLibrary | None, table: SampleTable | None,
                      gathered: tuple[np.ndarray, np.ndarray, dict] | None = None
                      ) -> tuple[np.ndarray, np.ndarray, dict]:
    """Reference spectra on all the input's bands (m, b), the mask of bands kept after the step's
    ``exclude`` ranges (empty when none), and the model entries describing where they came from.

    ``gathered``: the samples already taken from ``acc`` (:func:`.shared.gathered_samples`: indices,
    spectra on the input's bands, report), when the caller needs them too."""
    ref = meta["x"].ref
    nb = len(meta["x"].spec.bands)
    wl = input_coord(meta["x"].spec, "wavelength", ref)
    model: dict[str, Any] = {}
    if library is not None:
        wl, fwhm = input_wavelengths(meta, "a spectral library")
        if fwhm is not None and not np.isfinite(fwhm).any():
            fwhm = None
        refs = resample_library(library, wl, fwhm).spectra
        model["source"] = "library"
        model["method"] = "linear" if fwhm is None else "gaussian"
    else:
        assert table is not None
        idx, X, report = gathered if gathered is not None else gathered_samples(acc, table, nb, params.step)
        train = training_mask(table, idx)
        refs = class_means(X[train], table.label[idx][train], table.class_names)
        model["source"] = "samples"
        model["samples"] = report
        model["counts"] = np.bincount(table.label[idx][train], minlength=len(table.class_names) + 1)[1:]
    keep = exclude_mask(wl, params.settings.exclude, ref)
    return refs, keep, model


def load_references(cfg: ReferenceSpectraConfig, ctx: Any) -> tuple[SpectralLibrary | None, SampleTable | None]:
    """The library (subset to ``materials``) or the ground reference samples a section names."""
    if cfg.library is not None:
        lib = read_library(resolve_path(cfg.library, ctx))
        if cfg.materials is not None:
            lib = lib.subset(cfg.materials)
        return lib, None
    assert cfg.samples is not None
    return None, load_reference_samples(cfg.samples, ctx)
