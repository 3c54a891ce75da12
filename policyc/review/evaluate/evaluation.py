"""How a rule does on labelled data: risk, errors, rejects, confusion, the risk-reject curve, calibration.

Everything is accumulated batch by batch, so memory stays bounded whatever the
file size; several files (a directory or glob) are tallied one by one and the
tallies merged in a fixed tree (:mod:`policyc.evidence.partitions`), on Dask
workers if asked. No pass needs all rows at once: the curve is a tally over a
fixed grid of reject costs, not a sort of the rows, and the bootstrap interval of
the risk works on the confusion counts (:mod:`policyc.review.shared.bootstrap`),
so the same seed gives the same interval however the rows are split into files.

Definitions (``loss`` is the rule's stated matrix, reject row last, in its loss_unit; a rule compiled with
operating limits decides by the adjusted matrix L' but is charged by the stated one):

* empirical risk: mean over rows of loss[action, true class], reject cost included;
* an accepted (not deferred) decision is an *error* when its loss exceeds the
  least loss any action (reject aside) has for the row's true class; under 0-1
  loss with one action per class this is a misclassification;
* error rate: errors / all rows (Chow's E); error on accepted: errors / accepted rows;
* reject rate: deferred rows / all rows (invalid rows deferred under ``invalid_input: reject`` included);
  the deferred rows are also counted by reason (``min-risk``, ``invalid``);
* risk-reject curve: the reject cost c is swept over a grid from 0 to V, the
  largest minimum risk over all posteriors (deferring is never chosen for c ≥ V),
  plus the rule's own cost. At each c a row takes its minimum-risk action if
  that risk is at most c, else it is deferred at cost c. The accepted sets are
  nested, so as c rises the reject rate falls and the error rate E rises
  (Chow 1970; Fukunaga 1990, p. 78);
* the risk-reject curve sweeps the reject cost against the rule's own action rows (L' for a rule with limits);
* operating limits (rules compiled with ``limits:``): each limit's rate on the data, all rows for a
  ``max_share`` and the class's rows for a ``min_recall``, with a two-sided Clopper–Pearson interval at the
  report's confidence, and whether the rate is within the limit;
* calibration (posterior evidence only): the rule's posteriors, i.e. the
  upstream probabilities corrected to the deployment priors, against the
  labels. The upstream probabilities were calibrated under the upstream
  training priors, so it is the corrected ones that must match the deployment
  labels. Per class (one-vs-rest), 10 equal-width bins of the predicted
  P(class | x), right-closed as in scikit-learn's ``calibration_curve``; per
  class expected calibration error ECE_k = Σ_b (n_b / N) |observed_b − predicted_b|.

JSON shape (``policyc evaluate --format json``; keys sorted, floats rounded to
10 significant digits, NaN as null)::

    {
      "rule": {"source", "kind", "policy", "revision", "content_sha256", "policy_sha256", "training_sha256"},
      "data": str, "label": str, "rows": int, "invalid_rows": int,
      "deferred_by_reason": {"min-risk": int, "invalid": int}|null, "loss_unit": str|null,
      "classes": [str], "actions": [str], "reject_action": str|null, "reject_cost": float|null,
      "risk": {"estimate", "low", "high", "confidence", "resamples", "seed", "method"},
      "error_rate": float, "accepted_error_rate": float|null, "reject_rate": float,
      "error_definition": str,
      "confusion": {"rows": "true class", "columns": "action", "counts": [[int]]},
      "per_class": [{"class", "rows", "action_shares": {action: share}, "error_rate"}],
      "curve": {"reach_value": V, "points": [{"reject_cost", "risk", "reject_rate", "error_rate",
                                              "accepted_error_rate", "own"}]},
      "calibration": null | {"binning", "bins", "ece_warning_above", "warning": bool,
                             "classes": [{"class", "ece", "bins": [{"low", "high", "count",
                                                                     "mean_predicted", "observed"}]}]},
      "limits": [{"kind", "subject", "actions", "share", "rows", "count", "rate", "low", "high",
                  "confidence", "holds", "clearly_broken", "method"}]
    }
"""

from __future__ import annotations

import copy
import dataclasses
from collections.abc import Sequence
from functools import partial
from pathlib import Path
from typing import Annotated

import numpy as np
from pydantic import Field, computed_field
from pydantic.dataclasses import dataclass

from policyc.batch import add_counts, assess_batch, deferrals
from policyc.evidence.base import Progress
from policyc.evidence.io import DEFAULT_BATCH_ROWS, DataError, data_file_list, read_feature_batches
from policyc.evidence.partitions import PartitionRunner, SerialPartitions
from policyc.geometry.reach import reject_reach_value
from policyc.review.shared.bootstrap import (
    DEFAULT_CONFIDENCE,
    DEFAULT_RESAMPLES,
    DEFAULT_SEED,
    BootstrapInterval,
    categorical_mean_interval,
)
from policyc.review.shared.labels import label_codes
from policyc.review.shared.loading import LoadedRule, RuleIdentity, identity
from policyc.review.shared.losses import stated_loss
from policyc.review.shared.reports import REPORT_CONFIG
from policyc.review.shared.shipping import ShippedRule
from policyc.runtime import Explanation, Rule

__all__ = [
    "CALIBRATION_BINS",
    "CURVE_POINTS",
    "ECE_WARNING",
    "ERROR_DEFINITION",
    "CalibrationReport",
    "ClassCalibration",
    "ClassOutcome",
    "Confusion",
    "Curve",
    "CurvePoint",
    "Evaluation",
    "LimitCheck",
    "ReliabilityBin",
    "Tallies",
    "TallySettings",
    "error_cells",
    "evaluate",
    "label_codes",
    "limit_checks",
    "tally_file",
]

CURVE_POINTS = 41
CALIBRATION_BINS = 10
ECE_WARNING = 0.05
"""Warn when a class's expected calibration error exceeds this (common practice, no source)."""

ERROR_DEFINITION = (
    "an accepted decision is an error when its loss exceeds the least loss any action (reject aside) "
    "has for the true class"
)


def error_cells(loss: np.ndarray, n_plain: int) -> np.ndarray:
    """Boolean (A, K): True where taking action a for true class k is an error (see the module docstring).

    The reject row (index ≥ ``n_plain``) is never an error; it is a deferral.
    """
    plain = loss[:n_plain]
    cells = np.zeros(loss.shape, dtype=bool)
    cells[:n_plain] = plain > plain.min(axis=0, keepdims=True)  # λ(a|k) > min_b λ(b|k)
    return cells


@dataclass(frozen=True, config=REPORT_CONFIG)
class CurvePoint:
    """One point of the risk-reject curve at reject cost ``reject_cost``."""

    reject_cost: float
    risk: float
    reject_rate: float
    error_rate: float
    accepted_error_rate: float
    own: bool


@dataclass(frozen=True, config=REPORT_CONFIG)
class ReliabilityBin:
    low: float
    high: float
    count: int
    mean_predicted: float
    observed: float


@dataclass(frozen=True, config=REPORT_CONFIG)
class ClassCalibration:
    class_name: Annotated[str, Field(serialization_alias="class")]
    ece: float
    bins: tuple[ReliabilityBin, ...]


@dataclass(frozen=True, config=REPORT_CONFIG)
class CalibrationReport:
    """Per class: a reliability table of the rule's (prior-corrected) posteriors and the ECE."""

    class_names: Annotated[tuple[str, ...], Field(exclude=True)]
    tables: Annotated[tuple[tuple[ReliabilityBin, ...], ...], Field(exclude=True)]
    ece: Annotated[tuple[float, ...], Field(exclude=True)]
    binning: str = (
        "per class, one-vs-rest: 10 equal-width right-closed bins of the rule's posterior P(class | x), "
        "i.e. the upstream probabilities corrected to the deployment priors"
    )
    bins: int = CALIBRATION_BINS
    ece_warning_above: float = ECE_WARNING

    @computed_field  # type: ignore[prop-decorator]
    @property
    def warning(self) -> bool:
        return max(self.ece) > ECE_WARNING

    @computed_field  # type: ignore[prop-decorator]
    @property
    def classes(self) -> tuple[ClassCalibration, ...]:
        return tuple(
            ClassCalibration(name, ece, table)
            for name, table, ece in zip(self.class_names, self.tables, self.ece, strict=True)
        )


@dataclass(frozen=True, config=REPORT_CONFIG)
class ClassOutcome:
    """How the rows of one true class were decided."""

    class_name: Annotated[str, Field(serialization_alias="class")]
    rows: int
    action_shares: dict[str, float]
    error_rate: float | None


@dataclass(frozen=True, config=REPORT_CONFIG)
class Confusion:
    counts: list[list[int]]
    rows: str = "true class"
    columns: str = "action"


@dataclass(frozen=True, config=REPORT_CONFIG)
class Curve:
    reach_value: float
    points: tuple[CurvePoint, ...]


@dataclass(frozen=True, config=REPORT_CONFIG)
class LimitCheck:
    """One operating limit of the rule on the labelled data: its rate, a two-sided Clopper–Pearson interval
    at the report's confidence, and whether the rate is within the limit."""

    kind: str
    subject: str
    actions: tuple[str, ...]
    share: float
    rows: int  # rows the limit is judged on: all rows (max_share), the rows of the class (min_recall)
    count: int  # rows receiving the capped action / class rows receiving a listed action
    rate: float | None
    low: float | None
    high: float | None
    confidence: float
    holds: bool | None  # the rate is within the limit
    clearly_broken: bool | None  # the whole interval lies beyond the limit
    method: str = "Clopper-Pearson (exact binomial), two-sided"


def limit_checks(rule: Rule, confusion: np.ndarray, confidence: float) -> tuple[LimitCheck, ...]:
    """Each limit in the rule's manifest checked on the confusion counts (K, A) of labelled data."""
    from scipy import stats

    record = rule.manifest.get("limits")
    checks = []
    for figures in record["limits"] if record is not None else ():
        counted = np.isin(rule.actions, figures["actions"])
        judged = confusion if figures["kind"] == "max_share" else confusion[[rule.classes.index(figures["subject"])]]
        rows, count = int(judged.sum()), int(judged[:, counted].sum())
        tail = (1.0 - confidence) / 2.0
        rate = low = high = None
        holds = broken = None
        if rows:
            rate = count / rows
            # Clopper–Pearson: low = Beta⁻¹(α/2; x, n − x + 1), high = Beta⁻¹(1 − α/2; x + 1, n − x)
            low = float(stats.beta.ppf(tail, count, rows - count + 1)) if count > 0 else 0.0
            high = float(stats.beta.ppf(1.0 - tail, count + 1, rows - count)) if count < rows else 1.0
            holds = rate <= figures["share"] if figures["kind"] == "max_share" else rate >= figures["share"]
            broken = low > figures["share"] if figures["kind"] == "max_share" else high < figures["share"]
        checks.append(
            LimitCheck(
                figures["kind"],
                figures["subject"],
                tuple(figures["actions"]),
                figures["share"],
                rows,
                count,
                rate,
                low,
                high,
                confidence,
                holds,
                broken,
            )
        )
    return tuple(checks)


@dataclass(frozen=True, config=REPORT_CONFIG)
class Evaluation:
    """Everything ``policyc evaluate`` reports (see the module docstring for definitions); its JSON is this
    object (schemas/evaluation-report.schema.json)."""

    loaded: Annotated[LoadedRule, Field(exclude=True)]
    data: str
    label: str
    confusion: Annotated[np.ndarray, Field(exclude=True)]  # (K, A) rows per (true class, action)
    invalid_rows: int
    # rows sent to the reject action, per reason (empty without a reject option)
    deferred: Annotated[dict[str, int], Field(exclude=True)]
    risk: BootstrapInterval
    curve: Annotated[tuple[CurvePoint, ...], Field(exclude=True)]
    reach_value: Annotated[float, Field(exclude=True)]
    calibration: CalibrationReport | None
    limits: tuple[LimitCheck, ...] = ()
    error_definition: str = ERROR_DEFINITION

    @property
    def rule(self) -> Rule:
        return self.loaded.rule

    @property
    def loss(self) -> np.ndarray:
        """The stated matrix (a rule with operating limits decides by L' but costs L)."""
        return stated_loss(self.rule)

    @computed_field  # type: ignore[prop-decorator]
    @property
    def rows(self) -> int:
        return int(self.confusion.sum())

    @property
    def n_plain(self) -> int:
        return len(self.rule.actions) - (1 if self.rule.reject_action is not None else 0)

    @property
    def rejected(self) -> int:
        return int(self.confusion[:, self.n_plain :].sum())

    @property
    def errors_by_class(self) -> np.ndarray:
        # errors_k = Σ_a n[k, a] · [λ(a|k) > min_b λ(b|k)], a over the actions (reject aside)
        return (self.confusion * error_cells(self.loss, self.n_plain).T).sum(axis=1)

    @computed_field  # type: ignore[prop-decorator]
    @property
    def reject_rate(self) -> float:
        return self.rejected / self.rows  # R = deferred rows / all rows

    @computed_field  # type: ignore[prop-decorator]
    @property
    def deferred_by_reason(self) -> dict[str, int] | None:
        """Rows sent to the reject action per reason (``min-risk``, ``invalid``); None without a reject option."""
        return self.deferred if self.rule.reject_action is not None else None

    @computed_field  # type: ignore[prop-decorator]
    @property
    def error_rate(self) -> float:
        return float(self.errors_by_class.sum()) / self.rows  # E = errors / all rows (Chow's E)

    @computed_field  # type: ignore[prop-decorator]
    @property
    def accepted_error_rate(self) -> float:
        accepted = self.rows - self.rejected
        return float(self.errors_by_class.sum()) / accepted if accepted else float("nan")  # errors / accepted rows

    @computed_field(alias="rule")  # type: ignore[prop-decorator]
    @property
    def rule_identity(self) -> RuleIdentity:
        return identity(self.loaded)

    @computed_field  # type: ignore[prop-decorator]
    @property
    def loss_unit(self) -> str | None:
        return self.rule.manifest.get("loss_unit")

    @computed_field  # type: ignore[prop-decorator]
    @property
    def classes(self) -> tuple[str, ...]:
        return self.rule.classes

    @computed_field  # type: ignore[prop-decorator]
    @property
    def actions(self) -> tuple[str, ...]:
        return self.rule.actions

    @computed_field  # type: ignore[prop-decorator]
    @property
    def reject_action(self) -> str | None:
        return self.rule.reject_action

    @computed_field  # type: ignore[prop-decorator]
    @property
    def reject_cost(self) -> float | None:
        return self.rule.manifest.get("reject_cost")

    @computed_field(alias="confusion")  # type: ignore[prop-decorator]
    @property
    def confusion_counts(self) -> Confusion:
        return Confusion(self.confusion.tolist())

    @computed_field  # type: ignore[prop-decorator]
    @property
    def per_class(self) -> tuple[ClassOutcome, ...]:
        outcomes = []
        for k, name in enumerate(self.rule.classes):
            count = int(self.confusion[k].sum())
            shares = self.confusion[k] / count if count else np.full(len(self.rule.actions), np.nan)  # n[k, a] / n_k
            error_rate = float(self.errors_by_class[k] / count) if count else None
            outcomes.append(
                ClassOutcome(name, count, dict(zip(self.rule.actions, shares.tolist(), strict=True)), error_rate)
            )
        return tuple(outcomes)

    @computed_field(alias="curve")  # type: ignore[prop-decorator]
    @property
    def curve_report(self) -> Curve:
        return Curve(self.reach_value, self.curve)


class _CurveTally:
    """Running sums of the risk-reject curve over a grid of reject costs."""

    def __init__(self, loss: np.ndarray, n_plain: int, grid: np.ndarray) -> None:
        self.plain = loss[:n_plain]
        self.errors_at = error_cells(loss, n_plain)[:n_plain]
        self.grid = grid
        self.rejected = np.zeros(grid.size, dtype=np.int64)
        self.errors = np.zeros(grid.size, dtype=np.int64)
        self.loss_sum = np.zeros(grid.size)

    def add(self, risks: np.ndarray, valid: np.ndarray, codes: np.ndarray) -> None:
        n_plain = self.plain.shape[0]
        plain_risks = np.where(valid[:, None], risks[:, :n_plain], 0.0)
        best = np.argmin(plain_risks, axis=1)  # a*(x) = argmin over actions of R(a|x), ties to the earlier
        least = np.where(valid, plain_risks[np.arange(best.size), best], np.inf)  # invalid rows: always deferred
        # Chow's rule at cost c: accept a*(x) iff min_a R(a|x) <= c, else defer at cost c
        deferred = least[:, None] > self.grid[None, :]
        loss = self.plain[best, codes]
        wrong = self.errors_at[best, codes]
        self.rejected += deferred.sum(axis=0)
        self.errors += (~deferred & wrong[:, None]).sum(axis=0)
        self.loss_sum += np.where(deferred, self.grid[None, :], loss[:, None]).sum(axis=0)

    def merged(self, other: _CurveTally) -> _CurveTally:
        """The sums over both sets of rows (Σ over the union = Σ over each), this one's first."""
        total = copy.copy(self)
        total.rejected, total.errors = self.rejected + other.rejected, self.errors + other.errors
        total.loss_sum = self.loss_sum + other.loss_sum
        return total

    def points(self, rows: int, own: float | None) -> tuple[CurvePoint, ...]:
        accepted = rows - self.rejected
        with np.errstate(invalid="ignore", divide="ignore"):
            accepted_error = np.where(accepted > 0, self.errors / np.maximum(accepted, 1), np.nan)
        return tuple(
            CurvePoint(
                float(c),
                float(self.loss_sum[i] / rows),
                float(self.rejected[i] / rows),
                float(self.errors[i] / rows),
                float(accepted_error[i]),
                own is not None and float(c) == own,
            )
            for i, c in enumerate(self.grid)
        )


class _CalibrationTally:
    """Per class and bin: rows, Σ predicted P(k|x), rows whose label is k."""

    def __init__(self, n_classes: int) -> None:
        self.edges = np.linspace(0.0, 1.0, CALIBRATION_BINS + 1)
        self.count = np.zeros((n_classes, CALIBRATION_BINS), dtype=np.int64)
        self.predicted = np.zeros((n_classes, CALIBRATION_BINS))
        self.hits = np.zeros((n_classes, CALIBRATION_BINS), dtype=np.int64)

    def add(self, posteriors: np.ndarray, valid: np.ndarray, codes: np.ndarray) -> None:
        P, codes = posteriors[valid], codes[valid]
        for k in range(self.count.shape[0]):
            # right-closed bins (lo, hi], the first [0, 0.1]: the convention of sklearn's calibration_curve
            bins = np.searchsorted(self.edges[1:-1], P[:, k], side="left")
            self.count[k] += np.bincount(bins, minlength=CALIBRATION_BINS)
            self.predicted[k] += np.bincount(bins, weights=P[:, k], minlength=CALIBRATION_BINS)
            hits = np.bincount(bins, weights=(codes == k).astype(np.float64), minlength=CALIBRATION_BINS)
            self.hits[k] += hits.astype(np.int64)

    def merged(self, other: _CalibrationTally) -> _CalibrationTally:
        """The sums over both sets of rows, this one's first."""
        total = copy.copy(self)
        total.count, total.hits = self.count + other.count, self.hits + other.hits
        total.predicted = self.predicted + other.predicted
        return total

    def report(self, classes: Sequence[str]) -> CalibrationReport:
        tables, eces = [], []
        for k in range(len(classes)):
            n = int(self.count[k].sum())
            # ECE_k = Σ_b (n_b / N) |observed_b − predicted_b| = Σ_b |hits_b − Σ_b p| / N
            eces.append(float(np.abs(self.hits[k] - self.predicted[k]).sum() / n) if n else float("nan"))
            tables.append(
                tuple(
                    ReliabilityBin(
                        float(self.edges[b]),
                        float(self.edges[b + 1]),
                        int(self.count[k, b]),
                        float(self.predicted[k, b] / self.count[k, b]),
                        float(self.hits[k, b] / self.count[k, b]),
                    )
                    for b in range(CALIBRATION_BINS)
                    if self.count[k, b]
                )
            )
        return CalibrationReport(tuple(classes), tuple(tables), tuple(eces))


def _grid(value: float, own: float | None, points: int, extra: Sequence[float]) -> np.ndarray:
    costs = [*np.linspace(0.0, value, points).tolist(), *extra, *([own] if own is not None else [])]
    return np.unique(np.asarray(costs, dtype=np.float64))


class Tallies:
    """Everything the report counts and sums over a set of rows: one file's, or several files' merged."""

    def __init__(self, rule: Rule, grid: np.ndarray) -> None:
        n_plain = len(rule.actions) - (1 if rule.reject_action is not None else 0)
        self.confusion = np.zeros((len(rule.classes), len(rule.actions)), dtype=np.int64)
        self.invalid = 0
        self.deferred: dict[str, int] = {}
        self.curve = _CurveTally(np.asarray(rule.params["loss"]), n_plain, grid)
        self.calibration = _CalibrationTally(len(rule.classes)) if rule.evidence == "posterior" else None

    def add(self, rule: Rule, assessed: Explanation, codes: np.ndarray) -> None:
        """Count a batch's rows: their assessment and their labels' class indices."""
        self.invalid += int((~assessed.valid).sum())
        add_counts(self.deferred, deferrals(rule, assessed))
        # n[k, a] += rows of true class k given action a (cell k·A + a of the flattened (K, A) table)
        cells = np.bincount(codes * len(rule.actions) + assessed.action, minlength=self.confusion.size)
        self.confusion += cells.reshape(self.confusion.shape)
        self.curve.add(assessed.risks, assessed.valid, codes)
        if self.calibration is not None:
            self.calibration.add(assessed.posteriors, assessed.valid, codes)

    def merged(self, other: Tallies) -> Tallies:
        """The tallies of both sets of rows (a merge of :func:`~policyc.evidence.partitions.tree_reduce`)."""
        total = copy.copy(self)
        total.confusion, total.invalid = self.confusion + other.confusion, self.invalid + other.invalid
        total.deferred = dict(self.deferred)
        add_counts(total.deferred, other.deferred)
        total.curve = self.curve.merged(other.curve)
        if self.calibration is not None and other.calibration is not None:
            total.calibration = self.calibration.merged(other.calibration)
        return total


@dataclasses.dataclass(frozen=True)
class TallySettings:
    """What every file's tally shares: the rule as artefact bytes, the label column, the curve's reject costs."""

    rule: ShippedRule
    label: str
    grid: np.ndarray
    batch_rows: int = DEFAULT_BATCH_ROWS


def tally_file(settings: TallySettings, path: str, progress: Progress | None) -> Tallies:
    """Decide one labelled file in batches and tally it (a leaf of the merge tree; runs on a worker)."""
    rule, file = settings.rule.load(), Path(path)
    tallies = Tallies(rule, settings.grid)
    for batch in read_feature_batches(file, rule.features, label=settings.label, batch_rows=settings.batch_rows):
        codes = label_codes(file, settings.label, batch, rule.classes)
        tallies.add(rule, assess_batch(rule, batch.features, file, batch.first_row), codes)
        if progress is not None:
            progress(batch.features.shape[0], None)
    return tallies


def evaluate(
    loaded: LoadedRule,
    data: Path,
    label: str,
    confidence: float = DEFAULT_CONFIDENCE,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = DEFAULT_SEED,
    curve_points: int = CURVE_POINTS,
    extra_costs: Sequence[float] = (),
    batch_rows: int = DEFAULT_BATCH_ROWS,
    partitions: PartitionRunner | None = None,
) -> Evaluation:
    """Decide every labelled row of ``data`` (a file, or a directory or glob of files) in batches and tally
    what the report needs.

    Each file is tallied on its own and the tallies merged in the fixed tree of
    :func:`~policyc.evidence.partitions.tree_reduce`, in this process or by ``partitions`` (Dask workers with
    ``policyc.cluster``), with the same bits either way. The counts (confusion, rejects, errors, and so the
    bootstrap interval) do not depend on how the rows are split into files; the curve's risks and the
    calibration's sums of probabilities may differ from those of the concatenated file by rounding.

    Raises DataError on a missing column, a label that is not a class (naming the file and row), or invalid
    rows under ``invalid_input: error``.
    """
    rule = loaded.rule
    loss = np.asarray(rule.params["loss"])
    n_plain = len(rule.actions) - (1 if rule.reject_action is not None else 0)
    own = rule.manifest.get("reject_cost")
    value = reject_reach_value(loss[:n_plain])
    settings = TallySettings(ShippedRule.of(rule), label, _grid(value, own, curve_points, extra_costs), batch_rows)
    runner = partitions if partitions is not None else SerialPartitions()
    tallies = runner.tree_reduce(partial(tally_file, settings), Tallies.merged, data_file_list(data))
    confusion = tallies.confusion
    rows = int(confusion.sum())
    if rows == 0:
        raise DataError(f"{data}: the file has no rows")
    # empirical risk = (1/n) Σ_rows λ(action, true class): confusion counts times the stated loss, bootstrapped
    risk = categorical_mean_interval(confusion, stated_loss(rule).T, confidence, resamples, seed)
    return Evaluation(
        loaded,
        str(data),
        label,
        confusion,
        tallies.invalid,
        tallies.deferred,
        risk,
        tallies.curve.points(rows, own),
        value,
        tallies.calibration.report(rule.classes) if tallies.calibration is not None else None,
        limit_checks(rule, confusion, confidence),
    )
