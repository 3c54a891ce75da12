"""Tabular input and output in record batches (pyarrow): CSV and Parquet.

Nothing here loads a whole file: readers yield batches of at most
``batch_rows`` rows, so memory stays bounded whatever the file size.
Errors name the file, the column and the 1-based data row (the header is
not counted; in a CSV file, data row r sits on line r + 1).
"""

from __future__ import annotations

import queue
import re
import threading
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Literal, TypeVar, cast

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from policyc.errors import DataError
from policyc.files import atomic_path

__all__ = [
    "DEFAULT_BATCH_ROWS",
    "DataError",
    "FeatureBatch",
    "TableWriter",
    "count_rows",
    "data_format",
    "read_ahead",
    "read_feature_batches",
    "read_table_batches",
]

DEFAULT_BATCH_ROWS = 65_536
PARQUET_READ_BUFFER = 1 << 16
"""Bytes read at a time from each Parquet column chunk (pages are streamed, not whole row groups)."""
_BLOCK_ROWS = 4096
"""Rows of the feature matrix filled at a time: the block stays in cache while each column is written."""


def data_format(path: Path) -> str:
    suffix = path.suffix.lower()
    if suffix in (".csv", ".txt"):
        return "csv"
    if suffix in (".parquet", ".pq"):
        return "parquet"
    raise DataError(f"{path}: unknown data format {suffix!r}; use .csv or .parquet")


@dataclass(frozen=True)
class FeatureBatch:
    """One batch of rows: features as float64 (n, d), the label column (or None), and the first row number.

    ``codes`` holds the labels' class indices when the reader was given the classes (computed on the
    reading thread, see :func:`read_feature_batches`).
    """

    features: np.ndarray
    label_column: pa.Array | None
    first_row: int
    codes: np.ndarray | None = None

    @property
    def labels(self) -> np.ndarray | None:
        """The labels as a numpy unicode array."""
        return None if self.label_column is None else _text_values(self.label_column)

    def class_codes(self, classes: Sequence[str]) -> np.ndarray:
        """Index into ``classes`` of each row's label, -1 where it is none of them.

        Works on the column's distinct values, so a batch costs one dictionary encoding and K lookups.
        """
        if self.codes is not None:
            return self.codes
        assert self.label_column is not None
        encoded = pc.dictionary_encode(self.label_column)
        lookup = {name: index for index, name in enumerate(classes)}
        mapping = np.array([lookup.get(str(v), -1) for v in encoded.dictionary.to_pylist()], dtype=np.int64)
        return mapping[encoded.indices.to_numpy(zero_copy_only=False)]

    def first_unknown_label(self, codes: np.ndarray) -> tuple[int, str] | None:
        """(row number, label) of the first row whose code is -1, or None."""
        unknown = np.flatnonzero(codes < 0)
        if unknown.size == 0:
            return None
        assert self.label_column is not None
        return self.first_row + int(unknown[0]), str(self.label_column[int(unknown[0])].as_py())


def _csv_blocks(
    path: Path, columns: Sequence[str] | None, types: dict[str, pa.DataType], batch_rows: int
) -> pacsv.CSVStreamingReader:
    read_options = pacsv.ReadOptions(block_size=max(1 << 16, batch_rows * 64))
    convert = pacsv.ConvertOptions(
        include_columns=list(columns) if columns is not None else None,
        column_types=types,
        # Only an empty cell is missing; pyarrow's default list would also turn "nan", "NaN" and "NA" into
        # nulls, so a NaN would be reported as a missing value instead of passing through as documented.
        null_values=[""],
        strings_can_be_null=False,
    )
    return pacsv.open_csv(path, read_options=read_options, convert_options=convert)


_CSV_CONVERSION = re.compile(r"In CSV column #(\d+): .*CSV conversion error to (\w+): invalid value '(.*)'")


def read_table_batches(
    path: Path,
    columns: Sequence[str] | None = None,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    numeric: Sequence[str] = (),
    text: Sequence[str] = (),
) -> Iterator[pa.RecordBatch]:
    """Yield record batches of the chosen columns (all when None), each at most ``batch_rows`` rows.

    ``numeric`` columns are read as float64 and ``text`` columns as strings.
    """
    fmt = data_format(path)
    if not path.is_file():
        raise DataError(f"{path}: no such file")
    _require_columns(path, fmt, columns)
    if fmt == "parquet":
        batches = _parquet_batches(path, columns, batch_rows, numeric, text)
    else:
        types = {name: pa.float64() for name in numeric} | {name: pa.string() for name in text}
        batches = _csv_batches(path, columns, types, batch_rows)
    yield from batches


_END = object()
T = TypeVar("T")


def read_ahead(batches: Iterator[T], depth: int = 1) -> Iterator[T]:
    """Produce the next batch on a worker thread while the caller works on this one.

    pyarrow's decoding and numpy's copies and arithmetic release the GIL, so the two overlap; at most
    ``depth`` decoded batches wait in the queue, which keeps memory bounded. An error in the reader
    is raised in the caller; a caller that stops early stops the reader.
    """
    ready: queue.Queue[object] = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def produce() -> None:
        try:
            for batch in batches:
                while not stop.is_set():
                    try:
                        ready.put(batch, timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    return
            ready.put(_END)
        except BaseException as error:  # handed to the caller, who raises it
            ready.put(error)

    worker = threading.Thread(target=produce, name="policyc-read-ahead", daemon=True)
    worker.start()
    try:
        while (item := ready.get()) is not _END:
            if isinstance(item, BaseException):
                raise item
            yield cast(T, item)
    finally:
        stop.set()
        while worker.is_alive():
            try:
                ready.get_nowait()
            except queue.Empty:
                worker.join(timeout=0.1)


def _csv_batches(
    path: Path, columns: Sequence[str] | None, types: dict[str, pa.DataType], batch_rows: int
) -> Iterator[pa.RecordBatch]:
    header = _csv_header(path)
    try:
        for block in _csv_blocks(path, columns, types, batch_rows):
            for start in range(0, block.num_rows, batch_rows):
                yield block.slice(start, batch_rows)
    except pa.ArrowInvalid as exc:
        raise DataError(_explain_csv_error(path, header, str(exc))) from None


def _explain_csv_error(path: Path, header: list[str], message: str) -> str:
    match = _CSV_CONVERSION.search(message)
    if match is None:
        return f"{path}: {message.splitlines()[0]}"
    column_index, _, value = match.groups()
    column = header[int(column_index)] if int(column_index) < len(header) else f"#{column_index}"
    row = _first_row_holding(path, column, value)
    where = f", row {row} (line {row + 1})" if row is not None else ""
    return f"{path}: column {column!r}{where}: {value!r} is not a number"


def _first_row_holding(path: Path, column: str, text: str) -> int | None:
    """Re-read one column as text to find the 1-based data row holding ``text`` (error path only)."""
    reader = _csv_blocks(path, [column], {column: pa.string()}, DEFAULT_BATCH_ROWS)
    rows_before = 0
    for block in reader:
        matches = np.flatnonzero(pc.equal(block.column(0), text).to_numpy(zero_copy_only=False))
        if matches.size:
            return rows_before + int(matches[0]) + 1
        rows_before += block.num_rows
    return None


def _csv_header(path: Path) -> list[str]:
    try:
        first = pacsv.open_csv(path, read_options=pacsv.ReadOptions(block_size=1 << 16))
    except pa.ArrowInvalid as exc:
        raise DataError(f"{path}: cannot read as CSV: {str(exc).splitlines()[0]}") from None
    return list(first.schema.names)


def _parquet_batches(
    path: Path, columns: Sequence[str] | None, batch_rows: int, numeric: Sequence[str], text: Sequence[str]
) -> Iterator[pa.RecordBatch]:
    # pre_buffer=False: pyarrow's default pre-buffering fetches every requested row group up front (the whole
    # file, for iter_batches over all of them); with it off and a read buffer, a reader holds about one page per
    # column, so memory stays bounded whatever the file and row-group sizes. use_threads=False: decoding one
    # batch on several threads saves little next to the caller's own work per batch, and every decoding thread
    # keeps buffers of its own (about 40 MB more peak memory for 33 columns, tests/benchmarks/bench_fit.py).
    handle = pq.ParquetFile(path, pre_buffer=False, buffer_size=PARQUET_READ_BUFFER)
    rows_before = 0
    for batch in handle.iter_batches(
        batch_size=batch_rows, columns=list(columns) if columns is not None else None, use_threads=False
    ):
        arrays = []
        for name, array in zip(batch.schema.names, batch.columns, strict=True):
            if name in numeric:
                array = _as_float(path, name, array, rows_before)
            elif name in text:
                array = pc.cast(array, pa.string())
            arrays.append(array)
        yield pa.RecordBatch.from_arrays(arrays, names=batch.schema.names)
        rows_before += batch.num_rows


def _as_float(path: Path, name: str, array: pa.Array, rows_before: int) -> pa.Array:
    if pa.types.is_float64(array.type):
        return array
    if pa.types.is_floating(array.type) or pa.types.is_integer(array.type) or pa.types.is_decimal(array.type):
        return pc.cast(array, pa.float64())
    raise DataError(f"{path}: column {name!r} has type {array.type}, not a number (row {rows_before + 1} onwards)")


def _require_columns(path: Path, fmt: str, columns: Sequence[str] | None) -> None:
    if columns is None:
        return
    names = pq.read_schema(path).names if fmt == "parquet" else _csv_header(path)
    missing = [c for c in columns if c not in names]
    if missing:
        raise DataError(f"{path}: missing column(s) {', '.join(map(repr, missing))}; the file has {names}")


def count_rows(path: Path) -> int | None:
    """Row count when it is cheap to know (Parquet metadata), else None."""
    if data_format(path) == "parquet" and path.is_file():
        return int(pq.ParquetFile(path).metadata.num_rows)
    return None


def read_feature_batches(
    path: Path,
    features: Sequence[str],
    label: str | None = None,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    layout: Literal["rows", "columns"] = "rows",
    classes: Sequence[str] | None = None,
) -> Iterator[FeatureBatch]:
    """Yield features as float64 (n, d) arrays in ``features`` order, with labels as text when asked.

    Batches are produced on a reading thread one ahead of the caller (:func:`read_ahead`); with
    ``classes`` the labels' class indices are computed there too (``FeatureBatch.codes``).

    Missing values (empty CSV cells, Parquet nulls) are errors naming the column and row;
    NaN and infinity pass through for the caller to judge.

    ``layout="rows"`` gives C-ordered arrays (each row contiguous, as the runtime kernels want);
    ``layout="columns"`` gives the same (n, d) values as the transpose of a C-ordered (d, n) array
    (each feature contiguous), which is cheaper to build and suits per-feature statistics.
    """
    return read_ahead(_feature_batches(path, features, label, batch_rows, layout, classes))


def _feature_batches(
    path: Path,
    features: Sequence[str],
    label: str | None,
    batch_rows: int,
    layout: Literal["rows", "columns"],
    classes: Sequence[str] | None,
) -> Iterator[FeatureBatch]:
    columns = [*features, *([label] if label is not None else [])]
    first_row = 1
    for batch in read_table_batches(path, columns, batch_rows, numeric=features, text=[label] if label else []):
        if layout == "rows":
            matrix = batch_to_matrix(path, batch, features, first_row)
        else:
            matrix = np.vstack(_feature_columns(path, batch, features, first_row)).T
        label_column = None
        if label is not None:
            label_column = batch.column(columns.index(label))
            _refuse_nulls(path, label, label_column, first_row)
        batch_out = FeatureBatch(matrix, label_column, first_row)
        if classes is not None and label_column is not None:
            batch_out = replace(batch_out, codes=batch_out.class_codes(classes))
        yield batch_out
        first_row += batch.num_rows


def batch_to_matrix(path: Path, batch: pa.RecordBatch, features: Sequence[str], first_row: int) -> np.ndarray:
    """Stack the feature columns of a batch into a C-ordered float64 (n, d) array."""
    columns = _feature_columns(path, batch, features, first_row)
    matrix = np.empty((batch.num_rows, len(features)), dtype=np.float64)
    # One column over all n rows at a time would stride through the whole matrix d times; a block of rows
    # stays in cache while each of its columns is written (about twice as fast for 32 features).
    for start in range(0, batch.num_rows, _BLOCK_ROWS):
        rows = slice(start, start + _BLOCK_ROWS)
        for j, values in enumerate(columns):
            matrix[rows, j] = values[rows]
    return matrix


def _feature_columns(path: Path, batch: pa.RecordBatch, features: Sequence[str], first_row: int) -> list[np.ndarray]:
    """The feature columns as 1-D numpy arrays (float64 without nulls: views, no copy); a null is an error."""
    names = batch.schema.names
    columns = []
    for name in features:
        column = batch.column(names.index(name))
        _refuse_nulls(path, name, column, first_row)
        columns.append(column.to_numpy(zero_copy_only=False))
    return columns


def _text_values(array: pa.Array) -> np.ndarray:
    """A text column as a numpy unicode array, built from its distinct values (no Python object per row)."""
    encoded = pc.dictionary_encode(array)
    distinct = np.array(encoded.dictionary.to_pylist(), dtype=str)
    return distinct[encoded.indices.to_numpy(zero_copy_only=False)]


def _refuse_nulls(path: Path, name: str, column: pa.Array, first_row: int) -> None:
    if column.null_count:
        offset = int(np.flatnonzero(column.is_null().to_numpy(zero_copy_only=False))[0])
        row = first_row + offset
        raise DataError(f"{path}: column {name!r}, row {row}: missing value")


class TableWriter:
    """Write record batches to CSV or Parquet, atomically: the target appears only when complete."""

    def __init__(self, path: Path, schema: pa.Schema) -> None:
        self.path = path
        self.format = data_format(path)
        self.schema = schema

    @contextmanager
    def open(self) -> Iterator[Callable[[pa.RecordBatch], None]]:
        with atomic_path(self.path) as temporary:
            if self.format == "parquet":
                with pq.ParquetWriter(temporary, self.schema) as writer:
                    yield writer.write_batch
            else:
                with pacsv.CSVWriter(temporary, self.schema) as writer:
                    yield writer.write_batch
