"""Metamorphic properties of compiled rules (references.md §10, PR-1, PR-2, PR-3, PR-8).

Each property compiles a base policy and a transformed one and compares decisions on
random log-likelihood inputs, on the rows whose base risk gap (best vs runner-up action,
reject included) exceeds TIE_GUARD, so that rounding cannot decide a tie.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from helpers import loglik_evidence, names, policy_text, posterior_evidence, rule_from_text
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from policyc.runtime import Rule

TIE_GUARD = 1e-9
SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
finite = {"allow_nan": False, "allow_infinity": False, "allow_subnormal": False}


@dataclass(frozen=True)
class Case:
    loss: np.ndarray  # (A, K), actions only
    priors: np.ndarray  # (K,)
    reject_cost: float | None
    inputs: np.ndarray  # (n, K) log-likelihoods

    @property
    def classes(self) -> list[str]:
        return names("c", self.loss.shape[1])

    @property
    def actions(self) -> list[str]:
        return names("a", self.loss.shape[0])


@st.composite
def cases(draw: st.DrawFn, with_reject: bool | None = None) -> Case:
    n_classes = draw(st.integers(2, 4))
    n_actions = draw(st.integers(2, 4))
    loss = np.array(
        draw(st.lists(st.floats(0.0, 10.0, **finite), min_size=n_actions * n_classes, max_size=n_actions * n_classes))
    ).reshape(n_actions, n_classes)
    weights = np.array(draw(st.lists(st.floats(0.05, 1.0, **finite), min_size=n_classes, max_size=n_classes)))
    reject = draw(st.booleans()) if with_reject is None else with_reject
    reject_cost = draw(st.floats(0.0, 10.0, **finite)) if reject else None
    seed = draw(st.integers(0, 2**32 - 1))
    inputs = np.random.default_rng(seed).normal(0.0, 3.0, (200, n_classes))
    return Case(loss, weights / weights.sum(), reject_cost, inputs)


def build(
    case: Case,
    loss: np.ndarray | None = None,
    priors: np.ndarray | None = None,
    reject_cost: float | None = None,
    classes: list[str] | None = None,
    actions: list[str] | None = None,
) -> Rule:
    classes = classes if classes is not None else case.classes
    return rule_from_text(
        policy_text(
            classes=classes,
            priors=case.priors if priors is None else priors,
            actions=case.actions if actions is None else actions,
            loss=case.loss if loss is None else loss,
            evidence=loglik_evidence(classes),
            reject_cost=reject_cost,
        )
    )


def clear_rows(rule: Rule, inputs: np.ndarray) -> np.ndarray:
    """Rows whose best action beats the runner-up by more than TIE_GUARD."""
    clear = rule.explain(inputs).margin > TIE_GUARD
    assume(clear.sum() >= 20)
    return clear


@SETTINGS
@given(case=cases(), scale=st.floats(0.01, 100.0, **finite))
def test_scaling_losses_and_reject_cost_keeps_decisions(case: Case, scale: float) -> None:
    base = build(case, reject_cost=case.reject_cost)
    scaled = build(
        case, loss=scale * case.loss, reject_cost=None if case.reject_cost is None else scale * case.reject_cost
    )
    clear = clear_rows(base, case.inputs)
    # derived (references.md PR-1), Elkan 2001 §1.1 (references.md EL-5): λ -> cλ, d -> cd keeps every decision
    assert np.array_equal(scaled.decide(case.inputs)[clear], base.decide(case.inputs)[clear])


@SETTINGS
@given(case=cases(), shift=st.floats(-5.0, 5.0, **finite))
def test_adding_a_constant_to_every_loss_and_the_reject_cost_keeps_decisions(case: Case, shift: float) -> None:
    base = build(case, reject_cost=case.reject_cost)
    shifted = build(
        case, loss=case.loss + shift, reject_cost=None if case.reject_cost is None else case.reject_cost + shift
    )
    clear = clear_rows(base, case.inputs)
    # Elkan 2001 §1.1 (references.md EL-5): adding a constant to every entry keeps the argmin
    assert np.array_equal(shifted.decide(case.inputs)[clear], base.decide(case.inputs)[clear])


@SETTINGS
@given(case=cases(with_reject=True), data=st.data())
def test_column_shift_of_actions_and_reject_row_keeps_decisions(case: Case, data: st.DataObject) -> None:
    assert case.reject_cost is not None
    n_classes = case.loss.shape[1]
    shifts = np.array(data.draw(st.lists(st.floats(-5.0, 5.0, **finite), min_size=n_classes, max_size=n_classes)))
    base = build(case, reject_cost=case.reject_cost)
    # A column-shifted reject row (d + b_1, ..., d + b_K) is no longer constant, so the transformed policy
    # states it as one more ordinary action, last, exactly where the compiler puts the reject row.
    shifted_loss = np.vstack([case.loss + shifts, case.reject_cost + shifts])
    shifted = build(case, loss=shifted_loss, actions=[*case.actions, "defer"])
    clear = clear_rows(base, case.inputs)
    # derived (references.md PR-2, EL-5): λ(·|j) -> λ(·|j) + b_j for every action and the reject row
    assert np.array_equal(shifted.decide(case.inputs)[clear], base.decide(case.inputs)[clear])


def posterior_rule(loss: np.ndarray, reject_cost: float | None) -> Rule:
    classes = ["c0", "c1"]
    return rule_from_text(
        policy_text(
            classes=classes,
            priors=[0.5, 0.5],
            actions=["a0", "a1"],
            loss=loss,
            evidence=posterior_evidence(classes, [0.5, 0.5]),
            reject_cost=reject_cost,
        )
    )


def test_shifting_only_the_action_rows_moves_the_reject_region() -> None:
    # derived (references.md PR-2): the reject row must move with the matrix. At P = (½, ½) under 0-1 loss
    # both actions risk 0.5 < d = 0.6, so an action is taken; shifting the action rows by b = (0.2, 0.2)
    # raises their risks to 0.7 > 0.6 and the same input is now rejected; shifting d too restores the action.
    half = np.array([[0.5, 0.5]])
    zero_one = np.array([[0.0, 1.0], [1.0, 0.0]])
    assert posterior_rule(zero_one, 0.6).decide_names(half).tolist() == ["a0"]
    assert posterior_rule(zero_one + 0.2, 0.6).decide_names(half).tolist() == ["reject"]
    assert posterior_rule(zero_one + 0.2, 0.8).decide_names(half).tolist() == ["a0"]


@SETTINGS
@given(case=cases(with_reject=False), data=st.data())
def test_prior_loss_exchange_without_reject_keeps_decisions(case: Case, data: st.DataObject) -> None:
    n_classes = case.loss.shape[1]
    k = np.array(data.draw(st.lists(st.floats(0.1, 10.0, **finite), min_size=n_classes, max_size=n_classes)))
    exchanged_priors = (case.priors / k) / (case.priors / k).sum()
    base = build(case)
    exchanged = build(case, loss=case.loss * k, priors=exchanged_priors)
    clear = clear_rows(base, case.inputs)
    # Fukunaga 1990 p. 58 (references.md PR-3): column j of λ times k_j, P(j) times 1/k_j, renormalised
    assert np.array_equal(exchanged.decide(case.inputs)[clear], base.decide(case.inputs)[clear])


def test_prior_loss_exchange_is_not_invariant_with_reject() -> None:
    # derived (references.md PR-3): with a reject option the posterior normaliser changes the comparison with d.
    # Base: priors (½, ½), 0-1 loss, likelihoods (0.6, 0.4) -> P = (0.6, 0.4), risks (0.4, 0.6), d = 0.3: reject.
    # Exchange k = (0.5, 0.1): loss rows (0, 0.1), (0.5, 0); priors ∝ (1, 5) -> P = (3/13, 10/13),
    # risks (1/13, 1.5/13) = (0.077, 0.115) < d: a0. Without reject both take a0.
    classes = ["c0", "c1"]
    inputs = np.log([[0.6, 0.4]])

    def rule(loss: list[list[float]], priors: list[float], reject_cost: float | None) -> Rule:
        return rule_from_text(
            policy_text(
                classes=classes,
                priors=priors,
                actions=["a0", "a1"],
                loss=np.array(loss),
                evidence=loglik_evidence(classes),
                reject_cost=reject_cost,
            )
        )

    base_loss, exchanged_loss = [[0.0, 1.0], [1.0, 0.0]], [[0.0, 0.1], [0.5, 0.0]]
    exchanged_priors = [1.0 / 6.0, 5.0 / 6.0]
    assert rule(base_loss, [0.5, 0.5], None).decide_names(inputs).tolist() == ["a0"]
    assert rule(exchanged_loss, exchanged_priors, None).decide_names(inputs).tolist() == ["a0"]
    assert rule(base_loss, [0.5, 0.5], 0.3).decide_names(inputs).tolist() == ["reject"]
    assert rule(exchanged_loss, exchanged_priors, 0.3).decide_names(inputs).tolist() == ["a0"]


@SETTINGS
@given(case=cases(), data=st.data())
def test_permuting_classes_keeps_decisions(case: Case, data: st.DataObject) -> None:
    n_classes = case.loss.shape[1]
    order = np.array(data.draw(st.permutations(range(n_classes))))
    base = build(case, reject_cost=case.reject_cost)
    permuted = build(
        case,
        loss=case.loss[:, order],
        priors=case.priors[order],
        reject_cost=case.reject_cost,
        classes=[case.classes[i] for i in order],
    )
    clear = clear_rows(base, case.inputs)
    # derived (references.md PR-8): classes permuted with priors, loss columns and input columns
    assert permuted.features == tuple(f"ll_{case.classes[i]}" for i in order)
    assert np.array_equal(permuted.decide(case.inputs[:, order])[clear], base.decide(case.inputs)[clear])
    assert np.allclose(permuted.posteriors(case.inputs[:, order]), base.posteriors(case.inputs)[:, order], atol=1e-12)


@SETTINGS
@given(case=cases(), data=st.data())
def test_permuting_actions_permutes_decisions(case: Case, data: st.DataObject) -> None:
    n_actions = case.loss.shape[0]
    order = np.array(data.draw(st.permutations(range(n_actions))))
    base = build(case, reject_cost=case.reject_cost)
    permuted = build(
        case, loss=case.loss[order], reject_cost=case.reject_cost, actions=[case.actions[i] for i in order]
    )
    clear = clear_rows(base, case.inputs)
    # derived (references.md PR-8): new index i holds old action order[i]; the reject action stays last
    inverse = np.empty(n_actions + 1, dtype=int)
    inverse[order] = np.arange(n_actions)
    inverse[n_actions] = n_actions
    base_decisions = base.decide(case.inputs)[clear]
    permuted_decisions = permuted.decide(case.inputs)[clear]
    if case.reject_cost is None:
        inverse = inverse[:n_actions]
    assert np.array_equal(permuted_decisions, inverse[base_decisions])
    assert np.array_equal(permuted.decide_names(case.inputs)[clear], base.decide_names(case.inputs)[clear])
