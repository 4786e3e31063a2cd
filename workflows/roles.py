"""What each output of a science step is for: the vocabulary of :attr:`OutputSpec.role`.

Assessment, export and the report find outputs by these roles (stored in every store's attributes, each
COG's tags and each STAC item), never by the output's name.
"""
from __future__ import annotations

from enum import StrEnum

__all__ = ["Role"]


class Role(StrEnum):
    REFLECTANCE = "reflectance"    # a reflectance cube (the mosaic, a denoised cube, selected bands)
    SOURCE = "source"              # which flight line each pixel came from
    COMPONENTS = "components"      # MNF or PCA components
    CLASS_MAP = "class_map"        # a categorical map of materials or classes, assessed against the reference
    ABUNDANCE = "abundance"        # sub-pixel fractions (unit 1), assessed against reference fractions
    QUANTITY = "quantity"          # a calibrated property map, assessed against ground measurements
    UNCERTAINTY = "uncertainty"    # a per-pixel uncertainty of a quantity
    MASK = "mask"                  # a flag layer (out of range, not applicable)
    SCORE = "score"                # per-class figures behind a class decision (angles, fit figures)
    DIAGNOSTIC = "diagnostic"      # residuals, fit errors and other checks of a method
    FEATURE = "feature"            # band depths, positions, ratios and other spectral features
    DATA = "data"                  # anything else (the engine's default)
