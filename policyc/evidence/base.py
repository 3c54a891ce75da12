"""What every evidence kind produces for the compiler."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from policyc.evidence.calibration import CalibrationSample

__all__ = ["FittedEvidence", "Progress"]

Progress = Callable[[int, int | None], None]
"""Called with the number of rows just processed and the total expected (None when unknown)."""


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
