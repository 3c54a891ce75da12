"""What makes a review tool's result a report.

A report is a frozen pydantic dataclass: its fields (and ``computed_field`` properties) are the JSON a tool
prints with ``--format json``; fields marked ``Field(exclude=True)`` are working data the text renderers use.
:func:`policyc.render.dumps` is the one serializer, and ``schemas/*.schema.json`` are generated from the same
classes (:mod:`policyc.schemas`), so the published shape cannot drift from the code.
"""

from __future__ import annotations

from pydantic import ConfigDict

__all__ = ["REPORT_CONFIG"]

REPORT_CONFIG = ConfigDict(arbitrary_types_allowed=True)
"""Reports may carry numpy arrays and loaded rules as excluded working fields."""
