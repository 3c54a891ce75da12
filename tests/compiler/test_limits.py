"""Operating limits in the compiler: refusals with located errors, invalid rows, gain policies, the solver's laws."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from helpers import compile_text, loglik_evidence, policy_text, standalone
from hypothesis import given, settings
from hypothesis import strategies as st

from policyc.compiler.limits import (
    TIE_MARGIN,
    Limit,
    ReferenceSample,
    allowed_wrong_rows,
    solve_limits,
)
from policyc.language.diagnostics import CompileError

CLASSES = ["ok", "bad"]


def reference_csv(path: Path, n: int, seed: int = 0, labels: list[str] | None = None) -> None:
    rng = np.random.default_rng(seed)
    truth = rng.random(n) < 0.3
    x = rng.normal(np.where(truth, 1.5, 0.0), 1.0)
    # ln N(x; 0, 1) and ln N(x; 1.5, 1) up to the shared constant
    ll_ok, ll_bad = -0.5 * x**2, -0.5 * (x - 1.5) ** 2
    names = np.array(labels or CLASSES)[truth.astype(int)]
    lines = [
        "ll_ok,ll_bad,grade",
        *(f"{a!r},{b!r},{c}" for a, b, c in zip(ll_ok.tolist(), ll_bad.tolist(), names.tolist(), strict=True)),
    ]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def limited_text(limits: dict[str, object], reject_cost: float | None = 0.3, gain: bool = False) -> str:
    loss = np.array([[0.0, 4.0], [1.0, 0.0]])
    text = policy_text(
        classes=CLASSES,
        priors=[0.7, 0.3],
        actions=["accept", "refuse"],
        loss=loss,
        evidence=loglik_evidence(CLASSES),
        reject_cost=reject_cost,
        reject_action="review",
        invalid_input="reject" if reject_cost is not None else "error",
    )
    if gain:  # the same decisions stated as gains: g = -λ
        text = text.replace("loss:", "gain:").replace('"cost": 0.3', '"gain": -0.3')
        text = text.replace(": 4.0", ": -4.0").replace(": 1.0", ": -1.0")
    return text + f"limits: {json.dumps({'data': 'reference.csv', **limits})}\n"


def compile_error_codes(tmp_path: Path, text: str) -> list[tuple[str, tuple[str | int, ...]]]:
    with pytest.raises(CompileError) as caught:
        compile_text(tmp_path, text)
    return [(d.code, d.path) for d in caught.value.diagnostics]


def test_too_few_reference_rows_for_the_confidence_is_infeasible(tmp_path: Path) -> None:
    reference_csv(tmp_path / "reference.csv", 100)
    # a cap of 1% at 95% needs n ≥ ln 0.05 / ln 0.99 = 298.1 rows (references.md LIM-2, derived)
    text = limited_text({"max_share": {"review": 0.01}})
    with pytest.raises(CompileError) as caught:
        compile_text(tmp_path, text)
    (diagnostic,) = caught.value.diagnostics
    assert diagnostic.code == "limit-infeasible" and diagnostic.path == ("limits", "max_share", "review")
    assert "at least 299" in diagnostic.message and diagnostic.line is not None


def test_contradictory_caps_are_infeasible_and_named(tmp_path: Path) -> None:
    reference_csv(tmp_path / "reference.csv", 2000)
    # every row is accepted or refused; both at most half cannot be shown with 90% confidence
    text = limited_text({"confidence": 0.9, "max_share": {"accept": 0.5, "refuse": 0.5}}, reject_cost=None)
    codes = compile_error_codes(tmp_path, text)
    assert codes == [
        ("limit-infeasible", ("limits", "max_share", "accept")),
        ("limit-infeasible", ("limits", "max_share", "refuse")),
    ]


def test_recall_floor_with_no_rows_of_its_class_is_infeasible(tmp_path: Path) -> None:
    reference_csv(tmp_path / "reference.csv", 500, labels=["ok", "ok"])
    text = limited_text({"label": "grade", "min_recall": {"bad": {"actions": ["refuse"], "share": 0.9}}})
    assert compile_error_codes(tmp_path, text) == [("limit-infeasible", ("limits", "min_recall", "bad"))]


def test_unknown_reference_label_names_the_row(tmp_path: Path) -> None:
    reference_csv(tmp_path / "reference.csv", 500, labels=["ok", "rotten"])
    text = limited_text({"label": "grade", "min_recall": {"bad": {"actions": ["refuse"], "share": 0.9}}})
    with pytest.raises(CompileError) as caught:
        compile_text(tmp_path, text)
    (diagnostic,) = caught.value.diagnostics
    assert diagnostic.code == "reference-data-unusable" and diagnostic.path == ("limits", "data")
    assert "'rotten' is not a class" in diagnostic.message and "row" in diagnostic.message


def test_a_missing_feature_column_is_a_located_error(tmp_path: Path) -> None:
    (tmp_path / "reference.csv").write_text("ll_ok,grade\n-1.0,ok\n", encoding="utf-8")
    codes = compile_error_codes(tmp_path, limited_text({"max_share": {"review": 0.5}}))
    assert codes == [("reference-data-unusable", ("limits", "data"))]


def test_invalid_rows_count_as_deferred(tmp_path: Path) -> None:
    reference_csv(tmp_path / "reference.csv", 1000)
    with (tmp_path / "reference.csv").open("a", encoding="utf-8") as handle:
        handle.writelines("nan,-1.0,ok\n" for _ in range(300))
    # 300 of 1300 rows are invalid and always deferred: a 10% cap on deferrals cannot hold
    codes = compile_error_codes(tmp_path, limited_text({"max_share": {"review": 0.1}}))
    assert codes == [("limit-infeasible", ("limits", "max_share", "review"))]
    record = compile_text(tmp_path, limited_text({"max_share": {"review": 0.3}})).rule.manifest["limits"]
    assert record["invalid_rows"] == 300 and record["limits"][0]["count"] >= 300


def test_gain_policies_solve_to_the_same_rule(tmp_path: Path) -> None:
    reference_csv(tmp_path / "reference.csv", 3000)
    limits = {
        "label": "grade",
        "max_share": {"review": 0.05},
        "min_recall": {"bad": {"actions": ["refuse"], "share": 0.9}},
    }
    by_loss = compile_text(tmp_path, limited_text(limits)).rule
    by_gain = compile_text(tmp_path, limited_text(limits, gain=True), "gain.yaml").rule
    assert np.array_equal(by_loss.params["loss"], by_gain.params["loss"])
    assert by_loss.manifest["limits"]["limits"] == by_gain.manifest["limits"]["limits"]


def test_the_standalone_module_runs_the_adjusted_matrix(tmp_path: Path) -> None:
    reference_csv(tmp_path / "reference.csv", 3000)
    rule = compile_text(tmp_path, limited_text({"max_share": {"review": 0.05}})).rule
    module = standalone(rule, tmp_path)
    X = np.random.default_rng(1).normal(size=(500, 2)) - 1.0
    assert np.array_equal(module.decide(X), rule.decide(X))


def test_umbrella_count_matches_its_definition() -> None:
    # Tong, Feng & Li 2018 (references.md LIM-2): α = δ = 0.05 needs n ≥ 59 rows; with 59 rows no row
    # may be on the wrong side, with 58 none suffices.
    assert allowed_wrong_rows(59, 0.05, 0.05) == 0
    assert allowed_wrong_rows(58, 0.05, 0.05) == -1
    # P(Bin(1000, 0.1) ≤ x) ≤ 0.05 for x ≤ 84 (scipy.stats.binom as the oracle)
    from scipy import stats

    x = allowed_wrong_rows(1000, 0.1, 0.05)
    assert stats.binom.cdf(x, 1000, 0.1) <= 0.05 < stats.binom.cdf(x + 1, 1000, 0.1)


def cap_limit(action: int, share: float, n_actions: int, n_classes: int) -> Limit:
    counted = np.arange(n_actions) == action
    pattern = np.zeros((n_actions, n_classes))
    pattern[action] = 1.0
    return Limit("max_share", f"a{action}", share, counted, pattern)


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    action=st.integers(0, 3),
    share=st.floats(0.05, 0.6),
    confidence=st.floats(0.5, 0.99),
)
def test_a_solved_cap_holds_and_its_multiplier_is_the_least(
    seed: int, action: int, share: float, confidence: float
) -> None:
    rng = np.random.default_rng(seed)
    posteriors = rng.dirichlet([0.8, 0.8, 0.8], size=800)
    stated = np.vstack([rng.uniform(0.0, 10.0, size=(3, 3)), np.full(3, 2.0)])
    sample = ReferenceSample("r", "0" * 64, posteriors, np.ones(800, bool), np.zeros(800, bool), None)
    limit = cap_limit(action, share, 4, 3)
    solved = solve_limits(stated, [limit], sample, confidence, None)
    (outcome,) = solved.outcomes
    assert outcome.bound <= share + 1e-9  # holds at the confidence
    assert solved.price >= 0.0
    if outcome.multiplier > 0.0:
        # just below the multiplier one more row takes the action: the limit fails there
        step = 100 * TIE_MARGIN * max(1.0, float(np.abs(solved.adjusted_loss).max()))
        lower = solved.adjusted_loss - step * limit.pattern
        chosen = np.argmin(posteriors @ lower.T, axis=1)
        assert np.sum(chosen == action) > allowed_wrong_rows(800, share, 1.0 - confidence)


def recall_limit(class_index: int, listed: list[int], share: float, n_actions: int, n_classes: int) -> Limit:
    counted = np.isin(np.arange(n_actions), listed)
    pattern = np.zeros((n_actions, n_classes))
    pattern[~counted, class_index] = 1.0
    return Limit("min_recall", f"c{class_index}", share, counted, pattern, class_index)


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    cap=st.floats(0.02, 0.3),
    recall=st.floats(0.5, 0.98),
    listed=st.lists(st.integers(0, 2), min_size=1, max_size=2, unique=True),
)
def test_joint_limits_hold_or_are_refused(seed: int, cap: float, recall: float, listed: list[int]) -> None:
    """A cap on deferring and a recall floor that lists the reject action (the bench/pack creep of the
    packhouse demo): whatever the numbers, the solver returns multipliers under which both hold at their
    bounds, or refuses; it never returns a rule that breaks a limit."""
    from policyc.compiler.limits import LimitInfeasible

    rng = np.random.default_rng(seed)
    n = 1500
    posteriors = rng.dirichlet([0.6, 0.6, 0.6], size=n)
    labels = (rng.random(n)[:, None] > np.cumsum(posteriors, axis=1)).sum(axis=1)
    stated = np.vstack([rng.uniform(0.0, 10.0, size=(3, 3)), np.full(3, 1.5)])
    sample = ReferenceSample("r", "0" * 64, posteriors, np.ones(n, bool), np.zeros(n, bool), labels)
    limits = [cap_limit(3, cap, 4, 3), recall_limit(2, [*listed, 3], recall, 4, 3)]
    try:
        solved = solve_limits(stated, limits, sample, 0.9, "y")
    except LimitInfeasible as refused:
        assert refused.limits
        return
    decided = np.argmin(posteriors @ solved.adjusted_loss.T, axis=1)
    share, caught = np.mean(decided == 3), np.mean(np.isin(decided[labels == 2], [*listed, 3]))
    held, floor = solved.outcomes
    assert share == pytest.approx(held.rate) and held.bound <= cap + 1e-9
    assert caught == pytest.approx(floor.rate) and floor.bound >= recall - 1e-9
