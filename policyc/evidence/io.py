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
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Literal, TypeVar, cast

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from policyc.errors import DataError
from policyc.evidence._csv_records import CsvRecords, RecordError, split_records
from policyc.files import DataFilesError, atomic_path, data_files, same_file
from policyc.language.hints import did_you_mean

__all__ = [
    "DEFAULT_BATCH_ROWS",
    "MISSING_CELLS",
    "DataError",
    "FeatureBatch",
    "RowBatch",
    "RowSource",
    "TableWriter",
    "count_rows",
    "data_file_list",
    "data_format",
    "expected_rows",
    "read_ahead",
    "read_feature_batches",
    "read_table_batches",
    "write_behind",
    "write_rows",
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
    path: Path,
    columns: Sequence[str] | None,
    types: dict[str, pa.DataType],
    batch_rows: int,
    newlines_in_values: bool = False,
) -> pacsv.CSVStreamingReader:
    read_options = pacsv.ReadOptions(block_size=max(1 << 16, batch_rows * 64))
    parse = pacsv.ParseOptions(newlines_in_values=newlines_in_values)
    convert = pacsv.ConvertOptions(
        include_columns=list(columns) if columns is not None else None,
        column_types=types,
        # Only an empty cell is missing; pyarrow's default list would also turn "nan", "NaN" and "NA" into
        # nulls, so a NaN would be reported as a missing value instead of passing through as documented.
        null_values=[""],
        strings_can_be_null=False,
    )
    return pacsv.open_csv(path, read_options=read_options, parse_options=parse, convert_options=convert)


_CSV_CONVERSION = re.compile(r"In CSV column #(\d+): .*CSV conversion error to (\w+): invalid value '(.*)'")
_CSV_NOT_UTF8 = re.compile(r"In CSV column #(\d+): .*invalid UTF8 data")


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
A = TypeVar("A")
B = TypeVar("B")


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


@contextmanager
def write_behind(write: Callable[[A, B], None], depth: int = 1) -> Iterator[Callable[[A, B], None]]:
    """Hand ``write``'s calls to a worker thread so the caller goes on with the next batch.

    At most ``depth`` calls wait in the queue (bounded memory) and they run in order. The first error in
    ``write`` is raised in the caller, at its next call or on leaving; later calls are then dropped. Leaving
    waits for the queued calls, so whatever encloses this block (an atomic output) sees every write done.
    """
    pending: queue.Queue[tuple[A, B] | None] = queue.Queue(maxsize=depth)
    failures: list[BaseException] = []

    def consume() -> None:
        while (item := pending.get()) is not None:
            if not failures:
                try:
                    write(*item)
                except BaseException as error:  # handed to the caller, who raises it
                    failures.append(error)

    def hand_over(first: A, second: B) -> None:
        if failures:
            raise failures[0]
        pending.put((first, second))

    worker = threading.Thread(target=consume, name="policyc-write-behind", daemon=True)
    worker.start()
    try:
        yield hand_over
    finally:
        pending.put(None)
        worker.join()
    if failures:
        raise failures[0]


def _csv_batches(
    path: Path,
    columns: Sequence[str] | None,
    types: dict[str, pa.DataType],
    batch_rows: int,
    newlines_in_values: bool = False,
) -> Iterator[pa.RecordBatch]:
    header = _csv_header(path)
    try:
        for block in _csv_blocks(path, columns, types, batch_rows, newlines_in_values):
            for start in range(0, block.num_rows, batch_rows):
                yield block.slice(start, batch_rows)
    except pa.ArrowInvalid as exc:
        raise DataError(_explain_csv_error(path, header, str(exc))) from None


def _explain_csv_error(path: Path, header: list[str], message: str) -> str:
    if (match := _CSV_NOT_UTF8.search(message)) is not None:
        return _not_utf8_message(path, _column_named(header, match.group(1)))
    match = _CSV_CONVERSION.search(message)
    if match is None:
        return f"{path}: {_quoted_reason(message)}"
    column_index, _, value = match.groups()
    column = _column_named(header, column_index)
    row = _first_row_holding(path, column, value)
    where = f", row {row} (line {row + 1})" if row is not None else ""
    return f"{path}: column {column!r}{where}: {value!r} is not a number"


_REASON_CHARS = 200


def _quoted_reason(message: str) -> str:
    """A reader's message fit for a terminal: its first line, control characters escaped, at most 200 characters
    (pyarrow quotes the offending bytes, which in a binary file are anything)."""
    line = message.splitlines()[0] if message else ""
    shown = "".join(c if c.isprintable() else ascii(c)[1:-1] for c in line[:_REASON_CHARS])
    return shown + (" ..." if len(line) > _REASON_CHARS else "")


def _column_named(header: list[str], index: str) -> str:
    return header[int(index)] if int(index) < len(header) else f"#{index}"


def _not_utf8_message(path: Path, column: str) -> str:
    """Name the first cell of ``column`` that is not UTF-8 (the column is re-read as bytes: error path only)."""
    rows_before = 0
    for block in _csv_blocks(path, [column], {column: pa.binary()}, DEFAULT_BATCH_ROWS, newlines_in_values=True):
        for offset, cell in enumerate(block.column(0).to_pylist()):
            try:
                cell.decode("utf-8")
            except UnicodeDecodeError:
                return f"{path}: column {column!r}, row {rows_before + offset + 1}: {cell!r} is not UTF-8 text"
        rows_before += block.num_rows
    return f"{path}: column {column!r} is not UTF-8 text"


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
        raise DataError(f"{path}: cannot read as CSV: {_quoted_reason(str(exc))}") from None
    return list(first.schema.names)


def _parquet_batches(
    path: Path, columns: Sequence[str] | None, batch_rows: int, numeric: Sequence[str], text: Sequence[str]
) -> Iterator[pa.RecordBatch]:
    # pre_buffer=False: pyarrow's default pre-buffering fetches every requested row group up front (the whole
    # file, for iter_batches over all of them); with it off and a read buffer, a reader holds about one page per
    # column, so memory stays bounded whatever the file and row-group sizes. use_threads=False: decoding one
    # batch on several threads saves little next to the caller's own work per batch, and every decoding thread
    # keeps buffers of its own (about 40 MB more peak memory for 33 columns, tests/benchmarks/bench_fit.py).
    handle = _parquet_file(path, pre_buffer=False, buffer_size=PARQUET_READ_BUFFER)
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


def _parquet_file(path: Path, pre_buffer: bool = False, buffer_size: int = 0) -> pq.ParquetFile:
    """Open a Parquet file; a file that is not Parquet (or is truncated) is a DataError naming it."""
    try:
        return pq.ParquetFile(path, pre_buffer=pre_buffer, buffer_size=buffer_size)
    except (pa.ArrowInvalid, OSError) as exc:
        raise DataError(f"{path}: cannot read as Parquet: {_quoted_reason(str(exc))}") from None


def _as_float(path: Path, name: str, array: pa.Array, rows_before: int) -> pa.Array:
    if pa.types.is_float64(array.type):
        return array
    if pa.types.is_floating(array.type) or pa.types.is_integer(array.type) or pa.types.is_decimal(array.type):
        return pc.cast(array, pa.float64())
    raise DataError(f"{path}: column {name!r} has type {array.type}, not a number (row {rows_before + 1} onwards)")


def _require_columns(path: Path, fmt: str, columns: Sequence[str] | None) -> None:
    if columns is None:
        return
    names = _parquet_file(path).schema_arrow.names if fmt == "parquet" else _csv_header(path)
    missing = [c for c in columns if c not in names]
    if missing:
        named = ", ".join(f"{name!r}{_suggestion(name, names)}" for name in missing)
        raise DataError(f"{path}: missing column(s) {named}; the file has {names}")


def _suggestion(name: str, names: Sequence[str]) -> str:
    """`` (did you mean 'grade'?)`` for a near spelling among the file's columns, else nothing."""
    close = did_you_mean(name, names, "").removeprefix("; ")
    return f" ({close})" if close else ""


def count_rows(path: Path) -> int | None:
    """Row count when it is cheap to know (Parquet metadata), else None."""
    if data_format(path) == "parquet" and path.is_file():
        return int(_parquet_file(path).metadata.num_rows)
    return None


def expected_rows(files: Sequence[Path]) -> int | None:
    """Rows one pass over the files reads, when every file's count is cheap to know."""
    counts = [count_rows(path) for path in files]
    return None if None in counts else sum(c for c in counts if c is not None)


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
    return _rows_matrix(_feature_columns(path, batch, features, first_row), batch.num_rows)


def _rows_matrix(columns: Sequence[np.ndarray], n_rows: int) -> np.ndarray:
    """Columns of equal length as the columns of a C-ordered float64 (n, d) array."""
    matrix = np.empty((n_rows, len(columns)), dtype=np.float64)
    # One column over all n rows at a time would stride through the whole matrix d times; a block of rows
    # stays in cache while each of its columns is written (about twice as fast for 32 features).
    for start in range(0, n_rows, _BLOCK_ROWS):
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
    """Write record batches to CSV or Parquet, atomically: the target appears only when complete.

    ``parquet_options`` go to :class:`pyarrow.parquet.ParquetWriter`.
    """

    def __init__(self, path: Path, schema: pa.Schema, parquet_options: dict[str, bool] | None = None) -> None:
        self.path = path
        self.format = data_format(path)
        self.schema = schema
        self.parquet_options = parquet_options or {}

    @contextmanager
    def open(self) -> Iterator[Callable[[pa.RecordBatch], None]]:
        with atomic_path(self.path) as temporary:
            if self.format == "parquet":
                with _parquet_writer(temporary, self.schema, self.parquet_options) as write:
                    yield write
            else:
                with pacsv.CSVWriter(temporary, self.schema) as writer:
                    yield writer.write_batch


DICTIONARY_MAX_DISTINCT = 0.5
"""A numeric column is dictionary-encoded in a Parquet output only when at most this share of its first batch's
values are distinct (common practice, no source: a dictionary pays off only for repeated values)."""


@contextmanager
def _parquet_writer(
    path: Path, schema: pa.Schema, options: dict[str, bool]
) -> Iterator[Callable[[pa.RecordBatch], None]]:
    """A ParquetWriter opened at the first batch, whose values choose the columns to dictionary-encode.

    pyarrow dictionary-encodes every column by default; for a column of measurements, where values hardly
    repeat, it hashes every value only to fall back to plain encoding, several times the cost of the rest of
    the write (tests/benchmarks/bench_decide_file.py). The values written are the same either way.
    """
    writer: pq.ParquetWriter | None = None

    def write(batch: pa.RecordBatch) -> None:
        nonlocal writer
        if writer is None:
            writer = pq.ParquetWriter(path, schema, use_dictionary=_dictionary_columns(batch), **options)
        writer.write_batch(batch)

    try:
        yield write
        if writer is None:  # no rows: the file still gets the schema
            writer = pq.ParquetWriter(path, schema, **options)
    finally:
        if writer is not None:
            writer.close()


def _dictionary_columns(batch: pa.RecordBatch) -> list[str]:
    """The Parquet column paths to dictionary-encode: all but numeric columns whose values rarely repeat."""
    unique = {
        name
        for name, column in zip(batch.schema.names, batch.columns, strict=True)
        if (pa.types.is_floating(column.type) or pa.types.is_integer(column.type))
        # share of distinct values = distinct values / rows
        and pc.count_distinct(column).as_py() > DICTIONARY_MAX_DISTINCT * len(column)
    }
    return [path for path in _parquet_column_paths(batch.schema) if path not in unique]


def _parquet_column_paths(schema: pa.Schema) -> list[str]:
    """The dotted leaf column paths Parquet gives ``schema``'s fields (a nested field has several)."""
    sink = pa.BufferOutputStream()
    pq.write_table(schema.empty_table(), sink)
    layout = pq.read_metadata(pa.BufferReader(sink.getvalue())).schema
    return [layout.column(i).path for i in range(len(layout))]


# --- rows to decide on, passed through untouched ---------------------------------------------------------------

MISSING_CELLS = ("", "NA", "N/A", "NULL", "null")
"""CSV cells read as a missing value in a feature column, compared after trimming spaces and tabs.

NaN in any spelling the number parser knows (``nan``, ``NaN``, ``NAN``, ``-nan``) is missing as well; infinity
is a number (the rule judges it invalid). Any other text in a feature column is an error naming row and column.
"""


@dataclass(frozen=True)
class RowBatch:
    """Rows of a file to decide on: the features as float64 (n, d), NaN where a value is missing, and the rows
    as they are in the file: ``columns`` (Parquet as stored; CSV as text) or ``records`` (CSV bytes)."""

    features: np.ndarray
    first_row: int
    columns: pa.RecordBatch | None = None
    records: CsvRecords | None = None

    @property
    def num_rows(self) -> int:
        return int(self.features.shape[0])


class RowSource:
    """A CSV or Parquet file read in batches for deciding; nothing but the feature columns is parsed.

    With ``csv_bytes`` a CSV file's rows are kept as their bytes (:attr:`RowBatch.records`), so a CSV output
    repeats them exactly; otherwise every column is kept as an Arrow column, CSV cells as text (never typed).
    """

    def __init__(
        self, path: Path, features: Sequence[str], csv_bytes: bool = False, batch_rows: int = DEFAULT_BATCH_ROWS
    ) -> None:
        self.path, self.format = path, data_format(path)
        if not path.is_file():
            raise DataError(f"{path}: no such file")
        self.features, self.batch_rows = tuple(features), batch_rows
        self.csv_bytes = csv_bytes and self.format == "csv"
        if self.format == "parquet":
            try:
                self.schema = pq.read_schema(path)
            except (OSError, pa.ArrowException) as error:
                raise DataError(f"{path}: cannot read as Parquet: {_quoted_reason(str(error))}") from None
        else:
            self.schema = pa.schema([(name, pa.string()) for name in _csv_header(path)])
        self.names: list[str] = list(self.schema.names)
        missing = [f for f in self.features if f not in self.names]
        if missing:
            raise DataError(f"{path}: missing feature column(s) {missing}; the file has {self.names}")
        doubled = sorted({f for f in self.features if self.names.count(f) > 1})
        if doubled:
            raise DataError(f"{path}: feature column(s) {doubled} appear more than once; keep one of each")

    def batches(self) -> Iterator[RowBatch]:
        """The file's rows in batches of at most ``batch_rows`` (read one batch ahead on a worker thread)."""
        return read_ahead(self._rows_or_data_error())

    def _rows_or_data_error(self) -> Iterator[RowBatch]:
        try:
            yield from self._parquet_rows() if self.format == "parquet" else self._csv_rows()
        except (OSError, pa.ArrowException) as error:
            raise DataError(f"{self.path}: cannot read: {_quoted_reason(str(error))}") from None

    def csv_header(self) -> tuple[bytes, bytes]:
        """The CSV header record's bytes and line end (empty lines before it included)."""
        with self.path.open("rb") as stream:
            return next(split_records(stream), (b"", b""))

    def _parquet_rows(self) -> Iterator[RowBatch]:
        first_row = 1
        for batch in _parquet_batches(self.path, None, self.batch_rows, (), ()):
            columns = [
                _as_float(self.path, f, batch.column(self.names.index(f)), first_row - 1).to_numpy(zero_copy_only=False)
                for f in self.features
            ]
            yield RowBatch(_rows_matrix(columns, batch.num_rows), first_row, columns=batch)
            first_row += batch.num_rows

    def _csv_rows(self) -> Iterator[RowBatch]:
        columns = list(self.features) if self.csv_bytes else None
        texts = {name: pa.string() for name in (columns or self.names)}
        blocks = _csv_batches(self.path, columns, texts, self.batch_rows, newlines_in_values=True)
        with ExitStack() as stack:
            records = self._records(stack) if self.csv_bytes else None
            first_row = 1
            for batch in blocks:
                numbers = [
                    self._numbers(f, batch.column(batch.schema.names.index(f)), first_row) for f in self.features
                ]
                kept = _take_records(self.path, records, batch.num_rows) if records is not None else None
                yield RowBatch(_rows_matrix(numbers, batch.num_rows), first_row, batch if kept is None else None, kept)
                first_row += batch.num_rows
            if records is not None and next(records, None) is not None:
                raise DataError(f"{self.path}: {_UNMATCHED_RECORDS}")

    def _records(self, stack: ExitStack) -> Iterator[tuple[bytes, bytes]]:
        records = split_records(stack.enter_context(self.path.open("rb")))
        next(records, None)  # the header
        return _located_record_errors(self.path, records)

    def _numbers(self, name: str, text: pa.Array, first_row: int) -> np.ndarray:
        """A feature column's cells as float64, NaN where missing (:data:`MISSING_CELLS`); other text is an error."""
        trimmed = pc.utf8_trim(text, " \t")
        blank = pc.is_in(trimmed, value_set=pa.array(MISSING_CELLS))
        try:
            numbers = pc.cast(pc.if_else(blank, pa.scalar(None, pa.string()), trimmed), pa.float64())
        except pa.ArrowInvalid:
            row, value = _first_not_a_number(trimmed, blank)
            raise DataError(f"{self.path}: column {name!r}, row {first_row + row}: {value!r} is not a number") from None
        return numbers.to_numpy(zero_copy_only=False)


_UNMATCHED_RECORDS = "the rows could not be matched to the file's lines (irregular quoting?); nothing was written"


def _first_not_a_number(trimmed: pa.Array, blank: pa.Array) -> tuple[int, str]:
    """Offset and text of the first cell that is neither missing nor a number (error path only)."""
    for offset, (value, is_blank) in enumerate(zip(trimmed.to_pylist(), blank.to_pylist(), strict=True)):
        try:
            if not is_blank:
                pc.cast(pa.scalar(value), pa.float64())
        except pa.ArrowInvalid:
            return offset, str(value)
    raise AssertionError("a cast failed on no single cell")  # pragma: no cover - pyarrow casts cell by cell


def _take_records(path: Path, records: Iterator[tuple[bytes, bytes]], n_rows: int) -> CsvRecords:
    bodies, ends = [], []
    for body, end in records:
        bodies.append(body)
        ends.append(end)
        if len(bodies) == n_rows:
            return CsvRecords(bodies, ends)
    raise DataError(f"{path}: {_UNMATCHED_RECORDS}")


def _located_record_errors(path: Path, records: Iterator[tuple[bytes, bytes]]) -> Iterator[tuple[bytes, bytes]]:
    rows = 0
    try:
        for record in records:
            yield record
            rows += 1
    except RecordError as error:
        raise DataError(f"{path}: after row {rows}: {error}") from None


def _csv_text(batch: pa.RecordBatch) -> list[bytes]:
    """Each row of ``batch`` as CSV cells joined by commas (no line end): numbers in their shortest exact form,
    text quoted when needed, nulls empty."""
    columns = []
    for column in batch.columns:
        if pa.types.is_string(column.type):
            needs_quotes = pc.match_substring_regex(column, '[,"\\r\\n]')
            quoted = pc.binary_join_element_wise('"', pc.replace_substring(column, '"', '""'), '"', "")
            column = pc.if_else(needs_quotes, quoted, column)
        columns.append(pc.fill_null(pc.cast(column, pa.string()), ""))
    joined = pc.binary_join_element_wise(*columns, ",")
    return cast(list[bytes], pc.cast(joined, pa.binary()).to_pylist())


@contextmanager
def write_rows(path: Path, source: RowSource, added: pa.Schema) -> Iterator[Callable[[RowBatch, pa.RecordBatch], None]]:
    """Write the rows of ``source`` with the ``added`` columns after them to ``path`` (format from its suffix),
    atomically. The input columns are not re-typed: CSV records kept as bytes are written as they were read.

    Refuses (DataError) to write over the source file itself, by any path that leads to it.
    """
    if same_file(path, source.path):
        raise DataError(f"{path}: is the input file {source.path}; write to another file")
    if source.csv_bytes and data_format(path) == "csv":
        body, end = source.csv_header()
        with atomic_path(path) as temporary, temporary.open("wb") as stream:
            names = pa.record_batch([pa.array([name]) for name in added.names], names=added.names)
            stream.write(body + b"," + _csv_text(names)[0] + end)

            def write_records(rows: RowBatch, extra: pa.RecordBatch) -> None:
                assert rows.records is not None
                stream.write(b"".join(_interleave(rows.records, _csv_text(extra))))

            yield write_records
        return
    schema = pa.schema([*source.schema, *added], metadata=source.schema.metadata)
    with TableWriter(path, schema, _parquet_options(source)).open() as write:
        yield lambda rows, extra: write(_joined(rows, extra, schema))


def _interleave(records: CsvRecords, cells: list[bytes]) -> list[bytes]:
    """Each record's body, a comma, its new cells and its line end, in one list (slice assignment: no Python
    loop per row)."""
    n_rows = len(cells)
    if len(records.bodies) != n_rows:
        raise ValueError(f"{len(records.bodies)} records for {n_rows} rows of new cells")
    parts: list[bytes] = [b","] * (4 * n_rows)
    parts[0::4], parts[2::4], parts[3::4] = records.bodies, cells, records.ends
    return parts


def _joined(rows: RowBatch, extra: pa.RecordBatch, schema: pa.Schema) -> pa.RecordBatch:
    assert rows.columns is not None
    return pa.RecordBatch.from_arrays([*rows.columns.columns, *extra.columns], schema=schema)


def _parquet_options(source: RowSource) -> dict[str, bool]:
    """Writer options that keep a Parquet input's physical types: INT96 timestamps, decimals stored as integers."""
    if source.format != "parquet":
        return {}
    columns = list(pq.ParquetFile(source.path).schema)
    return {
        "use_deprecated_int96_timestamps": any(c.physical_type == "INT96" for c in columns),
        "store_decimal_as_integer": any(
            c.logical_type.type == "DECIMAL" and c.physical_type in ("INT32", "INT64") for c in columns
        ),
    }


def data_file_list(path: Path) -> list[Path]:
    """The files a data path stands for (a file, a directory or a glob), in their fixed order
    (:func:`policyc.files.data_files`); a path naming no usable file is a DataError."""
    try:
        return data_files(path)
    except DataFilesError as error:
        raise DataError(str(error)) from None
