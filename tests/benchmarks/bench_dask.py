"""Benchmark: fit and decide over a partitioned Parquet dataset, one process against a local Dask cluster.

Run from the repository root (needs the dask extra)::

    python tests/benchmarks/bench_dask.py                          # 20 million rows in 16 files, 2 workers
    python tests/benchmarks/bench_dask.py --rows 2_000_000 --files 16 --workers 2

It writes N seeded rows (K = 4 classes, d = 8 float64 features, a text label) as ``--files`` Parquet files
to a temporary directory, then measures, side by side in one run:

* ``fit``: ``policyc compile``'s fit of full-covariance Gaussians with Ledoit-Wolf shrinkage (two passes over
  the files), in one fresh process, then on a ``LocalCluster`` of ``--workers`` single-threaded processes;
* ``decide``: every file decided into an output directory, one process, then the cluster;
* ``evaluate`` (the labels are the data's own) and ``priors`` (EM: one read, then one round of small tasks per
  iteration on the cluster), one process, then the cluster;
* the merge tree: one merge of two sets of per-class moments on the client, and the cluster's cost per tree
  level (a tree over 16 trivial leaves minus a single trivial leaf, divided by its 4 levels).

It prints rows/s, the cluster/one-process ratios, the one process's peak RSS and each worker's, checks that
the cluster's parameters equal the single process's bit for bit, that the decisions agree and that the
evaluation and the priors estimate are the same bits, and prints what
the figures predict for a cluster of N machines. Files are deleted afterwards unless ``--keep``.
"""

from __future__ import annotations

import argparse
import json
import math
import shutil
import subprocess
import sys
import tempfile
import time
from functools import partial
from pathlib import Path
from typing import Any

N_CLASSES = 4
N_FEATURES = 8
FEATURES = [f"f{j}" for j in range(N_FEATURES)]
CLASSES = [f"class_{k}" for k in range(N_CLASSES)]
LABEL = "label"


def generate(directory: Path, n_rows: int, n_files: int, seed: int = 20260514) -> None:
    """Write ``n_rows`` seeded rows split over ``n_files`` files: class k is N(μ_k, D_k M) with its own scales."""
    import numpy as np
    from bench_fit import write_gaussian_parquet  # a sibling script: the same generator

    directory.mkdir(parents=True, exist_ok=True)
    sizes = [part.size for part in np.array_split(np.arange(n_rows), n_files)]
    paths = [directory / f"part-{index:03d}.parquet" for index in range(n_files)]
    write_gaussian_parquet(paths, sizes, CLASSES, FEATURES, LABEL, seed, mean_scale=2.0)


def write_policy(directory: Path) -> Path:
    loss = {f"say_{a}": {c: 0 if a == c else 1 for c in CLASSES} for a in CLASSES}
    lines = [
        "policy: bench-dask",
        "revision: 1",
        f"classes: {json.dumps(CLASSES)}",
        "priors: training",
        f"actions: {json.dumps(list(loss))}",
        f"loss: {json.dumps(loss)}",
        "reject: {action: review, cost: 0.3}",
        "invalid_input: reject",
        "evidence:",
        "  kind: gaussian",
        "  covariance: full",
        "  shrinkage: auto",
        f"  features: {json.dumps(FEATURES)}",
        f"  training: {json.dumps({'data': 'data', 'label': LABEL})}",
    ]
    path = directory / "policy.yaml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def peak_rss_mb() -> float:
    """Peak resident set size of this process in MB (VmHWM, Linux)."""
    with open("/proc/self/status", encoding="ascii") as status:
        for line in status:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def task_fit(workdir: Path) -> dict[str, Any]:
    from policyc.compiler import compile_policy
    from policyc.compiler.artefact import write_artefact

    start = time.perf_counter()
    compiled = compile_policy(workdir / "policy.yaml")
    seconds = time.perf_counter() - start
    write_artefact(compiled.rule, workdir / "single.rule")
    return {"seconds": seconds, "peak_rss_mb": peak_rss_mb()}


def task_decide(workdir: Path) -> dict[str, Any]:
    from policyc.partitioned import DecideSettings, decide_partitions, plan_partitions

    rule_bytes = (workdir / "single.rule").read_bytes()
    start = time.perf_counter()
    counts = decide_partitions(
        DecideSettings(rule_bytes, "single.rule"), plan_partitions(workdir / "data", workdir / "out-single")
    )
    seconds = time.perf_counter() - start
    return {"seconds": seconds, "peak_rss_mb": peak_rss_mb(), "actions": counts.actions}


def review_figures(evaluation: Any, estimate: Any) -> dict[str, Any]:
    """What must agree between one process and the cluster: the evaluation report and the estimate, unrounded."""
    from policyc.render import dumps

    curve = [float(value).hex() for point in evaluation.curve for value in (point.risk, point.error_rate)]
    priors = [float(value).hex() for value in (*estimate.priors, *estimate.low, *estimate.high)]
    return {"evaluation": dumps(evaluation), "curve": curve, "estimate": priors, "iterations": estimate.iterations}


def timed_review(workdir: Path, rule_name: str, partitions: Any = None) -> dict[str, Any]:
    """``evaluate`` and ``priors`` over the data directory, timed, with the figures that must agree."""
    from policyc.review.evaluate.evaluation import evaluate
    from policyc.review.priors import estimate_priors
    from policyc.review.shared.loading import load_rule_or_policy

    loaded = load_rule_or_policy(workdir / rule_name)
    start = time.perf_counter()
    evaluation = evaluate(loaded, workdir / "data", LABEL, partitions=partitions)
    evaluate_seconds = time.perf_counter() - start
    start = time.perf_counter()
    estimate = estimate_priors(loaded.rule, workdir / "data", partitions=partitions)
    priors_seconds = time.perf_counter() - start
    return {"evaluate": evaluate_seconds, "priors": priors_seconds} | review_figures(evaluation, estimate)


def task_review(workdir: Path) -> dict[str, Any]:
    return timed_review(workdir, "single.rule") | {"peak_rss_mb": peak_rss_mb()}


def run_child(task: str, workdir: Path) -> dict[str, Any]:
    """One task in a fresh interpreter, so that its peak memory is its own."""
    command = [sys.executable, __file__, "--task", task, "--workdir", str(workdir)]
    completed = subprocess.run(command, capture_output=True, text=True, check=False)
    if completed.returncode != 0:
        sys.stderr.write(completed.stdout + completed.stderr)
        raise SystemExit(f"task {task!r} failed with exit code {completed.returncode}")
    return dict(json.loads(completed.stdout.strip().splitlines()[-1]))


def warm_up() -> None:
    import policyc.evidence.gaussian
    import policyc.partitioned
    import policyc.review.evaluate.evaluation
    import policyc.review.priors  # noqa: F401


def trivial_leaf(value: Any, path: str, progress: Any) -> Any:
    """A leaf that reads nothing: what remains of a tree's time is scheduling and transfer."""
    return value


def merge_cost(client: Any, moments: Any) -> tuple[float, float]:
    """(seconds per merge on the client, seconds per tree level on the cluster), best of 5."""
    from policyc.cluster import DaskPartitions
    from policyc.evidence.gaussian import merge_class_moments

    repeats = 2000
    start = time.perf_counter()
    for _ in range(repeats):
        merge_class_moments(moments, moments)
    per_merge = (time.perf_counter() - start) / repeats
    runner = DaskPartitions(client)
    leaf = partial(trivial_leaf, moments)

    def tree_seconds(n_leaves: int) -> float:
        best = math.inf
        for _ in range(5):
            start = time.perf_counter()
            runner.tree_reduce(leaf, merge_class_moments, [Path(f"leaf-{i}") for i in range(n_leaves)])
            best = min(best, time.perf_counter() - start)
        return best

    per_level = (tree_seconds(16) - tree_seconds(1)) / 4
    return per_merge, per_level


def cluster_phase(workdir: Path, n_workers: int) -> dict[str, Any]:
    from distributed import Client, LocalCluster

    from policyc.cluster import DaskPartitions
    from policyc.compiler import compile_policy
    from policyc.compiler.artefact import artefact_bytes
    from policyc.evidence.gaussian import TrainingColumns, class_moments_of_file
    from policyc.partitioned import DecideSettings, decide_partitions, plan_partitions

    start = time.perf_counter()
    with (
        LocalCluster(
            n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address="127.0.0.1:0"
        ) as cluster,
        Client(cluster) as client,
    ):
        # a long-lived cluster has imported policyc already: keep the imports out of the timings
        client.run(warm_up)
        startup = time.perf_counter() - start
        start = time.perf_counter()
        compiled = compile_policy(workdir / "policy.yaml", partitions=DaskPartitions(client))
        fit_seconds = time.perf_counter() - start
        rule_bytes = artefact_bytes(compiled.rule)
        start = time.perf_counter()
        counts = decide_partitions(
            DecideSettings(rule_bytes, "cluster.rule"),
            plan_partitions(workdir / "data", workdir / "out-cluster"),
            DaskPartitions(client),
        )
        decide_seconds = time.perf_counter() - start
        review = timed_review(workdir, "single.rule", DaskPartitions(client))
        worker_rss = client.run(peak_rss_mb)
        first = sorted((workdir / "data").iterdir())[0]
        columns = TrainingColumns(tuple(FEATURES), LABEL, tuple(CLASSES), False)
        per_merge, per_level = merge_cost(client, class_moments_of_file(columns, str(first), None))
    return {
        "startup": startup,
        "fit": fit_seconds,
        "decide": decide_seconds,
        "review": review,
        "worker_peak_rss_mb": sorted(worker_rss.values()),
        "rule_bytes": rule_bytes,
        "actions": counts.actions,
        "per_merge": per_merge,
        "per_level": per_level,
    }


def report(n_rows: int, n_files: int, n_workers: int, single: dict[str, Any], spread: dict[str, Any]) -> None:
    fit_single, decide_single = single["fit"], single["decide"]
    print(
        f"one process      fit {n_rows / fit_single['seconds']:>12,.0f} rows/s  ({fit_single['seconds']:.1f} s, "
        f"2 passes)  peak RSS {fit_single['peak_rss_mb']:.0f} MB"
    )
    print(
        f"one process   decide {n_rows / decide_single['seconds']:>12,.0f} rows/s  "
        f"({decide_single['seconds']:.1f} s)  peak RSS {decide_single['peak_rss_mb']:.0f} MB"
    )
    print(f"cluster ({n_workers} workers, started in {spread['startup']:.1f} s)")
    print(
        f"                 fit {n_rows / spread['fit']:>12,.0f} rows/s  ({spread['fit']:.1f} s)  "
        f"ratio to one process {fit_single['seconds'] / spread['fit']:.2f}"
    )
    print(
        f"              decide {n_rows / spread['decide']:>12,.0f} rows/s  ({spread['decide']:.1f} s)  "
        f"ratio to one process {decide_single['seconds'] / spread['decide']:.2f}"
    )
    review_single, review_spread = single["review"], spread["review"]
    for name in ("evaluate", "priors"):
        print(
            f"{name:>20} one process {n_rows / review_single[name]:>12,.0f} rows/s ({review_single[name]:.1f} s), "
            f"cluster {n_rows / review_spread[name]:>12,.0f} rows/s ({review_spread[name]:.1f} s), "
            f"ratio {review_single[name] / review_spread[name]:.2f}"
        )
    print(
        f"priors: one read, then {review_spread['iterations']} EM iterations, each a round of {n_files} small tasks "
        f"(about one tree level's cost on the cluster); one process's peak RSS for evaluate and priors "
        f"{review_single['peak_rss_mb']:.0f} MB"
    )
    print("worker peak RSS (MB, whole run): " + ", ".join(f"{mb:.0f}" for mb in spread["worker_peak_rss_mb"]))
    levels = math.ceil(math.log2(n_files))
    print(
        f"merge of two moment sets (K={N_CLASSES}, d={N_FEATURES}) on the client: "
        f"{spread['per_merge'] * 1e6:.1f} µs; cluster cost per tree level: {spread['per_level'] * 1e3:.1f} ms; "
        f"this tree: {levels} levels, {n_files - 1} merges per pass"
    )
    per_file = spread["fit"] / 2 / math.ceil(n_files / n_workers)  # seconds per file and pass on one worker
    print(
        "prediction for N machines of one worker each (fit, both passes): "
        f"T(N) ≈ 2 × (⌈{n_files}/N⌉ × {per_file:.2f} s + ⌈log₂ {n_files}⌉ × {spread['per_level'] * 1e3:.0f} ms)"
    )
    for machines in (1, 2, 4, 8, 16, 32):
        predicted = 2 * (math.ceil(n_files / machines) * per_file + levels * spread["per_level"])
        print(f"  N = {machines:>2}: {predicted:6.1f} s   {n_rows / predicted:>12,.0f} rows/s")


def child_main(args: argparse.Namespace) -> int:
    result = {"fit": task_fit, "decide": task_decide, "review": task_review}[args.task](args.workdir)
    print(json.dumps(result))
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=lambda s: int(s.replace("_", "")), default=20_000_000)
    parser.add_argument("--files", type=int, default=16)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--dir", type=Path, default=None, help="where to write the files (default: a temp dir)")
    parser.add_argument("--keep", action="store_true", help="keep the generated files")
    parser.add_argument("--task", choices=["fit", "decide", "review"], help=argparse.SUPPRESS)
    parser.add_argument("--workdir", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.task is not None:
        return child_main(args)

    workdir = Path(tempfile.mkdtemp(prefix="policyc-bench-dask-", dir=args.dir))
    try:
        start = time.perf_counter()
        generate(workdir / "data", args.rows, args.files)
        size_mb = sum(p.stat().st_size for p in (workdir / "data").iterdir()) / 1e6
        print(
            f"generated {args.rows:,} rows in {args.files} files ({size_mb:,.0f} MB) "
            f"in {time.perf_counter() - start:.1f} s: {workdir}"
        )
        write_policy(workdir)
        single = {task: run_child(task, workdir) for task in ("fit", "decide", "review")}
        spread = cluster_phase(workdir, args.workers)
        identical = spread["rule_bytes"] == (workdir / "single.rule").read_bytes()
        print(f"cluster rule identical to the single-process rule (byte for byte): {identical}")
        print(f"decision counts agree: {spread['actions'] == single['decide']['actions']}")
        same_review = all(spread["review"][key] == single["review"][key] for key in ("evaluation", "curve", "estimate"))
        print(f"evaluation and priors estimate identical to one process's (bit for bit): {same_review}")
        report(args.rows, args.files, args.workers, single, spread)
        return 0 if identical and spread["actions"] == single["decide"]["actions"] and same_review else 1
    finally:
        if not args.keep:
            shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    raise SystemExit(main())
