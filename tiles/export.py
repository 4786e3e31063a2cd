"""Product export: COG writing (:mod:`swathmill.tiles.cog`) and STAC items (:mod:`swathmill.tiles.stac`).

Kept so that ``swathmill.tiles.export`` imports keep working; new code imports from the two modules.
"""
from __future__ import annotations

from .cog import ExportError, default_class_colors, overview_factors, provenance_tags, write_cog
from .stac import (PROVENANCE_REQUIRED, STAC_PREFIX, item_path, stac_collection, stac_item, validate_collection_offline,
                   validate_item_offline)

__all__ = [
    "ExportError",
    "write_cog",
    "overview_factors",
    "default_class_colors",
    "provenance_tags",
    "item_path",
    "stac_item",
    "stac_collection",
    "validate_item_offline",
    "validate_collection_offline",
    "PROVENANCE_REQUIRED",
    "STAC_PREFIX",
]
