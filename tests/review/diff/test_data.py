"""The data diff on a few rows of upstream posteriors, against decisions and risks worked out by hand.

Two classes with P(pos | x) = q given in the data and equal priors, so the posterior is q itself. Under 0-1 loss
the minimum-risk action is say_neg for q <= 1/2 (the earlier action wins the tie); with a reject option of cost t
a row is deferred iff max(q, 1 - q) < 1 - t (Chow 1970, references.md CH-1).
"""

from __future__ import annotations

import csv
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pytest
from helpers import binary_policy, load_text

from policyc.errors import DataError
from policyc.review.diff import data_diff
from policyc.runtime import Rule

Q = [0.05, 0.1, 0.3, 0.45, 0.55, 0.7, 0.9, 0.95]
TRUTH = ["neg", "pos", "neg", "pos", "neg", "pos", "pos", "neg"]


def write_rows(
    path: Path, q: Sequence[float], truth: Sequence[str], columns: Sequence[str] = ("p_neg", "p_pos")
) -> Path:
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow([*columns, "truth"])
        writer.writerows([1.0 - p, p, label] for p, label in zip(q, truth, strict=True))
    return path


def rule(directory: Path, name: str, reject_cost: float | None = None, text: str | None = None) -> Rule:
    body = text or binary_policy(0, 1, 1, 0)
    if reject_cost is not None:
        body += f"invalid_input: reject\nreject: {{action: defer, cost: {reject_cost}}}\n"
    return load_text(directory, name, body).rule


def test_flips_rates_and_risks_of_a_new_reject_option(tmp_path: Path) -> None:
    old, new = rule(tmp_path, "old.yaml"), rule(tmp_path, "new.yaml", reject_cost=0.2)
    data = write_rows(tmp_path / "rows.csv", Q, TRUTH)
    result = data_diff(old, new, data, "truth", resamples=200)
    # by hand: old decides N N N N P P P P; new (defer iff 0.2 < q < 0.8) decides N N D D D D P P
    assert result.flips.tolist() == [[2, 0, 2], [0, 2, 2]]
    assert (result.rows, result.flipped, result.flip_rate, result.invalid_rows) == (8, 4, 0.5, 0)
    assert (result.reject_rates.old, result.reject_rates.new) == (None, 0.5)
    assert result.deferred_by_reason.old is None and result.deferred_by_reason.new is not None
    assert result.deferred_by_reason.new["min-risk"] == 4
    # mean R_new(a|x) with R(say_neg) = q, R(say_pos) = 1 - q, R(defer) = 0.2 (Duda, Hart & Stork 2001, §2.2)
    expected = result.expected_risk_report
    assert expected is not None and expected.rows == 8
    assert expected.old_decisions == pytest.approx(1.8 / 8, abs=1e-12)
    assert expected.new_decisions == pytest.approx(1.1 / 8, abs=1e-12)
    assert expected.difference == pytest.approx(-0.7 / 8, abs=1e-12)
    # mean loss_new[a, y]: old 0 1 0 1 1 0 0 1, new 0 1 .2 .2 .2 .2 0 1
    empirical = result.empirical_risk_report
    assert empirical is not None and empirical.rows == 8 and empirical.label == "truth"
    assert (empirical.old, empirical.new) == (pytest.approx(4.0 / 8), pytest.approx(2.8 / 8))
    # the mean of paired differences is the difference of the means
    assert empirical.difference.estimate == pytest.approx(2.8 / 8 - 4.0 / 8, abs=1e-12)
    assert not result.features_differ and result.notes == ()


def test_each_rules_reject_rate_counts_its_own_deferrals(tmp_path: Path) -> None:
    old, new = rule(tmp_path, "old.yaml", reject_cost=0.2), rule(tmp_path, "new.yaml", reject_cost=0.35)
    result = data_diff(old, new, write_rows(tmp_path / "rows.csv", Q, TRUTH))
    # defer iff t < q < 1 - t: four rows at t = 0.2, two (q = 0.45, 0.55) at t = 0.35
    assert (result.reject_rates.old, result.reject_rates.new) == (0.5, 0.25)
    assert result.deferred_by_reason.old is not None and result.deferred_by_reason.old["min-risk"] == 4
    # no labels: risks by the model only
    assert result.empirical_risk is None and result.empirical_risk_report is None
    assert result.expected_risk_report is not None


def test_a_single_row_is_enough(tmp_path: Path) -> None:
    old, new = rule(tmp_path, "old.yaml"), rule(tmp_path, "new.yaml", reject_cost=0.2)
    result = data_diff(old, new, write_rows(tmp_path / "one.csv", [0.3], ["neg"]), "truth", resamples=50)
    assert result.rows == 1 and result.flips.tolist() == [[0, 0, 1], [0, 0, 0]]


def test_rows_the_new_rule_cannot_read_are_counted_and_deferred(tmp_path: Path) -> None:
    old, new = rule(tmp_path, "old.yaml", reject_cost=0.2), rule(tmp_path, "new.yaml", reject_cost=0.2)
    data = write_rows(tmp_path / "rows.csv", Q, TRUTH)
    lines = data.read_text(encoding="utf-8").splitlines()
    data.write_text("\n".join([*lines, "0.7,0.7,neg"]) + "\n", encoding="utf-8")  # probabilities summing to 1.4
    result = data_diff(old, new, data)
    assert result.invalid_rows == 1
    assert result.deferred_by_reason.new is not None and result.deferred_by_reason.new["invalid"] == 1
    assert result.flips.sum() == 9


def test_rules_reading_other_columns_each_decide_on_their_own(tmp_path: Path) -> None:
    old = rule(tmp_path, "old.yaml")
    new = rule(tmp_path, "new.yaml", text=binary_policy(0, 1, 1, 0).replace("p_neg", "r_neg").replace("p_pos", "r_pos"))
    data = tmp_path / "rows.csv"
    with data.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["p_neg", "p_pos", "r_neg", "r_pos"])
        writer.writerows([1.0 - p, p, p, 1.0 - p] for p in Q)  # the new columns hold the mirrored posterior
    result = data_diff(old, new, data)
    # old: N N N N P P P P on q; new on 1 - q: P P P P N N N N
    assert result.flips.tolist() == [[0, 4], [4, 0]] and result.flip_rate == 1.0
    assert result.features_differ and any("different features" in note for note in result.notes)


def test_an_old_action_the_new_rule_lacks_stops_the_risk_comparison(tmp_path: Path) -> None:
    old = rule(tmp_path, "old.yaml")
    new = rule(tmp_path, "new.yaml", text=binary_policy(0, 1, 1, 0).replace("say_pos", "flag"))
    result = data_diff(old, new, write_rows(tmp_path / "rows.csv", Q, TRUTH), "truth", resamples=50)
    assert result.flips.tolist() == [[4, 0], [0, 4]]  # old say_pos rows all go to flag, none to say_neg
    assert result.flipped == 4  # say_pos -> flag is a change of action
    assert any("['say_pos']" in note for note in result.notes)
    assert result.expected_risk is None and result.empirical_risk is None and result.empirical_risk_report is None


def test_an_old_action_the_new_rule_lacks_but_never_chosen_leaves_risks_comparable(tmp_path: Path) -> None:
    old = rule(tmp_path, "old.yaml")
    new = rule(tmp_path, "new.yaml", text=binary_policy(0, 1, 1, 0).replace("say_pos", "flag"))
    low = [q for q in Q if q < 0.5]
    result = data_diff(old, new, write_rows(tmp_path / "rows.csv", low, TRUTH[: len(low)]), "truth", resamples=50)
    assert result.notes == () and result.expected_risk is not None and result.empirical_risk is not None
    assert result.expected_risk[0] == pytest.approx(np.mean(low), abs=1e-12)  # R(say_neg) = q


def test_a_label_that_is_not_a_class_names_the_column(tmp_path: Path) -> None:
    old, new = rule(tmp_path, "old.yaml"), rule(tmp_path, "new.yaml")
    data = write_rows(tmp_path / "rows.csv", Q, [*TRUTH[:-1], "maybe"])
    with pytest.raises(DataError, match="column 'truth', row 8: label 'maybe' is not a class"):
        data_diff(old, new, data, "truth")
