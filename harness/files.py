"""Files and folders that appear whole or not at all, and the one file hash.

Every file the tool writes goes to a temporary name in the same folder and is renamed into
place, so a reader never sees half a file. Temporary files and folders get the permissions the
user's umask gives any new file (not the private mode `tempfile` uses), so a team's shared run
folder stays readable.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import shutil
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

from harness.errors import HarnessError

__all__ = [
    "LockedFile",
    "atomic_folder",
    "cache_dir",
    "atomic_write_bytes",
    "atomic_write_json",
    "atomic_write_stream",
    "atomic_write_text",
    "file_sha256",
    "lock_file",
    "read_json",
    "remove_stale_temporaries",
    "wait_for_unlock",
]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write `data` to `path` through a temporary file in the same folder, then rename."""
    atomic_write_stream(path, lambda fh: fh.write(data))


def atomic_write_stream(path: Path, write: Callable[[Any], Any]) -> None:
    """Call `write(fh)` on a binary file at a temporary name in the same folder, then rename it to `path`.

    Why: a checkpoint serialised into memory first (bytes, then a copy of them) held two extra copies of a
    1.6 GB decoder checkpoint at once; streamed, the file never exists in memory as a whole.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.fchmod(fd, 0o666 & ~_umask())  # mkstemp makes it 0600
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def atomic_write_text(path: Path, text: str) -> None:
    """UTF-8 text, written atomically (newlines kept as given)."""
    atomic_write_bytes(path, text.encode("utf-8"))


def atomic_write_json(path: Path, obj: Any) -> None:
    """Indented JSON with a final newline, written atomically."""
    atomic_write_text(path, json.dumps(obj, indent=2, ensure_ascii=False, sort_keys=False) + "\n")


@contextlib.contextmanager
def atomic_folder(target: Path, *, is_complete: Callable[[Path], bool] | None = None) -> Iterator[Path]:
    """Yield an empty temporary folder beside `target`; on success it replaces `target` in one rename.

    An error inside the block leaves `target` as it was and removes the temporary folder. When
    `is_complete` is given and another process put a complete `target` in place first, that one is
    kept (both hold the same content by construction) instead of failing.
    """
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent))
    try:
        tmp.chmod(0o777 & ~_umask())  # mkdtemp makes it 0700
        yield tmp
        if target.exists() and not (is_complete is not None and is_complete(target)):
            shutil.rmtree(target)
        try:
            os.replace(tmp, target)
        except OSError:
            if is_complete is None or not is_complete(target):
                raise
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def remove_stale_temporaries(folder: Path) -> list[Path]:
    """Delete the temporaries (`.NAME.*.tmp`) a killed writer left in `folder` and its subfolders.

    Never needed for correctness (readers only see renamed files), but a run resumed after a kill
    should not carry the dead process's half-written leftovers.
    """
    removed: list[Path] = []
    if not folder.is_dir():
        return removed
    for path in sorted(folder.rglob(".*.tmp")):
        if path.is_dir():
            shutil.rmtree(path, ignore_errors=True)
        else:
            path.unlink(missing_ok=True)
        removed.append(path)
    return removed


def read_json(path: Path) -> Any:
    """Read a JSON file, with a message naming it when it is missing or broken."""
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise HarnessError(f"{path} is missing") from None
    except json.JSONDecodeError as exc:
        raise HarnessError(f"{path} is not valid JSON (line {exc.lineno}): half-written or edited by hand?") from None


def file_sha256(path: Path) -> str:
    """Hex sha256 of a file, read in 1 MiB blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def cache_dir() -> Path:
    """The tool's cache folder (toy checkpoints, converted assets, token cache): $HARNESS_CACHE, else
    ~/.cache/harness."""
    env = os.environ.get("HARNESS_CACHE", "").strip()
    return Path(env).expanduser() if env else Path.home() / ".cache" / "harness"


class LockedFile:
    """An open lock file holding an exclusive OS lock (flock) until `release`, or until the process ends."""

    def __init__(self, path: Path, fd: int) -> None:
        import fcntl

        self.path, self._fd, self._fcntl = path, fd, fcntl  # kept: a release at interpreter exit cannot import

    def release(self) -> None:
        """Give the lock up and close the file (the file stays: others may be waiting on it)."""
        if self._fd >= 0:
            self._fcntl.flock(self._fd, self._fcntl.LOCK_UN)
            os.close(self._fd)
            self._fd = -1


def _open_lock(path: Path) -> int:
    try:
        import fcntl  # noqa: F401  (POSIX only)
    except ImportError:
        raise HarnessError(f"cannot lock {path}: run locks need a POSIX system (Linux, macOS) with "
                           "fcntl.flock") from None
    path.parent.mkdir(parents=True, exist_ok=True)
    # Not inherited by child processes (Python opens files close-on-exec), so a child never keeps the lock.
    return os.open(path, os.O_RDWR | os.O_CREAT, 0o666 & ~_umask())


def lock_file(path: Path, note: str) -> LockedFile | None:
    """Take an exclusive lock on `path` (created if missing) without waiting; None when another holds it.

    The OS drops the lock when the holding process dies, however it dies, so a lock is never stale.
    On success `note` (who holds it) becomes the file's text. The note is written in place, not
    through a renamed temporary like every other file: the lock belongs to this file's inode, and a
    file renamed over it would be a different, unlocked one. Readers take a partial note as unknown.
    """
    import errno

    fd = _open_lock(path)
    import fcntl

    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError as exc:
        os.close(fd)
        if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
            return None
        raise HarnessError(f"cannot lock {path}: {exc.strerror} (a file system without locks?)") from None
    os.ftruncate(fd, 0)
    os.pwrite(fd, note.encode("utf-8"), 0)
    return LockedFile(path, fd)


def wait_for_unlock(path: Path) -> None:
    """Block until no process holds the lock on `path` (Ctrl-C still stops the wait)."""
    fd = _open_lock(path)
    import fcntl

    try:
        fcntl.flock(fd, fcntl.LOCK_SH)  # granted once the exclusive holder lets go
        fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)
