"""File helpers shared by every stage: atomic replacement (a reader sees the old file or the complete new one,
never a part) and sha256 digests read in chunks."""

from __future__ import annotations

import hashlib
import os
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

__all__ = ["atomic_path", "file_sha256", "write_bytes_atomically"]

_CHUNK = 1 << 20


@contextmanager
def atomic_path(target: Path) -> Iterator[Path]:
    """A temporary path beside ``target`` that is renamed over it on success and removed on failure."""
    target.parent.mkdir(parents=True, exist_ok=True)
    handle, name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".partial", dir=target.parent)
    os.close(handle)
    temporary = Path(name)
    try:
        yield temporary
        os.chmod(temporary, 0o644)
        os.replace(temporary, target)
    finally:
        temporary.unlink(missing_ok=True)


def write_bytes_atomically(target: Path, data: bytes) -> None:
    with atomic_path(target) as temporary, temporary.open("wb") as stream:
        stream.write(data)
        stream.flush()
        os.fsync(stream.fileno())


def file_sha256(path: Path) -> str:
    """sha256 of a file's bytes, read in 1 MiB chunks."""
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        while chunk := handle.read(_CHUNK):
            digest.update(chunk)
    return digest.hexdigest()
