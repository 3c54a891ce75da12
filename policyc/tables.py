"""Plain-text tables with labelled axes, for losses and other matrices shown to reviewers."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["format_matrix", "format_number"]


def format_number(value: float) -> str:
    return f"{value:.6g}"


def format_matrix(
    values: np.ndarray,
    row_names: Sequence[str],
    column_names: Sequence[str],
    row_axis: str,
    column_axis: str,
) -> str:
    """Render ``values[row, column]`` with both axes named, e.g. loss[action][true class]."""
    header = [f"{row_axis} \\ {column_axis}", *column_names]
    body = [[name, *(format_number(float(v)) for v in row)] for name, row in zip(row_names, values, strict=True)]
    widths = [max(len(line[i]) for line in [header, *body]) for i in range(len(header))]

    def line(cells: Sequence[str]) -> str:
        first = cells[0].ljust(widths[0])
        rest = (cell.rjust(width) for cell, width in zip(cells[1:], widths[1:], strict=True))
        return "  ".join([first, *rest]).rstrip()

    rule = "  ".join("-" * w for w in widths)
    return "\n".join([line(header), rule, *(line(cells) for cells in body)])
