"""Decide over a CSV or Parquet file in batches; output keeps the input rows untouched and adds the decision."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from threadpoolctl import threadpool_limits

from policyc.errors import DataError
from policyc.evidence.io import (
    DEFAULT_BATCH_ROWS,
    RowBatch,
    RowSource,
    count_rows,
    data_format,
    write_behind,
    write_rows,
)
from policyc.runtime import REASONS, Explanation, Rule, kernel

__all__ = ["DecisionCounts", "assess_batch", "decide_file", "deferral_text", "deferrals", "explain_columns"]


def assess_batch(rule: Rule, features: np.ndarray, data: Path, first_row: int, whose: str = "") -> Explanation:
    """The rule's assessment of a batch of a file's rows; under ``invalid_input: error`` an invalid row
    is a DataError naming its row in the file (rows counted from 1, the header not counted) and the
    columns holding a missing or non-finite value there."""
    assessment = rule.assess(features)
    refuse_invalid_rows(rule, assessment.valid, features, data, first_row, whose)
    return assessment


def refuse_invalid_rows(
    rule: Rule, valid: np.ndarray, features: np.ndarray, data: Path, first_row: int, whose: str = ""
) -> None:
    """Under ``invalid_input: error``, a DataError naming the first invalid row and its bad columns."""
    if rule.invalid_input == "error" and not valid.all():
        message = kernel.invalid_rows_message(valid, first_row, prepared=features, features=rule.features)
        raise DataError(f"{data}: {whose}{message}")


def deferrals(rule: Rule, assessment: Explanation) -> dict[str, int]:
    """Rows sent to the reject action, counted per reason (every reason of ``REASONS``, zero or not)."""
    if rule.reject_action is None:
        return {}
    deferred = assessment.action == rule.actions.index(rule.reject_action)
    return {reason: int((deferred & (assessment.reason == reason)).sum()) for reason in REASONS}


def deferral_text(deferred: Mapping[str, int]) -> str:
    """Deferrals by reason in words: ``min-risk 9, invalid 3``."""
    return ", ".join(f"{reason} {n}" for reason, n in deferred.items())


def add_counts(total: dict[str, int], more: Mapping[str, int]) -> None:
    for key, count in more.items():
        total[key] = total.get(key, 0) + count


@dataclass
class DecisionCounts:
    """Rows per action, and the rows sent to the reject action per reason (empty without a reject option)."""

    actions: dict[str, int]
    deferred: dict[str, int]
    reject_action: str | None

    @property
    def rows(self) -> int:
        return sum(self.actions.values())

    def add(self, rule: Rule, action: np.ndarray, valid: np.ndarray) -> None:
        """Count a batch's actions (indices into ``rule.actions``) and deferrals; a row's reason is ``invalid``
        where it is not valid, else ``min-risk`` (``kernel.reasons``)."""
        for index, count in enumerate(np.bincount(action, minlength=len(rule.actions)).tolist()):
            self.actions[rule.actions[index]] += count
        if rule.reject_action is not None:
            deferred = action == len(rule.actions) - 1
            invalid = int((deferred & ~valid).sum())
            add_counts(self.deferred, {"min-risk": int(deferred.sum()) - invalid, "invalid": invalid})

    def summary(self) -> str:
        """One line: rows per action with shares, then deferrals by reason."""
        # share = rows with the action / all rows
        text = ", ".join(f"{name} {n} ({n / self.rows:.1%})" for name, n in self.actions.items())
        if self.reject_action is not None:
            text += (
                f"; deferred to {self.reject_action}: {sum(self.deferred.values())} ({deferral_text(self.deferred)})"
            )
        return text


def explain_columns(rule: Rule) -> list[str]:
    """Names of the columns ``--explain`` adds after ``action``."""
    return list(_added_schema(rule, explain=True).names[1:])


def decide_file(
    rule: Rule,
    data: Path,
    output: Path,
    explain: bool = False,
    progress: Callable[[int, int | None], None] | None = None,
    batch_rows: int = DEFAULT_BATCH_ROWS,
) -> DecisionCounts:
    """Write ``output`` (format from its suffix) with the input rows untouched plus ``action`` (and explanations).

    Reading, deciding and writing overlap on three threads; meanwhile BLAS runs on one thread (threadpoolctl).

    A CSV output repeats a CSV input's bytes exactly and appends the new cells to each line; a Parquet input's
    columns keep their types. Raises DataError (nothing is left at ``output``) when the data cannot be used,
    when ``output`` is the input or a read-only file, or when the output cannot be written.
    """
    source = RowSource(data, rule.features, csv_bytes=data_format(output) == "csv", batch_rows=batch_rows)
    added = _added_schema(rule, explain)
    clashes = [name for name in added.names if name in source.names]
    if clashes:
        raise DataError(f"{data}: column(s) {clashes} already exist; rename them before deciding")
    counts = DecisionCounts(dict.fromkeys(rule.actions, 0), dict.fromkeys(REASONS, 0), rule.reject_action)
    total_rows = count_rows(data)
    try:
        # three threads: the source reads the next batch, this one decides, the writer writes the last one; BLAS
        # threads of the kernel's own would only compete with them (20% slower, tests/benchmarks/bench_decide_file.py)
        with (
            threadpool_limits(1, user_api="blas"),
            write_rows(output, source, added) as write,
            write_behind(write) as write_later,
        ):
            for rows in source.batches():
                columns, action, valid = _decide_batch(rule, rows, data, explain, added)
                write_later(rows, columns)
                counts.add(rule, action, valid)
                if progress is not None:
                    progress(rows.num_rows, total_rows)
            if counts.rows == 0:
                raise DataError(f"{data}: the file has no rows")
    except (OSError, pa.ArrowException) as error:
        reason = error.strerror if isinstance(error, OSError) and error.strerror else str(error)
        raise DataError(f"cannot write {output}: {reason}") from None
    return counts


def _added_schema(rule: Rule, explain: bool) -> pa.Schema:
    fields = [pa.field("action", pa.string())]
    if explain:
        fields += [pa.field(f"posterior_{c}", pa.float64()) for c in rule.classes]
        fields += [pa.field(f"risk_{a}", pa.float64()) for a in rule.actions]
        fields += [pa.field("runner_up", pa.string()), pa.field("margin", pa.float64())]
        fields += [pa.field("reason", pa.string())]
    return pa.schema(fields)


def _decide_batch(
    rule: Rule, rows: RowBatch, data: Path, explain: bool, schema: pa.Schema
) -> tuple[pa.RecordBatch, np.ndarray, np.ndarray]:
    """The added columns, action indices and validity of a batch; posteriors and risks only for ``explain``."""
    if explain:
        assessment = assess_batch(rule, rows.features, data, rows.first_row)
        return _decision_columns(rule, assessment, schema), assessment.action, assessment.valid
    action, valid = rule.decide_valid(rows.features)
    refuse_invalid_rows(rule, valid, rows.features, data, rows.first_row)
    names = pc.take(pa.array(rule.actions, pa.string()), pa.array(action))
    return pa.RecordBatch.from_arrays([names], schema=schema), action, valid


def _decision_columns(rule: Rule, assessment: Explanation, schema: pa.Schema) -> pa.RecordBatch:
    columns = [pa.array(assessment.action_name, type=pa.string())]
    if len(schema) > 1:
        columns += [pa.array(assessment.posteriors[:, k]) for k in range(len(rule.classes))]
        columns += [pa.array(assessment.risks[:, a]) for a in range(len(rule.actions))]
        columns += [pa.array(assessment.runner_up_name, type=pa.string()), pa.array(assessment.margin)]
        columns += [pa.array(assessment.reason, type=pa.string())]
    return pa.RecordBatch.from_arrays(columns, schema=schema)
