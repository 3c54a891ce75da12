"""Mutated demo policies: every one is checked or refused with located errors, none ends in a traceback.

The mutations are those a careless hand or a hostile file makes: deleted keys, values of the wrong type,
huge, tiny and non-finite numbers, unicode and long names, deep nesting, duplicated lines (duplicate
keys), truncation and random bytes. Each example runs the whole language stage in process
(bytes -> source -> model -> every consistency rule) through the public API; a fraction also runs
through ``policyc check``. Any exception other than a PolicyError fails the test with the example.

The count of examples is a promise of the README (at least 10,000 per run); the figures are printed.
"""

from __future__ import annotations

import functools
import re
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from policyc.cli import main as cli_main
from policyc.geometry import reach
from policyc.language.checks import check_document
from policyc.language.diagnostics import PolicyError
from policyc.language.source import load_source, parse_source_bytes

ROOT = Path(__file__).resolve().parents[2]
DEMOS = sorted((ROOT / "policies-demo").glob("*/policy*.yaml"))
SEEDS = [(path, path.read_bytes(), load_source(path).data) for path in DEMOS]

IN_PROCESS_EXAMPLES = 3_400  # per test below; three tests: 10,200 policies per run
CLI_EXAMPLES = 300

FUZZ_SETTINGS = settings(
    max_examples=IN_PROCESS_EXAMPLES,
    deadline=None,
    derandomize=True,  # a fixed seed per test; a failure prints the policy bytes that reproduce it
    database=None,
    suppress_health_check=[
        HealthCheck.too_slow,
        HealthCheck.data_too_large,
        HealthCheck.large_base_example,
        HealthCheck.function_scoped_fixture,  # the memoising fixture is set once per test, as intended
    ],
)

OUTCOMES: Counter[str] = Counter()
VALUE_START = re.compile(rb"(?::|\[|,|-) ")
DUMPER = getattr(yaml, "CSafeDumper", yaml.SafeDumper)  # libyaml where PyYAML has it: the dump is only the means


@functools.lru_cache(maxsize=4096)
def _solve_once(key: bytes, shape: tuple[int, ...], row: int) -> tuple[float, np.ndarray]:
    return reach.winning_margin(np.frombuffer(key).reshape(shape), row)


@pytest.fixture(autouse=True)
def _memoised_linear_programs(monkeypatch: pytest.MonkeyPatch) -> None:
    """Solve each distinct reachability program once: most mutations leave the loss matrix as it was.

    winning_margin is a pure function of (loss, row), so caching it changes no outcome, only the time.
    """

    def cached(loss: np.ndarray, row: int) -> tuple[float, np.ndarray]:
        array = np.ascontiguousarray(loss, dtype=np.float64)
        return _solve_once(array.tobytes(), array.shape, row)

    monkeypatch.setattr("policyc.language.checks.winning_margin", cached)


def outcome_of(raw: bytes, seed: Path) -> str:
    """Where the policy ended: refused by the loader, the model or a rule, or accepted. Anything else raises.

    Every error of a refusal names the file, line and column and has a kebab-case code.
    """
    name = str(seed)
    try:
        document = parse_source_bytes(raw, name, seed.parent)
        report = check_document(document)
    except PolicyError as exc:  # the loader's refusals; check_document reports the model's and the rules'
        stage, diagnostics = "refused by the loader", exc.diagnostics
    else:
        stage = "refused by the model" if report.policy is None else "refused by a rule"
        diagnostics = report.diagnostics
    errors = [d for d in diagnostics if d.is_error]
    for diagnostic in errors:
        assert diagnostic.file == name and diagnostic.line is not None and diagnostic.col is not None, diagnostic
        assert re.fullmatch(r"[a-z0-9]+(?:-[a-z0-9]+)+", diagnostic.code), diagnostic
    return stage if errors else "accepted"


# --- mutations -----------------------------------------------------------------------------------

NUMBERS = st.one_of(
    st.integers(),
    st.integers(min_value=-(10**30), max_value=10**30),
    st.floats(allow_nan=True, allow_infinity=True, allow_subnormal=True),
    st.sampled_from([0.0, -0.0, 1e20, -1e20, 1e308, 5e-324, 1e-300, 2**53 + 1, 10**400, -(10**1000)]),
)
NAMES = st.one_of(
    st.text(max_size=12),
    st.builds(lambda char, count: char * count, st.characters(), st.integers(190, 320)),  # long names
    st.sampled_from(["premium", "défaut", "🍎", "a b", " a", "yes", "null", "1e3", "0x1f", "~", "-", "*a", "&a"]),
)
SCALARS = st.one_of(NUMBERS, NAMES, st.booleans(), st.none())
VALUES = st.one_of(SCALARS, st.lists(SCALARS, max_size=4), st.dictionaries(NAMES, SCALARS, max_size=4))


def nested(depth: int, leaf: Any) -> Any:
    for _ in range(depth):
        leaf = [leaf]
    return leaf


def paths(data: Any, prefix: tuple[Any, ...] = ()) -> Iterator[tuple[Any, ...]]:
    """Every key path of the loaded data (lists as indices)."""
    yield prefix
    if isinstance(data, dict):
        for key, value in data.items():
            yield from paths(value, (*prefix, key))
    elif isinstance(data, list | tuple):
        for index, value in enumerate(data):
            yield from paths(value, (*prefix, index))


def as_plain(data: Any) -> Any:
    if isinstance(data, dict):
        return {key: as_plain(value) for key, value in data.items()}
    if isinstance(data, list | tuple):
        return [as_plain(value) for value in data]
    return data


def replaced(data: Any, path: tuple[Any, ...], change: Any) -> Any:
    """A copy of data with the node at path passed through change (None from change deletes a key)."""
    if not path:
        return change(data)
    head, rest = path[0], path[1:]
    if isinstance(data, dict):
        copy = dict(data)
        new = replaced(copy[head], rest, change)
        if new is _DELETE:
            del copy[head]
        else:
            copy[head] = new
        return copy
    items = list(data)
    new = replaced(items[head], rest, change)
    if new is _DELETE:
        del items[head]
    else:
        items[head] = new
    return items


_DELETE = object()


@st.composite
def data_mutation(draw: st.DrawFn) -> tuple[Path, bytes]:
    """A demo policy with one to three of its nodes deleted, replaced, renamed or nested deep, dumped as YAML."""
    path, _, data = draw(st.sampled_from(SEEDS))
    document: Any = as_plain(data)
    for _ in range(draw(st.integers(1, 3))):
        where = draw(st.sampled_from(list(paths(document))))
        kind = draw(st.sampled_from(["delete", "value", "number", "name", "nest", "rename"]))
        if kind == "delete" and where:
            document = replaced(document, where, lambda _: _DELETE)
        elif kind in ("value", "number", "name"):
            new_value = draw({"value": VALUES, "number": NUMBERS, "name": NAMES}[kind])
            document = replaced(document, where, lambda _, v=new_value: v)
        elif kind == "nest":
            depth = draw(st.integers(1, 60))
            document = replaced(document, where, lambda node, d=depth: nested(d, node))
        elif kind == "rename" and where and isinstance(where[-1], str):
            new_key = draw(NAMES)
            document = replaced(
                document,
                where[:-1],
                lambda parent, k=where[-1], n=new_key: {(n if q == k else q): v for q, v in parent.items()},
            )
    text = yaml.dump(document, Dumper=DUMPER, allow_unicode=draw(st.booleans()), sort_keys=False, width=10**6)
    return path, text.encode("utf-8")


@st.composite
def byte_mutation(draw: st.DrawFn, after_data_mutation: bool = False) -> tuple[Path, bytes]:
    """A demo policy's bytes truncated, overwritten, spliced with random bytes, or with lines repeated or dropped.

    With ``after_data_mutation`` the bytes are those of a policy whose values were mutated first.
    """
    if after_data_mutation:
        path, raw = draw(data_mutation())
    else:
        path, raw, _ = draw(st.sampled_from(SEEDS))
    for _ in range(draw(st.integers(1, 3))):
        at = draw(st.integers(0, len(raw)))
        kind = draw(
            st.sampled_from(["truncate", "insert", "overwrite", "repeat-line", "drop-line", "brackets", "digits"])
        )
        if kind == "truncate":
            raw = raw[:at]
        elif kind == "insert":
            raw = raw[:at] + draw(st.binary(min_size=1, max_size=8)) + raw[at:]
        elif kind == "overwrite":
            patch = draw(st.binary(min_size=1, max_size=4))
            raw = raw[:at] + patch + raw[at + len(patch) :]
        elif kind == "digits":  # an integer of up to thousands of digits where a value starts
            starts = [match.end() for match in VALUE_START.finditer(raw)] or [at]
            at = draw(st.sampled_from(starts))
            raw = raw[:at] + b"9" * draw(st.integers(1, 6000)) + raw[at:]
        elif kind == "brackets":
            raw = raw[:at] + draw(st.sampled_from([b"[", b"{", b"- ", b"? "])) * draw(st.integers(1, 1500)) + raw[at:]
        else:
            lines = raw.splitlines(keepends=True)
            if lines:
                index = draw(st.integers(0, len(lines) - 1))
                lines[index : index + 1] = [lines[index]] * 2 if kind == "repeat-line" else []
                raw = b"".join(lines)
    return path, raw


# --- the runs ------------------------------------------------------------------------------------


@FUZZ_SETTINGS
@given(data_mutation())
def test_policies_with_mutated_values_are_checked_or_refused(case: tuple[Path, bytes]) -> None:
    OUTCOMES[outcome_of(case[1], case[0])] += 1


@FUZZ_SETTINGS
@given(byte_mutation())
def test_policies_with_mutated_bytes_are_checked_or_refused(case: tuple[Path, bytes]) -> None:
    OUTCOMES[outcome_of(case[1], case[0])] += 1


@FUZZ_SETTINGS
@given(byte_mutation(after_data_mutation=True))
def test_policies_with_mutated_values_and_bytes_are_checked_or_refused(case: tuple[Path, bytes]) -> None:
    OUTCOMES[outcome_of(case[1], case[0])] += 1


@settings(FUZZ_SETTINGS, max_examples=CLI_EXAMPLES)
@given(case=st.one_of(data_mutation(), byte_mutation()))
def test_policyc_check_on_mutated_files_exits_zero_or_one_without_a_traceback(
    case: tuple[Path, bytes], tmp_path_factory: pytest.TempPathFactory
) -> None:
    seed, raw = case
    target = tmp_path_factory.mktemp("fuzz") / seed.name
    target.write_bytes(raw)
    for support in seed.parent.glob("*.csv"):  # relative data paths resolve as beside the demo
        (target.parent / support.name).symlink_to(support)
    result = CliRunner().invoke(cli_main, ["check", str(target)])
    assert result.exit_code in (0, 1), result.output
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    assert "Traceback" not in result.output
    OUTCOMES["cli-" + ("refused" if result.exit_code else "accepted")] += 1


def test_fuzz_figures(capsys: pytest.CaptureFixture[str]) -> None:
    """Print what the runs above tried (they run first, in file order); a traceback would have failed them."""
    cli = {key: count for key, count in OUTCOMES.items() if key.startswith("cli-")}
    in_process = {key: count for key, count in OUTCOMES.items() if not key.startswith("cli-")}
    if not in_process:
        pytest.skip("the fuzz runs were deselected")
    with capsys.disabled():
        print(
            f"\nfuzzed policies: {sum(in_process.values())} in process "
            f"({', '.join(f'{count} {key}' for key, count in sorted(in_process.items()))}); "
            f"{sum(cli.values())} through policyc check ({cli.get('cli-refused', 0)} exit 1); tracebacks: 0"
        )
    assert sum(in_process.values()) >= 10_000
