"""Decide over partitioned data: one output file per input file, under the same relative name, each atomic.

The rule travels as its artefact bytes and every partition loads it with the numpy-only runtime
(:func:`policyc.runtime.rule_from_bytes`), so a worker process needs no compiler and receives no pickled
object of ours. Partitions run through a :class:`~policyc.evidence.partitions.PartitionRunner`: this
process by default, Dask workers with ``policyc.cluster``. An output file appears only complete
(:func:`policyc.files.atomic_path`); a partition that runs twice (its worker died after writing) writes the
same bytes under the same name again, so the output directory never holds a partial or duplicated partition.
"""

from __future__ import annotations

import glob
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from policyc.batch import DecisionCounts, decide_file
from policyc.evidence.base import Progress
from policyc.evidence.io import DataError, data_file_list, expected_rows
from policyc.evidence.partitions import PartitionRunner, SerialPartitions
from policyc.runtime import shared_rule_from_bytes

__all__ = ["DecideSettings", "Partition", "decide_partition", "decide_partitions", "plan_partitions"]


@dataclass(frozen=True)
class Partition:
    """One input file and the output file it becomes."""

    data: str
    output: str


@dataclass(frozen=True)
class DecideSettings:
    """What every partition shares: the rule as artefact bytes and the output options."""

    rule_bytes: bytes
    rule_origin: str
    explain: bool = False


def plan_partitions(data: Path, out_dir: Path) -> list[Partition]:
    """Pair each input file of ``data`` (a file, directory or glob) with ``out_dir`` / its relative name.

    Refuses an output directory inside a directory input (a second run would read its own outputs) and
    an output that would replace an input.
    """
    files = data_file_list(data)
    if out_dir.exists() and not out_dir.is_dir():
        raise DataError(f"{out_dir}: the output must be a directory (one file per input partition)")
    base = data if data.is_dir() else files[0].parent
    if data.is_dir() and out_dir.resolve().is_relative_to(data.resolve()):
        raise DataError(f"{out_dir}: the output directory lies inside the input directory {data}; choose another")
    partitions = [Partition(str(path), str(out_dir / path.relative_to(base))) for path in files]
    inputs = {path.resolve() for path in files}
    for partition in partitions:
        if Path(partition.output).resolve() in inputs:
            raise DataError(f"{partition.output}: the output would replace an input file; choose another directory")
    return partitions


def decide_partition(settings: DecideSettings, partition: Partition, progress: Progress | None) -> DecisionCounts:
    """Decide one input file into its output file (runs on a worker); rows per action and deferral reason."""
    rule = shared_rule_from_bytes(settings.rule_bytes, settings.rule_origin)
    return decide_file(rule, Path(partition.data), Path(partition.output), settings.explain, progress)


def decide_partitions(
    settings: DecideSettings,
    partitions: Sequence[Partition],
    runner: PartitionRunner | None = None,
    progress: Progress | None = None,
) -> DecisionCounts:
    """Decide every partition (in this process unless ``runner`` says otherwise); counts summed over them.

    Temporary files that a killed worker left beside an output are removed once every partition is done.
    """
    if runner is None:
        runner = SerialPartitions(progress, expected_rows([Path(p.data) for p in partitions]))
    for output_directory in sorted({Path(p.output).parent for p in partitions}):
        output_directory.mkdir(parents=True, exist_ok=True)  # -o names a directory to fill, made if need be
    per_partition = runner.map(decide_partition, settings, partitions)
    _remove_leftover_temporaries(partitions)
    first = per_partition[0]
    return DecisionCounts(
        {action: sum(c.actions[action] for c in per_partition) for action in first.actions},
        {reason: sum(c.deferred[reason] for c in per_partition) for reason in first.deferred},
        first.reject_action,
    )


def _remove_leftover_temporaries(partitions: Sequence[Partition]) -> None:
    """``atomic_path`` names its temporary ``.<name>.<random>.partial``; a killed process cannot remove it."""
    for partition in partitions:
        output = Path(partition.output)
        for leftover in output.parent.glob(f".{glob.escape(output.name)}.*.partial"):
            leftover.unlink(missing_ok=True)
