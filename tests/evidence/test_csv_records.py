"""Cutting a CSV file into raw records: lossless, and row for row what pyarrow's CSV reader reads."""

from __future__ import annotations

import io

import pyarrow as pa
import pyarrow.csv as pacsv
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from policyc.evidence import _csv_records
from policyc.evidence._csv_records import RecordError, split_records

PIECES = [b"a", b"1", b",", b'"', b'""', b"\n", b"\r", b"\r\n", b" ", b"\xe9"]


def arrow_rows(data: bytes) -> list[dict[str, object]] | None:
    """pyarrow's reading of a two-column file, all cells as bytes; None when it refuses the file."""
    options = pacsv.ConvertOptions(column_types={"x": pa.binary(), "y": pa.binary()})
    try:
        table = pacsv.read_csv(
            io.BytesIO(data), parse_options=pacsv.ParseOptions(newlines_in_values=True), convert_options=options
        )
    except pa.ArrowInvalid:
        return None
    return table.to_pylist()


@settings(max_examples=1500, deadline=None)
@given(body=st.lists(st.sampled_from(PIECES), max_size=40), chunk=st.integers(1, 9))
def test_records_are_lossless_and_match_the_rows_pyarrow_reads(body: list[bytes], chunk: int) -> None:
    data = b"x,y\n" + b"".join(body)
    try:  # small chunks: records are cut across every chunk boundary
        records = list(split_records(io.BytesIO(data), chunk))
    except RecordError:
        return  # refused: only an unbalanced quote, which the caller reports
    assert b"".join(body + end for body, end in records) == data
    expected = arrow_rows(data)
    if expected is None:
        return
    rows = [body for body, _ in records[1:]]
    assert len(rows) == len(expected)
    for raw, row in zip(rows, expected, strict=True):  # each record alone reads as the same row
        assert arrow_rows(b"x,y\n" + raw.lstrip(b"\r\n")) == [row]


def test_blank_lines_ride_with_the_next_record_and_trail_with_the_last() -> None:
    data = b"\na,b\n1,2\r\n\r\n3,4\n\n\n"
    assert list(split_records(io.BytesIO(data))) == [(b"\na,b", b"\n"), (b"1,2", b"\r\n"), (b"\r\n3,4", b"\n\n\n")]


def test_a_quoted_line_end_stays_inside_its_record() -> None:
    data = b'a,b\n"x\r\ny",2\n"p ""q"", r",3'
    assert list(split_records(io.BytesIO(data))) == [(b"a,b", b"\n"), (b'"x\r\ny",2', b"\n"), (b'"p ""q"", r",3', b"")]


def test_an_unbalanced_quote_is_refused() -> None:
    with pytest.raises(RecordError, match="unbalanced quote"):
        list(split_records(io.BytesIO(b'a,b\n"open,1\n2,3\n')))


@pytest.mark.parametrize("row", [b'"' + b"x" * 200 + b'"', b"x" * 200], ids=["quoted", "plain"])
def test_a_record_longer_than_the_cap_is_refused(row: bytes, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(_csv_records, "MAX_RECORD_BYTES", 64)
    with pytest.raises(RecordError, match="longer than"):
        list(split_records(io.BytesIO(b"a\n" + row + b"\n"), chunk_bytes=16))
