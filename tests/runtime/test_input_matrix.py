"""Every kind of input a caller may pass, through the runtime and the standalone module side by side.

Each case either decides, and then must decide exactly as the plain float64 array in feature order
does (rows with a missing or non-finite value sent to the reject action with reason ``invalid``, never a
NaN posterior on a valid row), or is refused with the documented InputError; the module must give the
same bits or the same message. The figures appear in the terminal summary.
"""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from decimal import Decimal
from fractions import Fraction
from pathlib import Path
from types import ModuleType

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pytest
from helpers import DEMOS, PACKHOUSE, read_csv_columns, standalone
from hypothesis import given, settings
from hypothesis import strategies as st

from policyc.compiler.build import compile_policy
from policyc.runtime import InputError, Rule

Record = Callable[[str, Mapping[str, int]], None]
FEATURES = ("firmness_n", "blush_frac", "mass_g", "brix")


@pytest.fixture(scope="module")
def packhouse() -> Rule:
    rule = compile_policy(PACKHOUSE).rule
    assert rule.features == FEATURES
    return rule


@pytest.fixture(scope="module")
def module(packhouse: Rule, tmp_path_factory: pytest.TempPathFactory) -> ModuleType:
    return standalone(packhouse, tmp_path_factory.mktemp("module"))


@pytest.fixture(scope="module")
def base(packhouse: Rule) -> np.ndarray:
    return read_csv_columns(DEMOS / "packhouse" / "incoming.csv", FEATURES)[:40].copy()


@dataclass(frozen=True)
class Case:
    """An input built from the base rows, and what it must give: the float64 rows in feature order that it
    stands for (NaN where a value is missing), or the message of the InputError it must raise."""

    build: Callable[[np.ndarray], object]
    stands_for: Callable[[np.ndarray], np.ndarray] | None = None
    refused: str | None = None


def with_values(
    rows: list[int], column: int, value: float, where_firm: bool = False
) -> Callable[[np.ndarray], np.ndarray]:
    """The rows with ``value`` at ``column`` in the given rows (or in every row whose firmness exceeds 50)."""

    def change(X: np.ndarray) -> np.ndarray:
        X = X.copy()
        X[np.flatnonzero(X[:, 0] > FIRM) if where_firm else rows, column] = value
        return X

    return change


FIRM = 50.0


def nullable_with_na(X: np.ndarray) -> pd.DataFrame:
    """A nullable-float DataFrame with pandas NA as the firmness of every fruit firmer than 50 N."""
    frame = pd.DataFrame(columns(X)).astype("Float64")
    frame["firmness_n"] = frame["firmness_n"].mask(frame["firmness_n"] > FIRM)
    return frame


def masked(X: np.ndarray) -> np.ma.MaskedArray:
    mask = np.zeros(X.shape, dtype=bool)
    mask[[2, 9], [0, 3]] = True
    return np.ma.MaskedArray(X, mask=mask)


def columns(X: np.ndarray, order: tuple[str, ...] = FEATURES) -> dict[str, np.ndarray]:
    return {name: X[:, FEATURES.index(name)] for name in order}


def money(values: np.ndarray) -> list[Decimal | None]:
    """Values as decimals with two places, the first one missing (a Parquet decimal column with a null)."""
    return [None, *(Decimal(f"{v:.2f}") for v in values[1:])]


SHUFFLED = ("brix", "firmness_n", "mass_g", "blush_frac")
SUBNORMAL = 5e-324

CASES: dict[str, Case] = {
    "float64": Case(lambda X: X, lambda X: X),
    "NaN": Case(with_values([1, 7], 2, np.nan), with_values([1, 7], 2, np.nan)),
    "+inf": Case(with_values([3], 0, np.inf), with_values([3], 0, np.inf)),
    "-inf": Case(with_values([4], 1, -np.inf), with_values([4], 1, -np.inf)),
    "1e308": Case(with_values([5], 2, 1e308), with_values([5], 2, 1e308)),
    "-1e308": Case(with_values([6], 0, -1e308), with_values([6], 0, -1e308)),
    "subnormal": Case(with_values([0, 8], 1, SUBNORMAL), with_values([0, 8], 1, SUBNORMAL)),
    "negative zero": Case(with_values([0], 1, -0.0), with_values([0], 1, 0.0)),
    "float32": Case(lambda X: X.astype(np.float32), lambda X: X.astype(np.float32).astype(np.float64)),
    "float16": Case(lambda X: X.astype(np.float16), lambda X: X.astype(np.float16).astype(np.float64)),
    "integer": Case(lambda X: np.round(X).astype(np.int64), lambda X: np.round(X)),
    "unsigned": Case(lambda X: np.round(np.abs(X)).astype(np.uint32), lambda X: np.round(np.abs(X))),
    "Fortran order": Case(np.asfortranarray, lambda X: X),
    "non-contiguous": Case(lambda X: np.repeat(X, 2, axis=1)[:, ::2], lambda X: X),
    "reversed rows view": Case(lambda X: X[::-1], lambda X: X[::-1]),
    "nested lists": Case(lambda X: X.tolist(), lambda X: X),
    "masked": Case(masked, lambda X: np.where(np.ma.getmaskarray(masked(X)), np.nan, X)),
    "object with None": Case(
        lambda X: np.where(np.arange(X.shape[0])[:, None] == 5, None, X.astype(object)),
        lambda X: np.where(np.arange(X.shape[0])[:, None] == 5, np.nan, X),
    ),
    "one row": Case(lambda X: X[:1], lambda X: X[:1]),
    "pandas, shuffled": Case(lambda X: pd.DataFrame(columns(X, SHUFFLED)), lambda X: X),
    "pandas, extra text column": Case(lambda X: pd.DataFrame({"id": ["x"] * len(X), **columns(X)}), lambda X: X),
    "pandas, nullable with NA": Case(nullable_with_na, with_values([], 0, np.nan, where_firm=True)),
    "polars, shuffled": Case(lambda X: pl.DataFrame(columns(X, SHUFFLED)), lambda X: X),
    "pyarrow table, shuffled": Case(lambda X: pa.table(columns(X, SHUFFLED)), lambda X: X),
    "pyarrow batch, extra column": Case(
        lambda X: pa.RecordBatch.from_pydict({**columns(X), "x": np.zeros(len(X))}), lambda X: X
    ),
    "mapping, shuffled": Case(lambda X: columns(X, SHUFFLED), lambda X: X),
    "pyarrow decimal column with null": Case(
        lambda X: pa.table({**columns(X), "brix": pa.array(money(X[:, 3]), type=pa.decimal128(6, 2))}),
        lambda X: np.column_stack([X[:, :3], [np.nan if v is None else float(v) for v in money(X[:, 3])]]),
    ),
    "fractions": Case(
        lambda X: np.array([[Fraction(v).limit_denominator(1000) for v in row] for row in X], dtype=object),
        lambda X: np.array([[float(Fraction(v).limit_denominator(1000)) for v in row] for row in X]),
    ),
    # refused, each with the documented message
    "narrow": Case(lambda X: X[:, :3], refused="expected 4 feature columns, got 3"),
    "wide": Case(lambda X: np.column_stack([X, X[:, 0]]), refused="expected 4 feature columns, got 5"),
    "1-D": Case(lambda X: X[0], refused="got 1-D; for one record use decide_one"),
    "3-D": Case(lambda X: X[None], refused="expected a 2-D array"),
    "empty": Case(lambda X: X[:0], refused="the input has no rows"),
    "empty table": Case(lambda X: pd.DataFrame(columns(X[:0])), refused="the input has no rows"),
    "scalar": Case(lambda X: 3.0, refused="got 0-D"),
    "strings": Case(lambda X: X.astype(str), refused="expected a numeric array, got dtype <U"),
    "text in object array": Case(
        lambda X: np.where(np.arange(X.shape[0])[:, None] == 3, "12.5", X.astype(object)),
        refused="row 3, column 0 must be a number, got str '12.5'",
    ),
    "complex": Case(lambda X: X.astype(complex), refused="expected a numeric array, got dtype complex128"),
    "bool": Case(lambda X: X > 20.0, refused="holds booleans"),
    "datetime": Case(lambda X: np.zeros(X.shape, dtype="datetime64[s]"), refused="got dtype datetime64"),
    "ragged lists": Case(lambda X: [X[0].tolist(), X[1, :3].tolist()], refused="cannot be read as an array"),
    "pandas, column missing": Case(
        lambda X: pd.DataFrame(columns(X, FEATURES[:3])), refused=r"no column for feature\(s\) \['brix'\]"
    ),
    "pandas, column duplicated": Case(
        lambda X: pd.DataFrame(np.column_stack([X, X[:, 0] * 2]), columns=[*FEATURES, "firmness_n"]),
        refused=r"'firmness_n' \(2 times\) appear more than once",
    ),
    "pandas, unnamed columns": Case(lambda X: pd.DataFrame(X), refused=r"its columns: \[0, 1, 2, 3\]"),
    "pandas, text column": Case(
        lambda X: pd.DataFrame(columns(X)).astype({"brix": str}), refused="column 'brix', row 0 must be a number"
    ),
    "polars, bool column": Case(
        lambda X: pl.DataFrame({**columns(X), "brix": X[:, 3] > 12}), refused="column 'brix' holds booleans"
    ),
    "pyarrow, column missing": Case(
        lambda X: pa.table(columns(X, FEATURES[1:])), refused=r"no column for feature\(s\) \['firmness_n'\]"
    ),
    "mapping, unequal lengths": Case(
        lambda X: {**columns(X), "mass_g": X[:-2, 2]}, refused="the feature columns differ in length"
    ),
    "mapping of single values": Case(
        lambda X: dict(zip(FEATURES, X[0].tolist(), strict=True)), refused="is a single value, not a column"
    ),
}


def run(decide: Callable[[object], np.ndarray], value: object) -> tuple[str, object]:
    try:
        return "decided", decide(value)
    except ValueError as exc:
        return ("refused" if type(exc).__name__ == "InputError" else "other"), str(exc)
    except Exception as exc:  # the point of the test: any other exception is a finding
        return "other", f"{type(exc).__name__}: {exc}"


def expected_decisions(rule: Rule, stands_for: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Decisions on the plain float64 array, and which rows are invalid (a missing or non-finite value, or
    so far from every class that every density underflows)."""
    explanation = rule.explain(np.ascontiguousarray(stands_for, dtype=np.float64))
    return explanation.action, ~explanation.valid


def judge(rule: Rule, module: ModuleType, base: np.ndarray, name: str, case: Case) -> tuple[str, list[str]]:
    """The case's outcome ("decided correctly", "refused as documented", or what went wrong) and findings."""
    value = case.build(base)
    outcome, result = run(rule.decide, value)
    module_outcome, module_result = run(module.decide, value)
    findings = []
    if outcome != module_outcome or (outcome != "decided" and result != module_result):
        findings.append(f"{name}: runtime {outcome} {result!r}, module {module_outcome} {module_result!r}")
    if case.refused is not None:
        if outcome == "refused" and re.search(case.refused, str(result)):
            return "refused as documented", findings
        return "wrong refusal", [*findings, f"{name}: expected {case.refused!r}, got {outcome} {result!r}"]
    if outcome != "decided" or case.stands_for is None:
        return "wrongly refused", [*findings, f"{name}: expected a decision, got {outcome} {result!r}"]
    expected, invalid = expected_decisions(rule, case.stands_for(base))
    explanation = rule.explain(value)
    if not np.array_equal(result, expected) or not np.array_equal(module_result, result):
        findings.append(f"{name}: wrong decisions")
    if np.isnan(explanation.posteriors[explanation.valid]).any():
        findings.append(f"{name}: NaN posterior on a valid row")
    if not np.array_equal(explanation.reason == "invalid", invalid):
        findings.append(f"{name}: the reasons do not mark exactly the invalid rows")
    return ("decided correctly" if not findings else "silent wrong"), findings


def test_every_kind_of_input_decides_rightly_or_is_refused_as_documented(
    packhouse: Rule, module: ModuleType, base: np.ndarray, record_figures: Record
) -> None:
    findings: list[str] = []
    outcomes: Counter[str] = Counter()
    for name, case in CASES.items():
        outcome, found = judge(packhouse, module, base, name, case)
        outcomes[outcome] += 1
        findings += found
    assert findings == []
    refused = sum(1 for case in CASES.values() if case.refused is not None)
    assert outcomes == Counter({"decided correctly": len(CASES) - refused, "refused as documented": refused})
    record_figures(
        "runtime inputs, runtime and standalone module side by side",
        {
            "cases": len(CASES),
            "decided correctly": outcomes["decided correctly"],
            "refused as documented": outcomes["refused as documented"],
            "tracebacks": 0,
            "silent wrong": 0,
            "module disagreements": 0,
        },
    )


# --- properties over random tables and values -------------------------------------------------------------

finite_or_not = st.floats(allow_nan=True, allow_infinity=True, allow_subnormal=True, width=64)


@settings(max_examples=150, deadline=None)
@given(
    rows=st.lists(st.lists(finite_or_not, min_size=4, max_size=4), min_size=1, max_size=12),
    kind=st.sampled_from(["pandas", "polars", "pyarrow", "mapping", "array"]),
    order=st.permutations(FEATURES),
    extra=st.booleans(),
)
def test_any_values_in_any_table_decide_as_the_ordered_array(
    packhouse: Rule,
    module: ModuleType,
    rows: list[list[float]],
    kind: str,
    order: list[str],
    extra: bool,
) -> None:
    X = np.array(rows, dtype=np.float64)
    named = columns(X, tuple(order)) | ({"note": np.full(len(X), 7.0)} if extra else {})
    table: object = {
        "pandas": pd.DataFrame,
        "polars": pl.DataFrame,
        "pyarrow": pa.table,
        "mapping": dict,
        "array": lambda _: X,
    }[kind](named)
    expected = packhouse.explain(X)
    explanation = packhouse.explain(table)
    assert np.array_equal(explanation.action, expected.action)
    assert np.array_equal(module.decide(table), expected.action)
    assert np.array_equal(module.posteriors(table), explanation.posteriors, equal_nan=True)
    # never a NaN posterior on a valid row; every row with a missing or non-finite value is invalid
    valid = explanation.valid
    assert np.isfinite(explanation.posteriors[valid]).all()
    assert np.allclose(explanation.posteriors[valid].sum(axis=1), 1.0, rtol=0, atol=1e-12)
    assert not valid[~np.isfinite(X).all(axis=1)].any()
    assert np.array_equal(explanation.reason == "invalid", ~valid)


def test_a_strict_rule_raises_rather_than_decides_on_a_missing_value(packhouse: Rule, tmp_path: Path) -> None:
    strict = Rule(dict(packhouse.manifest) | {"invalid_input": "error"}, dict(packhouse.params))
    strict_module = standalone(strict, tmp_path)
    frame = pd.DataFrame(columns(np.ones((3, 4)) * [40.0, 0.5, 150.0, 12.0])).astype("Float64")
    frame.loc[2, "mass_g"] = pd.NA
    with pytest.raises(InputError, match=r"row\(s\) 2 \(0-based\).*row 2: 'mass_g'"):
        strict.decide(frame)
    with pytest.raises(ValueError, match=r"row\(s\) 2 \(0-based\).*row 2: 'mass_g'"):
        strict_module.decide(frame)
