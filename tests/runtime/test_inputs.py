"""What the runtime accepts as input: tables read by column name, missing values as invalid rows, refusals.

Every case also runs through the standalone module, which must agree with the runtime bit for bit.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from decimal import Decimal
from fractions import Fraction
from pathlib import Path
from types import ModuleType
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pytest
from helpers import CLAIMS, DEMOS, PACKHOUSE, read_csv_columns, standalone

from policyc.compiler.build import compile_policy
from policyc.runtime import REASONS, InputError, Rule


@pytest.fixture(scope="module")
def packhouse() -> Rule:
    return compile_policy(PACKHOUSE).rule


@pytest.fixture(scope="module")
def strict(packhouse: Rule) -> Rule:
    return Rule(dict(packhouse.manifest) | {"invalid_input": "error"}, dict(packhouse.params))


@pytest.fixture(scope="module")
def module(packhouse: Rule, tmp_path_factory: pytest.TempPathFactory) -> ModuleType:
    return standalone(packhouse, tmp_path_factory.mktemp("module"))


@pytest.fixture(scope="module")
def incoming(packhouse: Rule) -> np.ndarray:
    return read_csv_columns(DEMOS / "packhouse" / "incoming.csv", packhouse.features)


@contextmanager
def input_error(match: str) -> Iterator[None]:
    """Expect the runtime's InputError, or the standalone module's own class of that name."""
    with pytest.raises(ValueError, match=match) as info:
        yield
    assert type(info.value).__name__ == "InputError"


def frame(X: np.ndarray, names: tuple[str, ...]) -> dict[str, np.ndarray]:
    return {name: X[:, j] for j, name in enumerate(names)}


TABLES: dict[str, Callable[[dict[str, Any]], object]] = {
    "pandas": pd.DataFrame,
    "polars": pl.DataFrame,
    "pyarrow-table": pa.table,
    "pyarrow-batch": lambda columns: pa.RecordBatch.from_pydict(columns),
    "mapping": dict,
    "structured": lambda columns: pd.DataFrame(columns).to_records(index=False),
}


# --- finding 1: tables are read by column name, not by position -----------------------------------------


@pytest.mark.parametrize("kind", TABLES)
def test_a_table_with_shuffled_columns_decides_by_name(
    kind: str, packhouse: Rule, module: ModuleType, incoming: np.ndarray
) -> None:
    expected = packhouse.decide(incoming)
    shuffled = tuple(reversed(packhouse.features))
    table = TABLES[kind]({name: incoming[:, packhouse.features.index(name)] for name in shuffled})
    assert np.array_equal(packhouse.decide(table), expected)
    assert np.array_equal(module.decide(table), expected)
    assert np.array_equal(packhouse.posteriors(table), packhouse.posteriors(incoming))
    # read by position the same values would decide otherwise on most rows: the test can tell
    by_position = packhouse.decide(np.column_stack([incoming[:, packhouse.features.index(n)] for n in shuffled]))
    assert (by_position != expected).mean() > 0.5


@pytest.mark.parametrize("kind", TABLES)
def test_extra_columns_are_ignored(kind: str, packhouse: Rule, module: ModuleType, incoming: np.ndarray) -> None:
    columns = {"item_id": [f"N{i:05d}" for i in range(len(incoming))], **frame(incoming, packhouse.features)}
    columns["colour"] = np.ones(len(incoming))
    table = TABLES[kind](columns)
    assert np.array_equal(packhouse.decide(table), packhouse.decide(incoming))
    assert np.array_equal(module.decide(table), packhouse.decide(incoming))


@pytest.mark.parametrize("kind", TABLES)
def test_a_missing_feature_column_is_refused_by_name(kind: str, packhouse: Rule, incoming: np.ndarray) -> None:
    columns = frame(incoming, packhouse.features)
    del columns["brix"]
    with pytest.raises(InputError, match=r"no column for feature\(s\) \['brix'\]"):
        packhouse.decide(TABLES[kind](columns))


def test_a_frame_with_unnamed_columns_is_refused_rather_than_read_by_position(
    packhouse: Rule, incoming: np.ndarray
) -> None:
    with pytest.raises(InputError, match=r"no column for feature.*its columns: \[0, 1, 2, 3\]"):
        packhouse.decide(pd.DataFrame(incoming))
    assert np.array_equal(packhouse.decide(pd.DataFrame(incoming).to_numpy()), packhouse.decide(incoming))


# --- finding 4: a duplicated feature column is refused -----------------------------------------------------


def test_a_duplicated_feature_column_is_refused(packhouse: Rule, module: ModuleType, incoming: np.ndarray) -> None:
    names = [*packhouse.features, "brix"]
    doubled = np.column_stack([incoming, incoming[:, 3] + 1.0])  # the two brix columns disagree
    tables = {
        "pandas": pd.DataFrame(doubled, columns=names),
        "pyarrow": pa.Table.from_arrays([pa.array(doubled[:, j]) for j in range(5)], names=names),
    }
    for table in tables.values():
        for decide in (packhouse.decide, module.decide, packhouse.explain):
            with input_error(r"'brix' \(2 times\) appear more than once"):
                decide(table)
    # a duplicated column that is not a feature is ignored
    other = pd.DataFrame(np.column_stack([incoming, incoming[:, :2]]), columns=[*packhouse.features, "x", "x"])
    assert np.array_equal(packhouse.decide(other), packhouse.decide(incoming))


def test_columns_of_different_lengths_are_refused(packhouse: Rule, incoming: np.ndarray) -> None:
    columns = frame(incoming, packhouse.features)
    columns["mass_g"] = columns["mass_g"][:-1]
    with pytest.raises(InputError, match=r"differ in length.*'mass_g': 599"):
        packhouse.decide(columns)


# --- finding 5: masked entries are missing values; booleans are refused -----------------------------------


def test_masked_entries_are_missing_values_not_their_hidden_values(
    packhouse: Rule, module: ModuleType, incoming: np.ndarray
) -> None:
    X = incoming[:8]
    mask = np.zeros(X.shape, dtype=bool)
    mask[2, 1] = mask[5, 3] = True
    masked = np.ma.MaskedArray(X, mask=mask)
    reject = len(packhouse.actions) - 1
    assert (packhouse.decide(X)[[2, 5]] != reject).all()  # the hidden values would be decided
    for decide in (packhouse.decide, module.decide):
        decided = decide(masked)
        assert decided[[2, 5]].tolist() == [reject, reject]
        assert np.array_equal(decided[[0, 1, 3, 4, 6, 7]], packhouse.decide(X)[[0, 1, 3, 4, 6, 7]])
    assert packhouse.explain(masked).reason[[2, 5]].tolist() == ["invalid", "invalid"]
    columns: dict[str, object] = frame(X, packhouse.features)
    columns["blush_frac"] = np.ma.MaskedArray(X[:, 1], mask=mask[:, 1])
    assert packhouse.decide(columns)[2] == reject


@pytest.mark.parametrize("where", ["array", "column", "record"])
def test_booleans_are_refused(where: str, packhouse: Rule, module: ModuleType, incoming: np.ndarray) -> None:
    if where == "array":
        value: object = incoming[:4] > 20.0
    elif where == "column":
        value = frame(incoming[:4], packhouse.features) | {"brix": incoming[:4, 3] > 12.0}
    else:
        value = dict(zip(packhouse.features, incoming[0].tolist(), strict=True)) | {"brix": True}
    for method in (packhouse.decide, module.decide) if where != "record" else (packhouse.explain,):
        with input_error("boolean"):
            method(value)


# --- finding 6: missing values are invalid input, following invalid_input --------------------------------


def missing_value_tables(X: np.ndarray, features: tuple[str, ...]) -> dict[str, object]:
    """The same table with a missing value at (1, blush_frac) and (4, mass_g), in each library's spelling."""
    columns: dict[str, list[float | None]] = {name: X[:, j].tolist() for j, name in enumerate(features)}
    columns["blush_frac"][1] = None
    columns["mass_g"][4] = None
    pandas_na = pd.DataFrame({name: pd.array(values, dtype="Float64") for name, values in columns.items()})
    assert pandas_na["mass_g"].isna().tolist()[4] is True
    return {
        "pandas NA": pandas_na,
        "pandas NaN": pd.DataFrame(columns, dtype=float),
        "pandas object": pd.DataFrame({n: pd.Series(v, dtype=object) for n, v in columns.items()}),
        "polars null": pl.DataFrame(columns),
        "pyarrow null": pa.table(columns),
        "mapping of lists": columns,
        "object array": np.array([[columns[n][i] for n in features] for i in range(X.shape[0])], dtype=object),
        "nested lists": [[columns[n][i] for n in features] for i in range(X.shape[0])],
    }


def test_missing_values_are_rejected_per_row(packhouse: Rule, module: ModuleType, incoming: np.ndarray) -> None:
    X = incoming[:6]
    reject = len(packhouse.actions) - 1
    expected = packhouse.decide(X)
    expected[[1, 4]] = reject
    assert (packhouse.decide(X)[[1, 4]] != reject).all()
    for name, table in missing_value_tables(X, packhouse.features).items():
        assert np.array_equal(packhouse.decide(table), expected), name
        assert np.array_equal(module.decide(table), expected), name
        explanation = packhouse.explain(table)
        assert explanation.valid.tolist() == [True, False, True, True, False, True], name
        assert explanation.reason.tolist() == ["min-risk", "invalid", "min-risk", "min-risk", "invalid", "min-risk"]


def test_missing_values_under_invalid_input_error_name_the_row_and_column(
    strict: Rule, incoming: np.ndarray, tmp_path: Path
) -> None:
    strict_module = standalone(strict, tmp_path)
    for name, table in missing_value_tables(incoming[:6], strict.features).items():
        for method in (strict.decide, strict.explain, strict_module.decide):
            with input_error(r"row\(s\) 1, 4 .*row 1: 'blush_frac'; row 4: 'mass_g'"):
                method(table)
        assert name


def test_decide_one_treats_none_as_a_missing_value(packhouse: Rule, strict: Rule, incoming: np.ndarray) -> None:
    record = dict(zip(packhouse.features, incoming[0].tolist(), strict=True))
    assert packhouse.decide_one(record | {"brix": None}) == "hold_for_inspector"
    assert packhouse.decide_one(record | {"brix": float("nan")}) == "hold_for_inspector"
    with pytest.raises(InputError, match="row 0: 'brix'"):
        strict.decide_one(record | {"brix": None})


# --- finding 7 (runtime): a reason for every row; explain names actions and takes one record ----------------


def test_explain_gives_a_reason_for_every_row(packhouse: Rule, incoming: np.ndarray) -> None:
    X = incoming.copy()
    X[[3, 10], 0] = np.nan
    explanation = packhouse.explain(X)
    reject = packhouse.actions.index("hold_for_inspector")
    assert set(REASONS) == {"min-risk", "novelty", "invalid"}
    assert explanation.reason.shape == (len(X),)
    assert set(explanation.reason.tolist()) == {"min-risk", "invalid"}
    assert np.array_equal(explanation.reason == "invalid", ~explanation.valid)
    # rows deferred on valid input are Chow's ambiguity reject: min-risk, with the reject cost the minimum
    deferred = (explanation.action == reject) & explanation.valid
    assert deferred.sum() > 0
    assert (explanation.reason[deferred] == "min-risk").all()
    assert (explanation.risks[deferred, reject] < explanation.risks[deferred, :reject].min(axis=1)).all()


def test_truncated_upstream_probabilities_are_deferred_with_reason_invalid() -> None:
    # Probabilities cut to two decimals upstream (in the first half of the rows): such rows no longer sum to one
    # within the policy's tolerance; the untouched half stays valid.
    claims = compile_policy(CLAIMS).rule
    X = read_csv_columns(DEMOS / "claims" / "holdout.csv", claims.features)
    X[:1500] = np.floor(X[:1500] * 100.0) / 100.0
    off = np.abs(X.sum(axis=1) - 1.0) > float(claims.params["sum_tolerance"])
    assert 0 < off.sum() < len(X)
    explanation = claims.explain(X)
    assert np.array_equal(explanation.reason == "invalid", off)
    assert (explanation.action_name[off] == claims.reject_action).all()


def test_explain_names_the_actions(packhouse: Rule, incoming: np.ndarray) -> None:
    X = incoming[:50].copy()
    X[7, 2] = np.inf
    explanation = packhouse.explain(X)
    assert explanation.action_name.tolist() == packhouse.decide_names(X).tolist()
    runner = [packhouse.actions[i] if i >= 0 else None for i in explanation.runner_up.tolist()]
    assert explanation.runner_up_name.tolist() == runner
    assert explanation.runner_up_name[7] is None and explanation.action_name[7] == "hold_for_inspector"


def test_explain_takes_one_record_like_decide_one(packhouse: Rule, incoming: np.ndarray) -> None:
    record = dict(zip(packhouse.features, incoming[5].tolist(), strict=True))
    one = packhouse.explain(record)
    assert one.action_name.tolist() == [packhouse.decide_one(record)]
    assert np.array_equal(one.posteriors, packhouse.posteriors(incoming[5:6]))
    with pytest.raises(InputError, match=r"unknown field\(s\) \['colour'\]"):
        packhouse.explain(record | {"colour": 2.0})
    # a mapping of columns is a table, whichever its length
    assert packhouse.explain({name: [value] for name, value in record.items()}).action_name.tolist() == [
        packhouse.decide_one(record)
    ]


def test_a_pandas_series_is_one_record(packhouse: Rule, incoming: np.ndarray) -> None:
    record = pd.Series(incoming[5], index=list(packhouse.features))
    expected = packhouse.decide_names(incoming[5:6]).tolist()
    assert [packhouse.decide_one(record)] == expected  # type: ignore[arg-type]
    assert packhouse.explain(record).action_name.tolist() == expected
    with pytest.raises(InputError, match=r"unknown field\(s\) \['colour'\]"):
        packhouse.explain(pd.concat([record, pd.Series([1.0], index=["colour"])]))


def test_a_mapping_of_single_values_is_not_a_table_for_decide(packhouse: Rule, incoming: np.ndarray) -> None:
    record = dict(zip(packhouse.features, incoming[0].tolist(), strict=True))
    with pytest.raises(InputError, match="single value, not a column; decide_one"):
        packhouse.decide(record)


# --- finding 12 (runtime): decide_one on values that are not numbers ------------------------------------


@pytest.mark.parametrize(
    ("value", "message"),
    [
        (10**400, r"'brix' is an integer of 1329 bits, beyond the float64 range"),
        (10**5000, r"'brix' is an integer of \d+ bits"),
        ([15.0], r"'brix' must be a number, got list \[15\.0\]"),
        ("15", r"'brix' must be a number, got str '15'"),
        (True, r"'brix' must be a number, got bool True"),
        (1 + 2j, r"'brix' must be a number, got complex"),
        ({"x": 1}, r"'brix' must be a number, got dict"),
    ],
    ids=["10**400", "10**5000", "list", "string", "bool", "complex", "dict"],
)
def test_decide_one_refuses_values_that_are_not_float64_numbers(
    value: object, message: str, packhouse: Rule, incoming: np.ndarray
) -> None:
    record = dict(zip(packhouse.features, incoming[0].tolist(), strict=True))
    with pytest.raises(InputError, match=message):
        packhouse.decide_one(record | {"brix": value})


@pytest.mark.parametrize("record", [[41.0, 0.3, 150.0, 12.0], "firmness_n", 41.0, None])
def test_decide_one_refuses_what_is_not_a_mapping(record: object, packhouse: Rule) -> None:
    with pytest.raises(InputError, match="expected one record as a mapping of feature name to number"):
        packhouse.decide_one(record)  # type: ignore[arg-type]


def test_decide_one_takes_decimals_and_fractions_and_a_decimal_nan_is_missing(
    packhouse: Rule, incoming: np.ndarray
) -> None:
    record = dict(zip(packhouse.features, incoming[0].tolist(), strict=True))
    exact = packhouse.decide_one(record)
    assert packhouse.decide_one(record | {"brix": Decimal(repr(record["brix"]))}) == exact
    assert packhouse.decide_one(record | {"brix": Fraction(record["brix"])}) == exact
    for missing in (Decimal("NaN"), Decimal("sNaN")):
        assert packhouse.decide_one(record | {"brix": missing}) == "hold_for_inspector"
    with pytest.raises(InputError, match="'brix' is an integer of 1328 bits"):
        packhouse.decide_one(record | {"brix": Fraction(10**400, 3)})


def test_decide_one_accepts_numpy_and_large_python_numbers(packhouse: Rule, incoming: np.ndarray) -> None:
    record = dict(zip(packhouse.features, incoming[0].tolist(), strict=True))
    as_numpy = {name: np.float32(value) for name, value in record.items()}
    assert packhouse.decide_one(as_numpy) == packhouse.decide_names(np.float32(incoming[:1]))[0]
    # 10**300 is a finite float64 far outside every class: invalid (every density underflows), so deferred
    assert packhouse.decide_one(record | {"mass_g": 10**300}) == "hold_for_inspector"


# --- messages that name what is wrong, and how much of it -----------------------------------------------


@pytest.mark.parametrize(("extra", "listed"), [(7, "'c6']"), (8, "'c6' and 1 more]"), (10, "'c6' and 3 more]")])
def test_a_message_lists_ten_names_then_counts_the_rest(
    extra: int, listed: str, packhouse: Rule, incoming: np.ndarray
) -> None:
    # the table has three of the four features and `extra` other columns: 3 + 7 = 10 names are all shown
    columns = frame(incoming[:3], packhouse.features[:3]) | {f"c{i}": incoming[:3, 0] for i in range(extra)}
    with pytest.raises(InputError, match=re.escape(listed)) as refused:
        packhouse.decide(columns)
    assert str(refused.value).endswith(listed) and "'c7'" not in str(refused.value)


def test_a_long_value_is_shown_cut_to_forty_characters(packhouse: Rule, incoming: np.ndarray) -> None:
    record = dict(zip(packhouse.features, incoming[0].tolist(), strict=True))
    fits = "x" * 38  # its repr, quotes included, is 40 characters: shown whole
    with pytest.raises(InputError, match=re.escape(f"got str {fits!r}") + "$"):
        packhouse.decide_one(record | {"brix": fits})
    cut = "x" * 39  # 41 characters: the first 37, then "..."
    with pytest.raises(InputError, match=re.escape(f"got str {cut!r}"[:45] + "...") + "$"):
        packhouse.decide_one(record | {"brix": cut})


def test_a_record_of_text_only_is_refused_naming_the_first_feature(packhouse: Rule) -> None:
    with pytest.raises(InputError, match="feature 'firmness_n' must be a number, got str '41'"):
        packhouse.decide_one({name: "41" for name in packhouse.features})


def test_a_column_of_two_dimensions_is_refused(packhouse: Rule, incoming: np.ndarray) -> None:
    columns = frame(incoming, packhouse.features) | {"mass_g": incoming[:, 2:]}
    with pytest.raises(InputError, match=re.escape("column 'mass_g' has shape (600, 2); a column must be one-dim")):
        packhouse.decide(columns)


def test_masking_never_writes_to_the_callers_array(packhouse: Rule, incoming: np.ndarray) -> None:
    X = incoming[:6].copy()
    mask = np.zeros(X.shape, dtype=bool)
    mask[1, 2] = True
    packhouse.decide(np.ma.MaskedArray(X, mask=mask))
    np.testing.assert_array_equal(X, incoming[:6])


def test_an_array_of_three_dimensions_is_refused_even_with_the_feature_count_second(
    packhouse: Rule, incoming: np.ndarray
) -> None:
    # (n, d, 1), C-ordered float64: what the kernels take in every other respect
    with pytest.raises(InputError, match="expected a 2-D array of shape"):
        packhouse.decide(np.ascontiguousarray(incoming[:, :, None]))
