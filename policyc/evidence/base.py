"""What every evidence kind produces for the compiler."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np

if TYPE_CHECKING:
    from policyc.evidence.calibration import CalibrationSample

__all__ = ["FittedEvidence", "Progress"]


class Progress(Protocol):
    """Called with the rows just processed, the rows expected in this pass (None when unknown), and which pass
    of the data it is (``"pass 1 of 2"``, ``"reference data"``; empty when there is one)."""

    def __call__(self, rows: int, total: int | None, stage: str = "") -> None: ...


@dataclass(frozen=True)
class FittedEvidence:
    """What the compiler freezes: input columns, kernel arrays and a description for the manifest."""

    features: tuple[str, ...]
    params: dict[str, np.ndarray]
    description: dict[str, Any]
    training_counts: dict[str, int] | None = None
    training_sha256: str | None = None
    calibration_sample: CalibrationSample | None = None
    """Posterior evidence with ``calibrate:``: the labelled rows the map was fitted on, for the compiler's scores."""
