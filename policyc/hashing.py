"""File digests shared by the checks, the fit and the compiler."""

from __future__ import annotations

import hashlib
from pathlib import Path

__all__ = ["file_sha256"]

_CHUNK = 1 << 20


def file_sha256(path: Path) -> str:
    """sha256 of a file's bytes, read in 1 MiB chunks."""
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        while chunk := handle.read(_CHUNK):
            digest.update(chunk)
    return digest.hexdigest()
