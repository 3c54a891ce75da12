"""Decide over a directory or glob in one process: one output per input file, same names, atomically."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow.csv as pacsv
import pytest
from click.testing import CliRunner
from helpers import wine_policy_text, write_partitions
from sklearn.datasets import load_wine

from policyc.cli import main
from policyc.compiler import write_artefact
from policyc.compiler.build import compile_policy
from policyc.evidence.io import DataError
from policyc.partitioned import plan_partitions
from policyc.review.priors import estimate_priors
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
    # the same rows in the same order: EM performs the same operations (the contract asks 1e-9)
    np.testing.assert_array_equal(parts.priors, whole.priors)
    assert parts.iterations == whole.iterations
    result = CliRunner().invoke(main, ["priors", str(rule_file), str(tmp_path / "parts"), "--format", "json"])
    assert result.exit_code == 0, result.output
