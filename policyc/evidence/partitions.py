"""Statistics computed per data file (a partition) and merged by a binary tree in a fixed order.

A fit over several files computes each file's sufficient statistics on its own, then merges them pairwise,
level by level: (f0 f1) (f2 f3) (f4) -> (f0 f1 f2 f3) (f4) -> (f0 … f4). The tree depends only on the
number of files and their order (``policyc.files.data_files``), never on which process computed a leaf or
when it finished, so one process and a cluster perform the same floating-point operations in the same
order and give the same bits. How the leaves run is a :class:`PartitionRunner`: one process here, Dask
workers in ``policyc.cluster`` (the ``dask`` extra).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from contextlib import AbstractContextManager, contextmanager
from pathlib import Path
from typing import Generic, Protocol, TypeVar

import numpy as np

from policyc.evidence.base import Progress

__all__ = ["KeptHere", "KeptPartitions", "PartitionRunner", "SerialPartitions", "add_sums", "tree_reduce"]

T = TypeVar("T")
T_co = TypeVar("T_co", covariant=True)
S = TypeVar("S")
I = TypeVar("I")  # noqa: E741
A = TypeVar("A")
R = TypeVar("R")
N = TypeVar("N", np.ndarray, int)
Leaf = Callable[[str, Progress | None], T]
"""Statistics of one file: called with the file's path and a row progress callback (or None)."""
Task = Callable[[S, I, Progress | None], T]
"""Work on one partition: called with a value shared by all partitions, the partition's item and a row
progress callback (or None)."""


def tree_reduce(items: Sequence[T], combine: Callable[[T, T], T]) -> T:
    """Merge ``items`` pairwise, level by level, left to right; an odd last item moves up a level unchanged.

    ``combine`` need not be associative in floating point: the order of operations is fixed by
    ``len(items)`` alone. Depth ⌈log₂ n⌉, n - 1 combinations.
    """
    if not items:
        raise ValueError("nothing to reduce")
    level = list(items)
    while len(level) > 1:
        merged = [combine(level[i], level[i + 1]) for i in range(0, len(level) - 1, 2)]
        level = merged + level[len(merged) * 2 :]
    return level[0]


def add_sums(first: N, second: N) -> N:
    """Σ over the union = Σ over the first set + Σ over the second (arrays or numbers)."""
    return first + second


class KeptPartitions(Protocol[T_co]):
    """Each partition's value (e.g. per-row quantities), computed once and kept where it was computed, for
    passes that need the rows again and again (the EM iterations of ``policyc priors``)."""

    def reduce(self, task: Callable[[T_co, A], R], argument: A, combine: Callable[[R, R], R]) -> R:
        """``task(value, argument)`` for every partition's value, merged in :func:`tree_reduce`'s order."""
        ...


class KeptHere(Generic[T]):
    """Partition values held in this process."""

    def __init__(self, values: Sequence[T]) -> None:
        self.values = list(values)

    def reduce(self, task: Callable[[T, A], R], argument: A, combine: Callable[[R, R], R]) -> R:
        return tree_reduce([task(value, argument) for value in self.values], combine)


class PartitionRunner(Protocol):
    """Runs work on every partition: statistics merged by :func:`tree_reduce`'s tree, independent tasks, or
    values kept for repeated passes."""

    def tree_reduce(self, leaf: Leaf[T], combine: Callable[[T, T], T], files: Sequence[Path]) -> T:
        """The leaves' results merged in :func:`tree_reduce`'s order."""
        ...

    def map(self, task: Task[S, I, T], shared: S, items: Sequence[I]) -> list[T]:
        """``task(shared, item, progress)`` for every item, results in the items' order."""
        ...

    def keep(self, leaf: Leaf[T], files: Sequence[Path]) -> AbstractContextManager[KeptPartitions[T]]:
        """Every file's leaf value, kept (in the memory of whoever computed it) until the context ends."""
        ...


class SerialPartitions:
    """Every file in this process, one after another; progress counts rows against ``expected_rows`` per pass
    over the data, naming the pass (``"pass 1 of 2"``) when there are ``passes`` > 1."""

    def __init__(self, progress: Progress | None = None, expected_rows: int | None = None, passes: int = 1) -> None:
        self.progress, self.expected_rows, self.passes = progress, expected_rows, passes
        self.passes_begun = 0

    def tree_reduce(self, leaf: Leaf[T], combine: Callable[[T, T], T], files: Sequence[Path]) -> T:
        report = self._next_pass()
        return tree_reduce([leaf(str(path), report) for path in files], combine)

    def map(self, task: Task[S, I, T], shared: S, items: Sequence[I]) -> list[T]:
        report = self._next_pass()
        return [task(shared, item, report) for item in items]

    @contextmanager
    def keep(self, leaf: Leaf[T], files: Sequence[Path]) -> Iterator[KeptPartitions[T]]:
        report = self._next_pass()
        yield KeptHere([leaf(str(path), report) for path in files])

    def _next_pass(self) -> Progress | None:
        """A progress callback for the next pass over the data, or None without a display."""
        self.passes_begun += 1
        progress, expected = self.progress, self.expected_rows
        if progress is None:
            return None
        this_pass = f"pass {self.passes_begun} of {self.passes}" if self.passes > 1 else ""

        def report(rows: int, total: int | None, stage: str = "") -> None:
            progress(rows, expected, this_pass)  # a leaf knows neither the total of all files nor the pass

        return report
