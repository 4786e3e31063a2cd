"""Classification: spectral angle, spectral feature fitting and support vector machines.

Pure functions (no I/O) do the science; step factories wire them into engine steps. One module per
concern:

- :mod:`.sam` — spectral angle (Kruse et al., 1993): the angle, the threshold rule, kernel and step;
- :mod:`.sff` — spectral feature fitting (Clark, Gallagher and Swayze, 1990): fit, R2, kernel, step;
- :mod:`.svm` — RBF support vector machine with spatially blocked cross-validation: fit, prediction, step;
- :mod:`.models` — storage of fitted SVM models (skops, deterministic bytes, trusted types only);
- :mod:`.references` — reference spectra from a spectral library or from training samples;
- :mod:`.shared` — the classifiers' error, parameter object, class colours and pixel plumbing;
- :mod:`.legend` — the run's one legend (class code, name, colour) and its CSV table;
- :mod:`.build` — ``build_steps(section, ctx)`` for a configuration section, ``run_legend``.

Every step's parameter object (``Step.params``) is a :class:`ClassifierParams`: the step's settings
section (:class:`SamSettings`, :class:`SffSettings`, :class:`SvmSettings`; the configuration sections
:class:`SamConfig`, :class:`SffConfig`, :class:`SvmConfig` add the step's name, input and references)
plus the names and classes derived from the references and the run's legend.

Class maps
    uint8 in the codes of the run's legend: 0 unclassified (a valid pixel matching no class), 1..k
    the legend's classes (every map names all of them, also those it cannot produce), 255 nodata.

The modal (majority) filter of a class map is the engine's generic step
(``swathmill.tiles.ops.modal_filter_step(name, "<step>/classes", size, n_classes=len(legend.names))``);
it never lets nodata vote.
"""
from __future__ import annotations

from .build import build_steps, load_section_references, run_legend
from .legend import LEGEND_FILE, Legend, LegendEntry, build_legend, read_legend
from .models import SKOPS_EXTRA_TRUSTED, load_svm
from .references import ReferenceSpectraConfig, class_means
from .sam import SamConfig, SamSettings, assign_min_angle, class_thresholds, sam_step, spectral_angle
from .sff import SffConfig, SffSettings, assign_best_fit, sff_fit, sff_r2, sff_step
from .shared import TOL_MUTED, ClassifierParams, ClassifyError, class_palette
from .svm import SvmConfig, SvmSettings, blocked_folds, cap_samples, check_training, fit_svm, predict_svm, svm_step

__all__ = [
    "ClassifyError",
    "ClassifierParams",
    "TOL_MUTED",
    "SKOPS_EXTRA_TRUSTED",
    "class_palette",
    "spectral_angle",
    "assign_min_angle",
    "class_thresholds",
    "sff_fit",
    "sff_r2",
    "assign_best_fit",
    "class_means",
    "blocked_folds",
    "check_training",
    "cap_samples",
    "fit_svm",
    "load_svm",
    "predict_svm",
    "sam_step",
    "sff_step",
    "svm_step",
    "ReferenceSpectraConfig",
    "SamSettings",
    "SffSettings",
    "SvmSettings",
    "SamConfig",
    "SffConfig",
    "SvmConfig",
    "build_steps",
    "load_section_references",
    "run_legend",
    "LEGEND_FILE",
    "Legend",
    "LegendEntry",
    "build_legend",
    "read_legend",
]
