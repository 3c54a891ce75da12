"""A Rule is shared between threads, and a rule file is replaced while other processes load it.

* 8 threads deciding 20,000 rows each at once give exactly the sequential results;
* processes that load a rule file in a loop while another process replaces it atomically, again and
  again, always get one of the two complete rules, never a refusal and never a mix.
"""

from __future__ import annotations

import json
import subprocess
import sys
import threading
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from helpers import DEMOS, PACKHOUSE, read_csv_columns

from policyc.compiler.artefact import artefact_bytes
from policyc.compiler.build import compile_policy
from policyc.files import write_bytes_atomically
from policyc.runtime import Rule, rule_from_bytes

Record = Callable[[str, Mapping[str, int]], None]
THREADS, ROWS = 8, 20_000
READERS, LOADS_PER_READER = 2, 150


@pytest.fixture(scope="module")
def packhouse() -> Rule:
    return compile_policy(PACKHOUSE).rule


def test_threads_sharing_a_rule_match_the_sequential_results(packhouse: Rule, record_figures: Record) -> None:
    incoming = read_csv_columns(DEMOS / "packhouse" / "incoming.csv", packhouse.features)
    rng = np.random.default_rng(3)
    # more rows than one kernel chunk, so threads interleave inside the chunk loop
    X = incoming[rng.integers(0, incoming.shape[0], ROWS)] * rng.uniform(0.9, 1.1, (ROWS, 4))
    expected = packhouse.explain(X)
    barrier = threading.Barrier(THREADS)

    def work(_: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        barrier.wait()
        return packhouse.decide(X), packhouse.posteriors(X), packhouse.explain(X).reason

    with ThreadPoolExecutor(max_workers=THREADS) as pool:
        results = list(pool.map(work, range(THREADS)))
    for decisions, posteriors, reasons in results:
        assert np.array_equal(decisions, expected.action)
        assert np.array_equal(posteriors, expected.posteriors)
        assert np.array_equal(reasons, expected.reason)
    record_figures("concurrency, threads sharing one rule", {"threads": THREADS, "rows each": ROWS, "differing": 0})


READER = """
import json, sys
import numpy as np
from policyc.runtime import load_rule
path, loads, X, expected = sys.argv[1], int(sys.argv[2]), np.array(json.loads(sys.argv[3])), json.loads(sys.argv[4])
seen, broken = {}, []
for _ in range(loads):
    try:
        rule = load_rule(path)
    except Exception as exc:
        broken.append(f"{type(exc).__name__}: {exc}")
        continue
    decisions = rule.decide(X).tolist()
    if expected.get(rule.content_sha256) != decisions:
        broken.append(f"rule {rule.content_sha256} decided {decisions}")
    seen[rule.content_sha256] = seen.get(rule.content_sha256, 0) + 1
print(json.dumps({"seen": seen, "broken": broken}))
"""


def test_processes_loading_during_atomic_replacement_never_see_a_broken_rule(
    packhouse: Rule, tmp_path: Path, record_figures: Record
) -> None:
    cheaper_bench = Rule(packhouse.manifest, dict(packhouse.params) | {"loss": _with_reject_cost(packhouse, 1.2)})
    versions = [artefact_bytes(packhouse), artefact_bytes(cheaper_bench)]
    rules = [rule_from_bytes(data) for data in versions]
    X = read_csv_columns(DEMOS / "packhouse" / "holdout.csv", packhouse.features)[:200]
    expected = {rule.content_sha256: rule.decide(X).tolist() for rule in rules}
    assert len(expected) == 2 and expected[rules[0].content_sha256] != expected[rules[1].content_sha256]
    path = tmp_path / "serving.rule"
    write_bytes_atomically(path, versions[0])
    arguments = [str(path), str(LOADS_PER_READER), json.dumps(X.tolist()), json.dumps(expected)]
    readers = [
        subprocess.Popen([sys.executable, "-c", READER, *arguments], stdout=subprocess.PIPE, text=True)
        for _ in range(READERS)
    ]
    replacements = 0
    while any(reader.poll() is None for reader in readers):
        replacements += 1
        write_bytes_atomically(path, versions[replacements % 2])
    reports = [json.loads(reader.communicate(timeout=60)[0]) for reader in readers]
    assert all(reader.returncode == 0 for reader in readers)
    assert [report["broken"] for report in reports] == [[]] * READERS
    loads = sum(sum(report["seen"].values()) for report in reports)
    assert loads == READERS * LOADS_PER_READER
    assert replacements > 10
    assert set().union(*(report["seen"] for report in reports)) == set(expected)  # both versions were loaded
    record_figures(
        "concurrency, processes loading during atomic replacement",
        {"loads": loads, "replacements": replacements, "broken": 0},
    )


def _with_reject_cost(rule: Rule, cost: float) -> np.ndarray:
    loss = np.array(rule.params["loss"])
    loss[-1] = cost  # the reject row is last and constant: R(reject|x) = d
    return loss
