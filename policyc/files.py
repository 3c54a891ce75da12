"""File helpers shared by every stage: atomic replacement (a reader sees the old file or the complete new one,
never a part) and sha256 digests read in chunks."""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import secrets
import signal
import stat
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from types import FrameType

from policyc.errors import OutputError

__all__ = [
    "DATA_SUFFIXES",
    "DataFilesError",
    "atomic_path",
    "data_files",
    "data_sha256",
    "file_sha256",
    "same_file",
    "terminate_like_interrupt",
    "write_bytes_atomically",
]

_CHUNK = 1 << 20
_UNDER_WAY: set[Path] = set()
"""Temporary files of the atomic writes under way in this process."""
NEW_FILE_MODE = 0o644
DATA_SUFFIXES = frozenset({".csv", ".txt", ".parquet", ".pq"})
_GLOB_CHARACTERS = frozenset("*?[")


@contextmanager
def atomic_path(target: Path) -> Iterator[Path]:
    """A temporary path beside ``target`` that is renamed over it on success and removed on failure.

    A symbolic link is written through (its target is replaced, the link stays). An existing file keeps its
    permission bits; a read-only one is refused with PermissionError rather than replaced. A new file gets 0644.
    """
    target = Path(os.path.realpath(target))
    if not target.parent.is_dir():
        # a missing directory is more often a typo than a wish: never create it silently
        raise OutputError(f"{target}: the directory {target.parent} does not exist; create it first")
    mode = _replaceable_mode(target)
    # The name is known (and registered for SIGTERM, below) before one system call creates the file inside the
    # try, so Ctrl-C or SIGTERM can arrive at any moment without leaving it behind.
    temporary = target.parent / f".{target.name}.{secrets.token_hex(8)}.partial"
    _UNDER_WAY.add(temporary)
    owned = True
    try:
        try:
            os.close(os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
        except FileExistsError:
            owned = False  # another writer's file of the same random name: never remove it
            _UNDER_WAY.discard(temporary)
            raise
        yield temporary
        os.chmod(temporary, mode)
        os.replace(temporary, target)
    finally:
        if owned:
            temporary.unlink(missing_ok=True)
        _UNDER_WAY.discard(temporary)


def _replaceable_mode(target: Path) -> int:
    """The permission bits the new file takes over; PermissionError when the existing file is read-only."""
    try:
        mode = stat.S_IMODE(target.stat().st_mode)
    except FileNotFoundError:
        return NEW_FILE_MODE
    # The owner's write bit, not os.access: root may write anything, but a file made read-only is meant to stay.
    if not mode & stat.S_IWUSR or not os.access(target, os.W_OK):
        raise PermissionError(errno.EACCES, "the file is read-only; refusing to replace it", str(target))
    return mode


def same_file(first: Path, second: Path) -> bool:
    """Whether two paths name one file (through links and any spelling); False when either does not exist."""
    try:
        return os.path.samefile(first, second)
    except OSError:
        return False


@contextmanager
def terminate_like_interrupt() -> Iterator[None]:
    """Within the block, SIGTERM removes the temporary files of the writes under way (as Ctrl-C does through
    ``finally``) and ends the process with status 143.

    The handler removes the files itself rather than raising: an exception raised from a signal handler can
    be swallowed by library code that happens to be running (pyarrow importing an optional module, say).
    Only the main thread can set handlers; elsewhere this does nothing.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGTERM, _remove_partial_files_and_exit)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def _remove_partial_files_and_exit(signum: int, frame: FrameType | None) -> None:
    for temporary in list(_UNDER_WAY):
        with contextlib.suppress(OSError):
            temporary.unlink(missing_ok=True)
    os.write(2, b"policyc: terminated; the partial output was removed\n")
    os._exit(128 + signum)  # the shell's convention for a process ended by a signal


def write_bytes_atomically(target: Path, data: bytes) -> None:
    with atomic_path(target) as temporary, temporary.open("wb") as stream:
        stream.write(data)
        stream.flush()
        os.fsync(stream.fileno())


_DIGESTS: dict[tuple[int, ...], str] = {}
"""Digests already computed in this process, by file identity (see :func:`file_sha256`); the oldest go first."""
_DIGESTS_KEPT = 64
_DIGESTS_LOCK = threading.Lock()


def file_sha256(path: Path) -> str:
    """sha256 of a file's bytes, read in 1 MiB chunks; hashed once per process while the file is unchanged.

    A compile hashes its data for the check and again after the fit has read it (to see that the pinned file
    is what was read): the second time costs a ``stat``. A file counts as unchanged while its device, inode,
    size, modification and status-change times (nanoseconds) are (common practice, no source); rewriting a
    file updates its status-change time, so a change made even within the same second shows.
    """
    before = _identity(path)
    with _DIGESTS_LOCK:
        known = _DIGESTS.get(before)
    if known is not None:
        return known
    text = _read_sha256(path)
    if _identity(path) == before:  # a file written to while it was read is hashed again next time
        with _DIGESTS_LOCK:
            _DIGESTS[before] = text
            while len(_DIGESTS) > _DIGESTS_KEPT:
                del _DIGESTS[next(iter(_DIGESTS))]
    return text


def _read_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        while chunk := handle.read(_CHUNK):
            digest.update(chunk)
    return digest.hexdigest()


def _identity(path: Path) -> tuple[int, ...]:
    status = path.stat()
    return (status.st_dev, status.st_ino, status.st_size, status.st_mtime_ns, status.st_ctime_ns)


class DataFilesError(ValueError):
    """A data path names no usable files; the message says which path and why."""


def data_files(path: Path) -> list[Path]:
    """The data files a path stands for, in a fixed order: a file itself; a directory's files; a glob's matches.

    A glob pattern may stand in the last component only (``data/part-*.parquet``). A directory is walked
    recursively; names starting with ``.`` or ``_`` (temporary files, ``_SUCCESS``
    markers) are skipped at every level, and any other file must have a data suffix, so a stray file is an
    error rather than silently dropped data. The order is the relative paths' text order, on every machine:
    sums merged over the files (``evidence/partitions.py``) depend on it.
    """
    if _GLOB_CHARACTERS.intersection(path.name):
        matches = sorted(
            (p for p in path.parent.glob(path.name) if p.is_file() and not _is_hidden(Path(p.name))),
            key=lambda p: p.name,
        )
        if not matches:
            raise DataFilesError(f"{path}: no file matches the pattern")
        return [_require_data_suffix(p) for p in matches]
    if path.is_dir():
        found = sorted(
            (p for p in path.rglob("*") if p.is_file() and not _is_hidden(p.relative_to(path))),
            key=lambda p: p.relative_to(path).as_posix(),
        )
        if not found:
            raise DataFilesError(f"{path}: the directory holds no data files")
        return [_require_data_suffix(p) for p in found]
    if not path.is_file():
        raise DataFilesError(f"{path}: no such file or directory")
    return [path]


def _is_hidden(relative: Path) -> bool:
    return any(part.startswith((".", "_")) for part in relative.parts)


def _require_data_suffix(path: Path) -> Path:
    if path.suffix.lower() not in DATA_SUFFIXES:
        raise DataFilesError(f"{path}: not a data file (expected one of {', '.join(sorted(DATA_SUFFIXES))})")
    return path


def data_sha256(files: list[Path]) -> str:
    """The sha256 a pin compares: a single file's own digest; for several, the sha256 of one line per file,
    ``<name relative to their common folder>\\t<file sha256>\\n``, in the given order (a renamed, added,
    removed or changed file changes it)."""
    if len(files) == 1:
        return file_sha256(files[0])
    common = Path(os.path.commonpath([p.resolve().parent for p in files]))
    listing = "".join(f"{p.resolve().relative_to(common).as_posix()}\t{file_sha256(p)}\n" for p in files)
    return hashlib.sha256(listing.encode("utf-8")).hexdigest()
