"""Two-class minimum-risk rules as likelihood-ratio tests, Elkan's p*, and the LR-5 closed-form example."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.integrate
import scipy.stats
from helpers import compile_text, loglik_evidence, policy_text, posterior_evidence, rule_from_text
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from policyc.geometry.intervals import posterior_intervals
from policyc.runtime import Rule

CLASSES = ["w1", "w2"]
ACTIONS = ["decide_w1", "decide_w2"]


def two_class_rule(loss: np.ndarray, priors: tuple[float, float]) -> Rule:
    """loss[i][j] = λ_ij: deciding ω_(i+1) when the truth is ω_(j+1) (Fukunaga's c_ij, references.md)."""
    return rule_from_text(
        policy_text(classes=CLASSES, priors=priors, actions=ACTIONS, loss=loss, evidence=loglik_evidence(CLASSES))
    )


finite = {"allow_nan": False, "allow_infinity": False, "allow_subnormal": False}


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    l11=st.floats(0.0, 5.0, **finite),
    l22=st.floats(0.0, 5.0, **finite),
    gap21=st.floats(0.1, 10.0, **finite),
    gap12=st.floats(0.1, 10.0, **finite),
    p1=st.floats(0.05, 0.95, **finite),
    m1=st.floats(-3.0, 3.0, **finite),
    m2=st.floats(-3.0, 3.0, **finite),
    s1=st.floats(0.3, 3.0, **finite),
    s2=st.floats(0.3, 3.0, **finite),
    seed=st.integers(0, 2**32 - 1),
)
def test_two_class_decision_is_the_likelihood_ratio_test(
    l11: float,
    l22: float,
    gap21: float,
    gap12: float,
    p1: float,
    m1: float,
    m2: float,
    s1: float,
    s2: float,
    seed: int,
) -> None:
    l21, l12 = l11 + gap21, l22 + gap12  # the conditions λ21 > λ11 and λ12 > λ22
    assume(l21 > l11 and l12 > l22)
    p2 = 1.0 - p1
    rule = two_class_rule(np.array([[l11, l12], [l21, l22]]), (p1, p2))
    rng = np.random.default_rng(seed)
    x = np.concatenate([rng.normal(m1, s1, 100), rng.normal(m2, s2, 100), rng.uniform(-8.0, 8.0, 100)])
    log_p1, log_p2 = scipy.stats.norm.logpdf(x, m1, s1), scipy.stats.norm.logpdf(x, m2, s2)
    # Fukunaga 1990 eq. 3.25-3.26 (references.md LR-2): decide ω1 iff ln p1/p2 > ln θ,
    # θ = [(λ12 - λ22)/(λ21 - λ11)] · P2/P1
    log_theta = np.log((l12 - l22) / (l21 - l11) * p2 / p1)
    log_ratio = log_p1 - log_p2
    clear = np.abs(log_ratio - log_theta) > 1e-9
    assume(clear.sum() >= 250)
    expected = np.where(log_ratio > log_theta, 0, 1)
    decided = rule.decide(np.column_stack([log_p1, log_p2]))
    assert np.array_equal(decided[clear], expected[clear])


# --- Elkan's threshold p* -----------------------------------------------------------------------------------

# (c00, c01, c10, c11) -> p*, as printed in references.md EL-2; C(i, j) = cost of predicting i when the truth is j
ELKAN_GOLDEN = [((0, 1, 1, 0), 0.5), ((0, 4, 1, 0), 0.2), ((0, 1, 4, 0), 0.8), ((1, 5, 3, 0), 0.285714)]


@pytest.mark.parametrize(("costs", "printed"), ELKAN_GOLDEN)
def test_posterior_threshold_is_elkans_p_star(costs: tuple[int, int, int, int], printed: float, tmp_path: Path) -> None:
    c00, c01, c10, c11 = map(float, costs)
    # Elkan 2001 §1.3 p* (references.md EL-2): predict 1 iff P(1|x) >= p*
    p_star = (c10 - c00) / (c10 - c00 + c01 - c11)
    assert p_star == pytest.approx(printed, abs=5e-7)
    # rows = predicted class (actions), columns = true class: loss[i][j] = C(i, j)
    loss = np.array([[c00, c01], [c10, c11]])
    intervals = posterior_intervals(loss)
    assert [(i.action, i.low, i.high) for i in intervals] == [
        (0, 0.0, pytest.approx(p_star, abs=1e-15)),
        (1, pytest.approx(p_star, abs=1e-15), 1.0),
    ]
    # the compiled rule on calibrated posteriors (trained priors = deployment priors) agrees either side of p*
    classes = ["negative", "positive"]
    rule = compile_text(
        tmp_path,
        policy_text(
            classes=classes,
            priors=[0.5, 0.5],
            actions=["predict_negative", "predict_positive"],
            loss=loss,
            evidence=posterior_evidence(classes, [0.5, 0.5]),
        ),
    ).rule
    q = np.array([0.0, p_star - 1e-7, p_star + 1e-7, 1.0])
    assert rule.decide(np.column_stack([1.0 - q, q])).tolist() == [0, 0, 1, 1]


def test_costs_act_as_changed_priors_cork_stoppers(tmp_path: Path) -> None:
    # Marques de Sá 2001 §4.2.1 cork stoppers (references.md LR-4, WX-3): P = (0.4, 0.6), λ12 = 0.015,
    # λ21 = 0.01 -> P* = (0.308, 0.692); exact 4/13 derived (references.md LR-4)
    p_star = np.array([0.01 * 0.4, 0.015 * 0.6])
    p_star /= p_star.sum()
    assert p_star[0] == pytest.approx(4.0 / 13.0, abs=1e-15)
    assert p_star == pytest.approx([0.308, 0.692], abs=5e-4)
    rule = compile_text(
        tmp_path,
        policy_text(
            classes=CLASSES,
            priors=[0.4, 0.6],
            actions=ACTIONS,
            loss=np.array([[0.0, 0.015], [0.01, 0.0]]),
            evidence=loglik_evidence(CLASSES),
        ),
    ).rule
    log_ratio = np.linspace(-6.0, 6.0, 2001)
    log_ratio = log_ratio[np.abs(log_ratio - np.log(p_star[1] / p_star[0])) > 1e-9]
    # Fukunaga 1990 p. 58 (references.md LR-4): the rule is MAP under P*
    expected = np.where(log_ratio + np.log(p_star[0]) > np.log(p_star[1]), 0, 1)
    decided = rule.decide(np.column_stack([log_ratio, np.zeros_like(log_ratio)]))
    assert np.array_equal(decided, expected)


# --- LR-5: N(0,1) vs N(2,1), P1 = 0.3, λ12 = 2, λ21 = 1 ------------------------------------------------------


@pytest.fixture(scope="module")
def lr5_rule(tmp_path_factory: pytest.TempPathFactory) -> Rule:
    return compile_text(
        tmp_path_factory.mktemp("lr5"),
        policy_text(
            classes=CLASSES,
            priors=[0.3, 0.7],
            actions=ACTIONS,
            loss=np.array([[0.0, 2.0], [1.0, 0.0]]),
            evidence=loglik_evidence(CLASSES),
        ),
    ).rule


def lr5_columns(x: np.ndarray) -> np.ndarray:
    return np.column_stack([scipy.stats.norm.logpdf(x, 0.0, 1.0), scipy.stats.norm.logpdf(x, 2.0, 1.0)])


def lr5_closed_form() -> tuple[float, float]:
    """derived (references.md LR-5): θ = (λ12/λ21)·P2/P1, log-LR = 2 - 2x, x* = (2 - ln θ)/2."""
    theta = (2.0 / 1.0) * 0.7 / 0.3
    x_star = (2.0 - np.log(theta)) / 2.0
    error_1 = scipy.stats.norm.sf(x_star, 0.0, 1.0)  # ω1 decided as ω2
    error_2 = scipy.stats.norm.cdf(x_star, 2.0, 1.0)  # ω2 decided as ω1
    return float(x_star), float(1.0 * 0.3 * error_1 + 2.0 * 0.7 * error_2)


def test_lr5_threshold(lr5_rule: Rule) -> None:
    x_star, _ = lr5_closed_form()
    assert x_star == pytest.approx(0.229777, abs=5e-7)  # printed in references.md LR-5
    low, high = -1.0, 2.0
    assert lr5_rule.decide(lr5_columns(np.array([low, high]))).tolist() == [0, 1]
    for _ in range(60):
        middle = 0.5 * (low + high)
        if lr5_rule.decide(lr5_columns(np.array([middle])))[0] == 0:
            low = middle
        else:
            high = middle
    # derived (references.md LR-5): decide ω1 iff x < x*
    assert abs(0.5 * (low + high) - x_star) < 1e-6


def test_lr5_bayes_risk(lr5_rule: Rule) -> None:
    x_star, bayes_risk = lr5_closed_form()
    assert bayes_risk == pytest.approx(0.176423, abs=5e-7)  # printed in references.md LR-5

    def risk_density(x: float) -> float:
        # R(δ(x)|x) p(x): the rule's conditional risk of its own decision times the mixture density
        explanation = lr5_rule.explain(lr5_columns(np.array([x])))
        mixture = 0.3 * scipy.stats.norm.pdf(x, 0.0, 1.0) + 0.7 * scipy.stats.norm.pdf(x, 2.0, 1.0)
        return float(explanation.risks[0, explanation.action[0]]) * mixture

    left, _ = scipy.integrate.quad(risk_density, -14.0, x_star, epsabs=1e-12, limit=200)
    right, _ = scipy.integrate.quad(risk_density, x_star, 16.0, epsabs=1e-12, limit=200)
    assert left + right == pytest.approx(bayes_risk, abs=1e-6)
