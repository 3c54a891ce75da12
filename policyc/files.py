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

__all__ = ["atomic_path", "file_sha256", "same_file", "terminate_like_interrupt", "write_bytes_atomically"]

_CHUNK = 1 << 20
_UNDER_WAY: set[Path] = set()
"""Temporary files of the atomic writes under way in this process."""
NEW_FILE_MODE = 0o644


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


def file_sha256(path: Path) -> str:
    """sha256 of a file's bytes, read in 1 MiB chunks."""
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        while chunk := handle.read(_CHUNK):
            digest.update(chunk)
    return digest.hexdigest()
