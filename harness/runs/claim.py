"""Run claims: one process at a time on a run folder, held by an OS-level lock for the run's life.

Before anything is written into `<output>/<task>/<run-id>/`, the process that will write it takes an
exclusive lock (POSIX `flock`) on `<output>/<task>/.<run-id>.lock`, beside the folder: a fresh start
deletes the folder, and a lock file inside it would go with it. The lock file records the holder's
pid, host and what it is doing, so a refused process can name it. The OS drops the lock when the
holder exits or is killed, so a claim left by a killed process never blocks a later `--resume`; the
file itself stays (it is the lock, not a marker) and is taken over by the next claim.

A process may claim a run it already holds (a sweep holds the run while the runner runs it): claims
nest within one process. On a network file system, `flock` works across machines where the file
system supports it (NFS v4 does, through byte-range locks); the cluster sweep needs no shared folder.
"""

from __future__ import annotations

import contextlib
import json
import os
import socket
import time
from collections.abc import Iterator
from pathlib import Path

from harness.errors import HarnessError
from harness.files import LockedFile, lock_file, wait_for_unlock
from harness.train import processes  # the module: looked up at call time (tests stand in for a launch)

__all__ = ["RunBusy", "claim_file", "claim_holder", "claim_launched", "claim_run", "wait_for_release"]

# Claims this process holds: run folder -> (lock, nesting depth). Process state by nature: a lock is
# held by a process, and a nested claim of the same run must not ask the OS a second time (it would refuse).
_HELD: dict[Path, tuple[LockedFile, int]] = {}


class RunBusy(HarnessError):
    """Another process holds the run: `folder` and a description of the `holder`."""

    def __init__(self, folder: Path, holder: str) -> None:
        self.folder, self.holder = folder, holder
        super().__init__(f"run {folder} is claimed by {holder}; wait for it to end (or stop it), then run "
                         "again: --resume continues it, a finished run is skipped")


def claim_file(folder: Path) -> Path:
    """The lock file of a run folder: `.<run-id>.lock` beside it."""
    return folder.parent / f".{folder.name}.lock"


def claim_holder(folder: Path) -> str:
    """Who holds (or last held) the claim, as the lock file says: 'pid N on host H (doing, since T)'."""
    try:
        note = json.loads(claim_file(folder).read_text(encoding="utf-8"))
        return f"pid {int(note['pid'])} on host {note['host']} ({note['doing']} since {note['since']})"
    except (OSError, ValueError, KeyError, TypeError):  # being written this instant, or never written
        return "another process (it has not recorded which yet)"


@contextlib.contextmanager
def claim_run(folder: Path, *, doing: str = "running it") -> Iterator[None]:
    """Hold the run's lock for the block; RunBusy (a HarnessError naming the holder) when another process has it."""
    key = folder.resolve()
    if key in _HELD:
        lock, depth = _HELD[key]
        _HELD[key] = (lock, depth + 1)
        try:
            yield
        finally:
            _HELD[key] = (lock, _HELD[key][1] - 1)
        return
    note = json.dumps({"pid": os.getpid(), "host": socket.gethostname(), "doing": doing,
                       "since": time.strftime("%Y-%m-%dT%H:%M:%S%z")})
    taken = lock_file(claim_file(key), note)
    if taken is None:
        raise RunBusy(folder, claim_holder(key))
    _HELD[key] = (taken, 1)
    try:
        yield
    finally:
        del _HELD[key]
        taken.release()


@contextlib.contextmanager
def claim_launched(folder: Path, *, doing: str = "running it") -> Iterator[None]:
    """`claim_run` by the main process of an `accelerate launch` (the one that writes); when it is
    refused, every process raises RunBusy, so none is left waiting for the others. One process: claim_run."""
    with contextlib.ExitStack() as held:
        busy: RunBusy | None = None
        if processes.is_main_process():
            try:
                held.enter_context(claim_run(folder, doing=doing))
            except RunBusy as exc:
                busy = exc
        if processes.any_process(busy is not None):
            raise busy or RunBusy(folder, "another process (the main process names it)")
        yield


def wait_for_release(folder: Path) -> None:
    """Block until nobody holds the run (returns at once when nobody does); the caller then claims it."""
    if folder.resolve() in _HELD:
        raise AssertionError(f"waiting for {folder}, which this process holds itself")  # internal invariant
    wait_for_unlock(claim_file(folder.resolve()))
