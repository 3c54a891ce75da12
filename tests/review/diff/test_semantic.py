"""Semantic changes: what each differing setting is called, its kind, and where it sits in both policy files.

Locations are checked against the policy text itself: the line that states the value and the column where the
value starts (1-based), found by searching the text the test wrote.
"""

from __future__ import annotations

import hashlib
import shutil
import textwrap
from pathlib import Path

import pytest
from helpers import DEMOS, binary_policy, load_text, position, three_class_policy

from policyc.review.diff import SemanticChange, semantic_changes
from policyc.review.shared.loading import LoadedRule

R5 = DEMOS / "packhouse" / "policy-r5.yaml"


def changes_between(old: LoadedRule, new: LoadedRule) -> dict[str, SemanticChange]:
    return {c.what: c for c in semantic_changes(old, new)}


def gain_policy(gain_neg_pos: float, reject_gain: float) -> str:
    """Two classes stated as gains, with a reject option stated as a gain."""
    return textwrap.dedent(
        f"""\
        policy: gains
        revision: 1
        classes: [neg, pos]
        priors: {{neg: 0.5, pos: 0.5}}
        actions: [say_neg, say_pos]
        gain:
          say_neg: {{neg: 1, pos: {gain_neg_pos}}}
          say_pos: {{neg: 0, pos: 1}}
        reject: {{action: defer, gain: {reject_gain}}}
        evidence:
          kind: posterior
          columns: {{neg: p_neg, pos: p_pos}}
          trained_priors: {{neg: 0.5, pos: 0.5}}
          calibration: {{method: none}}
        """
    )


def test_a_gain_policy_reports_losses_located_at_the_gains_it_states(tmp_path: Path) -> None:
    old_text, new_text = gain_policy(-2, 0.25), gain_policy(-3, 0.5)
    old, new = load_text(tmp_path, "old.yaml", old_text), load_text(tmp_path, "new.yaml", new_text)
    changes = changes_between(old, new)
    assert set(changes) == {"loss[say_neg][pos]", "reject.cost"}
    entry, reject = changes["loss[say_neg][pos]"], changes["reject.cost"]
    # on the loss scale a gain g is the loss -g (the sign convention of the policy language)
    assert (entry.change, entry.old, entry.new) == ("changed", "2", "3")
    assert (reject.change, reject.old, reject.new) == ("changed", "-0.25", "-0.5")
    assert entry.old_location == position(tmp_path / "old.yaml", old_text, "say_neg:", "-2")
    assert entry.new_location == position(tmp_path / "new.yaml", new_text, "say_neg:", "-3")
    assert reject.old_location == position(tmp_path / "old.yaml", old_text, "reject:", "0.25")
    assert reject.new_location == position(tmp_path / "new.yaml", new_text, "reject:", "0.5")


def test_a_removed_setting_is_located_on_the_old_side_only(tmp_path: Path) -> None:
    old_text = three_class_policy(0.3)
    old, new = load_text(tmp_path, "old.yaml", old_text), load_text(tmp_path, "new.yaml", three_class_policy(None))
    changes = changes_between(old, new)
    assert (changes["reject.cost"].change, changes["reject.cost"].old, changes["reject.cost"].new) == (
        "removed",
        "0.3",
        None,
    )
    assert changes["reject.cost"].old_location == position(tmp_path / "old.yaml", old_text, "reject:", "0.3")
    assert changes["reject.cost"].new_location is None
    # the reject action is a setting of its own, never one of the actions the rule chooses between
    assert changes["reject.action"].change == "removed" and "actions" not in changes


def test_reordered_classes_are_one_reordered_entry(tmp_path: Path) -> None:
    old_text = binary_policy(0, 1, 1, 0)
    new_text = old_text.replace("classes: [neg, pos]", "classes: [pos, neg]")
    old, new = load_text(tmp_path, "old.yaml", old_text), load_text(tmp_path, "new.yaml", new_text)
    # same classes and settings: only the order differs, and the posterior columns follow the classes
    classes, columns = semantic_changes(old, new)
    assert (classes.what, classes.change, classes.old, classes.new) == (
        "classes (order)",
        "reordered",
        "[neg, pos]",
        "[pos, neg]",
    )
    assert classes.new_location == position(tmp_path / "new.yaml", new_text, "classes:", "[pos")
    assert (columns.what, columns.old, columns.new) == ("features (order)", "[p_neg, p_pos]", "[p_pos, p_neg]")
    assert columns.new_location == position(tmp_path / "new.yaml", new_text, "columns:", "{neg")


@pytest.mark.parametrize(
    ("relative", "reported"),
    # equal within relative 1e-12 or absolute 1e-15 is the same setting (rounding of a value written out
    # again); common practice, no source
    [(0.5e-12, False), (1.5e-12, True)],
)
def test_a_loss_entry_changed_only_by_rounding_is_no_change(tmp_path: Path, relative: float, reported: bool) -> None:
    old = load_text(tmp_path, "old.yaml", binary_policy(0, 1, 1, 0))
    new = load_text(tmp_path, "new.yaml", binary_policy(0, 1, 1.0 + relative, 0, revision=2))
    assert ("loss[say_pos][neg]" in changes_between(old, new)) is reported


@pytest.mark.parametrize(("absolute", "reported"), [(0.5e-15, False), (1.5e-15, True)])
def test_a_loss_entry_near_zero_compares_by_the_absolute_tolerance(
    tmp_path: Path, absolute: float, reported: bool
) -> None:
    old = load_text(tmp_path, "old.yaml", binary_policy(0, 1, 1, 0))
    new = load_text(tmp_path, "new.yaml", binary_policy(absolute, 1, 1, 0, revision=2))
    assert ("loss[say_neg][neg]" in changes_between(old, new)) is reported  # common practice, no source


def test_posterior_evidence_settings_are_named_per_key_and_located(tmp_path: Path) -> None:
    old_text = binary_policy(0, 1, 1, 0)
    new_text = old_text.replace("pos: p_pos}", "pos: p_positive}").replace(
        "calibration: {method: none}", "calibration: {method: none, score: {metric: brier, value: 0.2}}"
    )
    old, new = load_text(tmp_path, "old.yaml", old_text), load_text(tmp_path, "new.yaml", new_text)
    changes = changes_between(old, new)
    column = changes["evidence.columns[pos]"]
    assert (column.old, column.new) == ("p_pos", "p_positive")
    assert column.new_location == position(tmp_path / "new.yaml", new_text, "columns:", "p_positive")
    score = changes["evidence.calibration.score.value"]
    assert (score.change, score.new) == ("added", "0.2")
    assert score.new_location == position(tmp_path / "new.yaml", new_text, "calibration:", "0.2")
    # the renamed column is a feature removed and one added; each points into the evidence columns of its file
    removed = next(c for c in semantic_changes(old, new) if c.what == "features" and c.change == "removed")
    assert removed.old == "p_pos"
    assert removed.old_location == position(tmp_path / "old.yaml", old_text, "columns:", "{neg")


@pytest.fixture
def packhouse_r5(tmp_path: Path) -> tuple[Path, str]:
    """Packhouse revision 5 (Gaussian evidence, a reject option with novelty) and its training data."""
    shutil.copy(R5.parent / "train.csv", tmp_path / "train.csv")
    text = R5.read_text(encoding="utf-8")
    (tmp_path / "old.yaml").write_text(text, encoding="utf-8")
    return tmp_path, text


def test_gaussian_settings_are_located_where_the_policy_states_them(packhouse_r5: tuple[Path, str]) -> None:
    folder, text = packhouse_r5
    features = "features: [firmness_n, blush_frac, mass_g, brix]"
    new_text = (
        text.replace("coverage: 0.999", "coverage: 0.99")
        .replace("shrinkage: none", "shrinkage: auto")
        .replace(features, "features: [firmness_n, blush_frac, mass_g]")
    )
    old = load_text(folder, "old.yaml", text)
    new = load_text(folder, "new.yaml", new_text)
    changes = changes_between(old, new)
    novelty = changes["reject.novelty.coverage"]
    assert (novelty.old, novelty.new) == ("0.999", "0.99")
    assert novelty.new_location == position(folder / "new.yaml", new_text, "novelty:", "0.99")
    intensity = changes["evidence.shrinkage_intensity[defect]"]
    assert intensity.old == "0" and float(intensity.new or "nan") > 0.0  # Ledoit-Wolf shrinks a sample covariance
    assert intensity.new_location == position(folder / "new.yaml", new_text, "shrinkage:", "auto")
    assert "evidence fit (class means and covariances, digest)" in changes
    (removed,) = [c for c in semantic_changes(old, new) if c.what == "features"]
    assert (removed.change, removed.old) == ("removed", "brix")
    assert removed.old_location == position(folder / "old.yaml", text, "features:", "brix")


def test_reordered_gaussian_features_point_at_the_feature_list(packhouse_r5: tuple[Path, str]) -> None:
    folder, text = packhouse_r5
    new_text = text.replace("[firmness_n, blush_frac, mass_g, brix]", "[firmness_n, mass_g, blush_frac, brix]")
    old, new = load_text(folder, "old.yaml", text), load_text(folder, "new.yaml", new_text)
    changes = changes_between(old, new)
    assert changes["features (order)"].new_location == position(folder / "new.yaml", new_text, "features:", "[")
    # the same data fitted with its columns in another order: other arrays, so another digest
    assert changes["evidence fit (class means and covariances, digest)"].change == "changed"


def test_a_renamed_training_label_is_named_apart_from_the_training_data(packhouse_r5: tuple[Path, str]) -> None:
    folder, text = packhouse_r5
    data = (folder / "train.csv").read_text(encoding="utf-8").replace(",grade\n", ",quality\n", 1)
    (folder / "relabelled.csv").write_text(data, encoding="utf-8")
    digest = hashlib.sha256(data.encode("utf-8")).hexdigest()
    new_text = (
        text.replace("data: train.csv", "data: relabelled.csv")
        .replace("label: grade", "label: quality")
        .replace("a8321964a69bebf453ef7c2836e588ec539aea1b5eafb38041dcda5dfbb45bfe", digest)
    )
    old, new = load_text(folder, "old.yaml", text), load_text(folder, "new.yaml", new_text)
    changes = changes_between(old, new)
    label = changes["evidence.training.label"]
    assert (label.old, label.new) == ("grade", "quality")
    assert label.new_location == position(folder / "new.yaml", new_text, "label:", "quality")
    assert changes["evidence.training.sha256"].new == digest
    # same numbers under another column name: the fit is the same
    assert "evidence fit (class means and covariances, digest)" not in changes


def test_a_setting_stated_on_one_side_only_is_located_on_that_side(packhouse_r5: tuple[Path, str]) -> None:
    folder, text = packhouse_r5
    without = "".join(line for line in text.splitlines(keepends=True) if not line.lstrip().startswith("novelty:"))
    with_novelty, plain = load_text(folder, "old.yaml", text), load_text(folder, "plain.yaml", without)
    # the other side states a reject option, but no novelty under it: no location there
    added = changes_between(plain, with_novelty)["reject.novelty.coverage"]
    assert (added.change, added.old_location) == ("added", None)
    assert added.new_location == position(folder / "old.yaml", text, "novelty:", "0.999")
    removed = changes_between(with_novelty, plain)["reject.novelty.coverage"]
    assert (removed.change, removed.new_location) == ("removed", None)
