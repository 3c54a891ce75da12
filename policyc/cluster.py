"""Scale-out on Dask (the ``dask`` extra): partitions run on a cluster's workers, results as in one process.

* :func:`connect` opens a client on a scheduler address, or on a ``LocalCluster`` it starts and stops.
* :class:`DaskPartitions` is a :class:`~policyc.evidence.partitions.PartitionRunner`: one task per file, and
  the merge tree of :func:`~policyc.evidence.partitions.tree_reduce` built from tasks, so the workers perform
  the same floating-point operations in the same order as one process; values kept for repeated passes
  stay in the memory of the worker that computed them.
* :func:`decide_dataframe` decides a dask DataFrame and returns one.

Only this module imports dask; the CLI imports it inside a command given ``--scheduler``.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TypeVar

import dask.dataframe as dd
import numpy as np
import pandas as pd
from distributed import Client, Future, LocalCluster, as_completed

from policyc.errors import PolicycError
from policyc.evidence.base import Progress
from policyc.evidence.partitions import KeptPartitions, Leaf, Task, tree_reduce
from policyc.runtime import InputError, Rule, shared_rule_from_bytes

__all__ = ["ClusterError", "DaskPartitions", "connect", "decide_dataframe"]

T = TypeVar("T")
S = TypeVar("S")
I = TypeVar("I")  # noqa: E741
A = TypeVar("A")
R = TypeVar("R")

CONNECT_TIMEOUT_SECONDS = 30


class ClusterError(PolicycError, RuntimeError):
    """The scheduler cannot be reached or started; the message says which address."""

    stage = "cluster"


@contextmanager
def connect(scheduler: str, workers: int | None = None) -> Iterator[Client]:
    """A client on ``scheduler`` (an address such as ``tcp://10.0.0.5:8786``), or on a local cluster of
    ``workers`` single-threaded worker processes on the loopback interface when ``scheduler == "local"``,
    stopped on exit."""
    if scheduler != "local":
        if workers is not None:
            raise ClusterError("--workers applies to --scheduler local only; a running cluster has its own workers")
        with _client(scheduler) as client:
            yield client
        return
    count = workers if workers is not None else os.cpu_count() or 1
    with _local_cluster(count) as cluster, _client(cluster) as client:
        yield client


@contextmanager
def _local_cluster(workers: int) -> Iterator[LocalCluster]:
    try:
        cluster = LocalCluster(
            n_workers=workers,
            threads_per_worker=1,  # a task already overlaps reading and arithmetic on two threads (io.read_ahead)
            processes=True,
            host="127.0.0.1",
            # the scheduler always serves HTTP (None still means port 8787, and a warning when it is taken):
            # any free port, on the loopback interface only
            dashboard_address="127.0.0.1:0",
        )
    except (OSError, RuntimeError, TimeoutError) as exc:
        raise ClusterError(f"cannot start a local Dask cluster of {workers} workers: {exc}") from None
    with cluster:
        yield cluster


@contextmanager
def _client(address: str | LocalCluster) -> Iterator[Client]:
    try:
        client = Client(address, timeout=CONNECT_TIMEOUT_SECONDS)
    except (OSError, TimeoutError, ValueError) as exc:
        raise ClusterError(f"cannot reach the Dask scheduler at {address}: {exc}") from None
    with client:
        yield client


class DaskPartitions:
    """Runs each partition as a Dask task and reports ``progress(1, total)`` as each completes (a fit's
    passes report no total).

    A worker that dies takes its running tasks with it and the scheduler runs them again elsewhere
    (up to ``distributed.scheduler.allowed-failures`` times); an error raised by a task (bad data) is not
    retried: it reaches the caller, and the remaining tasks are cancelled.
    """

    def __init__(self, client: Client, progress: Progress | None = None) -> None:
        self.client, self.progress = client, progress

    def tree_reduce(self, leaf: Leaf[T], combine: Callable[[T, T], T], files: Sequence[Path]) -> T:
        leaves = self.client.map(leaf, [str(path) for path in files], [None] * len(files), pure=False)
        root = tree_reduce(leaves, lambda first, second: self.client.submit(combine, first, second, pure=False))
        self._follow(leaves, None)  # a fit may make several passes: a running count of partitions, no total
        return root.result()

    def map(self, task: Task[S, I, T], shared: S, items: Sequence[I]) -> list[T]:
        # the shared value (the rule's bytes) goes to every worker once, not once per task
        shared_future = self.client.scatter(shared, broadcast=True, hash=False)
        futures = self.client.map(task, [shared_future] * len(items), items, [None] * len(items), pure=False)
        self._follow(futures, len(futures))
        return list(self.client.gather(futures))

    @contextmanager
    def keep(self, leaf: Leaf[T], files: Sequence[Path]) -> Iterator[KeptPartitions[T]]:
        futures = self.client.map(leaf, [str(path) for path in files], [None] * len(files), pure=False)
        try:
            self._follow(futures, len(futures))
            yield KeptOnWorkers(self.client, futures)
        finally:
            self.client.cancel(futures)  # the workers drop the values

    def _follow(self, futures: list[Future[Any]], total: int | None) -> None:
        """Wait for every task, reporting ``progress(1, total)`` per task; the first failed task's error is
        raised here and the other tasks are cancelled."""
        try:
            for future in as_completed(futures):
                future.result()
                if self.progress is not None:
                    self.progress(1, total)
        except BaseException:
            self.client.cancel(futures)
            raise


class KeptOnWorkers:
    """Partition values held by the workers that computed them (a worker lost with its values recomputes
    them elsewhere, the same bits). A pass sends each value's worker one task with a small argument and
    gathers the small results; they are merged here, in :func:`tree_reduce`'s order."""

    def __init__(self, client: Client, futures: list[Future[Any]]) -> None:
        self.client, self.futures = client, futures

    def reduce(self, task: Callable[[Any, A], R], argument: A, combine: Callable[[R, R], R]) -> R:
        count = len(self.futures)
        results = self.client.map(task, self.futures, [argument] * count, pure=False)
        return tree_reduce(self.client.gather(results), combine)


def _output_columns(rule: Rule, posteriors: bool, risks: bool, reasons: bool) -> dict[str, Any]:
    columns: dict[str, Any] = {"action": pd.StringDtype()}
    columns |= {f"posterior_{name}": np.float64 for name in rule.classes} if posteriors else {}
    columns |= {f"risk_{name}": np.float64 for name in rule.actions} if risks else {}
    columns |= {"reason": pd.StringDtype()} if reasons else {}
    return columns


def _decide_pandas(
    frame: pd.DataFrame, rule_bytes: bytes, posteriors: bool, risks: bool, reasons: bool
) -> pd.DataFrame:
    """Decide one partition (runs on a worker); the runtime selects the rule's features by name."""
    rule = shared_rule_from_bytes(rule_bytes)
    assessment = rule.assess(frame)
    if rule.invalid_input == "error" and not assessment.valid.all():
        first = int(np.flatnonzero(~assessment.valid)[0])
        raise InputError(f"row with index {frame.index[first]!r} has a missing, NaN or infinite feature value")
    out = pd.DataFrame(index=frame.index)
    out["action"] = pd.array(assessment.action_name, dtype=pd.StringDtype())
    for k, name in enumerate(rule.classes if posteriors else ()):
        out[f"posterior_{name}"] = assessment.posteriors[:, k]
    for a, name in enumerate(rule.actions if risks else ()):
        out[f"risk_{name}"] = assessment.risks[:, a]
    if reasons:
        out["reason"] = pd.array(assessment.reason, dtype=pd.StringDtype())
    return out


def decide_dataframe(
    rule: str | os.PathLike[str] | bytes,
    frame: dd.DataFrame,
    *,
    posteriors: bool = False,
    risks: bool = False,
    reasons: bool = False,
) -> dd.DataFrame:
    """Decide every row of a dask DataFrame: a DataFrame with the same index and partitions and an
    ``action`` column, plus ``posterior_<class>``, ``risk_<action>`` and ``reason`` columns on request.

    ``rule`` is an artefact path or its bytes; the bytes travel in the task graph and each worker loads
    them with the numpy-only runtime, which selects the rule's features by name (other columns ignored).
    Missing, NaN or infinite feature values are invalid input: the reject action (reason ``invalid``), or
    an :class:`~policyc.runtime.InputError` naming the row's index when the rule says ``invalid_input: error``.
    """
    rule_bytes = rule if isinstance(rule, bytes) else Path(rule).read_bytes()
    loaded = shared_rule_from_bytes(rule_bytes)  # verifies the artefact here, before any worker sees it
    missing = [name for name in loaded.features if name not in frame.columns]
    if missing:
        raise InputError(f"the data has no column(s) {missing}; the rule needs {list(loaded.features)}")
    columns = _output_columns(loaded, posteriors, risks, reasons)
    meta = pd.DataFrame({name: pd.Series(dtype=dtype) for name, dtype in columns.items()}, index=frame._meta.index)
    return frame.map_partitions(_decide_pandas, rule_bytes, posteriors, risks, reasons, meta=meta)
