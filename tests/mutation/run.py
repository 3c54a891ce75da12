"""Mutation testing: does the test suite notice a wrong formula?

    python -m tests.mutation.run [MODULE ...] [--tests PATH ...] [--jobs N]

1. The repository is copied to a temporary directory (one copy per job), so the
   working tree is never modified.
2. The tests run once under coverage with one context per test, which maps every
   line of the mutated modules to the tests that execute it (and gives each test's
   duration). A failing baseline stops the run.
3. Each mutant (see :mod:`tests.mutation.mutants`) is written into a copy and only the
   tests covering its lines run, fastest first, stopping at the first failure, in a
   forked process with a time limit. Lines run only at import time are covered by
   every test that touches the module.
4. A table gives per module the mutants, killed (a test failed, or the time limit was
   hit), survived, equivalent (listed in ``tests/mutation/equivalent.txt`` with a
   reason, excluded from the score) and the score killed / (mutants - equivalent).
   Then every survivor is printed as ``file:line`` and its key, ready to be listed
   as equivalent once a reader has shown that no input can tell it apart.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import importlib.util
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

from tests.mutation.mutants import Mutant, generate

__all__ = ["Outcome", "load_equivalents", "main", "run"]

ROOT = Path(__file__).resolve().parents[2]
EQUIVALENT_FILE = Path(__file__).with_name("equivalent.txt")
# The modules whose scores the contributor guide records.
DEFAULT_MODULES = (
    "policyc/geometry/decisions.py",
    "policyc/geometry/reach.py",
    "policyc/geometry/sampling.py",
    "policyc/geometry/intervals.py",
    "policyc/language/checks.py",
    "policyc/evidence/gaussian.py",
    "policyc/review/shared/gaussians.py",
    "policyc/review/priors.py",
    "policyc/review/evaluate/evaluation.py",
    "policyc/review/diff/semantic.py",
    "policyc/review/diff/posterior.py",
    "policyc/review/diff/data.py",
    "policyc/review/diff/gates.py",
    "policyc/runtime/kernel.py",
    "policyc/runtime/rule.py",
    "policyc/runtime/inputs.py",
)
NOT_COPIED = (".git", ".venv", ".ci-venv", "__pycache__", ".hypothesis", "*_cache", "*.egg-info", "build")
# Imported before forking so that every mutant does not pay for them again; never the package under test.
# Those the tests imported are preloaded. Not hypothesis: pytest must import its plugin itself to rewrite it.
PRELOAD = (
    "numpy",
    "scipy.optimize",
    "scipy.stats",
    "scipy.special",
    "pyarrow",
    "pyarrow.csv",
    "pyarrow.parquet",
    "pydantic",
    "yaml",
    "click",
    "click.testing",
    "sklearn.covariance",
    "jsonschema",
)
EQUIVALENT_LINE = re.compile(r"^(?P<key>\S+::\S+ `.*?` -> `.*?`)\s+(?:—|--)\s+(?P<reason>\S.*)$")
POLL_SECONDS = 0.02
FIRST_STAGE_TESTS = 8
STAGE_START_SECONDS = 20.0


@dataclass
class Outcome:
    """What became of one mutant."""

    mutant: Mutant
    status: str  # killed | timeout | survived | no-tests | equivalent
    seconds: float = 0.0


@dataclass
class Coverage:
    """Tests per (module, line), and each test's duration."""

    lines: dict[str, dict[int, list[str]]] = field(default_factory=dict)
    durations: dict[str, float] = field(default_factory=dict)
    imported: list[str] = field(default_factory=list)

    def tests_for(self, mutant: Mutant) -> list[str]:
        """The tests that execute any line of the mutated expression, fastest first."""
        by_line = self.lines.get(mutant.path, {})
        found: set[str] = set()
        for line in range(mutant.line, mutant.end_line + 1):
            found.update(by_line.get(line, ()))
        if "" in found:  # run at import time: every test that touches the module
            found = {test for tests in by_line.values() for test in tests}
        found.discard("")
        return sorted(found, key=lambda test: (self.durations.get(test, 0.0), test))


def load_equivalents(path: Path = EQUIVALENT_FILE) -> dict[str, str]:
    """Keys of the mutants judged equivalent, with the reason given for each."""
    equivalents: dict[str, str] = {}
    if not path.exists():
        return equivalents
    for number, raw in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        match = EQUIVALENT_LINE.match(line)
        if match is None:
            raise SystemExit(f"{path}:{number}: expected 'KEY — reason', got {line!r}")
        equivalents[match["key"]] = match["reason"]
    return equivalents


def _copy_repository(source: Path, target: Path) -> Path:
    shutil.copytree(source, target, ignore=shutil.ignore_patterns(*NOT_COPIED), symlinks=True)
    return target


def _measure_coverage(copy: Path, modules: Sequence[str], tests: Sequence[str]) -> Coverage:
    """Run the tests once in a fresh interpreter under coverage, one context per test."""
    report = copy / ".mutation-coverage.json"
    # The copy's own modules come first; the runner itself is found in this repository if the copy lacks it.
    bootstrap = f"import sys; sys.path.append({str(ROOT)!r}); from tests.mutation.run import main; sys.exit(main())"
    command = [sys.executable, "-c", bootstrap, "--collect-coverage", str(report), *modules]
    command += [f"--tests={test}" for test in tests]
    completed = subprocess.run(command, cwd=copy, env=_environment(copy), check=False)
    if completed.returncode != 0:
        raise SystemExit(f"the tests fail before any mutation (pytest exit {completed.returncode}); fix them first")
    data = json.loads(report.read_text(encoding="utf-8"))
    lines = {path: {int(line): tests for line, tests in by_line.items()} for path, by_line in data["lines"].items()}
    return Coverage(lines, data["durations"], data["imported"])


def _collect_coverage(report: Path, modules: Sequence[str], tests: Sequence[str]) -> int:
    """In a fresh interpreter: run pytest under coverage and write lines -> tests to ``report``."""
    import coverage
    import pytest

    root = Path.cwd()
    cov = coverage.Coverage(data_file=None, include=[str(root / module) for module in modules])
    durations: dict[str, float] = {}

    class Contexts:
        @pytest.hookimpl(wrapper=True)
        def pytest_runtest_protocol(self, item: pytest.Item, nextitem: pytest.Item | None) -> object:
            cov.switch_context(item.nodeid)
            try:
                return (yield)
            finally:
                cov.switch_context("")

        def pytest_runtest_logreport(self, report: pytest.TestReport) -> None:
            durations[report.nodeid] = durations.get(report.nodeid, 0.0) + report.duration

    cov.start()
    exit_code = pytest.main([*_pytest_arguments(), *tests], plugins=[Contexts()])
    cov.stop()
    data = cov.get_data()
    lines = {}
    for measured in data.measured_files():
        by_line = data.contexts_by_lineno(measured)
        lines[Path(measured).relative_to(root).as_posix()] = {line: sorted(ctx) for line, ctx in by_line.items()}
    imported = [name for name in PRELOAD if name in sys.modules]
    report.write_text(json.dumps({"lines": lines, "durations": durations, "imported": imported}), encoding="utf-8")
    return int(exit_code)


def _environment(copy: Path) -> dict[str, str]:
    # Plugins are loaded by name (_pytest_arguments): autoloading all of them costs seconds per mutant.
    environment = dict(
        os.environ, PYTHONDONTWRITEBYTECODE="1", PYTHONPATH=str(copy), PYTEST_DISABLE_PLUGIN_AUTOLOAD="1"
    )
    environment.pop("PYTEST_ADDOPTS", None)
    return environment


def _pytest_arguments() -> list[str]:
    """Options for every pytest run: no cache, and of the installed plugins only hypothesis's."""
    arguments = ["-q", "-p", "no:cacheprovider"]
    if importlib.util.find_spec("_hypothesis_pytestplugin") is not None:
        arguments += ["-p", "_hypothesis_pytestplugin"]
    return arguments


def _preload(modules: Iterable[str]) -> None:
    for name in modules:
        with contextlib.suppress(ImportError):
            importlib.import_module(name)


class _SameExamples:
    """Hypothesis draws the same examples for every mutant, keeps no example database and has no deadline."""

    def pytest_configure(self, config: object) -> None:
        with contextlib.suppress(ImportError):
            from hypothesis import settings

            settings.register_profile("mutation", database=None, derandomize=True, deadline=None)
            settings.load_profile("mutation")


def _child(copy: Path, mutant: Mutant, tests: Sequence[str]) -> None:
    """In the forked process: run the covering tests against the mutant and exit with pytest's code."""
    os.setsid()  # own process group, so a time-out ends the tests' subprocesses too
    os.chdir(copy)
    sys.path.insert(0, str(copy))
    os.environ.update(_environment(copy))
    sys.dont_write_bytecode = True
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, 1)
    os.dup2(devnull, 2)
    code = 4
    try:
        import pytest

        code = int(pytest.main(["-x", *_pytest_arguments(), *tests], plugins=[_SameExamples()]))
    finally:
        os._exit(code)


def _status(exit_code: int) -> str:
    # pytest: 0 all passed, 1 a test failed, 2 interrupted (a collection error counts: the mutant broke an import)
    return "survived" if exit_code == 0 else "killed"


def _stages(tests: list[str]) -> list[list[str]]:
    """The fastest few tests first, then the rest: most mutants fail one of the first, before the slow collection
    of every covering test file."""
    return [tests[:FIRST_STAGE_TESTS], tests[FIRST_STAGE_TESTS:]] if len(tests) > FIRST_STAGE_TESTS else [tests]


def _run_mutants(
    root: Path,
    copies: Sequence[Path],
    jobs: list[tuple[Mutant, list[str], float]],
    progress: bool,
    record: Path | None = None,
) -> list[Outcome]:
    """Run each (mutant, tests, time limit) in forked processes, one mutant per copy at a time."""
    outcomes: list[Outcome] = []
    pending = list(reversed(jobs))
    running: dict[int, tuple[Mutant, Path, float, float, list[list[str]]]] = {}
    free = list(copies)
    while pending or running:
        while pending and free:
            mutant, tests, limit = pending.pop()
            copy = free.pop()
            (copy / mutant.path).write_text(mutant.source, encoding="utf-8")
            first, *later = _stages(tests)
            running[_fork(copy, mutant, first)] = (mutant, copy, time.monotonic(), limit, later)
        time.sleep(POLL_SECONDS)
        for pid, (mutant, copy, started, limit, later) in list(running.items()):
            finished, wait_status = os.waitpid(pid, os.WNOHANG)
            elapsed = time.monotonic() - started
            if finished == 0 and elapsed < limit:
                continue
            del running[pid]
            if finished == 0:
                with contextlib.suppress(ProcessLookupError):
                    os.killpg(pid, signal.SIGKILL)
                os.waitpid(pid, 0)
                status = "timeout"
            else:
                status = _status(os.waitstatus_to_exitcode(wait_status))
            if status == "survived" and later:
                running[_fork(copy, mutant, later[0])] = (mutant, copy, started, limit, later[1:])
                continue
            shutil.copyfile(root / mutant.path, copy / mutant.path)
            free.append(copy)
            outcomes.append(Outcome(mutant, status, elapsed))
            _report(outcomes[-1], f"{len(outcomes)}/{len(jobs)}", progress, record)
    return outcomes


def _fork(copy: Path, mutant: Mutant, tests: list[str]) -> int:
    pid = os.fork()
    if pid == 0:
        _child(copy, mutant, tests)
    return pid


def _report(outcome: Outcome, count: str, progress: bool, record: Path | None) -> None:
    mutant = outcome.mutant
    if progress:
        print(f"  {count} {outcome.status:8} {mutant.path}:{mutant.line}", file=sys.stderr)
    if record is not None:
        with record.open("a", encoding="utf-8") as handle:
            entry = {"path": mutant.path, "line": mutant.line, "key": mutant.key, "status": outcome.status}
            handle.write(json.dumps(entry) + "\n")


def _check_harness(root: Path, copies: Sequence[Path], work: Sequence[tuple[Mutant, list[str], float]]) -> None:
    """The unmutated modules pass their tests in the forked harness, or no mutant's result would mean anything."""
    first: dict[str, tuple[Mutant, list[str], float]] = {}
    for mutant, tests, limit in work:  # per module, the mutant with the fewest tests: a quick check
        previous = first.get(mutant.path)
        if previous is None or len(tests) < len(previous[1]):
            first[mutant.path] = (mutant, tests, limit)
    unchanged = [
        (replace(mutant, source=(root / mutant.path).read_text(encoding="utf-8")), tests, limit)
        for mutant, tests, limit in first.values()
    ]
    for outcome in _run_mutants(root, copies, unchanged, progress=False):
        if outcome.status != "survived":
            raise SystemExit(f"{outcome.mutant.path}: its tests fail in the harness without any mutation")


def run(
    modules: Sequence[str],
    tests: Sequence[str],
    *,
    root: Path = ROOT,
    equivalents: dict[str, str] | None = None,
    jobs: int = 2,
    time_factor: float = 3.0,
    min_seconds: float = 10.0,
    progress: bool = False,
    record: Path | None = None,
) -> list[Outcome]:
    """Mutate ``modules`` (paths relative to ``root``) and run the covering tests from ``tests`` against each.

    Each mutant gets ``time_factor`` x the baseline time of its tests (at least ``min_seconds``).
    """
    equivalents = equivalents or {}
    with tempfile.TemporaryDirectory(prefix="policyc-mutation-") as scratch:
        copies = [_copy_repository(root, Path(scratch) / f"copy{index}") for index in range(max(jobs, 1))]
        coverage = _measure_coverage(copies[0], modules, tests)
        _preload(["pytest", *coverage.imported])
        outcomes: list[Outcome] = []
        work: list[tuple[Mutant, list[str], float]] = []
        for module in modules:
            for mutant in generate((root / module).read_text(encoding="utf-8"), module):
                covering = coverage.tests_for(mutant)
                if mutant.key in equivalents:
                    outcomes.append(Outcome(mutant, "equivalent"))
                    _report(outcomes[-1], "-", progress, record)
                elif not covering:
                    outcomes.append(Outcome(mutant, "no-tests"))
                    _report(outcomes[-1], "-", progress, record)
                else:
                    baseline = sum(coverage.durations.get(test, 0.0) for test in covering)
                    # each stage also pays pytest's start and collection, up to STAGE_START_SECONDS on a busy machine
                    allowance = STAGE_START_SECONDS * len(_stages(covering))
                    work.append((mutant, covering, max(min_seconds, time_factor * baseline + allowance)))
        _check_harness(root, copies, work)
        outcomes += _run_mutants(root, copies, work, progress, record)
    order = {module: index for index, module in enumerate(modules)}
    return sorted(outcomes, key=lambda o: (order[o.mutant.path], o.mutant.line, o.mutant.key))


def score_table(outcomes: Sequence[Outcome], modules: Sequence[str]) -> str:
    """Per module: mutants, killed (of which time-outs), survived, no tests, equivalent, and the score."""
    names = ("mutants", "killed", "timeout", "survived", "no-tests", "equiv", "score")
    header = f"{'module':42} " + " ".join(f"{name:>8}" for name in names)
    rows = [header, "-" * len(header)]
    for module in [*modules, "total"]:
        chosen = [o for o in outcomes if module in ("total", o.mutant.path)]
        counts = [sum(o.status in wanted for o in chosen) for wanted in _COLUMNS]
        counts[0] = len(chosen)
        scored = counts[0] - counts[5]
        # score = killed / (mutants - equivalent)
        score = f"{100.0 * counts[1] / scored:.1f}%" if scored else "-"
        rows.append(f"{module:42} " + " ".join(f"{value:>8}" for value in [*counts, score]))
    return "\n".join(rows)


_COLUMNS = ((), ("killed", "timeout"), ("timeout",), ("survived",), ("no-tests",), ("equivalent",))


def survivors(outcomes: Sequence[Outcome]) -> str:
    """The mutants no test noticed: ``file:line`` and the key under which one would be listed as equivalent."""
    lines = []
    for outcome in outcomes:
        if outcome.status in ("survived", "no-tests"):
            note = " (no test runs this line)" if outcome.status == "no-tests" else ""
            lines.append(f"{outcome.mutant.path}:{outcome.mutant.line}{note}\n    {outcome.mutant.key}")
    return "\n".join(lines)


def _arguments(argv: Sequence[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(prog="python -m tests.mutation.run", description=__doc__.splitlines()[0])
    parser.add_argument("modules", nargs="*", help="module paths relative to the repository (default: the listed set)")
    parser.add_argument("--tests", action="append", help="test paths to draw from (default: tests/, this folder aside)")
    parser.add_argument("--jobs", type=int, default=2, help="mutants run at once (default 2)")
    parser.add_argument("--time-factor", type=float, default=3.0, help="time limit per mutant, x its tests' baseline")
    parser.add_argument("--root", type=Path, default=ROOT, help=argparse.SUPPRESS)
    parser.add_argument("--equivalent", type=Path, default=EQUIVALENT_FILE, help="the list of equivalent mutants")
    parser.add_argument("--collect-coverage", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--quiet", action="store_true", help="no progress lines")
    parser.add_argument("--record", type=Path, help="append each outcome to this file as a JSON line as it comes")
    return parser.parse_args(argv)


def main(argv: Sequence[str] | None = None) -> int:
    """Command-line entry: print the score table and the survivors; exit 0."""
    args = _arguments(argv)
    modules = args.modules or list(DEFAULT_MODULES)
    tests = args.tests or ["tests", "--ignore=tests/mutation"]
    if args.collect_coverage is not None:
        return _collect_coverage(args.collect_coverage, modules, tests)
    equivalents = load_equivalents(args.equivalent)
    started = time.monotonic()
    outcomes = run(
        modules,
        tests,
        root=args.root.resolve(),
        equivalents=equivalents,
        jobs=args.jobs,
        time_factor=args.time_factor,
        progress=not args.quiet,
        record=args.record,
    )
    stale = sorted(
        key for key in equivalents if key.split("::")[0] in modules and key not in {o.mutant.key for o in outcomes}
    )
    print(score_table(outcomes, modules))
    print(f"\n{len(outcomes)} mutants in {time.monotonic() - started:.0f} s")
    if any(o.status in ("survived", "no-tests") for o in outcomes):
        print("\nsurvivors (kill them with a test, or list them in tests/mutation/equivalent.txt with a reason):")
        print(survivors(outcomes))
    if stale:
        print("\nlisted as equivalent but no longer generated (remove from the list):\n" + "\n".join(stale))
    return 0


if __name__ == "__main__":
    sys.exit(main())
