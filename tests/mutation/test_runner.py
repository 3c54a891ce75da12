"""The mutation runner on a tiny sample: what it generates, and that it tells a killed mutant from a survivor.

The full run over policyc is too slow for CI; this checks the machinery it relies on.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from tests.mutation.mutants import generate
from tests.mutation.run import ROOT, load_equivalents

SAMPLE = '''"""A sample module."""

from __future__ import annotations

__all__ = ["clamp"]


def clamp(value: float, limit: float) -> float:
    return value if value < limit else limit
'''
# Both tests stay away from value == limit, so `<` -> `<=` survives while `<` -> `>=` is caught.
SAMPLE_TESTS = """from sample import clamp


def test_below_the_limit():
    assert clamp(1.0, 2.0) == 1.0


def test_above_the_limit():
    assert clamp(3.0, 2.0) == 2.0
"""
SURVIVOR = "sample.py::clamp `value < limit` -> `value <= limit`"


def changes(source: str) -> set[tuple[str, str]]:
    return {(mutant.before, mutant.after) for mutant in generate(source, "m.py")}


def test_every_kind_of_change_is_generated():
    source = "def f(x, y, z):\n    return np.all(x[:-1] > 0, axis=1) & (not y) | min(z, 2.5) and x.max(axis=-1)\n"
    assert {
        ("x[:-1] > 0", "x[:-1] >= 0"),
        ("x[:-1] > 0", "x[:-1] <= 0"),
        ("np.all(x[:-1] > 0, axis=1)", "np.any(x[:-1] > 0, axis=1)"),
        ("np.all(x[:-1] > 0, axis=1)", "np.all(x[:-1] > 0, axis=0)"),
        ("-1", "1"),
        (":-1", ":"),
        ("0", "1"),
        ("not y", "y"),
        ("min(z, 2.5)", "max(z, 2.5)"),
        ("2.5", "5.0"),
        ("x.max(axis=-1)", "x.min(axis=-1)"),
        ("x.max(axis=-1)", "x.max(axis=0)"),
    } <= changes(source)
    # The axis constant changes only through the axis mutation (never axis=2).
    assert not any("axis=2" in after or "axis=-2" in after for _, after in changes(source))


def test_annotations_docstrings_and_all_are_left_alone():
    assert changes(SAMPLE) == {("value < limit", "value <= limit"), ("value < limit", "value >= limit")}


def test_a_repeated_change_is_numbered_so_its_key_stays_unique():
    keys = [mutant.key for mutant in generate("def f(a):\n    return a[1] + a[1]\n", "m.py")]
    assert len(keys) == len(set(keys))
    assert "m.py::f#2 `1` -> `2`" in keys


def test_a_mutant_behaves_as_its_change_says():
    namespace: dict[str, object] = {}
    negated = next(m for m in generate(SAMPLE, "sample.py") if m.after == "value >= limit")
    exec(compile(negated.source, "sample.py", "exec"), namespace)
    assert namespace["clamp"](1.0, 2.0) == 2.0  # type: ignore[operator]
    assert negated.line == 9


def run_on_sample(tmp_path: Path, equivalents: str) -> str:
    (tmp_path / "sample.py").write_text(SAMPLE, encoding="utf-8")
    (tmp_path / "test_sample.py").write_text(SAMPLE_TESTS, encoding="utf-8")
    listed = tmp_path / "equivalent.txt"
    listed.write_text(equivalents, encoding="utf-8")
    command = [sys.executable, "-m", "tests.mutation.run", "sample.py", "--tests=test_sample.py"]
    command += ["--root", str(tmp_path), "--equivalent", str(listed), "--jobs", "1", "--quiet"]
    completed = subprocess.run(command, cwd=ROOT, capture_output=True, text=True, timeout=300, check=True)
    assert not list(tmp_path.glob("**/*.pyc")), "the runner wrote into the tree it was given"
    assert (tmp_path / "sample.py").read_text(encoding="utf-8") == SAMPLE
    return completed.stdout


def table_row(output: str, module: str) -> list[str]:
    return next(line.split() for line in output.splitlines() if line.startswith(module))


def test_a_killed_and_a_surviving_mutant_are_told_apart(tmp_path):
    output = run_on_sample(tmp_path, "")
    # mutants, killed, timeout, survived, no-tests, equivalent, score
    assert table_row(output, "sample.py")[1:] == ["2", "1", "0", "1", "0", "0", "50.0%"]
    assert "sample.py:9\n    " + SURVIVOR in output


def test_a_listed_equivalent_mutant_leaves_the_score(tmp_path):
    output = run_on_sample(tmp_path, f"# judged by reading\n{SURVIVOR} — the sample treats the limit as inside\n")
    assert table_row(output, "sample.py")[1:] == ["2", "1", "0", "0", "0", "1", "100.0%"]
    assert "survivors" not in output


def test_an_equivalent_entry_needs_a_reason(tmp_path):
    listed = tmp_path / "equivalent.txt"
    listed.write_text(SURVIVOR + "\n", encoding="utf-8")
    with pytest.raises(SystemExit, match="expected 'KEY — reason'"):
        load_equivalents(listed)


def test_the_repository_list_of_equivalent_mutants_reads():
    assert all(reason for reason in load_equivalents().values())
