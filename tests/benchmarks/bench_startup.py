"""Benchmark: how long the command line takes to start, against ``python -c "import numpy"``.

Run from the repository root::

    python tests/benchmarks/bench_startup.py              # 9 runs of each, medians
    python tests/benchmarks/bench_startup.py --runs 21

Each task runs in a fresh interpreter, one after the other in rounds, so a busy machine slows all of
them alike:

* ``numpy``: ``python -c "import numpy"``, the floor of any command that decides;
* ``help``: ``python -m policyc --help``;
* ``check``: ``python -m policyc check policies-demo/packhouse/policy.yaml`` (the demo, pinned training data).

It prints each median wall time and its ratio to ``numpy``, and exits with status 1 when ``help`` takes
longer than ``--max-help`` (0.3 s) or ``check`` longer than ``--max-check`` (0.7 s); both are this
project's targets (common practice, no source). On a loaded machine compare the ratios.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
TASKS = {
    "numpy": ["-c", "import numpy"],
    "help": ["-m", "policyc", "--help"],
    "check": ["-m", "policyc", "check", "policies-demo/packhouse/policy.yaml"],
}


def deployed_environment() -> dict[str, str]:
    """This environment with bytecode caching allowed, as where policyc is installed: pip compiles a package's
    bytecode on install (numpy's is there), and the warm-up run writes policyc's in an editable checkout. With
    PYTHONDONTWRITEBYTECODE set, every run would compile policyc from source (about 15 ms of its start-up)."""
    return {name: value for name, value in os.environ.items() if name != "PYTHONDONTWRITEBYTECODE"}


def seconds(arguments: list[str]) -> float:
    start = time.perf_counter()
    subprocess.run([sys.executable, *arguments], cwd=ROOT, check=True, capture_output=True, env=deployed_environment())
    return time.perf_counter() - start


def medians(runs: int) -> dict[str, float]:
    times: dict[str, list[float]] = {name: [] for name in TASKS}
    for arguments in TASKS.values():
        seconds(arguments)  # warm the file cache
    for _ in range(runs):
        for name, arguments in TASKS.items():
            times[name].append(seconds(arguments))
    return {name: statistics.median(values) for name, values in times.items()}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--runs", type=int, default=9)
    parser.add_argument("--max-help", type=float, default=0.3)
    parser.add_argument("--max-check", type=float, default=0.7)
    args = parser.parse_args()
    found = medians(args.runs)
    for name, value in found.items():
        print(f"{name:<6} {value:6.3f} s   {value / found['numpy']:5.2f} x numpy")
    failed = found["help"] > args.max_help or found["check"] > args.max_check
    if failed:
        print(f"over target: help {args.max_help} s, check {args.max_check} s")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
