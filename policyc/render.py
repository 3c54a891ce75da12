"""Shared presentation helpers: number formats, tables (labelled matrices, text and Markdown), JSON rounding."""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from typing import Any

import numpy as np

__all__ = [
    "JSON_DIGITS",
    "dumps",
    "format_matrix",
    "format_number",
    "limits_text",
    "markdown_table",
    "number",
    "rounded",
    "share",
    "text_table",
]

JSON_DIGITS = 10
"""Significant digits of floats in JSON reports, so reports compare equal across platforms."""


def number(value: float | None, digits: int = 4) -> str:
    """A float for people: ``digits`` significant digits, ``n/a`` for None or NaN."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    if value == 0:
        return "0"
    return f"{value:.{digits}g}"


def share(value: float | None) -> str:
    """A share in [0, 1] as a percentage with two decimals."""
    if value is None or math.isnan(value):
        return "n/a"
    return f"{100.0 * value:.2f}%"


def rounded(value: Any, digits: int = JSON_DIGITS) -> Any:
    """Round every float in nested lists/dicts to ``digits`` significant digits; NaN and inf become None."""
    if isinstance(value, float):
        if not math.isfinite(value):
            return None
        return float(f"{value:.{digits}g}")
    if isinstance(value, dict):
        return {key: rounded(item, digits) for key, item in value.items()}
    if isinstance(value, list | tuple):
        return [rounded(item, digits) for item in value]
    return value


def dumps(value: Any) -> str:
    """The one serializer of reports: stable JSON, floats rounded, NaN and infinity as null, sorted keys.

    ``value`` is a report (a pydantic dataclass, see :mod:`policyc.review.shared.reports`) or plain JSON data.
    """
    from pydantic import TypeAdapter  # here: `policyc check` uses this module's tables, not its JSON

    data = TypeAdapter(type(value)).dump_python(value, mode="json", by_alias=True)
    return json.dumps(rounded(data), indent=2, sort_keys=True, ensure_ascii=False)


def _escape(cell: str) -> str:
    return cell.replace("|", "\\|").replace("\n", " ")


def markdown_table(header: Sequence[str], rows: Sequence[Sequence[str]], align: str | None = None) -> str:
    """A GitHub-flavoured Markdown table; ``align`` is one letter per column (l or r), default l then r."""
    align = align or "l" + "r" * (len(header) - 1)
    marks = [":---" if a == "l" else "---:" for a in align]
    lines = ["| " + " | ".join(_escape(h) for h in header) + " |", "| " + " | ".join(marks) + " |"]
    lines += ["| " + " | ".join(_escape(c) for c in row) + " |" for row in rows]
    return "\n".join(lines)


def text_table(header: Sequence[str], rows: Sequence[Sequence[str]], indent: str = "  ") -> str:
    """A plain table: first column left-aligned, the others right-aligned, a dashed rule under the header."""
    widths = [max(len(line[i]) for line in [header, *rows]) for i in range(len(header))]

    def line(cells: Sequence[str]) -> str:
        first = cells[0].ljust(widths[0])
        rest = (cell.rjust(width) for cell, width in zip(cells[1:], widths[1:], strict=True))
        return (indent + "  ".join([first, *rest])).rstrip()

    rule = indent + "  ".join("-" * w for w in widths)
    return "\n".join([line(header), rule, *(line(row) for row in rows)])


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
    return text_table(header, body, indent="")


def _stated_limit(figures: dict[str, Any]) -> str:
    if figures["kind"] == "max_share":
        return f"at most {share(figures['share'])} get {figures['subject']}"
    return f"at least {share(figures['share'])} of {figures['subject']} get {' or '.join(figures['actions'])}"


def limits_text(
    record: dict[str, Any], unit: str | None, actions: Sequence[str], classes: Sequence[str], matrix: bool = True
) -> str:
    """A manifest's ``limits`` record for people: per limit the rate, bound, multiplier and price; L' (``matrix``).

    ``actions`` (reject last) and ``classes`` give the order of L' (the manifest's JSON keys are sorted)."""
    per, both = record["per_limit_confidence"], record["confidence"]
    money = f" ({unit})" if unit else ""
    rows = [
        [
            _stated_limit(f),
            share(f["rate"]),
            ("≤ " if f["kind"] == "max_share" else "≥ ") + share(f["bound"]),
            number(f["multiplier"]),
            number(f["price"]),
        ]
        for f in record["limits"]
    ]
    header = ["limit", "rate", f"bound ({100 * per:.4g}%)", "multiplier", f"price{money}"]
    lines = [
        f"operating limits on {record['data']} ({record['rows']} rows): each holds on new data with "
        f"probability ≥ {100 * per:.4g}%, all together ≥ {100 * both:.4g}%",
        text_table(header, rows),
        f"  price of all limits together: {number(record['price'])} {unit or 'per row'} "
        f"(expected loss {number(record['expected_loss_unlimited'])} -> {number(record['expected_loss_limited'])})",
    ]
    if matrix:
        adjusted = np.array([[record["adjusted_loss"][a][c] for c in classes] for a in actions])
        lines += [
            "",
            "adjusted loss L' = L + Σ_j μ_j M_j, the matrix the rule decides by, loss[action][true class]:",
            format_matrix(adjusted, actions, classes, "action", "true class"),
        ]
    return "\n".join(lines)
