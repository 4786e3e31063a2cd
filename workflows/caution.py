"""The one place of the caution texts every product carries: a long one for the report, a short one for metadata.

Products are estimates; both texts say so, and that they are to be confirmed in the field and used
under local rules and licensed practice.
"""
from __future__ import annotations

__all__ = ["CAUTION", "CAUTION_SHORT"]

CAUTION = (
    "Every product of this run is an estimate. Its reliability is the accuracy measured in this report "
    "against the reference samples, and it holds only where those samples represent the ground. "
    "Confirm the maps in the field before acting on them, and use them under the local rules and "
    "within licensed professional practice (for example in exploration, environmental or "
    "agricultural decisions); they do not replace either."
)
"""The report's caution (shown at its top)."""

CAUTION_SHORT = ("Products are estimates with the accuracy measured in the run's report; confirm them in the "
                 "field and use them under local rules and licensed practice.")
"""The caution of the STAC collection's description."""
