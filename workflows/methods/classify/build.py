"""The classifier steps of a configuration section: ``build_steps(section, ctx)``, and the run's legend.

``ctx`` provides ``grid`` (the mosaic's :class:`swathmill.tiles.grid.Grid`, needed for ground
reference), optionally ``base_dir`` (relative paths), ``valid`` (a function (rows, cols) -> bool
of mosaic validity, to report samples on nodata early) and ``legend`` (the run's
:class:`~swathmill.workflows.methods.classify.legend.Legend`; without it a step makes a legend of its
own references).
"""
from __future__ import annotations

from pathlib import Path
from typing import Any, Sequence

from swathmill.tiles.step import Step
from swathmill.workflows.inputs.library import SpectralLibrary
from swathmill.workflows.inputs.reference import SampleTable
from swathmill.workflows.params import ctx_get

from .legend import Legend, build_legend
from .references import load_references
from .sam import SamConfig, sam_step
from .sff import SffConfig, sff_step
from .shared import ClassifyError, load_reference_samples
from .svm import SvmConfig, svm_step

__all__ = ["build_steps", "load_section_references", "run_legend"]

Section = SamConfig | SffConfig | SvmConfig
References = tuple[SpectralLibrary | None, SampleTable | None]


def load_section_references(section: Section, ctx: Any = None) -> References:
    """The library or ground reference samples of a classifier section (loaded once per run)."""
    if isinstance(section, (SamConfig, SffConfig)):
        return load_references(section.references, ctx)
    if isinstance(section, SvmConfig):
        return None, load_reference_samples(section.reference, ctx)
    raise ClassifyError(f"a classifier section is a SamConfig, SffConfig or SvmConfig. Got {type(section).__name__}")


def run_legend(loaded: Sequence[tuple[Section, References]], reference_classes: Sequence[str] = (),
               reference_label: str = "ground reference") -> Legend:
    """The run's legend: the classes of every library the sections use (in order, library colours
    kept), then those of their ground references, then ``reference_classes`` (the run's validation
    reference)."""
    libs, refs = [], []
    for section, (lib, smp) in loaded:
        if lib is not None:
            colors = lib.class_colors()
            libs.append((f"spectral library {Path(lib.source).name}", list(lib.class_names),
                         list(colors) if colors is not None else None))
        if smp is not None:
            refs.append((f"ground reference of step {section.name!r}", list(smp.class_names), None))
    extra = [(reference_label, list(reference_classes), None)] if reference_classes else []
    return build_legend([*libs, *refs, *extra])


def build_steps(section: Section, ctx: Any = None, refs: References | None = None) -> list[Step]:
    """Steps for one classifier section (see the config models for the YAML shape).

    The step's parameters are the section's settings fields (its name, input and references are the
    step's name, input and reference spectra or samples); ``refs`` are the section's references
    already loaded (:func:`load_section_references`). The class map is written in the codes of
    ``ctx.legend`` when given.
    """
    legend = ctx_get(ctx, "legend")
    lib, smp = refs if refs is not None else load_section_references(section, ctx)
    if isinstance(section, SamConfig):
        return [sam_step(section.name, section.input, library=lib, samples=smp, settings=section, legend=legend)]
    if isinstance(section, SffConfig):
        return [sff_step(section.name, section.input, library=lib, samples=smp, settings=section, legend=legend)]
    assert isinstance(section, SvmConfig) and smp is not None
    return [svm_step(section.name, section.input, samples=smp, settings=section, legend=legend)]
