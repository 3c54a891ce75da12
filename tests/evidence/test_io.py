"""Tabular input in record batches (CSV, Parquet) and atomic tabular output.

The expected values come from the data the tests themselves write (numpy arrays
written with ``repr`` so every float round-trips exactly) and from pyarrow's own
whole-file readers, never from policyc.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from policyc.evidence.io import DataError, TableWriter, read_feature_batches, write_behind

FEATURES = ["alpha", "beta", "gamma", "delta"]


def write_csv(path: Path, columns: dict[str, list[str]]) -> Path:
    """Write text cells column by column; the header is line 1, data row r is line r + 1."""
    names = list(columns)
    rows = zip(*(columns[name] for name in names), strict=True)
    path.write_text(",".join(names) + "\n" + "".join(",".join(row) + "\n" for row in rows), encoding="utf-8")
    return path


def sample(n_rows: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    values = rng.normal(loc=[0.0, 10.0, -5.0, 1e3], scale=[1.0, 0.1, 3.0, 50.0], size=(n_rows, len(FEATURES)))
    labels = rng.choice(np.array(["north", "south", "east"]), size=n_rows)
    return values, labels


def sample_csv(path: Path, values: np.ndarray, labels: np.ndarray) -> Path:
    columns = {name: [repr(float(v)) for v in values[:, j]] for j, name in enumerate(FEATURES)}
    return write_csv(path, columns | {"label": [str(v) for v in labels]})


def sample_parquet(path: Path, values: np.ndarray, labels: np.ndarray, row_group_size: int) -> Path:
    table = pa.table({name: values[:, j] for j, name in enumerate(FEATURES)} | {"label": labels.tolist()})
    pq.write_table(table, path, row_group_size=row_group_size)
    return path


def read_all(path: Path, features: list[str], label: str | None, batch_rows: int):
    batches = list(read_feature_batches(path, features, label, batch_rows=batch_rows))
    matrix = np.concatenate([b.features for b in batches])
    labels = np.concatenate([b.labels for b in batches]) if label is not None else None
    return batches, matrix, labels


def data_error(path: Path, features: list[str], label: str | None = None, batch_rows: int = 1000) -> str:
    with pytest.raises(DataError) as info:
        list(read_feature_batches(path, features, label, batch_rows=batch_rows))
    return str(info.value)


# --- batches give the same matrices as one read ------------------------------------------------


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_batched_read_equals_one_read_and_the_written_values(fmt: str, tmp_path: Path) -> None:
    # 3000 rows of ~80 bytes: the CSV spans several 64 KiB pyarrow blocks, the Parquet file several row groups.
    values, labels = sample(3000)
    path = (
        sample_csv(tmp_path / "data.csv", values, labels)
        if fmt == "csv"
        else sample_parquet(tmp_path / "data.parquet", values, labels, row_group_size=700)
    )
    batches, matrix, text = read_all(path, FEATURES, "label", batch_rows=257)
    (whole,), one_matrix, one_text = read_all(path, FEATURES, "label", batch_rows=1_000_000)

    assert len(batches) >= 3000 // 257
    assert all(0 < b.features.shape[0] <= 257 for b in batches)
    # first_row counts data rows from 1 and continues across batches
    assert [b.first_row for b in batches] == list(np.cumsum([0] + [b.features.shape[0] for b in batches[:-1]]) + 1)
    np.testing.assert_array_equal(matrix, one_matrix)
    np.testing.assert_array_equal(text, one_text)
    # both equal what was written: repr(float) round-trips exactly through a correctly rounded parser
    np.testing.assert_array_equal(matrix, values)
    np.testing.assert_array_equal(text, labels)
    assert matrix.dtype == np.float64 and whole.features.flags.c_contiguous


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_feature_columns_follow_the_requested_order(fmt: str, tmp_path: Path) -> None:
    values, labels = sample(50, seed=1)
    path = (
        sample_csv(tmp_path / "data.csv", values, labels)
        if fmt == "csv"
        else sample_parquet(tmp_path / "data.parquet", values, labels, row_group_size=20)
    )
    order = ["delta", "alpha", "gamma"]
    _, matrix, _ = read_all(path, order, None, batch_rows=16)
    np.testing.assert_array_equal(matrix, values[:, [FEATURES.index(name) for name in order]])


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_column_layout_holds_the_same_values(fmt: str, tmp_path: Path) -> None:
    values, labels = sample(300, seed=4)
    path = (
        sample_csv(tmp_path / "data.csv", values, labels)
        if fmt == "csv"
        else sample_parquet(tmp_path / "data.parquet", values, labels, row_group_size=128)
    )
    batches = list(read_feature_batches(path, FEATURES, "label", batch_rows=64, layout="columns"))
    assert all(b.features.shape == (b.labels.shape[0], len(FEATURES)) for b in batches if b.labels is not None)
    assert all(b.features.T.flags.c_contiguous for b in batches)  # each feature contiguous
    np.testing.assert_array_equal(np.concatenate([b.features for b in batches]), values)
    np.testing.assert_array_equal(np.concatenate([b.labels for b in batches if b.labels is not None]), labels)


def test_labels_are_text_even_when_the_file_holds_numbers(tmp_path: Path) -> None:
    csv_path = write_csv(tmp_path / "d.csv", {"x": ["1.5", "2.5", "3.5"], "y": ["1", "2", "10"]})
    _, _, csv_labels = read_all(csv_path, ["x"], "y", batch_rows=2)
    assert csv_labels.tolist() == ["1", "2", "10"]

    parquet_path = tmp_path / "d.parquet"
    pq.write_table(pa.table({"x": [1.5, 2.5, 3.5], "y": pa.array([1, 2, 10], pa.int32())}), parquet_path)
    _, _, parquet_labels = read_all(parquet_path, ["x"], "y", batch_rows=2)
    assert parquet_labels.tolist() == ["1", "2", "10"]


def test_parquet_dictionary_labels_are_text(tmp_path: Path) -> None:
    # a categorical label column (as pandas writes it) arrives as dictionary<string> and must read as plain text
    path = tmp_path / "dict.parquet"
    labels = pa.array(["b", "a", "b", "c", "a"]).dictionary_encode()
    pq.write_table(pa.table({"x": [1.0, 2.0, 3.0, 4.0, 5.0], "y": labels}), path, row_group_size=2)
    _, _, text = read_all(path, ["x"], "y", batch_rows=3)
    assert text.tolist() == ["b", "a", "b", "c", "a"]


def test_parquet_integer_columns_are_read_as_float(tmp_path: Path) -> None:
    path = tmp_path / "ints.parquet"
    ints = np.array([3, -7, 2**40, 0], dtype=np.int64)
    table = pa.table({"count": ints, "small": pa.array([1, 2, 3, 4], pa.int8()), "label": ["a", "b", "a", "b"]})
    pq.write_table(table, path, row_group_size=3)
    _, matrix, _ = read_all(path, ["count", "small"], "label", batch_rows=2)
    assert matrix.dtype == np.float64
    np.testing.assert_array_equal(matrix, np.column_stack([ints.astype(float), [1.0, 2.0, 3.0, 4.0]]))


def test_csv_nan_and_infinity_pass_through_as_values(tmp_path: Path) -> None:
    # read_feature_batches documents that NaN and infinity pass through for the caller to judge;
    # only an empty cell is a missing value.
    path = write_csv(tmp_path / "d.csv", {"x": ["1", "nan", "inf", "-inf", "NaN"], "y": ["a", "b", "a", "b", "a"]})
    _, matrix, _ = read_all(path, ["x"], "y", batch_rows=2)
    assert np.isnan(matrix[[1, 4], 0]).all()
    assert matrix[2, 0] == np.inf and matrix[3, 0] == -np.inf and matrix[0, 0] == 1.0


def test_parquet_batches_hold_a_fraction_of_the_file_in_memory(tmp_path: Path) -> None:
    # The module's promise: nothing loads a whole file. pyarrow's pre-buffering (its default) fetches every
    # row group up front, which held the whole file (about 1.05 × its size) in arrow's memory pool; reading
    # 1000-row batches of a 40-row-group file must hold far less. The bound (a quarter) is ours: common
    # practice, no source (observed 0.07).
    rng = np.random.default_rng(6)
    path = tmp_path / "groups.parquet"
    schema = pa.schema([(name, pa.float64()) for name in FEATURES] + [("label", pa.string())])
    with pq.ParquetWriter(path, schema) as writer:
        for _ in range(40):
            values = rng.normal(size=(5000, len(FEATURES)))
            columns = {name: values[:, j] for j, name in enumerate(FEATURES)}
            writer.write_table(pa.table(columns | {"label": ["north"] * 5000}, schema=schema))
    pool = pa.default_memory_pool()
    before = pool.bytes_allocated()
    held = 0
    rows = 0
    for batch in read_feature_batches(path, FEATURES, "label", batch_rows=1000):
        held = max(held, pool.bytes_allocated() - before)
        rows += batch.features.shape[0]
    assert rows == 200_000
    assert held < path.stat().st_size / 4


# --- errors name the file, the column and the row ----------------------------------------------


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
@pytest.mark.parametrize("missing", ["epsilon", "label_column"])
def test_missing_column_names_file_and_column(fmt: str, missing: str, tmp_path: Path) -> None:
    values, labels = sample(10, seed=2)
    path = (
        sample_csv(tmp_path / "data.csv", values, labels)
        if fmt == "csv"
        else sample_parquet(tmp_path / "data.parquet", values, labels, row_group_size=5)
    )
    features, label = (["alpha", "epsilon"], "label") if missing == "epsilon" else (["alpha"], "label_column")
    message = data_error(path, features, label)
    assert str(path) in message
    assert repr(missing) in message


def test_non_numeric_value_names_column_row_and_line(tmp_path: Path) -> None:
    # 3000 rows: the bad cell sits in a later 64 KiB block and in a later batch than the first
    values, labels = sample(3000, seed=3)
    columns = {name: [repr(float(v)) for v in values[:, j]] for j, name in enumerate(FEATURES)}
    bad_row = 2500  # 1-based data row; the header is line 1, so this is line 2501
    columns["gamma"][bad_row - 1] = "12;5"
    path = write_csv(tmp_path / "data.csv", columns | {"label": labels.tolist()})
    message = data_error(path, FEATURES, "label", batch_rows=100)
    assert str(path) in message
    assert "'gamma'" in message
    assert re.search(rf"\brow {bad_row}\b", message), message
    assert re.search(rf"\bline {bad_row + 1}\b", message), message
    assert "'12;5'" in message


@pytest.mark.parametrize("batch_rows", [2, 1000])
def test_empty_cell_names_column_and_row(batch_rows: int, tmp_path: Path) -> None:
    path = write_csv(
        tmp_path / "data.csv",
        {"x": ["1", "2", "3", "4", "5", "6"], "y": ["1", "2", "3", "4", "", "6"], "label": ["a"] * 6},
    )
    message = data_error(path, ["x", "y"], "label", batch_rows=batch_rows)
    assert str(path) in message and "'y'" in message
    assert re.search(r"\brow 5\b", message), message


def test_parquet_null_names_column_and_row_across_batches(tmp_path: Path) -> None:
    path = tmp_path / "nulls.parquet"
    x = pa.array([1.0, 2.0, 3.0, 4.0, 5.0, None, 7.0], pa.float64())
    pq.write_table(pa.table({"x": x, "label": ["a"] * 7}), path, row_group_size=4)
    message = data_error(path, ["x"], "label", batch_rows=3)
    assert str(path) in message and "'x'" in message
    assert re.search(r"\brow 6\b", message), message


def test_parquet_text_feature_is_refused_by_name(tmp_path: Path) -> None:
    path = tmp_path / "text.parquet"
    pq.write_table(pa.table({"x": ["1", "2"], "label": ["a", "b"]}), path)
    message = data_error(path, ["x"], "label")
    assert str(path) in message and "'x'" in message and "not a number" in message


# --- atomic output -----------------------------------------------------------------------------

SCHEMA = pa.schema([("x", pa.float64()), ("action", pa.string())])


def record_batches() -> list[pa.RecordBatch]:
    return [
        pa.record_batch([pa.array([1.5, -2.0]), pa.array(["pack", "juice"])], schema=SCHEMA),
        pa.record_batch([pa.array([3.25]), pa.array(["hold"])], schema=SCHEMA),
    ]


def read_back(path: Path) -> pa.Table:
    if path.suffix == ".parquet":
        return pq.read_table(path)
    return pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(column_types=SCHEMA))


@pytest.mark.parametrize("name", ["out.csv", "out.parquet"])
def test_table_writer_writes_every_batch(name: str, tmp_path: Path) -> None:
    target = tmp_path / name
    with TableWriter(target, SCHEMA).open() as write:
        for batch in record_batches():
            write(batch)
    assert read_back(target).equals(pa.Table.from_batches(record_batches()))
    assert sorted(p.name for p in target.parent.iterdir()) == [name]


@pytest.mark.parametrize("name", ["out.csv", "out.parquet"])
def test_table_writer_leaves_nothing_when_the_writing_fails(name: str, tmp_path: Path) -> None:
    target = tmp_path / name
    with pytest.raises(RuntimeError, match="upstream failed"), TableWriter(target, SCHEMA).open() as write:
        write(record_batches()[0])
        raise RuntimeError("upstream failed")
    assert list(tmp_path.iterdir()) == []  # neither the target nor a temporary file


@pytest.mark.parametrize("name", ["out.csv", "out.parquet"])
def test_table_writer_keeps_the_old_file_when_the_writing_fails(name: str, tmp_path: Path) -> None:
    target = tmp_path / name
    with TableWriter(target, SCHEMA).open() as write:
        write(record_batches()[1])
    before = target.read_bytes()
    with pytest.raises(RuntimeError), TableWriter(target, SCHEMA).open() as write:
        write(record_batches()[0])
        raise RuntimeError("upstream failed")
    assert target.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == [name]


def _encodings(path: Path) -> dict[str, set[str]]:
    """Each Parquet leaf column's encodings over all row groups, from the file's own metadata."""
    metadata = pq.read_metadata(path)
    found: dict[str, set[str]] = {}
    for group in range(metadata.num_row_groups):
        for i in range(metadata.num_columns):
            column = metadata.row_group(group).column(i)
            found.setdefault(column.path_in_schema, set()).update(column.encodings)
    return found


def test_parquet_output_dictionary_encodes_only_repeated_values(tmp_path: Path) -> None:
    # Values hardly repeating (measurements, ids) are written plain; repeated ones (codes, text, nested) keep
    # pyarrow's dictionary; every value reads back the same either way.
    rng = np.random.default_rng(3)
    n = 1000
    schema = pa.schema(
        [
            ("measure", pa.float64()),
            ("id", pa.int64()),
            ("grade", pa.int32()),
            ("few_floats", pa.float32()),
            ("label", pa.string()),
            ("point", pa.struct([("x", pa.float64()), ("y", pa.int8())])),
        ]
    )
    batches = [
        pa.RecordBatch.from_arrays(
            [
                pa.array(rng.normal(size=n)),
                pa.array(np.arange(start, start + n)),
                pa.array(rng.integers(0, 5, n), pa.int32()),
                pa.array(rng.choice([0.5, 1.5], n), pa.float32()),
                pa.array(rng.choice(["ok", "bad"], n)),
                pa.StructArray.from_arrays(
                    [pa.array(rng.choice([1.0, 2.0], n)), pa.array(rng.integers(0, 3, n), pa.int8())], ["x", "y"]
                ),
            ],
            schema=schema,
        )
        for start in (0, n)
    ]
    target = tmp_path / "out.parquet"
    with TableWriter(target, schema).open() as write:
        for batch in batches:
            write(batch)
    assert pq.read_table(target).equals(pa.Table.from_batches(batches))
    dictionary = {path for path, encodings in _encodings(target).items() if "RLE_DICTIONARY" in encodings}
    assert dictionary == {"grade", "few_floats", "label", "point.x", "point.y"}


def test_parquet_output_of_no_rows_has_the_schema(tmp_path: Path) -> None:
    target = tmp_path / "out.parquet"
    with TableWriter(target, SCHEMA).open():
        pass
    assert pq.read_table(target).equals(SCHEMA.empty_table())


def test_a_mistyped_column_gets_a_did_you_mean(tmp_path: Path) -> None:
    data = tmp_path / "data.csv"
    data.write_text("firmness_n,grade\n1.0,ok\n", encoding="utf-8")
    with pytest.raises(DataError, match=r"missing column\(s\) 'firmnes' \(did you mean 'firmness_n'\?\), 'zzz';"):
        list(read_feature_batches(data, ["firmnes", "zzz"]))


def test_write_behind_writes_in_order_and_raises_the_writers_error_in_the_caller() -> None:
    written: list[tuple[int, str]] = []

    def write(number: int, text: str) -> None:
        if number == 3:
            raise OSError("disk full")
        written.append((number, text))

    with pytest.raises(OSError, match="disk full"), write_behind(write) as write_later:
        for number in range(10):
            write_later(number, str(number))
    assert written == [(0, "0"), (1, "1"), (2, "2")]


def test_write_behind_finishes_every_write_before_leaving() -> None:
    written: list[int] = []
    with write_behind(lambda number, _: written.append(number), depth=2) as write_later:
        for number in range(50):
            write_later(number, None)
    assert written == list(range(50))
