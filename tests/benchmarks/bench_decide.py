"""Benchmark: the decision kernels against scikit-learn and against the bare matrix product they cannot beat.

Run from the repository root (``python tests/benchmarks/bench_all.py`` runs this and the other benchmarks)::

    python tests/benchmarks/bench_decide.py              # every figure, about two minutes on 2 cores
    python tests/benchmarks/bench_decide.py --quick      # smaller batches, for a first look

Each figure is measured side by side in one process, the two sides alternating over several rounds, and
the median of the per-round ratios is reported, so a machine that slows down slows both sides alike.
BLAS is pinned to one thread (threadpoolctl) for every single-thread comparison, scikit-learn included.

Figures (targets are this project's, common practice, no source):

* full covariance, n = 1e6, d = 32, K = 8, A = 8 + reject: ``Rule.decide`` against scikit-learn's
  ``QuadraticDiscriminantAnalysis.predict_proba`` followed by the risk product and argmin (the same
  decision), target ≥ 6×; and against the bound, a bare chunked product X (32 × 256) into a reused
  buffer, which every full-covariance kernel must do, target ≥ 0.6;
* the same, small shape n = 1e5, d = 8, K = 3: target ≥ 3× scikit-learn;
* tied covariance against ``LinearDiscriminantAnalysis`` (≥ 1.5×), diagonal against ``GaussianNB`` (≥ 3×);
* extra memory of ``decide`` beyond its output (tracemalloc peak, numpy reports its buffers to it) at 1e6
  and 4e6 rows: target ≤ 32 MiB;
* one row, d = 8: ``decide_one`` and ``decide(x[None])`` p50 ≤ 10 µs and ≥ 15× scikit-learn ``predict``;
* float32 (``Rule.astype``) against float64: ≥ 1.7×, with the largest posterior difference and the count of
  decisions that differ (only near ties);
* both cores: the default (numpy's BLAS threads) against BLAS pinned to one thread (never slower is the
  target), and a pool of 2 threads with BLAS pinned, once with the other core idle and once busy.

Every comparison also checks that the two sides decide alike (mismatches are reported).
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import statistics
import sys
import time
import tracemalloc
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_info, threadpool_limits

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/helpers.py builds rules from parameters

from helpers import gaussian_rule, random_covariances

from policyc.runtime import Rule, kernel


@dataclass(frozen=True)
class Figure:
    """One line of the table: what, policyc's value, the reference's, their ratio, the target and whether met."""

    name: str
    policyc: str
    reference: str
    ratio: float | None
    target: str
    met: bool | None


def shape_rule(rng: np.random.Generator, n_classes: int, dim: int, covariance: str) -> tuple[Rule, np.ndarray]:
    """A rule of the given shape (reject option included) and its exact class means (for sampling)."""
    means = rng.normal(scale=1.5, size=(n_classes, dim))
    covariances = random_covariances(rng, n_classes, dim, covariance)
    loss = rng.uniform(1.0, 10.0, size=(n_classes, n_classes))
    np.fill_diagonal(loss, 0.0)
    rule = gaussian_rule(means, covariances, np.full(n_classes, 1 / n_classes), loss, 2.0, covariance=covariance)
    return rule, means


def sample(rng: np.random.Generator, means: np.ndarray, rows: int) -> np.ndarray:
    codes = rng.integers(0, means.shape[0], rows)
    return means[codes] + rng.normal(scale=1.2, size=(rows, means.shape[1]))


def fitted_reference(kind: str, rule: Rule, means: np.ndarray, rng: np.random.Generator) -> Callable[..., np.ndarray]:
    """A scikit-learn estimator fitted on data from the rule's classes, deciding with the rule's losses."""
    from sklearn.discriminant_analysis import LinearDiscriminantAnalysis, QuadraticDiscriminantAnalysis
    from sklearn.naive_bayes import GaussianNB

    estimator = {"full": QuadraticDiscriminantAnalysis, "tied": LinearDiscriminantAnalysis, "diagonal": GaussianNB}
    X = sample(rng, means, 4000 * means.shape[0])
    y = np.argmin(((X[:, None, :] - means[None]) ** 2).sum(axis=2), axis=1)
    model = estimator[kind]().fit(X, y)
    loss = np.asarray(rule.params["loss"])

    def decide(batch: np.ndarray) -> np.ndarray:
        # the same rule: posteriors, R = P λᵀ, argmin (the reject row is constant)
        return np.argmin(model.predict_proba(batch) @ loss.T, axis=1)

    return decide


def paired(first: Callable[[], object], second: Callable[[], object], rounds: int) -> tuple[float, float, float]:
    """Median seconds of each side and the median of the per-round ratios second / first."""
    a, b, ratios = [], [], []
    for _ in range(rounds):
        start = time.perf_counter()
        first()
        middle = time.perf_counter()
        second()
        end = time.perf_counter()
        a.append(middle - start)
        b.append(end - middle)
        ratios.append((end - middle) / (middle - start))
    return statistics.median(a), statistics.median(b), statistics.median(ratios)


def rate(rows: int, seconds: float) -> str:
    return f"{rows / seconds / 1e6:.2f} M rows/s"


def batch_figures(args: argparse.Namespace, rng: np.random.Generator) -> list[Figure]:
    figures = []
    shapes = [("full", args.rows, 32, 8, 6.0), ("full", args.rows // 10, 8, 3, 3.0)]
    shapes += [("tied", args.rows, 32, 8, 1.5), ("diagonal", args.rows, 32, 8, 3.0)]
    for covariance, rows, dim, n_classes, target in shapes:
        rule, means = shape_rule(rng, n_classes, dim, covariance)
        X = sample(rng, means, rows)
        ours, theirs, ratio = against(rule, fitted_reference(covariance, rule, means, rng), X, args.rounds)
        label = f"{covariance}, n={rows:.0e}, d={dim}, K={n_classes}: decide vs scikit-learn"
        figures.append(Figure(label, rate(rows, ours), rate(rows, theirs), ratio, f">= {target:g}x", ratio >= target))
        if covariance == "full" and dim == 32:
            figures.append(bound_figure(rule, X, args.rounds))
    return figures


def against(
    rule: Rule, reference: Callable[[np.ndarray], np.ndarray], X: np.ndarray, rounds: int
) -> tuple[float, float, float]:
    """Median seconds of decide and of the reference, and their median ratio, BLAS on one thread.

    Also counts where the fast decide path differs from the full computation (explain's argmin of the
    stored risks) on the same rows: it must be 0.
    """
    with threadpool_limits(1):
        mismatches = int((rule.decide(X, threads=1) != rule.explain(X).action).sum())
        shape = f"{rule.manifest['evidence']['covariance']}, n={X.shape[0]}"
        print(f"{shape}: decide vs the full computation, {mismatches} decisions differ")
        return paired(lambda: rule.decide(X, threads=1), lambda: reference(X), rounds)


def bound_figure(rule: Rule, X: np.ndarray, rounds: int) -> Figure:
    """The bare chunked product X (d × K·d) into a reused buffer: what any full-covariance kernel must do."""
    whitening = np.ascontiguousarray(rule.params["whitening"].T)
    buffer = np.empty((kernel.CHUNK_ROWS, whitening.shape[1]))

    def bound() -> None:
        for start in range(0, X.shape[0], kernel.CHUNK_ROWS):
            block = X[start : start + kernel.CHUNK_ROWS]
            np.matmul(block, whitening, out=buffer[: block.shape[0]])

    with threadpool_limits(1):
        theirs, ours, fraction = paired(bound, lambda: rule.decide(X, threads=1), rounds)
    fraction = 1.0 / fraction  # bound time / decide time
    rows = X.shape[0]
    return Figure(
        "full, large: fraction of the bound", rate(rows, ours), rate(rows, theirs), fraction, ">= 0.6", fraction >= 0.6
    )


def memory_figures(rng: np.random.Generator, sizes: list[int]) -> list[Figure]:
    rule, means = shape_rule(rng, 8, 32, "full")
    figures = []
    for rows in sizes:
        X = sample(rng, means, rows)
        tracemalloc.start()
        base = tracemalloc.get_traced_memory()[0]
        actions = rule.decide(X, threads=1)
        peak = tracemalloc.get_traced_memory()[1] - base
        tracemalloc.stop()
        extra = (peak - actions.nbytes) / 2**20
        figures.append(
            Figure(f"extra memory of decide, n={rows:.0e}", f"{extra:.1f} MiB", "", None, "<= 32 MiB", extra <= 32)
        )
        del X
    return figures


def single_row_figures(rng: np.random.Generator, repeats: int) -> list[Figure]:
    from sklearn.discriminant_analysis import QuadraticDiscriminantAnalysis

    rule, means = shape_rule(rng, 3, 8, "full")
    X = sample(rng, means, 3000)
    model = QuadraticDiscriminantAnalysis().fit(X, np.argmin(((X[:, None] - means[None]) ** 2).sum(axis=2), axis=1))
    rows = sample(rng, means, repeats)
    records = [dict(zip(rule.features, row.tolist(), strict=True)) for row in rows]

    def p50(call: Callable[[int], object]) -> float:
        times = []
        for i in range(repeats):
            start = time.perf_counter_ns()
            call(i)
            times.append(time.perf_counter_ns() - start)
        return statistics.median(times) / 1e3

    with threadpool_limits(1):
        theirs = p50(lambda i: model.predict(rows[i : i + 1]))
        figures = []
        for name, call in (
            ("decide_one", lambda i: rule.decide_one(records[i])),
            ("decide(x[None])", lambda i: rule.decide(rows[i : i + 1])),
        ):
            ours = p50(call)
            ratio = theirs / ours
            met = ours <= 10.0 and ratio >= 15.0
            figures.append(
                Figure(
                    f"one row, d=8: {name} p50", f"{ours:.1f} us", f"{theirs:.1f} us", ratio, "<= 10 us, >= 15x", met
                )
            )
    return figures


def float32_figure(rng: np.random.Generator, rows: int, rounds: int) -> list[Figure]:
    rule, means = shape_rule(rng, 8, 32, "full")
    single = rule.astype(np.float32)
    X = sample(rng, means, rows)
    with threadpool_limits(1):
        double_time, single_time, _ = paired(
            lambda: rule.decide(X, threads=1), lambda: single.decide(X, threads=1), rounds
        )
    ratio = double_time / single_time
    explanation = rule.explain(X[:200_000])
    difference = float(np.abs(single.posteriors(X[:200_000]) - explanation.posteriors).max())
    differing = int((single.decide(X[:200_000]) != explanation.action).sum())
    note = f"max |ΔP| {difference:.1e}, {differing} of 200000 decisions differ (near ties)"
    return [
        Figure(
            "float32 vs float64, full, large",
            rate(rows, single_time),
            rate(rows, double_time),
            ratio,
            ">= 1.7x",
            ratio >= 1.7,
        ),
        Figure(f"float32 accuracy: {note}", f"{difference:.1e}", "", None, "<= 1e-5", difference <= 1e-5),
    ]


def _spin(stop: multiprocessing.synchronize.Event) -> None:  # type: ignore[name-defined]
    while not stop.is_set():
        pass


def thread_figures(rng: np.random.Generator, rows: int, rounds: int) -> list[Figure]:
    """Both cores: numpy's own BLAS threads (the default) and a pool of 2 threads over chunks with BLAS pinned
    to one thread, each against one thread; the pool once with the other core idle and once with it busy."""
    rule, means = shape_rule(rng, 8, 32, "full")
    X = sample(rng, means, rows)
    blas_one, blas_all, ratio = paired(lambda: _pinned_decide(rule, X), lambda: rule.decide(X), rounds)
    figures = [
        Figure(
            "BLAS threads (default) vs BLAS pinned to 1",
            rate(rows, blas_all),
            rate(rows, blas_one),
            1 / ratio,
            ">= 1x",
            1 / ratio >= 0.97,
        )
    ]
    for busy in (False, True):
        stop = multiprocessing.Event()
        spinner = multiprocessing.Process(target=_spin, args=(stop,)) if busy else None
        if spinner is not None:
            spinner.start()
        try:
            with threadpool_limits(1):
                one, two, _ = paired(lambda: rule.decide(X), lambda: rule.decide(X, threads=2), rounds)
        finally:
            stop.set()
            if spinner is not None:
                spinner.join()
        where = "other core busy" if busy else "other core idle"
        figures.append(
            Figure(f"2 threads vs 1 (BLAS pinned), {where}", rate(rows, two), rate(rows, one), one / two, "", None)
        )
    return figures


def _pinned_decide(rule: Rule, X: np.ndarray) -> np.ndarray:
    with threadpool_limits(1):
        return rule.decide(X)


def render(figures: list[Figure]) -> str:
    header = ("figure", "policyc", "reference", "ratio", "target", "met")
    rows = [
        (
            f.name,
            f.policyc,
            f.reference,
            "" if f.ratio is None else f"{f.ratio:.2f}",
            f.target,
            {True: "yes", False: "NO", None: ""}[f.met],
        )
        for f in figures
    ]
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header))]
    lines = [
        "  ".join(str(cell).ljust(width) for cell, width in zip(row, widths, strict=True)) for row in [header, *rows]
    ]
    lines.insert(1, "  ".join("-" * width for width in widths))
    return "\n".join(lines)


def blas_line() -> str:
    info = [
        f"{i['internal_api']} {i['version']} ({i.get('architecture')}, {i['num_threads']} threads)"
        for i in threadpool_info()
    ]
    return f"BLAS: {', '.join(info) or 'none found'}; numpy {np.__version__}; cores {multiprocessing.cpu_count()}"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="1e5-row batches and fewer rounds")
    parser.add_argument("--json", action="store_true", help="print the figures as JSON instead of a table")
    args = parser.parse_args(argv)
    args.rows = 100_000 if args.quick else 1_000_000
    args.rounds = 3 if args.quick else 7
    rng = np.random.default_rng(20261202)
    figures = batch_figures(args, rng)
    figures += memory_figures(rng, [args.rows, 4 * args.rows])
    figures += single_row_figures(rng, 2000 if args.quick else 20000)
    figures += float32_figure(rng, args.rows, args.rounds)
    figures += thread_figures(rng, args.rows, args.rounds)
    if args.json:
        print(json.dumps([asdict(f) for f in figures]))
    else:
        print(blas_line())
        print(render(figures))
    return 0


if __name__ == "__main__":
    sys.exit(main())
