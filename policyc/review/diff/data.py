"""Both rules' decisions on a reference table: flips, reject rates, expected and empirical risk."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated

import numpy as np
from pydantic import Field, computed_field
from pydantic.dataclasses import dataclass as report

from policyc.batch import add_counts, assess_batch, deferrals
from policyc.evidence.io import DEFAULT_BATCH_ROWS, DataError, read_feature_batches
from policyc.review.diff.posterior import same_actions
from policyc.review.shared.bootstrap import (
    DEFAULT_CONFIDENCE,
    DEFAULT_RESAMPLES,
    DEFAULT_SEED,
    BootstrapInterval,
    categorical_mean_interval,
)
from policyc.review.shared.labels import label_codes
from policyc.review.shared.losses import stated_loss, stated_risks
from policyc.review.shared.reports import REPORT_CONFIG
from policyc.runtime import Rule

__all__ = ["DataDiff", "data_diff"]


@report(frozen=True, config=REPORT_CONFIG)
class FlipCounts:
    """Rows per (old action, new action); rows in old-action order, columns in new-action order."""

    old_actions: tuple[str, ...]
    new_actions: tuple[str, ...]
    counts: list[list[int]]


@report(frozen=True, config=REPORT_CONFIG)
class RejectRates:
    old: float | None
    new: float | None


@report(frozen=True, config=REPORT_CONFIG)
class Deferrals:
    """Rows each rule sends to its reject action, per reason (``min-risk``, ``invalid``); None without one."""

    old: dict[str, int] | None
    new: dict[str, int] | None


@report(frozen=True, config=REPORT_CONFIG)
class ExpectedRisk:
    rows: int
    old_decisions: float
    new_decisions: float
    basis: str = "mean conditional risk R_new(a|x) under the new rule's model, rows valid for the new rule"

    @computed_field  # type: ignore[prop-decorator]
    @property
    def difference(self) -> float:
        return self.new_decisions - self.old_decisions


@report(frozen=True, config=REPORT_CONFIG)
class EmpiricalRisk:
    label: str | None
    rows: int
    old: float
    new: float
    difference: BootstrapInterval  # new - old, paired
    basis: str = "mean of loss_new[action, true class], the NEW policy's loss matrix"


@report(frozen=True, config=REPORT_CONFIG)
class DataDiff:
    """Both rules' decisions on a reference table (see the module docstring for each quantity)."""

    source: str
    old_actions: Annotated[tuple[str, ...], Field(exclude=True)]
    new_actions: Annotated[tuple[str, ...], Field(exclude=True)]
    flips: Annotated[np.ndarray, Field(exclude=True)]  # (A_old, A_new) row counts
    flipped: Annotated[int, Field(exclude=True)]
    invalid_rows: int  # rows the new rule cannot evaluate (sent per its invalid_input)
    reject_rate_old: Annotated[float | None, Field(exclude=True)]
    reject_rate_new: Annotated[float | None, Field(exclude=True)]
    # rows each rule sends to its reject action, per reason (empty without a reject option)
    deferred_old: Annotated[dict[str, int], Field(exclude=True)]
    deferred_new: Annotated[dict[str, int], Field(exclude=True)]
    # (old decisions, new decisions, rows) under the new model
    expected_risk: Annotated[tuple[float, float, int] | None, Field(exclude=True)]
    # (old, new, rows) by the new loss matrix
    empirical_risk: Annotated[tuple[float, float, int] | None, Field(exclude=True)]
    difference: Annotated[BootstrapInterval | None, Field(exclude=True)]  # empirical new - old
    label: Annotated[str | None, Field(exclude=True)]
    features_differ: bool
    notes: tuple[str, ...] = ()

    @computed_field  # type: ignore[prop-decorator]
    @property
    def rows(self) -> int:
        return int(self.flips.sum())

    @computed_field  # type: ignore[prop-decorator]
    @property
    def flip_rate(self) -> float:
        # flip rate = rows whose action changes / all rows
        return self.flipped / self.rows if self.rows else float("nan")

    @computed_field(alias="flips")  # type: ignore[prop-decorator]
    @property
    def flip_counts(self) -> FlipCounts:
        return FlipCounts(self.old_actions, self.new_actions, self.flips.tolist())

    @computed_field(alias="reject_rate")  # type: ignore[prop-decorator]
    @property
    def reject_rates(self) -> RejectRates:
        return RejectRates(self.reject_rate_old, self.reject_rate_new)

    @computed_field  # type: ignore[prop-decorator]
    @property
    def deferred_by_reason(self) -> Deferrals:
        return Deferrals(
            self.deferred_old if self.reject_rate_old is not None else None,
            self.deferred_new if self.reject_rate_new is not None else None,
        )

    @computed_field(alias="expected_risk")  # type: ignore[prop-decorator]
    @property
    def expected_risk_report(self) -> ExpectedRisk | None:
        if self.expected_risk is None:
            return None
        old, new, rows = self.expected_risk
        return ExpectedRisk(rows, old, new)

    @computed_field(alias="empirical_risk")  # type: ignore[prop-decorator]
    @property
    def empirical_risk_report(self) -> EmpiricalRisk | None:
        if self.empirical_risk is None or self.difference is None:
            return None
        old, new, rows = self.empirical_risk
        return EmpiricalRisk(self.label, rows, old, new, self.difference)


def _action_map(old: Rule, new: Rule) -> np.ndarray:
    """Index in the new rule of each old action (-1 when the new rule has no such action)."""
    same = same_actions(old, new)
    return np.where(same.any(axis=1), same.argmax(axis=1), -1).astype(np.int64)


@dataclass
class _DataTally:
    """Running sums over batches."""

    old: Rule
    new: Rule
    mapping: np.ndarray
    flips: np.ndarray
    cells: np.ndarray  # (A_new, A_new, K_new): rows per (mapped old action, new action, true class)
    risk_old: float = 0.0
    risk_new: float = 0.0
    risk_rows: int = 0
    invalid: int = 0
    deferred_old: dict[str, int] = field(default_factory=dict)
    deferred_new: dict[str, int] = field(default_factory=dict)

    def add(self, X: tuple[np.ndarray, np.ndarray], codes: np.ndarray | None, path: Path, first_row: int) -> None:
        """Decide one batch with both rules; ``X`` holds each rule's feature columns."""
        before = assess_batch(self.old, X[0], path, first_row, "old rule: ")
        after = assess_batch(self.new, X[1], path, first_row, "new rule: ")
        n_new = len(self.new.actions)
        self.flips += np.bincount(
            before.action * n_new + after.action, minlength=len(self.old.actions) * n_new
        ).reshape(len(self.old.actions), n_new)
        self.invalid += int((~after.valid).sum())
        add_counts(self.deferred_old, deferrals(self.old, before))
        add_counts(self.deferred_new, deferrals(self.new, after))
        mapped = self.mapping[before.action]
        valid = after.valid
        if (mapped >= 0).all():
            rows = np.flatnonzero(valid)
            # mean R_new(a|x) over rows valid for the new rule, a = the old and the new decision; by the new
            # policy's stated matrix (a rule with operating limits decides by L' but costs L)
            risks = stated_risks(self.new, after.posteriors[rows])
            self.risk_old += float(risks[np.arange(rows.size), mapped[rows]].sum())
            self.risk_new += float(risks[np.arange(rows.size), after.action[rows]].sum())
            self.risk_rows += rows.size
            if codes is not None:
                k = len(self.new.classes)
                flat = (mapped * n_new + after.action) * k + codes
                self.cells += np.bincount(flat, minlength=self.cells.size).reshape(self.cells.shape)


def _batches(
    path: Path, old: Rule, new: Rule, label: str | None, batch_rows: int
) -> Iterator[tuple[tuple[np.ndarray, np.ndarray], np.ndarray | None, int]]:
    columns = list(dict.fromkeys([*old.features, *new.features]))
    old_index = [columns.index(f) for f in old.features]
    new_index = [columns.index(f) for f in new.features]
    for batch in read_feature_batches(path, columns, label=label, batch_rows=batch_rows):
        codes = None
        if batch.label_column is not None:
            codes = label_codes(path, label or "", batch, new.classes, "the new rule")
        yield (batch.features[:, old_index], batch.features[:, new_index]), codes, batch.first_row


def data_diff(
    old: Rule,
    new: Rule,
    data: Path,
    label: str | None = None,
    confidence: float = DEFAULT_CONFIDENCE,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = DEFAULT_SEED,
    batch_rows: int = DEFAULT_BATCH_ROWS,
) -> DataDiff:
    """Decide every row of ``data`` with both rules, in batches; raise DataError on unusable data."""
    mapping = _action_map(old, new)
    n_new = len(new.actions)
    tally = _DataTally(
        old,
        new,
        mapping,
        np.zeros((len(old.actions), n_new), dtype=np.int64),
        np.zeros((n_new, n_new, len(new.classes)), dtype=np.int64),
    )
    for X, codes, first_row in _batches(data, old, new, label, batch_rows):
        tally.add(X, codes, data, first_row)
    return _finish(tally, data, label, confidence, resamples, seed)


def _finish(tally: _DataTally, data: Path, label: str | None, confidence: float, resamples: int, seed: int) -> DataDiff:
    old, new, mapping, flips = tally.old, tally.new, tally.mapping, tally.flips
    rows = int(flips.sum())
    if rows == 0:
        raise DataError(f"{data}: the file has no rows")
    notes = []
    features_differ = set(old.features) != set(new.features)
    if features_differ:
        notes.append("the rules read different features; each rule decided on its own columns of the data")
    same = mapping[:, None] == np.arange(len(new.actions))[None, :]
    flipped = int(flips[~same].sum())
    unmatched = [a for a, m in zip(old.actions, mapping, strict=True) if m < 0 and flips[old.actions.index(a)].any()]
    expected = empirical = difference = None
    if unmatched:
        notes.append(f"old action(s) {unmatched} do not exist in the new rule, so no risk comparison is possible")
    elif tally.risk_rows:
        # mean R_new(a|x) = Σ_rows R_new(a(x)|x) / rows, for the old and the new decisions
        expected = (tally.risk_old / tally.risk_rows, tally.risk_new / tally.risk_rows, tally.risk_rows)
    if label is not None and not unmatched:
        loss = stated_loss(new)
        # per row: loss_new[a_new, y] - loss_new[a_old, y], by category (a_old mapped, a_new, y)
        values = loss[None, :, :] - loss[:, None, :]
        difference = categorical_mean_interval(tally.cells, values, confidence, resamples, seed)
        # empirical risk = (1/n) Σ_rows loss_new[a(x), y]: cell counts by (action, class) times the loss
        old_loss = float((tally.cells.sum(axis=1) * loss).sum()) / rows
        new_loss = float((tally.cells.sum(axis=0) * loss).sum()) / rows
        empirical = (old_loss, new_loss, rows)
    return DataDiff(
        str(data),
        tuple(old.actions),
        tuple(new.actions),
        flips,
        flipped,
        tally.invalid,
        _reject_share(old, flips.sum(axis=1)),
        _reject_share(new, flips.sum(axis=0)),
        tally.deferred_old,
        tally.deferred_new,
        expected,
        empirical,
        difference,
        label,
        features_differ,
        tuple(notes),
    )


def _reject_share(rule: Rule, counts: np.ndarray) -> float | None:
    if rule.reject_action is None:
        return None
    # reject rate = rows sent to the reject action / all rows
    return float(counts[rule.actions.index(rule.reject_action)] / counts.sum())
