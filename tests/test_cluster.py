"""Scale-out on a Dask cluster of our own: two worker processes on the loopback interface, shared by the module.

The cluster must give what one process gives: the same fitted parameters (bit for bit, which is more than the
1e-12 the contract asks) and the same decisions, file by file.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import astuple
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner
from helpers import iris_posterior_policy_text, wine_policy_text, write_iris_posteriors, write_partitions
from sklearn.datasets import load_wine

from policyc.cli import main
from policyc.compiler import write_artefact
from policyc.compiler.artefact import artefact_bytes
from policyc.compiler.build import compile_policy
from policyc.evidence.io import DataError
from policyc.language.diagnostics import CompileError
from policyc.partitioned import DecideSettings, decide_partitions, plan_partitions
from policyc.render import dumps
from policyc.review.evaluate.evaluation import Evaluation, evaluate
from policyc.review.priors import estimate_priors
from policyc.review.shared.loading import load_rule_or_policy
from policyc.runtime import InputError, load_rule, rule_from_bytes

dd = pytest.importorskip("dask.dataframe")
distributed = pytest.importorskip("distributed")
pd = pytest.importorskip("pandas")

from policyc.cluster import ClusterError, DaskPartitions, connect, decide_dataframe  # noqa: E402


@pytest.fixture(scope="module")
def client() -> Iterator[distributed.Client]:
    with (
        distributed.LocalCluster(
            n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address="127.0.0.1:0"
        ) as cluster,
        distributed.Client(cluster) as client,
    ):
        yield client


@pytest.fixture(scope="module")
def wine_files(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, np.ndarray]:
    # UCI wine data (Forina et al., PARVUS) shipped with scikit-learn: 178 rows, 13 features, 3 classes
    X, y = load_wine(return_X_y=True)
    directory = tmp_path_factory.mktemp("wine")
    write_partitions(directory / "train", X, [f"c{k}" for k in y], 9)
    (directory / "policy.yaml").write_text(wine_policy_text("train"), encoding="utf-8")
    return directory, X


def test_the_cluster_fit_equals_the_single_process_fit(
    client: distributed.Client, wine_files: tuple[Path, np.ndarray]
) -> None:
    directory, X = wine_files
    single = compile_policy(directory / "policy.yaml").rule
    seen: list[int | None] = []
    spread = compile_policy(directory / "policy.yaml", partitions=DaskPartitions(client, lambda n, t: seen.append(t)))
    for name, array in single.params.items():
        # the same tree of merges in the same order: identical bits (the contract asks 1e-12 relative)
        np.testing.assert_array_equal(spread.rule.params[name], array, err_msg=name)
    np.testing.assert_array_equal(spread.rule.decide(X), single.decide(X))
    assert spread.rule.manifest == single.manifest
    # Ledoit-Wolf reads the 9 files twice; progress counts partitions as they complete
    assert seen == [None] * 18


def test_a_fit_problem_on_a_worker_is_located_in_the_policy(
    client: distributed.Client, wine_files: tuple[Path, np.ndarray], tmp_path: Path
) -> None:
    _, X = wine_files
    labels = ["c0", "c1", "c2"] * (len(X) // 3) + ["c0"] * (len(X) % 3)
    labels[100] = "c9"
    paths = write_partitions(tmp_path / "train", X, labels, 4)
    (tmp_path / "policy.yaml").write_text(wine_policy_text("train"), encoding="utf-8")
    with pytest.raises(CompileError) as caught:
        compile_policy(tmp_path / "policy.yaml", partitions=DaskPartitions(client))
    # row 100 (0-based) is data row 11 of the third file (45 + 45 rows before it)
    assert caught.value.codes == ["unknown-label"]
    assert f"{paths[2]}: column 'label', row 11: label 'c9' is not a class" in str(caught.value)


@pytest.fixture(scope="module")
def rule_file(wine_files: tuple[Path, np.ndarray]) -> Path:
    directory, _ = wine_files
    path = directory / "wine.rule"
    write_artefact(compile_policy(directory / "policy.yaml").rule, path)
    return path


def decide_in_one_process(rule_file: Path, data: Path, out: Path) -> dict[str, int]:
    settings = DecideSettings(rule_file.read_bytes(), str(rule_file), explain=True)
    return decide_partitions(settings, plan_partitions(data, out))


def test_decide_on_the_cluster_writes_what_one_process_writes(
    client: distributed.Client, wine_files: tuple[Path, np.ndarray], rule_file: Path, tmp_path: Path
) -> None:
    directory, _ = wine_files
    expected = decide_in_one_process(rule_file, directory / "train", tmp_path / "one")
    settings = DecideSettings(rule_file.read_bytes(), str(rule_file), explain=True)
    plan = plan_partitions(directory / "train", tmp_path / "many")
    counts = decide_partitions(settings, plan, DaskPartitions(client))
    assert counts == expected
    names = sorted(p.name for p in (tmp_path / "one").iterdir())
    assert names == sorted(p.name for p in (directory / "train").iterdir())
    assert sorted(p.name for p in (tmp_path / "many").iterdir()) == names
    for name in names:
        assert pq.read_table(tmp_path / "many" / name).equals(pq.read_table(tmp_path / "one" / name)), name


def test_the_cli_runs_compile_and_decide_on_a_scheduler(
    client: distributed.Client, wine_files: tuple[Path, np.ndarray], rule_file: Path, tmp_path: Path
) -> None:
    directory, _ = wine_files
    address = client.scheduler_info()["address"]
    compiled = CliRunner().invoke(
        main, ["compile", str(directory / "policy.yaml"), "-o", str(tmp_path / "r.rule"), "--scheduler", address]
    )
    assert compiled.exit_code == 0, compiled.output
    assert (tmp_path / "r.rule").read_bytes() == rule_file.read_bytes()
    decided = CliRunner().invoke(
        main, ["decide", str(rule_file), str(directory / "train"), "-o", str(tmp_path / "out"), "--scheduler", address]
    )
    assert decided.exit_code == 0, decided.output
    assert decided.output.startswith("178 rows ->")
    assert len(list((tmp_path / "out").iterdir())) == 9


def test_priors_on_the_cluster_equal_priors_in_one_process(
    client: distributed.Client, wine_files: tuple[Path, np.ndarray], rule_file: Path
) -> None:
    directory, _ = wine_files
    rule = load_rule(rule_file)
    single = estimate_priors(rule, directory / "train")
    seen: list[int | None] = []
    spread = estimate_priors(rule, directory / "train", partitions=DaskPartitions(client, lambda n, t: seen.append(t)))
    # each EM step sums per file and merges the 9 sums in the same tree: identical bits (the contract asks 1e-9)
    for field in ("priors", "low", "high"):
        np.testing.assert_array_equal(getattr(spread, field), getattr(single, field), err_msg=field)
    assert (spread.iterations, spread.change_statistic, spread.rows) == (
        single.iterations,
        single.change_statistic,
        single.rows,
    )
    assert seen == [9] * 9  # the ratios are computed once, one task per file
    # the ratios kept on the workers are released once the estimate is made (the scheduler tells them soon after)
    deadline = time.monotonic() + 10
    while any(client.run(lambda dask_worker: len(dask_worker.data)).values()) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert not any(client.run(lambda dask_worker: len(dask_worker.data)).values())


def unrounded(evaluation: Evaluation) -> np.ndarray:
    """Every number of the curve and the calibration, as the rounded JSON does not show them."""
    assert evaluation.calibration is not None
    bins = [astuple(b) for table in evaluation.calibration.tables for b in table]
    rows = [*(astuple(point) for point in evaluation.curve), *bins, evaluation.calibration.ece]
    return np.concatenate([np.array(row, dtype=float) for row in rows])


def test_evaluate_on_the_cluster_equals_evaluate_in_one_process(client: distributed.Client, tmp_path: Path) -> None:
    (tmp_path / "policy.yaml").write_text(iris_posterior_policy_text(), encoding="utf-8")
    write_iris_posteriors(tmp_path / "labelled", 5, ".parquet")
    loaded = load_rule_or_policy(tmp_path / "policy.yaml")
    single = evaluate(loaded, tmp_path / "labelled", "label")
    spread = evaluate(loaded, tmp_path / "labelled", "label", partitions=DaskPartitions(client))
    # the same tallies merged in the same tree: the whole report, curve and calibration included, is identical
    assert dumps(spread) == dumps(single)
    np.testing.assert_array_equal(unrounded(spread), unrounded(single))  # NaN where no row is accepted
    np.testing.assert_array_equal(spread.confusion, single.confusion)


def test_the_cli_runs_evaluate_and_priors_on_a_scheduler(
    client: distributed.Client, wine_files: tuple[Path, np.ndarray], rule_file: Path
) -> None:
    directory, _ = wine_files
    address = client.scheduler_info()["address"]
    for command in (
        ["evaluate", str(rule_file), str(directory / "train"), "--label", "label", "--format", "json"],
        ["priors", str(rule_file), str(directory / "train" / "part-0[1-7].parquet"), "--format", "json"],
    ):
        single = CliRunner().invoke(main, command)
        spread = CliRunner().invoke(main, [*command, "--scheduler", address])
        assert single.exit_code == spread.exit_code == 0, spread.output
        assert spread.output == single.output


def test_a_bad_file_on_a_worker_is_named_by_evaluate_and_priors(
    client: distributed.Client, wine_files: tuple[Path, np.ndarray], rule_file: Path, tmp_path: Path
) -> None:
    _, X = wine_files
    paths = write_partitions(tmp_path / "data", X, ["c0"] * len(X), 4)
    paths[3].write_bytes(b"PAR1 truncated")
    rule = load_rule(rule_file)
    with pytest.raises(DataError, match=rf"{paths[3]}: cannot read as Parquet"):
        estimate_priors(rule, tmp_path / "data", partitions=DaskPartitions(client))
    with pytest.raises(DataError, match=rf"{paths[3]}: cannot read as Parquet"):
        evaluate(load_rule_or_policy(rule_file), tmp_path / "data", "label", partitions=DaskPartitions(client))


def test_workers_need_a_local_scheduler(tmp_path: Path) -> None:
    result = CliRunner().invoke(main, ["compile", "p.yaml", "-o", "r.rule", "--workers", "2"])
    assert result.exit_code == 2
    assert "--workers needs --scheduler local" in result.output
    with pytest.raises(ClusterError, match="applies to --scheduler local only"), connect("tcp://127.0.0.1:1", 2):
        pass


def test_an_unreachable_scheduler_is_a_clear_error(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("policyc.cluster.CONNECT_TIMEOUT_SECONDS", 1)
    with (
        pytest.raises(ClusterError, match=r"cannot reach the Dask scheduler at tcp://127\.0\.0\.1:9"),
        connect("tcp://127.0.0.1:9"),
    ):
        pass


def test_a_bad_row_on_a_worker_names_its_file_and_row(
    client: distributed.Client, wine_files: tuple[Path, np.ndarray], tmp_path: Path
) -> None:
    directory, X = wine_files
    write_partitions(tmp_path / "data", X, ["c0"] * len(X), 4, ".csv")
    bad = tmp_path / "data" / "part-02.csv"
    lines = bad.read_text().splitlines()
    lines[3] = lines[3].replace(",", ",oops", 1)  # data row 3, second feature
    bad.write_text("\n".join(lines) + "\n")
    rule_path = tmp_path / "r.rule"
    write_artefact(compile_policy(directory / "policy.yaml").rule, rule_path)
    settings = DecideSettings(rule_path.read_bytes(), str(rule_path))
    with pytest.raises(DataError, match=rf"{bad}: column 'f1', row 3: 'oops.*' is not a number"):
        decide_partitions(settings, plan_partitions(tmp_path / "data", tmp_path / "out"), DaskPartitions(client))
    assert not (tmp_path / "out" / "part-02.csv").exists()


def test_a_dask_dataframe_is_decided_by_feature_name(
    client: distributed.Client, wine_files: tuple[Path, np.ndarray]
) -> None:
    directory, X = wine_files
    (directory / "rejecting.yaml").write_text(wine_policy_text("train", invalid_input="reject"), encoding="utf-8")
    rule_bytes = artefact_bytes(compile_policy(directory / "rejecting.yaml").rule)
    rule = rule_from_bytes(rule_bytes)
    X = X.copy()
    X[7, 5] = np.nan  # invalid input: the reject action, reason "invalid"
    frame = pd.DataFrame({f"f{j}": X[:, j] for j in reversed(range(X.shape[1]))} | {"note": "extra column"})
    decided = decide_dataframe(
        rule_bytes, dd.from_pandas(frame, npartitions=4), posteriors=True, risks=True, reasons=True
    ).compute()
    assert list(decided["action"]) == list(rule.decide_names(X))
    assert list(decided["reason"]) == list(rule.explain(X).reason)
    assert decided["reason"][7] == "invalid" and decided["action"][7] == "reject"
    np.testing.assert_array_equal(decided[[f"posterior_c{k}" for k in range(3)]].to_numpy(), rule.posteriors(X))
    np.testing.assert_array_equal(decided[[f"risk_{a}" for a in rule.actions]].to_numpy(), rule.risks(X))
    with pytest.raises(InputError, match=r"no column\(s\) \['f3'\]"):
        decide_dataframe(rule_bytes, dd.from_pandas(frame.drop(columns="f3"), npartitions=2))


def test_a_missing_value_in_a_dataframe_is_invalid_input(
    client: distributed.Client, wine_files: tuple[Path, np.ndarray], rule_file: Path
) -> None:
    _, X = wine_files
    frame = pd.DataFrame({f"f{j}": pd.array(X[:6, j], dtype="Float64") for j in range(X.shape[1])})
    frame.loc[4, "f2"] = pd.NA
    # the wine policy says invalid_input: error (tests/helpers.py), so the row is refused by its index
    with pytest.raises(InputError, match="row with index 4"):
        decide_dataframe(rule_file, dd.from_pandas(frame, npartitions=2)).compute()


def test_nothing_outside_the_dask_extra_imports_dask() -> None:
    modules = "policyc.cli, policyc.compiler, policyc.runtime, policyc.partitioned"
    script = f"import sys, {modules}; print(sorted(sys.modules))"
    loaded = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True).stdout
    assert "'dask'" not in loaded and "'distributed'" not in loaded


def test_a_worker_killed_while_deciding_does_not_lose_or_repeat_a_partition(
    client: distributed.Client, rule_file: Path, tmp_path: Path
) -> None:
    # Last in the module: it kills one of the shared cluster's workers (its nanny starts a new one).
    rng = np.random.default_rng(14)
    X = rng.normal(size=(240_000, 13)) * 20 + 50
    write_partitions(tmp_path / "data", X, ["c0"] * len(X), 12)
    expected = decide_in_one_process(rule_file, tmp_path / "data", tmp_path / "one")
    killed: list[int] = []

    def kill_a_busy_worker(rows: int, total: int | None) -> None:
        if killed:
            return
        busy = [worker for worker, keys in client.processing().items() if keys]
        pids = client.run(os.getpid, workers=busy[:1])
        killed.extend(pids.values())
        for pid in pids.values():
            os.kill(pid, signal.SIGKILL)

    settings = DecideSettings(rule_file.read_bytes(), str(rule_file), explain=True)
    plan = plan_partitions(tmp_path / "data", tmp_path / "many")
    counts = decide_partitions(settings, plan, DaskPartitions(client, kill_a_busy_worker))
    assert len(killed) == 1
    assert counts == expected
    written = sorted(p.name for p in (tmp_path / "many").iterdir())
    assert written == sorted(p.name for p in (tmp_path / "one").iterdir())  # no leftover temporary, no extra file
    for name in written:
        assert pq.read_table(tmp_path / "many" / name).equals(pq.read_table(tmp_path / "one" / name)), name
