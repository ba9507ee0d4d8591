"""One sweep run as a Ray task on a cluster worker, and the archive that carries its folder back.

The worker runs `execute_run` into a scratch folder of its own (`tiltyard-task-<pid>@<host>-*` in its
temporary folder), then returns the finished run folder as the bytes of a gzipped tar archive
(config, data record, log, predictions, metrics, reports; `model/` only when weights are asked
for), so the driver needs no file system in common with it. Nothing is written anywhere else but
the caches every run uses ($HARNESS_CACHE). Scratch folders of workers that died (killed mid-run)
are removed by the next task on the same machine.

The worker reads the data at the paths the config names, as a local run does, and first checks
each file against the sha256 the driver hashed at the sweep's start: a file missing on this
machine, or another version of it, fails the run with a message naming the file and the host.
"""

from __future__ import annotations

import dataclasses
import io
import logging
import os
import shutil
import socket
import tarfile
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from harness.config import Config
from harness.files import atomic_folder, atomic_write_bytes, file_sha256

__all__ = ["SCRATCH_PREFIX", "pack_folder", "run_task", "unpack_folder"]

SCRATCH_PREFIX = "tiltyard-task-"


def _is_temporary(relative: Path) -> bool:
    return any(part.startswith(".") and part.endswith(".tmp") for part in relative.parts)


def pack_folder(folder: Path, *, weights: bool = False, checkpoints: bool = False) -> bytes:
    """The run folder's files as a gzipped tar archive; `model/` only with `weights`, `checkpoints/` only
    with `checkpoints`; never the temporaries of a writer that was killed."""
    buffer = io.BytesIO()
    with tarfile.open(fileobj=buffer, mode="w:gz", compresslevel=1) as tar:  # weights hardly compress: be quick
        for path in sorted(folder.rglob("*")):
            relative = path.relative_to(folder)
            top = relative.parts[0]
            if (top == "model" and not weights) or (top == "checkpoints" and not checkpoints):
                continue
            if path.is_file() and not path.is_symlink() and not _is_temporary(relative):
                tar.add(path, arcname=relative.as_posix(), recursive=False)
    return buffer.getvalue()


def unpack_folder(archive: bytes, target: Path) -> None:
    """Write the archive's files as `target`, atomically: the whole folder appears in one rename, or nothing changes."""
    with atomic_folder(target) as tmp, tarfile.open(fileobj=io.BytesIO(archive), mode="r:gz") as tar:
        for member in tar.getmembers():
            relative = Path(member.name)
            source = tar.extractfile(member) if member.isfile() else None
            if source is None or relative.is_absolute() or ".." in relative.parts:  # plain files inside only
                raise AssertionError(f"unexpected archive member {member.name!r}")  # internal: pack_folder made it
            with source:  # into the temporary folder, renamed whole when the block ends
                atomic_write_bytes(tmp / relative, source.read())


def _alive(pid: int) -> bool:
    import psutil

    try:
        return bool(psutil.Process(pid).status() != psutil.STATUS_ZOMBIE)
    except psutil.NoSuchProcess:
        return False
    except psutil.Error:  # it exists, but is not ours to ask about: leave its folder alone
        return True


def _clear_dead_scratch(root: Path) -> None:
    """Remove scratch folders whose worker process is gone (killed mid-run); never a live process's."""
    host = socket.gethostname()
    for path in root.glob(f"{SCRATCH_PREFIX}*@*"):
        pid_text, _, rest = path.name[len(SCRATCH_PREFIX):].partition("@")
        if not (path.is_dir() and pid_text.isdigit() and rest.startswith(f"{host}-")):
            continue  # not a scratch folder, or another machine's (a temporary folder shared by machines)
        if int(pid_text) != os.getpid() and not _alive(int(pid_text)):
            shutil.rmtree(path, ignore_errors=True)


def _check_inputs(cfg: Config, expected: Sequence[tuple[str, str]]) -> str | None:
    """None when every data file is here with the driver's sha256; else a message naming the file and host."""
    from harness.experiments.data_checks import data_files

    host = socket.gethostname()
    for path, (driver_path, digest) in zip(data_files(cfg), expected, strict=True):
        if not path.is_file():
            return (f"data file {path} is not on host {host}: a cluster sweep reads the data at the same path on "
                    "every machine (copy it there, or put it on a folder all machines see)")
        here = file_sha256(path)
        if here != digest:
            return (f"data file {path} on host {host} differs from {driver_path} on the driver (sha256 {here[:12]} "
                    f"here, {digest[:12]} there); copy the driver's version to every machine")
    return None


class _Collect(logging.Handler):
    """The harness's warnings during the task, returned to the driver (the worker's own stderr is not shown)."""

    def __init__(self) -> None:
        super().__init__(logging.WARNING)
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.lines.append(record.getMessage())


def run_task(cfg: Config, expected: Sequence[tuple[str, str]], cwd: str, earlier: bytes | None, *,
             weights: bool, threads: int) -> dict[str, Any]:
    """Run `cfg` here in a scratch folder and return its folder as an archive, with its status and costs.

    `expected` pairs each data file of the run (in `data_files` order) with the driver's path and sha256;
    `cwd` is the driver's working folder (relative data paths resolve from it when it exists here);
    `earlier` is the archive of an interrupted attempt to resume from; `threads` the CPUs the task holds.
    """
    from harness.experiments.steps import failure_message, memory_after, run_state
    from harness.runs.folders import run_folder, write_status
    from harness.runs.run import execute_run

    for name, value in (("HF_HUB_OFFLINE", "1"), ("TRANSFORMERS_NO_ADVISORY_WARNINGS", "1"),
                        ("HF_HUB_DISABLE_PROGRESS_BARS", "1")):
        os.environ.setdefault(name, value)  # the command line's own defaults, for workers it did not start
    started = time.perf_counter()
    root = Path(tempfile.gettempdir())
    _clear_dead_scratch(root)
    scratch = Path(tempfile.mkdtemp(prefix=f"{SCRATCH_PREFIX}{os.getpid()}@{socket.gethostname()}-", dir=root))
    collect, harness_log = _Collect(), logging.getLogger("harness")
    harness_log.addHandler(collect)
    before = os.getcwd()
    lines: list[str] = []
    try:
        if Path(cwd).is_dir():
            os.chdir(cwd)
        local = dataclasses.replace(cfg, output=str(scratch / "runs"))
        folder = run_folder(local)
        if earlier is not None:
            unpack_folder(earlier, folder)
        problem = _check_inputs(cfg, expected)
        if problem is not None:
            write_status(folder, "failed", error=problem)
        else:
            try:
                execute_run(local, resume=earlier is not None, log=lines.append, threads=threads)
            except Exception as exc:  # the run's failure is the result; the task itself succeeded
                if run_state(folder)["state"] != "failed":
                    write_status(folder, "failed", error=failure_message(exc))
        status = run_state(folder)
        archive = pack_folder(folder, weights=weights, checkpoints=weights and status["state"] != "finished")
        return {"status": status, "archive": archive, "host": socket.gethostname(), "pid": os.getpid(),
                "seconds": time.perf_counter() - started, "log": lines, "warnings": collect.lines,
                "memory": memory_after()}
    finally:
        harness_log.removeHandler(collect)
        os.chdir(before)
        shutil.rmtree(scratch, ignore_errors=True)
