"""Property tests of the decision-theoretic checks against brute force and closed forms.

Reachability is a linear program over the probability simplex (simplex.winning_margin);
here it is compared with a dense grid over the 3-class simplex. The grid can only
resolve margins larger than its own spacing allows, so each direction of the
comparison is asserted only where that is provable:

* a grid point where a row beats every other by more than 1e-9 is a feasible point
  of the LP, so the LP margin is at least that gap;
* the LP optimum p* rounds to a grid point q with |q_j - p*_j| < 1/N, hence
  ||q - p*||_1 < 3/N, and every risk difference (λ_b - λ_r)·p moves by at most
  ptp(λ_b - λ_r)/2 · ||q - p*||_1 (the differences of two points of the simplex sum
  to zero). A margin larger than that bound is therefore seen on the grid.
"""

from __future__ import annotations

from functools import cache

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from policyc.geometry import reach
from policyc.geometry.decisions import margin_tolerance
from policyc.geometry.reach import reject_reach_value, winning_margin, wins_somewhere
from policyc.language.checks import (
    CheckContext,
    action_regions,
    check_document,
    every_action_is_reachable,
    no_dominated_actions,
    run_rules,
)
from policyc.language.model import Policy
from policyc.language.source import parse_source

PROPERTY_SETTINGS = settings(
    max_examples=150,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow],
)

GRID_N = 200  # simplex grid step 1/200: 20 301 points over three classes
GAP = 1e-9  # a grid point counts as a win only when the row beats every other by more than this
LP_SLACK = 1e-7  # HiGHS solves these tiny LPs to far better than this


@cache
def simplex_grid(n: int = GRID_N) -> np.ndarray:
    """All points (i, j, n - i - j) / n of the 3-class probability simplex, shape (m, 3)."""
    i, j = np.meshgrid(np.arange(n + 1), np.arange(n + 1), indexing="ij")
    keep = i + j <= n
    points = np.stack([i[keep], j[keep], n - i[keep] - j[keep]], axis=1)
    return points / n


def resolution_bound(loss: np.ndarray, row: int, n: int = GRID_N) -> float:
    """Largest amount by which rounding a posterior to the grid can shrink the row's lead over any other row."""
    spans = [np.ptp(loss[b] - loss[row]) for b in range(loss.shape[0]) if b != row]
    return max(spans, default=0.0) / 2 * 3 / n


def loss_matrices(max_actions: int = 5) -> st.SearchStrategy[tuple[np.ndarray, float | None]]:
    """Integer losses 0..9 for 2..max_actions actions over 3 classes, and an optional reject cost."""
    rows = st.lists(st.lists(st.integers(0, 9), min_size=3, max_size=3), min_size=2, max_size=max_actions)
    reject = st.none() | st.integers(0, 20).map(lambda k: k / 2)
    return st.tuples(rows.map(lambda r: np.array(r, dtype=float)), reject)


def with_reject_row(loss: np.ndarray, cost: float | None) -> np.ndarray:
    return loss if cost is None else np.vstack([loss, np.full(loss.shape[1], cost)])


# --- LP reachability against a dense grid ------------------------------------------------------------


@PROPERTY_SETTINGS
@given(loss_matrices())
def test_wins_somewhere_gives_the_linear_programs_verdict(case: tuple[np.ndarray, float | None]) -> None:
    # the witness points only short-cut the program; the verdict must be the program's
    loss = with_reject_row(*case)
    tolerance = margin_tolerance(loss)
    for row in range(loss.shape[0]):
        assert wins_somewhere(loss, row, tolerance) == (winning_margin(loss, row)[0] > tolerance)


def test_wins_somewhere_falls_back_to_the_program_for_a_sliver(monkeypatch: pytest.MonkeyPatch) -> None:
    # two rows cross at P(second) = 0.3 with risk 0.3; a constant row 1e-6 below wins only on a sliver there
    c = 0.3 / 0.7
    sliver = np.array([[0.0, 1.0], [0.3 - 1e-6, 0.3 - 1e-6], [c, 0.0]])
    touching = np.array([[0.0, 1.0], [0.3, 0.3], [c, 0.0]])  # only ties at the crossing
    programs: list[int] = []

    def counted(loss: np.ndarray, row: int) -> tuple[float, np.ndarray]:
        programs.append(row)
        return winning_margin(loss, row)

    monkeypatch.setattr(reach, "winning_margin", counted)
    assert reach.wins_somewhere(sliver, 1, margin_tolerance(sliver))
    assert not reach.wins_somewhere(touching, 1, margin_tolerance(touching))
    assert programs == [1, 1]  # no witness point hit the sliver: the program answered both times


@PROPERTY_SETTINGS
@given(loss_matrices())
def test_winning_margin_agrees_with_a_dense_grid(case: tuple[np.ndarray, float | None]) -> None:
    loss, cost = case
    rows = with_reject_row(loss, cost)  # the reject option is a constant row d: reject when min risk > d
    risks = simplex_grid() @ rows.T  # R(a|p) = Σ_j λ(a|j) p_j at every grid point
    for row in range(rows.shape[0]):
        margin, posterior = winning_margin(rows, row)
        others = np.delete(risks, row, axis=1)
        lead = others.min(axis=1) - risks[:, row]  # > 0 where the row is the unique argmin
        best = float(lead.max())
        # The returned posterior is a point of the simplex where the row leads by the margin.
        assert posterior.min() >= 0.0 and posterior.sum() == pytest.approx(1.0, abs=1e-12)
        reached = np.delete(rows, row, axis=0) @ posterior - rows[row] @ posterior
        assert reached.min() >= margin - LP_SLACK
        # Grid win with a clear gap => the LP finds a margin at least that large.
        if best > GAP:
            assert margin >= best - LP_SLACK > 0.0
        # LP margin beyond what the grid can miss => the grid sees the row win.
        if margin > resolution_bound(rows, row) + LP_SLACK:
            assert best > 0.0
        # No grid point reaches beyond the LP optimum.
        assert best <= margin + LP_SLACK


def policy_for(loss: np.ndarray, cost: float | None) -> Policy:
    classes = tuple(f"c{j}" for j in range(loss.shape[1]))
    actions = tuple(f"a{i}" for i in range(loss.shape[0]))
    data: dict[str, object] = {
        "policy": "generated",
        "classes": classes,
        "priors": dict.fromkeys(classes, 1 / 3),
        "actions": actions,
        "loss": {
            a: {c: float(v) for c, v in zip(classes, row, strict=True)} for a, row in zip(actions, loss, strict=True)
        },
        "evidence": {"kind": "log-likelihood", "columns": {c: f"l_{c}" for c in classes}},
    }
    if cost is not None:
        data["reject"] = {"action": "defer", "cost": cost}
    return Policy.model_validate(data)


@PROPERTY_SETTINGS
@given(loss_matrices())
def test_action_regions_agree_with_grid_decisions(case: tuple[np.ndarray, float | None]) -> None:
    """The regions follow the runtime's rule: argmin risk, ties to the earlier action, reject when min risk > d."""
    loss, cost = case
    policy = policy_for(loss, cost)
    regions = action_regions(policy)
    assert regions is not None
    rows = with_reject_row(loss, cost)
    assert [r.name for r in regions] == [*policy.actions, *(["defer"] if cost is not None else [])]
    risks = simplex_grid() @ rows.T
    chosen = np.argmin(risks, axis=1)  # first minimum: ties go to the earlier row, and reject is last
    for row, region in enumerate(regions):
        distinct = [b for b in range(rows.shape[0]) if not np.array_equal(rows[b], rows[row])]
        lead = (risks[:, distinct].min(axis=1) if distinct else np.full(len(risks), np.inf)) - risks[:, row]
        wins = chosen == row
        if np.any(wins & (lead > GAP)):
            assert region.reachable, (region, rows)
        if region.margin > resolution_bound(rows, row) + LP_SLACK:
            assert np.any(wins & (lead > 0.0)), (region, rows)
        if any(np.array_equal(rows[b], rows[row]) for b in range(row)):
            assert not region.reachable  # an earlier identical row takes every tie

    # Every row that is never chosen is reported exactly once, by dominance or by reachability.
    found = run_rules(policy, CheckContext(), rules=(no_dominated_actions, every_action_is_reachable))
    flagged = sorted(d.path for d in found)
    never = sorted(
        ("loss", region.name) if row < len(policy.actions) else ("reject",)
        for row, region in enumerate(regions)
        if not region.reachable
    )
    assert flagged == never


# --- the value V of the loss matrix (reject reachability) --------------------------------------------


@pytest.mark.parametrize("k", [2, 3, 4, 5, 6])
def test_reject_reach_value_of_zero_one_loss(k: int) -> None:
    zero_one = 1.0 - np.eye(k)
    # Chow 1970 (references.md CH-2): max posterior >= 1/K, so reject is used only when d < (K-1)/K.
    assert reject_reach_value(zero_one) == pytest.approx((k - 1) / k, rel=1e-9)


@pytest.mark.parametrize(("k", "value"), [(2, 0.5), (3, 0.6667), (5, 0.8)])
def test_reject_reach_value_golden_lp_results(k: int, value: float) -> None:
    # LP results listed in references.md CH-6.
    assert reject_reach_value(1.0 - np.eye(k)) == pytest.approx(value, abs=5e-5)


def test_reject_reach_value_golden_two_by_two() -> None:
    # derived minimax value, references.md CH-6: c01 = 3, c10 = 1 -> 0.75
    assert reject_reach_value(np.array([[0.0, 3.0], [1.0, 0.0]])) == pytest.approx(0.75, rel=1e-9)


positive_costs = st.floats(min_value=0.01, max_value=1000.0, allow_nan=False, allow_infinity=False)


@PROPERTY_SETTINGS
@given(positive_costs, positive_costs)
def test_reject_reach_value_of_a_zero_diagonal_two_by_two(c01: float, c10: float) -> None:
    loss = np.array([[0.0, c01], [c10, 0.0]])
    # derived minimax value, references.md CH-6: V = c01 c10 / (c01 + c10)
    assert reject_reach_value(loss) == pytest.approx(c01 * c10 / (c01 + c10), rel=1e-9)


@PROPERTY_SETTINGS
@given(st.integers(2, 6), st.floats(min_value=0.01, max_value=100.0), st.floats(min_value=-50.0, max_value=50.0))
def test_reject_reach_value_scales_and_shifts_with_the_losses(k: int, scale: float, shift: float) -> None:
    # Chow 1970 (references.md CH-2) for 0-1 loss; V(s·λ + c) = s·V(λ) + c since Σ_j p_j = 1 (references.md EL-5).
    loss = scale * (1.0 - np.eye(k)) + shift
    expected = scale * (k - 1) / k + shift
    assert reject_reach_value(loss) == pytest.approx(expected, rel=1e-9, abs=1e-9)


# --- the reject-never-taken warning -------------------------------------------------------------------

TEMPLATE = """\
policy: generated
classes: [ok, bad]
priors: {{ok: 0.5, bad: 0.5}}
actions: [accept, refuse]
loss:
  accept: {{ok: 0, bad: {c01!r}}}
  refuse: {{ok: {c10!r}, bad: 0}}
reject: {{action: defer, cost: {d!r}}}
evidence: {{kind: log-likelihood, columns: {{ok: l_ok, bad: l_bad}}}}
"""


@PROPERTY_SETTINGS
@given(
    positive_costs,
    positive_costs,
    st.floats(min_value=0.0, max_value=1200.0, allow_nan=False, allow_infinity=False),
    st.booleans(),
)
def test_reject_never_taken_exactly_when_cost_reaches_v(c01: float, c10: float, d: float, at_v: bool) -> None:
    # derived minimax value, references.md CH-6: deferring at cost d is ever taken iff d < V.
    value = c01 * c10 / (c01 + c10)
    if at_v:
        d = value  # ties go to the action, so a cost of exactly V is never taken
    else:
        assume(abs(d - value) > 1e-6 * max(1.0, c01, c10))
    report = check_document(parse_source(TEMPLATE.format(c01=c01, c10=c10, d=d), "generated.yaml"))
    assert report.policy is not None and report.policy.reject_cost() == d
    assert not report.has_errors, report.diagnostics
    fired = [x for x in report.diagnostics if x.code == "reject-never-taken"]
    assert len(fired) == (1 if d >= value else 0)
    assert all(x.line == 8 for x in fired)


@PROPERTY_SETTINGS
@given(st.integers(2, 5), st.integers(-300, 300), st.integers(0, 2**32 - 1))
def test_winning_margin_is_homogeneous_over_every_magnitude(k: int, exponent: int, seed: int) -> None:
    # t(s·λ) = s·t(λ) for s > 0: scaling the constraints (λ_r - λ_b)·p + t ≤ 0 scales t (common practice,
    # no source). Losses of 1e20 used to make the solver fail, since it reads such coefficients as infinite.
    loss = np.random.default_rng(seed).uniform(0.0, 10.0, size=(k + 1, k))
    scale = 10.0**exponent
    for row in range(k + 1):
        margin, posterior = winning_margin(loss, row)
        scaled_margin, scaled_posterior = winning_margin(loss * scale, row)
        assert scaled_margin == pytest.approx(margin * scale, rel=1e-6, abs=1e-7 * scale * np.ptp(loss))
        assert np.isclose(posterior.sum(), 1.0) and np.isclose(scaled_posterior.sum(), 1.0)


# --- the tie tolerance: 1e-9 relative to the largest loss (policyc.geometry.decisions.margin_tolerance) ---

# Three 0-1 actions; a3 the average of the first two (it ties them where they tie and loses elsewhere: an exact
# tie, never a win); a4 lower by 0.01 on the first two classes (a win by 0.01 where they tie), dominating nobody.
TIED = np.array([[0.0, 1.0, 1.0], [1.0, 0.0, 1.0], [1.0, 1.0, 0.0], [0.5, 0.5, 1.0], [0.49, 0.49, 1.5]])


def unreachable(loss: np.ndarray, cost: float | None = None) -> list[tuple[str | int, ...]]:
    found = run_rules(policy_for(loss, cost), CheckContext(), rules=(every_action_is_reachable,))
    return sorted(d.path for d in found)


@pytest.mark.parametrize("scale", [1e-6, 1.0, 1e6])
def test_reachability_verdicts_do_not_depend_on_the_unit_of_the_losses(scale: float) -> None:
    # EL-5 (references.md): scaling every loss by s > 0 changes no decision, so no verdict either; the exact tie
    # stays a tie at every scale and the 0.01 win stays a win (at 1e-6 its lead, 1e-8, is still above the 1e-9 floor).
    assert unreachable(TIED * scale) == [("loss", "a3")]


@pytest.mark.parametrize("scale", [1.0, 1e6])
@pytest.mark.parametrize(("lead", "reachable"), [(1.5e-9, True), (0.5e-9, False)])
def test_a_lead_counts_as_a_win_only_above_1e_9_of_the_largest_loss(scale: float, lead: float, reachable: bool) -> None:
    # The first two actions tie at P = (½, ½, 0) with risk ½; the third, ½ - lead there, leads by `lead`, and by
    # lead·(1 - p₃) along that edge, so its margin is exactly `lead`; the largest loss is 1·scale.
    loss = np.array([[0.0, 1.0, 1.0], [1.0, 0.0, 1.0], [0.5 - lead, 0.5 - lead, 1.0]]) * scale
    assert margin_tolerance(loss) == pytest.approx(1e-9 * scale, rel=1e-12)
    assert unreachable(loss) == ([] if reachable else [("loss", "a2")])


def test_a_lead_below_the_tolerance_at_the_centre_is_not_a_win() -> None:
    # Two classes: the constant action ½ - 0.75e-9 leads the 0-1 actions by 0.75e-9 at the centre (½, ½), its best
    # point, which is below the tie tolerance 1e-9: a tie, whichever witness posteriors are tried first.
    loss = np.array([[0.0, 1.0], [1.0, 0.0], [0.5 - 0.75e-9, 0.5 - 0.75e-9]])
    assert not wins_somewhere(loss, 2, margin_tolerance(loss))
    assert winning_margin(loss, 2)[0] == pytest.approx(0.75e-9, abs=1e-12)


def test_a_lead_equal_to_the_tolerance_at_a_vertex_is_a_tie() -> None:
    # Margins at or below the tolerance are ties (the docstring's boundary). The first row leads the second by
    # 0.5·P(first class), so by exactly 0.5 at the vertex (1, 0), a witness posterior, and by less everywhere else.
    loss = np.array([[0.0, 1.0], [0.5, 1.0]])
    assert winning_margin(loss, 0)[0] == pytest.approx(0.5, abs=1e-12)
    assert not wins_somewhere(loss, 0, tolerance=0.5)
    assert wins_somewhere(loss, 0, tolerance=0.5 - 1e-6)


def test_a_lead_of_exactly_the_tolerance_is_a_tie() -> None:
    # Losses of a few 1e-9 put the tolerance at its floor, 1e-9. The first two actions win by 4e-9 at the vertices of
    # the last two classes; the third leads them by 4e-9/2 - 1e-9 = 1e-9 at (½, ½, 0, 0), its best point. Every step
    # is exact in binary, so that lead is the tolerance to the bit: a tie (margins at or below the tolerance are ties).
    unit = 1e-9
    loss = np.array([[0.0, 4, 0, 4], [4, 0, 4, 0], [1, 1, 4, 4]]) * unit
    assert winning_margin(loss, 2)[0] == margin_tolerance(loss) == unit
    regions = action_regions(policy_for(loss, None))
    assert regions is not None and [region.reachable for region in regions] == [True, True, False]
    assert unreachable(loss) == [("loss", "a2")]
