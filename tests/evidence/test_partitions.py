"""Training data in several files: the fixed merge tree, and fits equal to one file's within 1e-12."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
from helpers import compile_text, wine_policy_text, write_partitions
from hypothesis import given
from hypothesis import strategies as st
from sklearn.datasets import load_wine

from policyc.evidence.partitions import SerialPartitions, tree_reduce
from policyc.files import DataFilesError, data_files, data_sha256
from policyc.language.diagnostics import CompileError


def test_the_tree_pairs_neighbours_level_by_level() -> None:
    def bracket(a: str, b: str) -> str:
        return f"({a}{b})"

    assert tree_reduce(list("abcde"), bracket) == "(((ab)(cd))e)"
    assert tree_reduce(list("abcdef"), bracket) == "(((ab)(cd))(ef))"
    assert tree_reduce(["a"], bracket) == "a"
    with pytest.raises(ValueError, match="nothing"):
        tree_reduce([], bracket)


def test_kept_values_are_computed_once_and_each_pass_merges_in_the_tree(tmp_path: Path) -> None:
    paths = [tmp_path / name for name in "abcde"]
    computed: list[str] = []

    def leaf(path: str, progress: object) -> str:
        computed.append(path)
        return Path(path).name

    with SerialPartitions().keep(leaf, paths) as kept:
        first = kept.reduce(lambda value, tag: f"{value}{tag}", "1", lambda a, b: f"({a}{b})")
        second = kept.reduce(lambda value, tag: f"{value}{tag}", "2", lambda a, b: f"({a}{b})")
    assert computed == [str(path) for path in paths]  # one read of each file for both passes
    assert (first, second) == ("(((a1b1)(c1d1))e1)", "(((a2b2)(c2d2))e2)")


@given(st.lists(st.integers(-(10**6), 10**6), min_size=1, max_size=40))
def test_the_tree_combines_every_item_once(values: list[int]) -> None:
    assert tree_reduce(values, lambda a, b: a + b) == sum(values)


@pytest.fixture(scope="module")
def wine() -> tuple[np.ndarray, list[str]]:
    # UCI wine data (Forina et al., PARVUS) shipped with scikit-learn: 178 rows, 13 features, 3 classes
    X, y = load_wine(return_X_y=True)
    return X, [f"c{k}" for k in y]


def relative_difference(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.linalg.norm(a - b) / np.linalg.norm(b))


@pytest.mark.parametrize(("covariance", "shrinkage"), [("full", "auto"), ("tied", "auto"), ("diagonal", "none")])
@pytest.mark.parametrize("suffix", [".parquet", ".csv"])
def test_a_directory_of_files_fits_as_one_file(
    tmp_path: Path, wine: tuple[np.ndarray, list[str]], covariance: str, shrinkage: str, suffix: str
) -> None:
    X, labels = wine
    write_partitions(tmp_path / "whole", X, labels, 1, suffix)
    write_partitions(tmp_path / "parts", X, labels, 7, suffix)
    whole = compile_text(tmp_path, wine_policy_text(f"whole/part-00{suffix}", shrinkage, covariance), "a.yaml").rule
    parts = compile_text(tmp_path, wine_policy_text("parts", shrinkage, covariance), "b.yaml").rule
    for name, array in whole.params.items():
        # the merge order differs (batches of one file vs a tree of files): rounding only, far below 1e-12
        assert relative_difference(parts.params[name], array) <= 1e-12, name
    np.testing.assert_array_equal(parts.decide(X), whole.decide(X))


def test_a_glob_fits_the_files_it_matches(tmp_path: Path, wine: tuple[np.ndarray, list[str]]) -> None:
    X, labels = wine
    write_partitions(tmp_path / "parts", X, labels, 4)
    by_directory = compile_text(tmp_path, wine_policy_text("parts"), "a.yaml").rule
    by_glob = compile_text(tmp_path, wine_policy_text("parts/part-*.parquet"), "b.yaml").rule
    for name, array in by_directory.params.items():
        np.testing.assert_array_equal(by_glob.params[name], array)


def test_a_bad_file_in_a_directory_is_named(tmp_path: Path, wine: tuple[np.ndarray, list[str]]) -> None:
    X, labels = wine
    write_partitions(tmp_path / "parts", X, labels, 3, ".csv")
    bad = tmp_path / "parts" / "part-01.csv"
    lines = bad.read_text().splitlines()
    lines[5] = "x" + lines[5]  # data row 5: the first feature is not a number
    bad.write_text("\n".join(lines) + "\n")
    with pytest.raises(CompileError) as caught:
        compile_text(tmp_path, wine_policy_text("parts"))
    assert caught.value.codes == ["training-data-unusable"]
    assert f"{bad}: column 'f0', row 5" in str(caught.value)


def test_a_corrupt_parquet_file_is_named(tmp_path: Path, wine: tuple[np.ndarray, list[str]]) -> None:
    X, labels = wine
    write_partitions(tmp_path / "parts", X, labels, 3)
    bad = tmp_path / "parts" / "part-02.parquet"
    bad.write_bytes(b"not parquet at all")
    with pytest.raises(CompileError) as caught:
        compile_text(tmp_path, wine_policy_text("parts"))
    assert caught.value.codes == ["training-data-unusable"]
    assert f"{bad}: cannot read as Parquet" in str(caught.value)


def test_files_come_in_relative_path_order_and_hidden_ones_are_skipped(tmp_path: Path) -> None:
    for name in ["b.csv", "a/z.parquet", "a.csv", ".a.csv.1234.partial", "_SUCCESS", "_tmp/x.csv"]:
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_text("x\n")
    assert [p.relative_to(tmp_path).as_posix() for p in data_files(tmp_path)] == ["a.csv", "a/z.parquet", "b.csv"]
    assert [p.name for p in data_files(tmp_path / "*.csv")] == ["a.csv", "b.csv"]


@pytest.mark.parametrize(
    ("layout", "spec", "message"),
    [
        ({"d/notes.md": "x"}, "d", "not a data file"),
        ({"d/_SUCCESS": ""}, "d", "holds no data files"),
        ({}, "*.parquet", "no file matches"),
        ({}, "nowhere", "no such file or directory"),
    ],
)
def test_unusable_data_paths_are_refused(tmp_path: Path, layout: dict[str, str], spec: str, message: str) -> None:
    for name, text in layout.items():
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_text(text)
    with pytest.raises(DataFilesError, match=message):
        data_files(tmp_path / spec)


def test_the_digest_of_several_files_changes_with_a_name_or_a_byte(tmp_path: Path) -> None:
    for name in ["a.csv", "b.csv"]:
        (tmp_path / "d" / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / "d" / name).write_text(f"{name}\n")
    before = data_sha256(data_files(tmp_path / "d"))
    shutil.copytree(tmp_path / "d", tmp_path / "e")
    assert data_sha256(data_files(tmp_path / "e")) == before  # the folder's own name is not part of it
    (tmp_path / "e" / "b.csv").rename(tmp_path / "e" / "c.csv")
    assert data_sha256(data_files(tmp_path / "e")) != before
    (tmp_path / "d" / "b.csv").write_text("b.csv \n")
    assert data_sha256(data_files(tmp_path / "d")) != before
