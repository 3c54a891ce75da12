"""Decisions on the simplex and the alignment of two rules' class orders."""

from __future__ import annotations

import numpy as np
import pytest

from policyc.geometry.decisions import align_columns, decide_on_posteriors, margin_tolerance


def test_columns_follow_the_reference_class_order() -> None:
    loss = np.array([[0.0, 1.0, 2.0], [3.0, 4.0, 5.0]])
    np.testing.assert_array_equal(align_columns(loss, ["a", "b", "c"], ["c", "a", "b"]), loss[:, [2, 0, 1]])


@pytest.mark.parametrize(("classes", "reference"), [(["a", "b"], ["a", "c"]), (["a", "b"], ["a", "b", "b"])])
def test_class_lists_that_differ_are_refused(classes: list[str], reference: list[str]) -> None:
    with pytest.raises(ValueError, match="the class lists differ"):
        align_columns(np.zeros((2, len(classes))), classes, reference)


def test_ties_go_to_the_earlier_row_and_the_tolerance_is_relative_with_a_floor() -> None:
    loss = np.array([[0.0, 1.0], [1.0, 0.0], [0.5, 0.5]])
    # at (½, ½) all three risks are ½: the first row wins the tie (np.argmin takes the first minimum)
    assert decide_on_posteriors(loss, np.array([[0.5, 0.5], [0.9, 0.1], [0.1, 0.9]])).tolist() == [0, 0, 1]
    assert margin_tolerance(loss * 1e6) == pytest.approx(1e-3) and margin_tolerance(loss * 1e-6) == 1e-9
