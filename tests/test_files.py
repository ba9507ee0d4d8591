"""harness/files.py: files and folders that appear whole, with the permissions of the user's umask."""

from __future__ import annotations

import os
import stat
from collections.abc import Iterator
from pathlib import Path

import pytest

from harness.files import atomic_folder, atomic_write_json, atomic_write_text, file_sha256, read_json


@pytest.fixture
def umask() -> Iterator[object]:
    """Set a umask for the test and restore the caller's after."""
    old = os.umask(0o022)
    try:
        yield lambda mask: os.umask(mask)
    finally:
        os.umask(old)


def _mode(path: Path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


# 0o666 & ~umask for files and 0o777 & ~umask for folders is what open() and mkdir() give any program
# (POSIX creat(2)/mkdir(2), common practice): a team's shared folder stays readable under umask 022.
@pytest.mark.parametrize("mask, file_mode, folder_mode", [(0o022, 0o644, 0o755), (0o002, 0o664, 0o775),
                                                          (0o077, 0o600, 0o700)])
def test_written_files_and_folders_follow_the_umask(tmp_path: Path, umask, mask: int, file_mode: int,
                                                    folder_mode: int) -> None:
    umask(mask)
    atomic_write_text(tmp_path / "a.txt", "x")
    atomic_write_json(tmp_path / "sub" / "b.json", {"k": 1})
    with atomic_folder(tmp_path / "model") as tmp:
        (tmp / "weights.bin").write_bytes(b"\0")
    assert _mode(tmp_path / "a.txt") == file_mode and _mode(tmp_path / "sub" / "b.json") == file_mode
    assert _mode(tmp_path / "model") == folder_mode
    # the reference: what a plain open() makes under the same umask
    (tmp_path / "plain.txt").write_text("x")
    assert _mode(tmp_path / "plain.txt") == file_mode


def test_a_failed_folder_write_leaves_the_old_folder_and_no_temporary(tmp_path: Path) -> None:
    target = tmp_path / "model"
    with atomic_folder(target) as tmp:
        (tmp / "v1").write_text("one")
    with pytest.raises(RuntimeError), atomic_folder(target) as tmp:
        (tmp / "v2").write_text("two")
        raise RuntimeError("killed half-way")
    assert sorted(p.name for p in target.iterdir()) == ["v1"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model"]  # no temporary left beside it


def test_a_complete_folder_another_writer_finished_first_is_kept(tmp_path: Path) -> None:
    target = tmp_path / "toy"
    with atomic_folder(target, is_complete=Path.is_dir) as tmp:
        (tmp / "mine").write_text("a")
        target.mkdir()  # another process wins the race
        (target / "theirs").write_text("b")
    assert sorted(p.name for p in target.iterdir()) == ["theirs"]


def test_read_json_names_a_broken_file(tmp_path: Path) -> None:
    from harness.errors import HarnessError

    (tmp_path / "x.json").write_text('{"a": ')
    with pytest.raises(HarnessError, match=r"x\.json is not valid JSON \(line 1\)"):
        read_json(tmp_path / "x.json")
    with pytest.raises(HarnessError, match="is missing"):
        read_json(tmp_path / "none.json")


def test_file_sha256_matches_hashlib(tmp_path: Path) -> None:
    import hashlib

    data = os.urandom(3 * 2**20 + 5)  # more than one 1 MiB block
    (tmp_path / "blob").write_bytes(data)
    assert file_sha256(tmp_path / "blob") == hashlib.sha256(data).hexdigest()  # the library function
