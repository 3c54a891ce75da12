"""Benchmark: ``policyc decide`` on a Parquet file, end to end, against pyarrow reading and writing the same file.

Run from the repository root::

    python tests/benchmarks/bench_decide_file.py                  # 5 million rows (about 1.3 GB of Parquet)
    python tests/benchmarks/bench_decide_file.py --rows 1_000_000 --rounds 5
    python tests/benchmarks/bench_decide_file.py --json           # the figures as one JSON object

It writes a seeded Parquet file of N rows (an int64 ``id`` column and d = 32 float64 features drawn from
K = 8 Gaussian classes), compiles a full-covariance policy fitted on 200,000 rows of the same kind, then
times in rounds, each command in a fresh process so that its peak resident memory is its own:

* ``reference``: a Python process that reads the file with ``ParquetFile.iter_batches`` and writes every
  batch to a new Parquet file with ``ParquetWriter`` at pyarrow's defaults (the floor for any command that
  rewrites the file the way a user's script would);
* ``reference_plain``: the same without dictionary encoding, which is what policyc's writer chooses for this
  file's columns (none of their values repeat): the floor for the same output encoding;
* ``policyc``: ``python -m policyc decide RULE DATA -o OUT -q`` (the rows and an ``action`` column).

It prints the medians and spread of rows/s, the ratios policyc/reference and policyc/reference_plain and
each command's peak RSS, and exits with status 1 when the median ratio to ``reference`` is below
``--min-ratio`` (0.8, this project's target, common practice, no source).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_fit  # a sibling script, not a package

ROOT = Path(__file__).resolve().parents[2]
TRAINING_ROWS = 200_000
READ_OPTIONS = {"pre_buffer": False, "buffer_size": 1 << 16}  # policyc.evidence.io's reader options

REFERENCE = f"""
import sys
import pyarrow.parquet as pq
source = pq.ParquetFile(sys.argv[1], pre_buffer={READ_OPTIONS["pre_buffer"]}, buffer_size={READ_OPTIONS["buffer_size"]})
with pq.ParquetWriter(sys.argv[2], source.schema_arrow, use_dictionary=sys.argv[3] == "dictionary") as writer:
    for batch in source.iter_batches(batch_size=65_536):
        writer.write_batch(batch)
"""


def generate(path: Path, n_rows: int, seed: int = 20240612) -> None:
    """Write ``n_rows`` rows: ``id`` then the benchmark's 32 features (the fit benchmark's classes)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    scratch = path.with_suffix(".labelled.parquet")
    bench_fit.generate(scratch, n_rows, seed)
    source = pq.ParquetFile(scratch)
    schema = pa.schema([("id", pa.int64())] + [(name, pa.float64()) for name in bench_fit.FEATURES])
    first = 0
    with pq.ParquetWriter(path, schema) as writer:
        for batch in source.iter_batches(batch_size=bench_fit.GENERATION_CHUNK, columns=bench_fit.FEATURES):
            ids = pa.array(range(first, first + batch.num_rows), pa.int64())
            writer.write_batch(pa.RecordBatch.from_arrays([ids, *batch.columns], schema=schema))
            first += batch.num_rows
    scratch.unlink()


def compile_rule(workdir: Path) -> None:
    """A full-covariance rule with K = 8 classes, 8 actions and a reject option, fitted on its own file."""
    training = workdir / "train.parquet"
    bench_fit.generate(training, TRAINING_ROWS, seed=7)
    classes = bench_fit.CLASSES
    loss = {f"say_{a}": {c: 0 if a == c else 1 for c in classes} for a in classes}
    policy = workdir / "policy.yaml"
    policy.write_text(
        "\n".join(
            [
                "policy: bench-decide-file",
                f"classes: {json.dumps(classes)}",
                "priors: training",
                f"actions: {json.dumps(list(loss))}",
                f"loss: {json.dumps(loss)}",
                "reject: {action: review, cost: 0.2}",
                "invalid_input: reject",
                "evidence:",
                "  kind: gaussian",
                "  covariance: full",
                f"  features: {json.dumps(bench_fit.FEATURES)}",
                f"  training: {json.dumps({'data': str(training), 'label': bench_fit.LABEL})}",
                "",
            ]
        )
    )
    rule = workdir / "bench.rule"
    subprocess.run(
        [sys.executable, "-m", "policyc", "compile", str(policy), "-o", str(rule), "-q"],
        check=True,
        capture_output=True,
    )


def timed(command: list[str]) -> tuple[float, float]:
    """Wall seconds and peak RSS (MiB) of one child process."""
    start = time.perf_counter()
    process = subprocess.Popen(command, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(process.pid, 0)
    seconds = time.perf_counter() - start
    output = process.communicate()
    process.returncode = os.waitstatus_to_exitcode(status)
    if process.returncode != 0:
        sys.stderr.write(b"".join(output).decode(errors="replace"))
        raise SystemExit(f"{command[:4]} failed with exit code {process.returncode}")
    return seconds, usage.ru_maxrss / 1024.0  # ru_maxrss is in KiB on Linux


def measure(data: Path, rule: Path, workdir: Path, rounds: int) -> dict[str, Any]:
    """Alternate the two commands ``rounds`` times; medians, spreads and peak RSS of each."""
    import pyarrow.parquet as pq

    n_rows = pq.ParquetFile(data).metadata.num_rows
    commands = {
        "reference": [sys.executable, "-c", REFERENCE, str(data), str(workdir / "copy.parquet"), "dictionary"],
        "reference_plain": [sys.executable, "-c", REFERENCE, str(data), str(workdir / "copy.parquet"), "plain"],
        "policyc": [
            sys.executable,
            "-m",
            "policyc",
            "decide",
            str(rule),
            str(data),
            "-o",
            str(workdir / "out.parquet"),
            "-q",
        ],
    }
    seconds: dict[str, list[float]] = {name: [] for name in commands}
    peaks: dict[str, list[float]] = {name: [] for name in commands}
    ratios: dict[str, list[float]] = {"reference": [], "reference_plain": []}
    for _ in range(rounds):
        for name, command in commands.items():
            wall, peak = timed(command)
            seconds[name].append(wall)
            peaks[name].append(peak)
        for reference, found in ratios.items():
            # ratio = policyc rows/s / reference rows/s = reference seconds / policyc seconds, same round
            found.append(seconds[reference][-1] / seconds["policyc"][-1])
    decided = pq.ParquetFile(workdir / "out.parquet").metadata.num_rows
    if decided != n_rows:
        raise SystemExit(f"policyc wrote {decided} rows of {n_rows}")
    return {
        "rows": n_rows,
        "rounds": rounds,
        "policyc_rows_per_s": [n_rows / s for s in seconds["policyc"]],
        "reference_rows_per_s": [n_rows / s for s in seconds["reference"]],
        "reference_plain_rows_per_s": [n_rows / s for s in seconds["reference_plain"]],
        "ratios": ratios["reference"],
        "ratio": statistics.median(ratios["reference"]),
        "ratios_plain": ratios["reference_plain"],
        "ratio_plain": statistics.median(ratios["reference_plain"]),
        "policyc_peak_rss_mib": max(peaks["policyc"]),
        "reference_peak_rss_mib": max(peaks["reference"]),
        "reference_plain_peak_rss_mib": max(peaks["reference_plain"]),
    }


def prepare(workdir: Path, rows: int) -> None:
    """Write the data file and the rule into ``workdir`` unless they are there."""
    data = workdir / f"data-{rows}.parquet"
    if not data.exists():
        generate(data, rows)
    if not (workdir / "bench.rule").exists():
        compile_rule(workdir)


def figures(rows: int = 5_000_000, rounds: int = 3, keep: Path | None = None) -> dict[str, Any]:
    """Generate the files (or reuse those in ``keep``), measure, and return the figures."""
    workdir = keep or Path(tempfile.mkdtemp(prefix="policyc-bench-decide-"))
    workdir.mkdir(parents=True, exist_ok=True)
    try:
        data, rule = workdir / f"data-{rows}.parquet", workdir / "bench.rule"
        # in a child: a process's peak RSS counts its parent's at the fork, so this one stays small
        subprocess.run([sys.executable, __file__, "--prepare", str(workdir), "--rows", str(rows)], check=True)
        return measure(data, rule, workdir, rounds)
    finally:
        if keep is None:
            shutil.rmtree(workdir)


def spread(values: list[float]) -> str:
    return f"{statistics.median(values) / 1e6:.3f} M/s ({min(values) / 1e6:.3f}-{max(values) / 1e6:.3f})"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=lambda s: int(s.replace("_", "")), default=5_000_000)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--keep", type=Path, default=None, help="keep (and reuse) the files in this directory")
    parser.add_argument("--min-ratio", type=float, default=0.8)
    parser.add_argument("--json", action="store_true", help="print the figures as one JSON object")
    parser.add_argument("--prepare", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.prepare is not None:
        prepare(args.prepare, args.rows)
        return 0
    found = figures(args.rows, args.rounds, args.keep)
    if args.json:
        print(json.dumps(found))
    else:
        print(f"rows               {found['rows']:>12,}  rounds {found['rounds']}")
        for name in ("reference", "reference_plain", "policyc"):
            rates, peak = found[f"{name}_rows_per_s"], found[f"{name}_peak_rss_mib"]
            print(f"{name:<19}{spread(rates)}  peak {peak:.0f} MiB")
        for suffix in ("", "_plain"):
            ratios = found[f"ratios{suffix}"]
            print(f"ratio{suffix:<14}{found[f'ratio{suffix}']:.3f} ({min(ratios):.3f}-{max(ratios):.3f})")
    return 0 if found["ratio"] >= args.min_ratio else 1


if __name__ == "__main__":
    sys.exit(main())
