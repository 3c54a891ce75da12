"""Decide over a CSV or Parquet file in batches; output keeps the input columns and adds the decision."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from itertools import chain
from pathlib import Path

import numpy as np
import pyarrow as pa

from policyc.evidence.io import (
    DEFAULT_BATCH_ROWS,
    DataError,
    TableWriter,
    batch_to_matrix,
    count_rows,
    read_ahead,
    read_table_batches,
)
from policyc.runtime import Explanation, Rule, kernel

__all__ = ["assess_batch", "decide_file", "explain_columns"]


def assess_batch(rule: Rule, features: np.ndarray, data: Path, first_row: int, whose: str = "") -> Explanation:
    """The rule's assessment of a batch of a file's rows; under ``invalid_input: error`` an invalid row
    is a DataError naming its row in the file (rows counted from 1, the header not counted)."""
    assessment = rule.assess(features)
    if rule.invalid_input == "error" and not assessment.valid.all():
        raise DataError(f"{data}: {whose}{kernel.invalid_rows_message(assessment.valid, first_row)}")
    return assessment


def explain_columns(rule: Rule) -> list[str]:
    return [
        *(f"posterior_{c}" for c in rule.classes),
        *(f"risk_{a}" for a in rule.actions),
        "runner_up",
        "margin",
    ]


def decide_file(
    rule: Rule,
    data: Path,
    output: Path,
    explain: bool = False,
    progress: Callable[[int, int | None], None] | None = None,
    batch_rows: int = DEFAULT_BATCH_ROWS,
) -> dict[str, int]:
    """Write ``output`` (format from its suffix) with the input columns plus ``action`` (and explanations).

    Returns the count of rows per action. Nothing is left at ``output`` on error.
    """
    decided = _decided_batches(rule, data, explain, batch_rows)
    first = next(decided, None)
    if first is None:
        raise DataError(f"{data}: the file has no rows")
    counts = np.zeros(len(rule.actions), dtype=np.int64)
    total_rows = count_rows(data)
    with TableWriter(output, first[0].schema).open() as write:
        for batch, actions in chain([first], decided):
            write(batch)
            counts += np.bincount(actions, minlength=len(rule.actions))
            if progress is not None:
                progress(batch.num_rows, total_rows)
    return dict(zip(rule.actions, counts.tolist(), strict=True))


def _decided_batches(
    rule: Rule, data: Path, explain: bool, batch_rows: int
) -> Iterator[tuple[pa.RecordBatch, np.ndarray]]:
    added = ["action", *(explain_columns(rule) if explain else [])]
    first_row = 1
    for batch in read_ahead(read_table_batches(data, None, batch_rows, numeric=rule.features)):
        if first_row == 1:
            _require_columns(rule, data, batch.schema.names, added)
        features = batch_to_matrix(data, batch, rule.features, first_row)
        assessment = assess_batch(rule, features, data, first_row)
        yield _with_decisions(rule, batch, assessment, explain), assessment.action
        first_row += batch.num_rows


def _require_columns(rule: Rule, data: Path, names: list[str], added: list[str]) -> None:
    missing = [f for f in rule.features if f not in names]
    if missing:
        raise DataError(f"{data}: missing feature column(s) {missing}")
    clashes = [c for c in added if c in names]
    if clashes:
        raise DataError(f"{data}: column(s) {clashes} already exist; rename them before deciding")


def _with_decisions(rule: Rule, batch: pa.RecordBatch, assessment: Explanation, explain: bool) -> pa.RecordBatch:
    action_names = np.asarray(rule.actions, dtype=object)
    columns = [*list(batch.columns), pa.array(action_names[assessment.action], type=pa.string())]
    names = [*list(batch.schema.names), "action"]
    if explain:
        runner_names = [rule.actions[i] if i >= 0 else None for i in assessment.runner_up.tolist()]
        columns += [pa.array(assessment.posteriors[:, k]) for k in range(len(rule.classes))]
        columns += [pa.array(assessment.risks[:, a]) for a in range(len(rule.actions))]
        columns += [pa.array(runner_names, type=pa.string()), pa.array(assessment.margin)]
        names += explain_columns(rule)
    return pa.RecordBatch.from_arrays(columns, names=names)
