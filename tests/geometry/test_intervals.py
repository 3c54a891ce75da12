"""Two-class decision intervals against Elkan's threshold and against decisions on a dense grid."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from policyc.geometry.decisions import decide_on_posteriors
from policyc.geometry.intervals import PosteriorInterval, posterior_intervals

GRID = np.linspace(0.0, 1.0, 4001)


def grid_actions(loss: np.ndarray) -> np.ndarray:
    """The minimum-risk row at every q of GRID (posteriors (1 - q, q)), ties to the earlier row."""
    return decide_on_posteriors(loss, np.column_stack([1.0 - GRID, GRID]))


def assert_intervals_match_grid(loss: np.ndarray) -> list[PosteriorInterval]:
    intervals = posterior_intervals(loss)
    # The intervals tile [0, 1] in order, and neighbours differ (equal neighbours are merged).
    assert intervals[0].low == 0.0 and intervals[-1].high == 1.0
    assert all(a.high == b.low and a.action != b.action for a, b in itertools.pairwise(intervals))
    actions = grid_actions(loss)
    for interval in intervals:
        inside = (interval.low + 1e-9 < GRID) & (interval.high - 1e-9 > GRID)
        assert set(actions[inside].tolist()) <= {interval.action}
    return intervals


def test_three_actions_and_reject_in_four_intervals():
    # R(a|q) = λ(a|1)(1 - q) + λ(a|2) q: a0 = 10q, a1 = 5 - 4q, a2 = 12 - 12q, reject = 2 (hand-solved):
    # a0 up to 10q = 2 (q = 0.2), reject until 5 - 4q = 2 (q = 0.75), a1 until 12 - 12q = 5 - 4q (q = 0.875), then a2.
    # Crossings of lines that are not the minimum (5/14, 6/11, 5/6) split the reject and a1 stretches: those
    # pieces must merge back.
    loss = np.array([[0.0, 10.0], [5.0, 1.0], [12.0, 0.0], [2.0, 2.0]])
    intervals = assert_intervals_match_grid(loss)
    assert [i.action for i in intervals] == [0, 3, 1, 2]
    assert [i.high for i in intervals[:-1]] == pytest.approx([0.2, 0.75, 0.875], abs=1e-12)


@pytest.mark.parametrize(
    ("c00", "c01", "c10", "c11", "threshold"),
    # Elkan 2001 §1.3 (references.md EL-2): p* = (c10 - c00) / (c10 - c00 + c01 - c11), golden values.
    [(0, 1, 1, 0, 0.5), (0, 4, 1, 0, 0.2), (0, 1, 4, 0, 0.8), (1, 5, 3, 0, 2 / 7)],
)
def test_two_actions_switch_at_elkans_threshold(c00, c01, c10, c11, threshold):
    # Elkan's C(i, j): cost of predicting i when the truth is j; rows are predictions, q = P(second class).
    loss = np.array([[c00, c01], [c10, c11]], dtype=float)
    assert posterior_intervals(loss) == [
        PosteriorInterval(0.0, pytest.approx(threshold, abs=1e-12), 0),
        PosteriorInterval(pytest.approx(threshold, abs=1e-12), 1.0, 1),
    ]


def test_one_action_holds_the_whole_interval():
    assert posterior_intervals(np.array([[1.0, 3.0]])) == [PosteriorInterval(0.0, 1.0, 0)]


def test_more_than_two_classes_are_refused():
    with pytest.raises(ValueError, match="two classes"):
        posterior_intervals(np.eye(3))


@settings(max_examples=150, deadline=None, derandomize=True, database=None)
@given(st.lists(st.tuples(st.integers(0, 9), st.integers(0, 9)), min_size=1, max_size=5))
def test_intervals_agree_with_grid_decisions(rows):
    assert_intervals_match_grid(np.array(rows, dtype=float))
