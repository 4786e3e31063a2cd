"""The one caution text every face of a run shows (report, run summary, STAC collection, README).

Products are estimates: their reliability is the accuracy measured against the reference samples,
and they are to be confirmed in the field and used under local rules and licensed practice.
"""
from __future__ import annotations

__all__ = ["CAUTION"]

CAUTION = (
    "Every product of this run is an estimate. Its reliability is the accuracy measured in this report "
    "against the reference samples, and it holds only where those samples represent the ground. "
    "Confirm the maps in the field before acting on them, and use them under the local rules and "
    "within licensed professional practice (for example in exploration, environmental or "
    "agricultural decisions); they do not replace either."
)
