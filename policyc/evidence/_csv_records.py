"""A CSV file cut into its records as raw bytes, so that rows can be copied to an output untouched.

The cut follows pyarrow's CSV reader with its default options (delimiter ``,``, quote ``"`` doubled inside
quotes, a quote opens a quoted field only at the start of a field, line ends ``\\n``, ``\\r\\n`` or ``\\r``,
empty lines skipped), so record i here is row i there; :mod:`policyc.evidence.io` checks that the counts agree.
"""

from __future__ import annotations

import re
from collections.abc import Generator, Iterator
from dataclasses import dataclass
from typing import BinaryIO

__all__ = ["CHUNK_BYTES", "MAX_RECORD_BYTES", "CsvRecords", "RecordError", "split_records"]

MAX_RECORD_BYTES = 64 << 20
"""A record longer than this is refused (most likely an unbalanced quote), so memory stays bounded."""
CHUNK_BYTES = 1 << 20
"""Bytes read at a time."""

_QUOTED = rb'"(?:[^"]|"")*+"[^,\r\n]*+'  # possessive: a doubled quote never ends the field
_PLAIN = rb'(?:[^,\r\n"][^,\r\n]*+)?'
_FIELD = rb"(?:" + _QUOTED + rb"|" + _PLAIN + rb")"
_RECORD = re.compile(_FIELD + rb"(?:," + _FIELD + rb")*+(\r\n|\n|\r|\Z)")


class RecordError(ValueError):
    """The bytes cannot be cut into records (an unbalanced quote, or a record over MAX_RECORD_BYTES)."""


@dataclass(frozen=True)
class CsvRecords:
    """Records of one batch: ``bodies[i]`` is the row's bytes without its line end (blank lines before it
    included), ``ends[i]`` its line end (empty for a last line without one)."""

    bodies: list[bytes]
    ends: list[bytes]


def split_records(stream: BinaryIO, chunk_bytes: int = CHUNK_BYTES) -> Iterator[tuple[bytes, bytes]]:
    """Yield ``(body, line end)`` for every non-empty record, losslessly: empty lines before a record are
    prepended to its body; empty lines after the last record are appended to its line end."""
    pending: tuple[bytes, bytes] | None = None
    blank = b""
    for body, end in _records(stream, chunk_bytes):
        if not body:
            blank += end
            continue
        if pending is not None:
            yield pending
        pending, blank = (blank + body, end), b""
    if pending is not None:
        yield pending[0], pending[1] + blank


def _records(stream: BinaryIO, chunk_bytes: int) -> Iterator[tuple[bytes, bytes]]:
    buffer = b""
    at_end = False
    while not at_end:
        chunk = stream.read(chunk_bytes)
        at_end = not chunk
        buffer += chunk
        if b'"' not in buffer and buffer.count(b"\r") == buffer.count(b"\r\n"):
            buffer = yield from _plain_lines(buffer, at_end)
        else:
            buffer = yield from _quoted_records(buffer, at_end)
        if len(buffer) > MAX_RECORD_BYTES:
            raise RecordError(f"a row longer than {MAX_RECORD_BYTES:,} bytes (an unbalanced quote?)")
    if buffer:
        raise RecordError("an unbalanced quote at the end of the file")


def _plain_lines(buffer: bytes, at_end: bool) -> Generator[tuple[bytes, bytes], None, bytes]:
    """The fast path for text without quotes or lone carriage returns, where a record is a line: yield the
    complete lines and return what follows the last line end (yielded too at the end of the file)."""
    lines = buffer.split(b"\n")
    rest = lines.pop()
    for line in lines:
        yield (line[:-1], b"\r\n") if line.endswith(b"\r") else (line, b"\n")
    if at_end and rest:
        yield rest, b""
        return b""
    return rest


def _quoted_records(buffer: bytes, at_end: bool) -> Generator[tuple[bytes, bytes], None, bytes]:
    """Records cut by the record pattern; return the bytes after the last complete record."""
    position = 0
    while position < len(buffer):
        match = _RECORD.match(buffer, position)
        if match is None or (not at_end and match.end() == len(buffer) and match.group(1) in (b"", b"\r")):
            break  # no whole record yet: it may go on (or "\r" become "\r\n") in the next chunk
        yield buffer[position : match.start(1)], match.group(1)
        position = match.end()
    return buffer[position:]
