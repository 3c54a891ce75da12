"""Gates: a measured value passes at or below its limit, a gate that cannot be measured fails, and each gate reads
the figure it names."""

from __future__ import annotations

import numpy as np
import pytest

from policyc.review.diff import GateLimits
from policyc.review.diff.data import DataDiff
from policyc.review.diff.gates import Gate, evaluate_gates
from policyc.review.diff.posterior import PosteriorSpaceDiff
from policyc.review.shared.bootstrap import BootstrapInterval

EXACT = PosteriorSpaceDiff(True, None, ("neg", "pos"), "exact", 0.25, 0.0)
SOBOL = PosteriorSpaceDiff(True, None, ("a", "b", "c"), "sobol", 0.25, 0.01)


def measured(reject_rate_new: float | None, increase: float | None) -> DataDiff:
    """Eight rows, two of them flipped (a flip rate of 1/4)."""
    difference = None if increase is None else BootstrapInterval(increase, increase - 0.1, increase + 0.1, 0.95, 99, 1)
    return DataDiff(
        source="rows.csv",
        old_actions=("a", "b"),
        new_actions=("a", "b"),
        flips=np.array([[3, 1], [1, 3]]),
        flipped=2,
        invalid_rows=0,
        reject_rate_old=None,
        reject_rate_new=reject_rate_new,
        deferred_old={},
        deferred_new={},
        expected_risk=None,
        empirical_risk=None,
        difference=difference,
        label=None if increase is None else "truth",
        features_differ=False,
    )


@pytest.mark.parametrize(("value", "passed"), [(0.1, True), (0.1 + 1e-9, False), (0.0, True), (None, False)])
def test_a_gate_passes_at_its_limit_and_fails_above_it_or_unmeasured(value: float | None, passed: bool) -> None:
    gate = Gate("max-flip-rate", 0.1, value, "flip rate on the data")
    assert gate.passed is passed
    assert gate.message.startswith(f"gate max-flip-rate {'passed' if passed else 'failed'}")


def test_a_failed_gate_says_by_how_much() -> None:
    gate = Gate("max-flip-rate", 0.03, 0.05, "flip rate on the data")
    assert gate.message == "gate max-flip-rate failed: flip rate on the data 0.05 exceeds the limit 0.03 by 0.02"
    unmeasured = Gate("max-reject-rate", 0.1, None, "the new rule's reject rate on the data")
    assert "cannot be measured" in unmeasured.message


def test_only_the_data_gates_need_data() -> None:
    assert GateLimits().need_data == [] and GateLimits(max_simplex_change=0.1).need_data == []
    limits = GateLimits(max_flip_rate=0.1, max_reject_rate=0.2, max_simplex_change=0.1)
    assert limits.need_data == ["max-flip-rate", "max-reject-rate"]


def test_each_gate_reads_its_own_figure() -> None:
    limits = GateLimits(max_flip_rate=0.3, max_risk_increase=0.0, max_reject_rate=0.1, max_simplex_change=0.2)
    flips, risk, reject, simplex = evaluate_gates(limits, EXACT, measured(0.125, 0.05))
    assert (flips.name, flips.value, flips.passed) == ("max-flip-rate", 0.25, True)  # 2 of 8 rows
    assert (risk.name, risk.value, risk.passed) == ("max-risk-increase", 0.05, False)
    assert (reject.name, reject.value, reject.passed) == ("max-reject-rate", 0.125, False)
    assert (simplex.name, simplex.value, simplex.passed) == ("max-simplex-change", 0.25, False)
    assert simplex.basis.endswith("(exact)")
    assert evaluate_gates(GateLimits(max_simplex_change=0.2), SOBOL, None)[0].basis.endswith("(Sobol estimate)")


def test_without_data_the_data_gates_fail_as_unmeasured() -> None:
    limits = GateLimits(max_flip_rate=1.0, max_risk_increase=1.0, max_reject_rate=1.0)
    gates = evaluate_gates(limits, EXACT, None)
    assert [g.value for g in gates] == [None, None, None] and not any(g.passed for g in gates)


def test_a_rule_without_a_reject_option_defers_nothing_and_unlabelled_data_has_no_risk_gate() -> None:
    limits = GateLimits(max_risk_increase=1.0, max_reject_rate=0.0)
    risk, reject = evaluate_gates(limits, EXACT, measured(None, None))
    assert risk.value is None and not risk.passed  # no labels: no empirical risk to gate on
    assert reject.value == 0.0 and reject.passed  # no reject option: nothing is ever deferred
