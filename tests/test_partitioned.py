"""Decide over a directory or glob in one process: one output per input file, same names, atomically."""

from __future__ import annotations

import json
from dataclasses import astuple
from pathlib import Path

import numpy as np
import pyarrow.csv as pacsv
import pytest
from click.testing import CliRunner
from helpers import iris_posterior_policy_text, wine_policy_text, write_iris_posteriors, write_partitions
from sklearn.datasets import load_wine

from policyc.cli import main
from policyc.compiler import write_artefact
from policyc.compiler.build import compile_policy
from policyc.evidence.io import DataError
from policyc.partitioned import plan_partitions
from policyc.review.evaluate.evaluation import evaluate
from policyc.review.priors import estimate_priors
from policyc.review.shared.loading import load_rule_or_policy
from policyc.runtime import load_rule


@pytest.fixture(scope="module")
def wine_rule(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, np.ndarray]:
    # UCI wine data (Forina et al., PARVUS) shipped with scikit-learn
    X, y = load_wine(return_X_y=True)
    directory = tmp_path_factory.mktemp("wine")
    write_partitions(directory / "train", X, [f"c{k}" for k in y], 3)
    (directory / "policy.yaml").write_text(wine_policy_text("train"), encoding="utf-8")
    write_artefact(compile_policy(directory / "policy.yaml").rule, directory / "wine.rule")
    return directory / "wine.rule", X


def test_a_directory_is_decided_file_by_file(wine_rule: tuple[Path, np.ndarray], tmp_path: Path) -> None:
    rule_file, X = wine_rule
    write_partitions(tmp_path / "in" / "2026", X, ["c0"] * len(X), 4, ".csv")
    (tmp_path / "in" / "2026" / ".part-00.csv.x1.partial").write_text("a stale temporary")
    (tmp_path / "out" / "2026").mkdir(parents=True)
    (tmp_path / "out" / "2026" / ".part-01.csv.x2.partial").write_text("left by a killed worker")
    result = CliRunner().invoke(main, ["decide", str(rule_file), str(tmp_path / "in"), "-o", str(tmp_path / "out")])
    assert result.exit_code == 0, result.output
    written = sorted(p.relative_to(tmp_path / "out").as_posix() for p in (tmp_path / "out").rglob("*"))
    assert written == ["2026", *(f"2026/part-{i:02d}.csv" for i in range(4))]
    actions = np.concatenate(
        [pacsv.read_csv(tmp_path / "out" / "2026" / f"part-{i:02d}.csv")["action"].to_numpy() for i in range(4)]
    )
    np.testing.assert_array_equal(actions, load_rule(rule_file).decide_names(X))


def test_a_glob_is_decided_into_a_directory(wine_rule: tuple[Path, np.ndarray], tmp_path: Path) -> None:
    rule_file, X = wine_rule
    write_partitions(tmp_path / "in", X, ["c0"] * len(X), 3)
    pattern = str(tmp_path / "in" / "part-0[02].parquet")
    result = CliRunner().invoke(main, ["decide", str(rule_file), pattern, "-o", str(tmp_path / "out")])
    assert result.exit_code == 0, result.output
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["part-00.parquet", "part-02.parquet"]


def test_outputs_never_land_among_the_inputs(tmp_path: Path) -> None:
    (tmp_path / "in").mkdir()
    (tmp_path / "in" / "a.csv").write_text("f0\n1\n")
    with pytest.raises(DataError, match="inside the input directory"):
        plan_partitions(tmp_path / "in", tmp_path / "in" / "out")
    with pytest.raises(DataError, match="would replace an input"):
        plan_partitions(tmp_path / "in" / "*.csv", tmp_path / "in")
    (tmp_path / "taken").write_text("a file")
    with pytest.raises(DataError, match="must be a directory"):
        plan_partitions(tmp_path / "in", tmp_path / "taken")


def test_a_bad_file_in_a_directory_is_named_by_the_cli(wine_rule: tuple[Path, np.ndarray], tmp_path: Path) -> None:
    rule_file, X = wine_rule
    write_partitions(tmp_path / "in", X, ["c0"] * len(X), 3)
    (tmp_path / "in" / "part-01.parquet").write_bytes(b"PAR1 truncated")
    result = CliRunner().invoke(main, ["decide", str(rule_file), str(tmp_path / "in"), "-o", str(tmp_path / "out")])
    assert result.exit_code == 1
    assert f"{tmp_path / 'in' / 'part-01.parquet'}: cannot read as Parquet" in result.output
    assert "Traceback" not in result.output


def test_priors_over_a_directory_equal_priors_over_the_one_file(
    wine_rule: tuple[Path, np.ndarray], tmp_path: Path
) -> None:
    rule_file, X = wine_rule
    write_partitions(tmp_path / "whole", X, ["?"] * len(X), 1)
    write_partitions(tmp_path / "parts", X, ["?"] * len(X), 5, ".csv")
    rule = load_rule(rule_file)
    whole = estimate_priors(rule, tmp_path / "whole" / "part-00.parquet")
    parts = estimate_priors(rule, tmp_path / "parts")
    # The same rows: each EM step's sums differ only by rounding (per-file sums merged in a tree, against one
    # column sum), about 1e-16 relative; EM contracts towards its fixed point, so the estimates stay within a
    # few ulps unless the stop falls one step apart, which moves them by less than the 1e-10 stopping tolerance.
    np.testing.assert_allclose(parts.priors, whole.priors, rtol=0, atol=1e-9)
    np.testing.assert_allclose(parts.low, whole.low, rtol=0, atol=1e-9)
    np.testing.assert_allclose(parts.high, whole.high, rtol=0, atol=1e-9)
    assert parts.rows == whole.rows == len(X)
    assert parts.change_statistic == pytest.approx(whole.change_statistic, rel=1e-9)
    result = CliRunner().invoke(main, ["priors", str(rule_file), str(tmp_path / "parts"), "--format", "json"])
    assert result.exit_code == 0, result.output
    assert json.loads(result.output)["rows"] == len(X)


@pytest.fixture(scope="module")
def iris_rule(tmp_path_factory: pytest.TempPathFactory) -> Path:
    directory = tmp_path_factory.mktemp("iris")
    (directory / "policy.yaml").write_text(iris_posterior_policy_text(), encoding="utf-8")
    write_artefact(compile_policy(directory / "policy.yaml").rule, directory / "iris.rule")
    return directory / "iris.rule"


def test_evaluate_over_a_directory_equals_evaluate_over_the_one_file(iris_rule: Path, tmp_path: Path) -> None:
    whole = write_iris_posteriors(tmp_path / "whole", 1)[0]
    write_iris_posteriors(tmp_path / "parts", 4)
    loaded = load_rule_or_policy(iris_rule)
    single = evaluate(loaded, whole, "label")
    parts = evaluate(loaded, tmp_path / "parts", "label")
    # counts do not depend on the split, so neither does the bootstrap drawn from them with the same seed
    np.testing.assert_array_equal(parts.confusion, single.confusion)
    assert (parts.invalid_rows, parts.deferred) == (single.invalid_rows, single.deferred)
    assert parts.risk == single.risk
    assert parts.limits == single.limits
    # sums of losses and probabilities over 150 rows, per file then merged: rounding, far below 1e-12
    single_curve, parts_curve = ([astuple(p) for p in e.curve] for e in (single, parts))
    np.testing.assert_allclose(np.array(parts_curve, dtype=float), np.array(single_curve, dtype=float), rtol=1e-12)
    assert single.calibration is not None and parts.calibration is not None
    np.testing.assert_allclose(parts.calibration.ece, single.calibration.ece, rtol=1e-12, atol=1e-14)
    for part_table, whole_table in zip(parts.calibration.tables, single.calibration.tables, strict=True):
        part_bins, whole_bins = (np.array([astuple(b) for b in t]) for t in (part_table, whole_table))
        np.testing.assert_allclose(part_bins, whole_bins, rtol=1e-12)


def test_evaluate_and_priors_name_the_bad_file_of_a_directory(iris_rule: Path, tmp_path: Path) -> None:
    paths = write_iris_posteriors(tmp_path / "csv", 3)
    lines = paths[1].read_text().splitlines()
    lines[2] = lines[2].replace('"c1"', '"c7"')  # data row 2 of the second file
    paths[1].write_text("\n".join(lines) + "\n")
    result = CliRunner().invoke(main, ["evaluate", str(iris_rule), str(tmp_path / "csv"), "--label", "label"])
    assert result.exit_code == 1
    assert f"{paths[1]}: column 'label', row 2: label 'c7' is not a class" in result.output
    paths = write_iris_posteriors(tmp_path / "parquet", 3, ".parquet")
    paths[2].write_bytes(b"PAR1 truncated")
    evaluation = ["evaluate", str(iris_rule), str(tmp_path / "parquet"), "--label", "label"]
    for arguments in (evaluation, ["priors", str(iris_rule), str(tmp_path / "parquet")]):
        result = CliRunner().invoke(main, arguments)
        assert result.exit_code == 1
        assert f"{paths[2]}: cannot read as Parquet" in result.output
        assert "Traceback" not in result.output


def test_a_missing_value_in_one_file_is_refused_as_in_a_single_file(iris_rule: Path, tmp_path: Path) -> None:
    paths = write_iris_posteriors(tmp_path / "in", 3)
    lines = paths[2].read_text().splitlines()
    lines[4] = "," + lines[4].split(",", 1)[1]  # data row 4, an empty f0 cell
    paths[2].write_text("\n".join(lines) + "\n")
    single = CliRunner().invoke(main, ["evaluate", str(iris_rule), str(paths[2]), "--label", "label"])
    spread = CliRunner().invoke(main, ["evaluate", str(iris_rule), str(tmp_path / "in"), "--label", "label"])
    assert single.exit_code == spread.exit_code == 1
    assert f"{paths[2]}: " in spread.output and "row 4" in spread.output
    assert spread.output == single.output
    for data in (paths[2], tmp_path / "in"):
        result = CliRunner().invoke(main, ["priors", str(iris_rule), str(data)])
        assert result.exit_code == 1 and spread.output == result.output
