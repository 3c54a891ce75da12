"""Chow's reject rule: 0-1 loss plus a reject cost t compiles to "reject iff max posterior < 1 - t"."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.stats
from helpers import compile_text, loglik_evidence, names, policy_text, posterior_evidence

from policyc.geometry.intervals import posterior_intervals
from policyc.runtime import Rule

TIE_GUARD = 1e-9


def zero_one_rule(directory: Path, n_classes: int, priors: np.ndarray, reject_cost: float | None) -> tuple[Rule, tuple]:
    """0-1 loss over posterior evidence whose trained priors equal the deployment priors (posteriors pass through)."""
    classes = names("c", n_classes)
    compiled = compile_text(
        directory,
        policy_text(
            classes=classes,
            priors=priors,
            actions=names("a", n_classes),
            loss=1.0 - np.eye(n_classes),
            evidence=posterior_evidence(classes, priors),
            reject_cost=reject_cost,
        ),
    )
    return compiled.rule, tuple(d.code for d in compiled.diagnostics)


def dirichlet_posteriors(seed: int, n_classes: int, n: int = 4000) -> np.ndarray:
    rng = np.random.default_rng(seed)
    # a mix of flat and peaked draws so that max posteriors cover (1/K, 1)
    alphas = rng.choice([0.3, 1.0, 3.0], size=n)
    draws = rng.gamma(alphas[:, None], size=(n, n_classes))
    return draws / draws.sum(axis=1, keepdims=True)


@pytest.mark.parametrize("n_classes", [2, 3, 4, 6])
@pytest.mark.parametrize("t", [0.05, 0.2, 0.35, 0.6])
def test_zero_one_loss_with_reject_is_chows_rule(n_classes: int, t: float, tmp_path: Path) -> None:
    rng = np.random.default_rng(n_classes)
    priors = rng.dirichlet(np.full(n_classes, 2.0))
    priors = np.round(priors / priors.sum(), 6)
    priors[-1] = 1.0 - priors[:-1].sum()
    rule, codes = zero_one_rule(tmp_path, n_classes, priors, reject_cost=t)
    P = dirichlet_posteriors(int(100 * t) + n_classes, n_classes)
    # trained priors = deployment priors: the rule's posteriors are its input
    assert np.allclose(rule.posteriors(P), P, rtol=0, atol=1e-12)
    top_two = np.sort(P, axis=1)[:, -2:]
    clear = (top_two[:, 1] - top_two[:, 0] > TIE_GUARD) & (np.abs(top_two[:, 1] - (1.0 - t)) > TIE_GUARD)
    # Chow 1970 (references.md CH-1): accept argmax_i P(i|x) iff max_i P(i|x) >= 1 - t, else reject
    expected = np.where(P.max(axis=1) >= 1.0 - t, P.argmax(axis=1), n_classes)
    decided = rule.decide(P)
    assert np.array_equal(decided[clear], expected[clear])
    assert clear.mean() > 0.99
    rejected = (decided == n_classes).mean()
    if t >= (n_classes - 1) / n_classes:
        # derived (references.md CH-2): max posterior >= 1/K, so reject is never used, and the checker says so
        assert rejected == 0.0
        assert "reject-never-taken" in codes
    else:
        assert 0.0 < rejected < 1.0
        assert "reject-never-taken" not in codes


@pytest.mark.parametrize("n_classes", [2, 3, 5])
def test_zero_one_loss_without_reject_is_map(n_classes: int, tmp_path: Path) -> None:
    rng = np.random.default_rng(10 + n_classes)
    priors = np.round(rng.dirichlet(np.full(n_classes, 1.5)), 6)
    priors[-1] = 1.0 - priors[:-1].sum()
    classes = names("c", n_classes)
    rule = compile_text(
        tmp_path,
        policy_text(
            classes=classes,
            priors=priors,
            actions=names("a", n_classes),
            loss=1.0 - np.eye(n_classes),
            evidence=loglik_evidence(classes),
        ),
    ).rule
    log_likelihoods = rng.normal(0.0, 2.0, (5000, n_classes))
    joint = log_likelihoods + np.log(priors)
    ordered = np.sort(joint, axis=1)
    clear = ordered[:, -1] - ordered[:, -2] > TIE_GUARD
    # Fukunaga 1990 eq. 3.5 and p. 58 (references.md LR-3): symmetric cost gives the MAP rule
    assert np.array_equal(rule.decide(log_likelihoods)[clear], joint.argmax(axis=1)[clear])


@pytest.mark.parametrize(("c01", "c10", "d"), [(1.0, 1.0, 0.2), (3.0, 1.0, 0.5), (1800.0, 120.0, 90.0)])
def test_two_class_reject_interval(c01: float, c10: float, d: float) -> None:
    # classes (0, 1); actions predict_0 with losses (0, c01), predict_1 with (c10, 0), reject at d
    loss = np.array([[0.0, c01], [c10, 0.0], [d, d]])
    # derived (references.md PR-7, CH-6): reject iff q = P(1|x) in (d/c01, 1 - d/c10), non-empty iff d < V
    value = c01 * c10 / (c01 + c10)
    assert d < value
    intervals = posterior_intervals(loss)
    assert [i.action for i in intervals] == [0, 2, 1]
    assert intervals[0].low == 0.0 and intervals[-1].high == 1.0
    assert intervals[1].low == pytest.approx(d / c01, abs=1e-15)
    assert intervals[1].high == pytest.approx(1.0 - d / c10, abs=1e-15)


# --- CH-5: error and reject rates for N(0,1) vs N(2,1), P1 = 0.3 ------------------------------------------

P1, P2 = 0.3, 0.7
# (t, E, R) as printed in references.md CH-5 (7 decimals)
CH5_TABLE = [(0.1, 0.0181723, 0.4524081), (0.2, 0.0426365, 0.2840895), (0.3, 0.0702430, 0.1726107)]


def ch5_closed_form(t: float) -> tuple[float, float]:
    """derived (references.md CH-5): L = ln p1/p2 ~ N(±Δ²/2, Δ²), Δ = 2; b = ln P1/P2, a = ln (1-t)/t."""
    norm = scipy.stats.norm
    a, b, delta = np.log((1.0 - t) / t), np.log(P1 / P2), 2.0
    mean1, mean2, sd = delta**2 / 2, -(delta**2) / 2, delta
    # error: ω1 sent to ω2 when L + b <= -a; ω2 sent to ω1 when L + b >= a
    error = P1 * norm.cdf(-a - b, mean1, sd) + P2 * norm.sf(a - b, mean2, sd)
    reject = P1 * (norm.cdf(a - b, mean1, sd) - norm.cdf(-a - b, mean1, sd)) + P2 * (
        norm.cdf(a - b, mean2, sd) - norm.cdf(-a - b, mean2, sd)
    )
    return float(error), float(reject)


def ch5_rule(directory: Path, t: float) -> Rule:
    classes = ["w1", "w2"]
    return compile_text(
        directory,
        policy_text(
            classes=classes,
            priors=[P1, P2],
            actions=["decide_w1", "decide_w2"],
            loss=np.array([[0.0, 1.0], [1.0, 0.0]]),
            evidence=loglik_evidence(classes),
            reject_cost=t,
        ),
    ).rule


def gaussian_columns(x: np.ndarray) -> np.ndarray:
    return np.column_stack([scipy.stats.norm.logpdf(x, 0.0, 1.0), scipy.stats.norm.logpdf(x, 2.0, 1.0)])


def decision_boundaries(rule: Rule, low: float, high: float) -> list[tuple[float, int, int]]:
    """Where the rule's decision changes along x in [low, high]: a grid, then bisection to ~1e-13."""
    grid = np.linspace(low, high, 20_001)
    decided = rule.decide(gaussian_columns(grid))
    changes = []
    for i in np.flatnonzero(decided[1:] != decided[:-1]):
        left, right = grid[i], grid[i + 1]
        for _ in range(60):
            middle = 0.5 * (left + right)
            if rule.decide(gaussian_columns(np.array([middle])))[0] == decided[i]:
                left = middle
            else:
                right = middle
        changes.append((0.5 * (left + right), int(decided[i]), int(decided[i + 1])))
    return changes


@pytest.mark.parametrize(("t", "printed_error", "printed_reject"), CH5_TABLE)
def test_chow_error_and_reject_rates_closed_form(
    t: float, printed_error: float, printed_reject: float, tmp_path: Path
) -> None:
    error, reject = ch5_closed_form(t)
    # references.md CH-5 table, printed to 7 decimals
    assert error == pytest.approx(printed_error, abs=6e-8)
    assert reject == pytest.approx(printed_reject, abs=6e-8)

    # The compiled rule, evaluated exactly: its two boundaries on x, then normal probabilities of its regions.
    rule = ch5_rule(tmp_path, t)
    boundaries = decision_boundaries(rule, -8.0, 10.0)
    assert [(before, after) for _, before, after in boundaries] == [(0, 2), (2, 1)]
    (x1, _, _), (x2, _, _) = boundaries
    a, b = np.log((1.0 - t) / t), np.log(P1 / P2)
    # derived (references.md CH-5): L = 2 - 2x, so accept ω1 iff x <= (2 + b - a)/2, ω2 iff x >= (2 + b + a)/2
    assert x1 == pytest.approx((2.0 + b - a) / 2.0, abs=1e-9)
    assert x2 == pytest.approx((2.0 + b + a) / 2.0, abs=1e-9)
    far = rule.decide(gaussian_columns(np.array([-40.0, 40.0]))).tolist()
    assert far == [0, 1]  # the outer regions extend to infinity
    norm = scipy.stats.norm
    rule_error = P1 * norm.sf(x2, 0.0, 1.0) + P2 * norm.cdf(x1, 2.0, 1.0)
    rule_reject = P1 * (norm.cdf(x2, 0.0, 1.0) - norm.cdf(x1, 0.0, 1.0)) + P2 * (
        norm.cdf(x2, 2.0, 1.0) - norm.cdf(x1, 2.0, 1.0)
    )
    assert rule_error == pytest.approx(error, abs=1e-6)
    assert rule_reject == pytest.approx(reject, abs=1e-6)


@pytest.mark.parametrize(("t", "printed_error", "printed_reject"), CH5_TABLE)
def test_chow_error_and_reject_rates_monte_carlo(
    t: float, printed_error: float, printed_reject: float, tmp_path: Path
) -> None:
    rule = ch5_rule(tmp_path, t)
    n = 200_000
    rng = np.random.default_rng(20 + int(10 * t))
    is_w2 = rng.random(n) < P2
    x = np.where(is_w2, 2.0, 0.0) + rng.standard_normal(n)
    decided = rule.decide(gaussian_columns(x))
    wrong = ((decided == 0) & is_w2) | ((decided == 1) & ~is_w2)
    rejected = decided == 2
    error, reject = ch5_closed_form(t)
    # references.md CH-5 (closed form, recomputed above); 3 standard errors of a proportion
    assert abs(wrong.mean() - error) < 3.0 * np.sqrt(error * (1.0 - error) / n)
    assert abs(rejected.mean() - reject) < 3.0 * np.sqrt(reject * (1.0 - reject) / n)
