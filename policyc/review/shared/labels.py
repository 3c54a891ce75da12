"""Labels of a reference table as class indices, shared by the review tools that read labelled data."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np

from policyc.evidence.io import DataError, FeatureBatch

__all__ = ["label_codes"]


def label_codes(
    path: Path, column: str, batch: FeatureBatch, classes: Sequence[str], whose: str = "the rule"
) -> np.ndarray:
    """Class index of each label; raise DataError naming the first row whose label is not a class."""
    codes = batch.class_codes(classes)
    unknown = batch.first_unknown_label(codes)
    if unknown is not None:
        raise DataError(
            f"{path}: column {column!r}, row {unknown[0]}: label {unknown[1]!r} is not a class of "
            f"{whose} ({', '.join(classes)})"
        )
    return codes
