"""What a caller passes -> the (n, d) float64 feature matrix the kernels evaluate (float32 for a float32 rule
given float32 input: no widening copy).

This file imports numpy and the standard library only: ``policyc compile
--emit-python`` copies it, like kernel.py, into every standalone module, so the
module reads input exactly as the runtime does.

Accepted input:

* a 2-D array or nested lists of shape (n, d): **positional**, columns in the
  rule's feature order; a masked array's masked entries are missing values;
* a **table with named columns**: a pandas or polars DataFrame, a pyarrow Table
  or RecordBatch, a numpy structured array, or a mapping of column name to 1-D
  array. The rule's features are selected by name; other columns are ignored; a
  feature column that is absent or appears more than once is refused by name.
  The table libraries are recognised by their attributes, never imported.

Numbers are Python and numpy integers and floats, fractions and decimals (a
Parquet decimal column), widened to float64. Missing values (None, nulls, pandas
NA, masked entries, NaN) become NaN, which every kernel treats as invalid input,
so such a row follows ``invalid_input``.
Booleans, text, dates and complex numbers are refused rather than guessed at: a
boolean column taken as 0/1 or text parsed as numbers would decide on values the
caller never wrote.
"""

from __future__ import annotations

import numbers
import sys
from typing import Any, TypeGuard

import numpy as np


class InputError(ValueError):
    """The input cannot be decided on: wrong shape, type or columns, or invalid rows under invalid_input: error."""


_SHOWN = 10
"""Names listed in one message before "and N more"."""


def feature_matrix(X: object, features: tuple[str, ...], dtype: np.dtype[Any] | type = np.float64) -> np.ndarray:
    """Return the input as a C-ordered float64 array of shape (n, len(features)); missing values are NaN.

    With ``dtype`` float32 (a float32 rule), float32 values stay float32: the kernel computes in float32 anyway,
    and widening would copy the whole input. Anything else is float64 (the kernel narrows it chunk by chunk).
    Raise InputError when the input cannot be read as feature values (see the module docstring).
    """
    keep = np.dtype(dtype) == np.float32
    if _ready(X, len(features), keep):
        return X  # already what the kernels take: skip the general checks (a one-row call pays them per row)
    kind = _table_kind(X)
    matrix = _from_array(X, len(features), keep) if kind is None else _from_table(X, kind, features, keep)
    if matrix.shape[0] == 0:
        raise InputError("the input has no rows")
    return matrix


def _ready(X: object, n_features: int, keep_float32: bool) -> TypeGuard[np.ndarray]:
    """Whether ``X`` is a plain C-ordered (n ≥ 1, n_features) float64 array (or float32 with ``keep_float32``)."""
    if type(X) is not np.ndarray or X.ndim != 2 or not X.shape[0] or X.shape[1] != n_features:
        return False
    return X.flags.c_contiguous and (X.dtype == np.float64 or (keep_float32 and X.dtype == np.float32))


def is_record(X: object) -> bool:
    """Whether ``X`` is one record: a mapping whose values are all single values, not columns."""
    mapping: Any = X
    # keys(), since iterating a pandas Series gives its values
    return _table_kind(X) == "mapping" and all(np.ndim(mapping[key]) == 0 for key in mapping.keys())  # noqa: SIM118


def record_row(record: object, features: tuple[str, ...]) -> np.ndarray:
    """One record, a mapping of feature name to number, as a float64 row; None is a missing value (NaN).

    Unlike a table, a record may hold no other fields: a misspelt name is an error, not an ignored column.
    """
    if type(record) is dict and len(record) == len(features):  # the common case, checked in one pass
        values = [record.get(name) for name in features]
        if all(type(value) is float for value in values):  # then every feature is present, so nothing else is
            return np.array(values)
    if _table_kind(record) != "mapping":
        raise InputError(f"expected one record as a mapping of feature name to number, got {type(record).__name__}")
    fields: Any = record
    missing = [name for name in features if name not in fields]
    unknown = [key for key in fields.keys() if key not in features]  # noqa: SIM118 (a Series iterates values)
    problems = [
        f"{what} {_listed(names)}"
        for what, names in (("missing feature(s)", missing), ("unknown field(s)", unknown))
        if names
    ]
    if problems:
        raise InputError("; ".join(problems))
    return np.array([_number(fields[name], f"feature {name!r}") for name in features])


def _table_kind(X: object) -> str | None:
    """Which kind of named-column table ``X`` is, judged by its attributes; None for a plain array or list."""
    if isinstance(X, np.ndarray):
        return "structured" if X.dtype.names is not None else None
    if hasattr(X, "column_names") and hasattr(X, "column"):
        return "arrow"
    if hasattr(X, "columns") and hasattr(X, "iloc"):
        return "pandas"
    if hasattr(X, "columns") and hasattr(X, "to_series"):
        return "polars"
    if hasattr(X, "keys") and hasattr(X, "__getitem__"):
        return "mapping"
    return None


def _column_names(table: Any, kind: str) -> list[object]:
    if kind == "structured":
        return list(table.dtype.names)
    if kind == "arrow":
        return list(table.column_names)
    if kind == "mapping":
        return list(table.keys())
    return list(table.columns)


def _column(table: Any, kind: str, name: object, index: int) -> object:
    """The column at ``index`` (by position, so that a duplicated name cannot pick another one)."""
    if kind == "arrow":
        return table.column(index)
    if kind == "pandas":
        return table.iloc[:, index]
    if kind == "polars":
        return table.to_series(index)
    return table[name]


def _from_table(table: object, kind: str, features: tuple[str, ...], keep_float32: bool) -> np.ndarray:
    names = _column_names(table, kind)
    positions: dict[object, list[int]] = {}
    for index, name in enumerate(names):
        positions.setdefault(name, []).append(index)
    missing = [name for name in features if name not in positions]
    duplicated = [name for name in features if len(positions.get(name, ())) > 1]
    if missing:
        raise InputError(f"the input has no column for feature(s) {_listed(missing)}; its columns: {_listed(names)}")
    if duplicated:
        counts = ", ".join(f"{name!r} ({len(positions[name])} times)" for name in duplicated)
        raise InputError(f"feature column(s) {counts} appear more than once in the input; keep one of each")
    columns = [_column_values(_column(table, kind, name, positions[name][0]), name, keep_float32) for name in features]
    lengths = {column.shape[0] for column in columns}
    if len(lengths) > 1:
        shown = ", ".join(f"{name!r}: {column.shape[0]}" for name, column in zip(features, columns, strict=True))
        raise InputError(f"the feature columns differ in length ({shown})")
    return np.ascontiguousarray(np.column_stack(columns))


def _column_values(column: object, name: str, keep_float32: bool) -> np.ndarray:
    values = _as_float(column, f"column {name!r}", keep_float32)
    if values.ndim == 0:
        raise InputError(f"column {name!r} is a single value, not a column; decide_one takes one record")
    if values.ndim != 1:
        raise InputError(f"column {name!r} has shape {values.shape}; a column must be one-dimensional")
    return values


def _from_array(X: object, n_features: int, keep_float32: bool) -> np.ndarray:
    try:
        array = X if np.ma.isMaskedArray(X) else np.asarray(X)
    except (ValueError, TypeError) as exc:
        raise InputError(f"the input cannot be read as an array: {exc}") from None
    assert isinstance(array, np.ndarray)
    if array.dtype.kind not in "fiubO":
        raise InputError(f"expected a numeric array, got dtype {array.dtype}")
    if array.ndim != 2:
        hint = "; for one record use decide_one, or X[None, :]" if array.ndim == 1 else ""
        raise InputError(f"expected a 2-D array of shape (n, {n_features}), got {array.ndim}-D{hint}")
    if array.shape[1] != n_features:
        raise InputError(f"expected {n_features} feature columns, got {array.shape[1]}")
    return _as_float(array, "the input", keep_float32)


def _as_float(values: object, what: str, keep_float32: bool) -> np.ndarray:
    """float64 values (C order; float32 ones kept as they are with ``keep_float32``) with missing entries as NaN;
    refuse booleans, text and other non-numbers."""
    masked: Any = values
    mask = np.ma.getmaskarray(masked) if np.ma.isMaskedArray(masked) else None
    try:
        data = np.asarray(masked.data if mask is not None else values)
    except (ValueError, TypeError) as exc:
        raise InputError(f"{what} cannot be read as numbers: {exc}") from None
    if data.dtype.kind == "b":
        raise InputError(f"{what} holds booleans; convert them to numbers (0.0 and 1.0) if that is what they mean")
    if data.dtype.kind == "O":
        result = _objects_as_float(data, what)
    elif data.dtype.kind in "fiu":
        # a wider float beyond the float64 range becomes ±inf: an invalid row; a masked input is copied, so
        # that masking never writes to the caller's array
        kind = np.float32 if keep_float32 and data.dtype == np.float32 else np.float64
        with np.errstate(over="ignore"):
            result = np.array(data, kind, order="C") if mask is not None else np.asarray(data, kind, "C")
    else:
        raise InputError(f"{what} is not numeric (dtype {data.dtype})")
    if mask is not None:
        result[mask] = np.nan
    return result


def _objects_as_float(data: np.ndarray, what: str) -> np.ndarray:
    result = np.empty(data.shape, dtype=np.float64)
    for index, value in np.ndenumerate(data):
        result[index] = _number(value, what, index)
    return result


def _number(value: object, what: str, index: tuple[int, ...] = ()) -> float:
    """A Python or numpy number as float; None and pandas NA are missing (NaN); anything else is refused,
    naming ``what`` and, for an element of an array, its row (and column)."""
    if value is None or type(value).__name__ == "NAType":
        return float("nan")
    if isinstance(value, numbers.Real | _decimal_type()) and not isinstance(value, bool | np.bool_):
        number: Any = value
        try:  # Real: int, float, Fraction and numpy's numbers
            return float(number)
        except ValueError:  # a signalling NaN decimal: a NaN, so a missing value
            return float("nan")
        except OverflowError:  # an int or fraction beyond float64; str() refuses very long ints, so its bits
            magnitude = abs(number)
            problem = f"is an integer of {int(magnitude).bit_length()} bits, beyond the float64 range"
    elif isinstance(value, bool | np.bool_):
        problem = f"must be a number, got bool {value!r}: booleans are refused; pass 0.0 or 1.0"
    else:
        shown = repr(value) if len(repr(value)) <= 40 else repr(value)[:37] + "..."
        problem = f"must be a number, got {type(value).__name__} {shown}"
    place = ", ".join(f"{axis} {i}" for axis, i in zip(("row", "column"), index, strict=False))
    raise InputError(f"{what}, {place} {problem}" if place else f"{what} {problem}")


def _decimal_type() -> type:
    """decimal.Decimal, or a type nothing is an instance of while the decimal module is not loaded (no Decimal
    can exist then; importing it would cost a service's start-up several milliseconds)."""
    module = sys.modules.get("decimal")
    return module.Decimal if module is not None else _NoDecimal


class _NoDecimal:
    """Stands for decimal.Decimal before anything has imported the decimal module."""


def _listed(names: list[Any]) -> str:
    shown = ", ".join(repr(name) for name in names[:_SHOWN])
    more = f" and {len(names) - _SHOWN} more" if len(names) > _SHOWN else ""
    return f"[{shown}{more}]"
