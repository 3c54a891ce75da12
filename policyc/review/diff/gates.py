"""Limits a CI job sets on a policy change; a gate that cannot be measured fails."""

from __future__ import annotations

from dataclasses import dataclass

from pydantic import computed_field
from pydantic.dataclasses import dataclass as report

from policyc.review.diff.data import DataDiff
from policyc.review.diff.posterior import PosteriorSpaceDiff
from policyc.review.shared.reports import REPORT_CONFIG

__all__ = ["Gate", "GateLimits", "evaluate_gates"]


@dataclass(frozen=True)
class GateLimits:
    """Limits from the command line; None means the gate is not asked for."""

    max_flip_rate: float | None = None
    max_risk_increase: float | None = None
    max_reject_rate: float | None = None
    max_simplex_change: float | None = None

    @property
    def need_data(self) -> list[str]:
        asked = {
            "max-flip-rate": self.max_flip_rate,
            "max-risk-increase": self.max_risk_increase,
            "max-reject-rate": self.max_reject_rate,
        }
        return [name for name, limit in asked.items() if limit is not None]


@report(frozen=True, config=REPORT_CONFIG)
class Gate:
    name: str
    limit: float
    value: float | None
    basis: str

    @computed_field  # type: ignore[prop-decorator]
    @property
    def passed(self) -> bool:
        return self.value is not None and self.value <= self.limit

    @computed_field  # type: ignore[prop-decorator]
    @property
    def message(self) -> str:
        if self.value is None:
            return f"gate {self.name} failed: {self.basis} cannot be measured (limit {self.limit:.4g})"
        if self.passed:
            return f"gate {self.name} passed: {self.basis} {self.value:.4g} <= limit {self.limit:.4g}"
        return (
            f"gate {self.name} failed: {self.basis} {self.value:.4g} exceeds the limit {self.limit:.4g} "
            f"by {self.value - self.limit:.4g}"  # excess = measured value - limit
        )


def evaluate_gates(limits: GateLimits, space: PosteriorSpaceDiff, data: DataDiff | None) -> tuple[Gate, ...]:
    """Measure each requested gate; a gate that cannot be measured fails."""
    gates = []
    if limits.max_flip_rate is not None:
        value = data.flip_rate if data is not None else None
        gates.append(Gate("max-flip-rate", limits.max_flip_rate, value, "flip rate on the data"))
    if limits.max_risk_increase is not None:
        gates.append(_risk_gate(limits.max_risk_increase, data))
    if limits.max_reject_rate is not None:
        value = data.reject_rate_new if data is not None else None
        basis = "the new rule's reject rate on the data"
        if data is not None and value is None:
            value = 0.0  # no reject option: nothing is ever deferred
        gates.append(Gate("max-reject-rate", limits.max_reject_rate, value, basis))
    if limits.max_simplex_change is not None:
        basis = "share of the simplex where the action changes" + (
            " (exact)" if space.method == "exact" else " (Sobol estimate)"
        )
        gates.append(Gate("max-simplex-change", limits.max_simplex_change, space.changed_share, basis))
    return tuple(gates)


def _risk_gate(limit: float, data: DataDiff | None) -> Gate:
    """Empirical risk increase on labelled data. Without labels there is no gate to offer: under the new
    model the new rule's expected risk never exceeds the old rule's, since it minimises that risk."""
    value = data.difference.estimate if data is not None and data.difference is not None else None
    # mean loss_new[a_new, y] - mean loss_new[a_old, y]
    return Gate("max-risk-increase", limit, value, "empirical risk increase new - old (labels, new loss matrix)")
