"""The classifier steps of a configuration section: ``build_steps(section, ctx)``.

``ctx`` provides ``grid`` (the mosaic's :class:`swathmill.tiles.grid.Grid`, needed for ground
reference) and optionally ``base_dir`` (relative paths) and ``valid`` (a function (rows, cols) -> bool
of mosaic validity, to report samples on nodata early).
"""
from __future__ import annotations

from typing import Any

from swathmill.tiles.step import Step

from .references import load_references
from .sam import SamConfig, sam_step
from .sff import SffConfig, sff_step
from .shared import ClassifyError, load_reference_samples
from .svm import SvmConfig, svm_step

__all__ = ["build_steps"]


def build_steps(section: SamConfig | SffConfig | SvmConfig, ctx: Any = None) -> list[Step]:
    """Steps for one classifier section (see the config models for the YAML shape).

    The step's parameters are the section's settings fields (its name, input and references are the
    step's name, input and reference spectra or samples).
    """
    if isinstance(section, SamConfig):
        lib, smp = load_references(section.references, ctx)
        return [sam_step(section.name, section.input, library=lib, samples=smp, settings=section)]
    if isinstance(section, SffConfig):
        lib, smp = load_references(section.references, ctx)
        return [sff_step(section.name, section.input, library=lib, samples=smp, settings=section)]
    if isinstance(section, SvmConfig):
        return [svm_step(section.name, section.input, samples=load_reference_samples(section.reference, ctx),
                         settings=section)]
    raise ClassifyError(f"build_steps takes a SamConfig, SffConfig or SvmConfig. Got {type(section).__name__}")
