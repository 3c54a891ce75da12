"""The posterior-space diff: exact intervals for two classes against a brute-force minimum-risk decision on a fine
grid of P(pos | x), and the Sobol estimate for three classes against an area worked out by hand.
"""

from __future__ import annotations

import itertools
import re
from pathlib import Path

import numpy as np
from helpers import binary_policy, load_text, policy_text, posterior_evidence, rule_from_text, three_class_policy
from hypothesis import given, settings
from hypothesis import strategies as st

from policyc.geometry.sampling import SIMPLEX_REPLICATES
from policyc.review.diff import posterior_space_diff
from policyc.runtime import Rule

CLASSES = ("neg", "pos")
GRID = 4096


@st.composite
def two_class_rules(draw: st.DrawFn) -> tuple[list[str], np.ndarray, str | None]:
    """Actions named from a small pool (so that the two sides share some), integer losses, maybe a reject."""
    actions = draw(st.lists(st.sampled_from(["a", "b", "c", "d"]), min_size=2, max_size=3, unique=True))
    loss = np.array(draw(st.lists(st.integers(0, 4), min_size=2 * len(actions), max_size=2 * len(actions))))
    reject = draw(st.sampled_from([None, "defer", "hold"]))
    return actions, loss.reshape(len(actions), 2).astype(float), reject


def build(actions: list[str], loss: np.ndarray, reject: str | None, cost: float) -> Rule:
    evidence = posterior_evidence(CLASSES, [0.5, 0.5])
    reject_cost = cost if reject is not None else None
    text = policy_text(
        classes=CLASSES,
        priors=[0.5, 0.5],
        actions=actions,
        loss=loss,
        evidence=evidence,
        reject_cost=reject_cost,
        reject_action=reject or "reject",
    )
    return rule_from_text(text)


def chosen(actions: list[str], loss: np.ndarray, reject: str | None, cost: float, q: np.ndarray) -> np.ndarray:
    """Minimum conditional risk R(a|q) = λ(a|neg)(1 - q) + λ(a|pos) q, the reject option a row of constant cost
    appended last, ties to the earlier row (Duda, Hart & Stork 2001, §2.2; Chow 1970 for the reject row)."""
    rows = np.vstack([loss, [cost, cost]]) if reject is not None else loss
    names = np.array([*actions, "<reject>"] if reject is not None else actions)
    risks = rows[:, 0][None, :] * (1.0 - q[:, None]) + rows[:, 1][None, :] * q[:, None]
    return names[np.argmin(risks, axis=1)]


@settings(max_examples=40, deadline=None)
@given(two_class_rules(), two_class_rules(), st.sampled_from([0.5, 1.5, 2.5]))
def test_two_class_movements_are_where_the_minimum_risk_actions_differ(
    old: tuple[list[str], np.ndarray, str | None], new: tuple[list[str], np.ndarray, str | None], cost: float
) -> None:
    space = posterior_space_diff(build(*old, cost), build(*new, cost))
    assert (space.method, space.standard_error, space.posterior_of) == ("exact", 0.0, "pos")
    q = (np.arange(GRID) + 0.5) / GRID  # midpoints of a fine grid on [0, 1]
    differs = chosen(*old, cost, q) != chosen(*new, cost, q)  # the two reject options match each other
    edges = 2 * (len(old[0]) + len(new[0]) + 2)  # each action change moves at most one grid cell
    assert abs(space.changed_share - differs.mean()) <= edges / GRID
    assert abs(sum(m.share for m in space.movements) - space.changed_share) <= 1e-12
    for movement in space.movements:
        assert movement.low is not None and movement.high is not None
        assert movement.share == movement.high - movement.low and movement.standard_error == 0.0
        middle = np.array([0.5 * (movement.low + movement.high)])
        names = {"defer": "<reject>", "hold": "<reject>"}
        before, after = (names.get(m, m) for m in (movement.old_action, movement.new_action))
        assert (before, after) == (chosen(*old, cost, middle)[0], chosen(*new, cost, middle)[0])
    # disjoint, and two pieces that touch hold different action pairs (else they would be one piece)
    pieces = [(m.low, m.high, m.old_action, m.new_action) for m in space.movements]
    assert all(a[1] < b[0] or (a[1] == b[0] and a[2:] != b[2:]) for a, b in itertools.pairwise(pieces))


def test_a_reject_band_gives_two_movements_with_chows_thresholds(tmp_path: Path) -> None:
    old = load_text(tmp_path, "old.yaml", binary_policy(0, 1, 1, 0))
    text = binary_policy(0, 1, 1, 0, revision=2) + "reject: {action: defer, cost: 0.2}\n"
    new = load_text(tmp_path, "new.yaml", text)
    space = posterior_space_diff(old.rule, new.rule)
    # Chow 1970 (references.md CH-1): under 0-1 loss reject iff max(q, 1 - q) < 1 - t, so q in (t, 1 - t)
    assert [(m.old_action, m.new_action) for m in space.movements] == [("say_neg", "defer"), ("say_pos", "defer")]
    assert [(m.low, m.high) for m in space.movements] == [(0.2, 0.5), (0.5, 0.8)]
    assert abs(space.changed_share - 0.6) <= 1e-12


def test_classes_with_other_names_are_not_comparable(tmp_path: Path) -> None:
    old = load_text(tmp_path, "old.yaml", binary_policy(0, 1, 1, 0))
    new = load_text(tmp_path, "new.yaml", re.sub(r"\bpos\b", "other", binary_policy(0, 1, 1, 0)))
    space = posterior_space_diff(old.rule, new.rule)
    assert not space.comparable and space.posterior_of is None and space.changed_share is None
    assert "class lists differ" in (space.reason or "")


def test_three_classes_have_no_single_posterior_axis(tmp_path: Path) -> None:
    old = load_text(tmp_path, "old.yaml", three_class_policy(None))
    new = load_text(tmp_path, "new.yaml", three_class_policy(0.3, revision=2))
    samples = 64 * SIMPLEX_REPLICATES  # a multiple of the replicates: every point requested is drawn
    space = posterior_space_diff(old.rule, new.rule, samples=samples, seed=3)
    assert space.comparable and space.method == "sobol" and space.posterior_of is None
    assert (space.samples, space.replicates, space.seed) == (samples, SIMPLEX_REPLICATES, 3)
    assert all(m.low is None and m.high is None for m in space.movements)


def test_a_small_changed_region_counts_though_some_replicates_miss_it(tmp_path: Path) -> None:
    t = 0.6
    old = load_text(tmp_path, "old.yaml", three_class_policy(None))
    new = load_text(tmp_path, "new.yaml", three_class_policy(t, revision=2))
    space = posterior_space_diff(old.rule, new.rule, samples=64 * SIMPLEX_REPLICATES, seed=5)
    # Chow 1970 (references.md CH-1): reject iff max_k p_k < s = 1 - t. For 1/3 < s <= 1/2 that set is
    # {q = s - p : q_k > 0, Σ q_k = 3s - 1}, the simplex scaled by 3s - 1: a share (3s - 1)^2 = 0.04 here,
    # about 2.6 of each replicate's 64 points, so a movement's share is 0 in some replicates
    expected = (3.0 * (1.0 - t) - 1.0) ** 2
    assert space.movements and space.standard_error is not None and space.changed_share is not None
    assert abs(space.changed_share - expected) <= 4.0 * space.standard_error
    assert abs(sum(m.share for m in space.movements) - space.changed_share) <= 1e-12


def test_a_threshold_moved_by_one_ulp_is_a_movement_of_one_ulp(tmp_path: Path) -> None:
    old = load_text(tmp_path, "old.yaml", binary_policy(0, 1, 1, 0))
    c10, c01 = 0.5 + 2.0**-53, 0.5 - 2.0**-53  # c10 + c01 = 1 exactly
    new = load_text(tmp_path, "new.yaml", binary_policy(0, c01, c10, 0, revision=2))
    space = posterior_space_diff(old.rule, new.rule)
    # Elkan 2001 §1.3 (references.md EL-2): p* = c10 / (c10 + c01) = 0.5 + 2^-53, the double after 0.5
    (moved,) = space.movements
    assert (moved.old_action, moved.new_action, moved.low, moved.high) == ("say_pos", "say_neg", 0.5, c10)
    assert space.changed_share == 2.0**-53
