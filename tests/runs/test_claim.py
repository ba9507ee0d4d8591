"""Runs that never collide: a run folder is claimed with an OS lock for the run's life.

Two `tiltyard run` of one config started together: the second is refused with one line naming the
holder's pid and host (exit 2) while the first holds the run; a sweep skips the held run and comes
back to it; a SIGKILL of the holder releases the claim (the OS drops the lock with the process), so
a later `--resume` proceeds. The holder runs in a child process (`python -m harness`), as a second
user in another terminal would; the one refused runs through `harness.cli.main` in this process.
"""

from __future__ import annotations

import errno
import json
import os
import socket
import sys
from pathlib import Path
from typing import Any

import pytest

from harness.cli import main
from harness.config import load_config
from harness.errors import HarnessError
from harness.experiments.sweep import expand_sweep, run_sweep
from harness.files import lock_file
from harness.runs.claim import claim_file, claim_holder, claim_run, wait_for_release
from harness.runs.folders import read_status, run_folder, run_id
from tests.common import ferry_config
from tests.runs.test_faults import harness_process, wait_for, write_config


def test_a_claimed_run_is_refused_naming_the_holder_and_free_once_released(tmp_path: Path) -> None:
    folder = tmp_path / "runs" / "ferry" / "some-run"
    with claim_run(folder):
        with claim_run(folder):  # the same process may claim what it holds (a sweep around the runner)
            pass
        # a second claim by another open file is what another process does: refused, naming this one
        assert lock_file(claim_file(folder), "x") is None
        note = json.loads(claim_file(folder).read_text())
        assert note["pid"] == os.getpid() and note["host"] == socket.gethostname()
        assert claim_holder(folder).startswith(f"pid {os.getpid()} on host {socket.gethostname()} (running it since ")
        with pytest.raises(AssertionError, match="holds itself"):
            wait_for_release(folder)
    assert not folder.exists()  # the claim lives beside the run folder, which a fresh start may delete
    wait_for_release(folder)  # nobody holds it: returns at once
    with claim_run(folder):
        pass


def test_claim_holder_without_a_readable_note(tmp_path: Path) -> None:
    folder = tmp_path / "run"
    assert claim_holder(folder) == "another process (it has not recorded which yet)"  # no lock file yet
    claim_file(folder).write_text('{"pid": 12', encoding="utf-8")  # a note being written this instant
    assert claim_holder(folder) == "another process (it has not recorded which yet)"


def test_no_fcntl_is_a_clear_error(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "fcntl", None)  # what a system without POSIX locks looks like to Python
    with pytest.raises(HarnessError, match=r"cannot lock .*\.run\.lock: run locks need a POSIX system"):
        with claim_run(tmp_path / "run"):
            pass


def test_a_file_system_without_locks_is_a_clear_error(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import fcntl

    def no_locks(fd: int, operation: int) -> None:
        raise OSError(errno.ENOLCK, os.strerror(errno.ENOLCK))  # what flock says where locks are unsupported

    monkeypatch.setattr(fcntl, "flock", no_locks)
    with pytest.raises(HarnessError, match=r"cannot lock .*: No locks available \(a file system without locks\?\)"):
        with claim_run(tmp_path / "run"):
            pass


def _holder(tmp_path: Path) -> tuple[Path, Path, Any]:
    """A `tiltyard run` in a child process (400 steps, about 8 s alone on one core), caught while training."""
    path = ferry_config(tmp_path, rows=160, checkpoint="toy:decoder",
                        train={"epochs": 20, "seed": 3, "checkpoint_every": 3, "log_every": 5})
    folder = run_folder(load_config(path))
    proc = harness_process("run", str(path), cwd=tmp_path)
    wait_for(folder / "checkpoints" / "last.pt", proc)
    return path, folder, proc


def test_second_run_is_refused_while_the_first_holds_it_and_resume_proceeds_after_a_kill(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path, folder, proc = _holder(tmp_path)
    try:
        written = {name: (folder / name).read_bytes() for name in ("config.yaml", "data.json", "environment.json")}
        capsys.readouterr()
        for args in (["run", str(path)], ["run", str(path), "--resume"], ["run", str(path), "--force"]):
            assert main(args) == 2
            err = capsys.readouterr().err.strip().splitlines()
            assert len(err) == 1, err  # one line, naming the holder's pid and host
            assert err[0].startswith(f"tiltyard run: error: run {folder} is claimed by pid {proc.pid} on host "
                                     f"{socket.gethostname()} (running it since "), err[0]
            assert "--resume continues it" in err[0]
        assert proc.poll() is None, "the holder ended before the refusals were checked"
        assert read_status(folder)["state"] == "running"  # the holder's run was not touched
        assert {name: (folder / name).read_bytes() for name in written} == written
    finally:
        proc.kill()  # SIGKILL: no handler runs; only the OS lets go of the lock
        proc.communicate(timeout=60)
    assert read_status(folder)["state"] == "running"  # a stale record of the killed run, and a stale lock file
    assert main(["--quiet", "run", str(path), "--resume"]) == 0
    status = read_status(folder)
    assert status["state"] == "finished" and status["resumed"] is True


def test_a_sweep_skips_a_held_run_and_comes_back_to_it(tmp_path: Path) -> None:
    grid = write_config(tmp_path, tmp_path / "runs", rows=24, name="grid.yaml",
                        sweep={"grid": {"train.seed": [1, 2]}})
    runs = expand_sweep(load_config(grid))
    held = run_folder(runs[0])
    said: list[str] = []
    # another process's claim on run 0 (a lock through its own open file, as that process would hold it)
    other = lock_file(claim_file(held), json.dumps({"pid": 4242, "host": "elsewhere", "doing": "testing",
                                                    "since": "2026-01-01T00:00:00"}))
    assert other is not None

    def log(line: str) -> None:
        said.append(line)
        if "coming back to it: waiting for" in line:
            other.release()  # the other holder finishes: the waiting sweep goes on

    summary = run_sweep(load_config(grid), "grid", compare=False, log=log)
    assert summary["failed"] == []
    first, second = f"[1/2] #0 {run_id(runs[0])}", f"[2/2] #1 {run_id(runs[1])}"
    assert f"{first}: skipped for now: claimed by pid 4242 on host elsewhere (testing since 2026-01-01T00:00:00); " \
           "coming back to it at the end" in said
    events = [(line.split(": ")[0], phrase) for line in said
              for phrase in ("skipped for now", "running", "coming back to it") if f": {phrase}" in line]
    assert events == [(first, "skipped for now"), (second, "running"), (first, "coming back to it"), (first, "running")]
    assert all(read_status(run_folder(r))["state"] == "finished" for r in runs)


def test_under_a_launch_every_process_is_refused_when_the_main_one_is(tmp_path: Path,
                                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    from harness.runs.claim import RunBusy, claim_launched
    from harness.train import processes

    # a non-main process of an `accelerate launch`: it does not claim, and learns from the main one (the
    # all-reduce of processes.any_process) that the claim was refused
    monkeypatch.setattr(processes, "is_main_process", lambda: False)
    monkeypatch.setattr(processes, "any_process", lambda flag: True)
    with pytest.raises(RunBusy, match=r"is claimed by another process \(the main process names it\)"):
        with claim_launched(tmp_path / "run"):
            pass
    assert not claim_file(tmp_path / "run").exists()  # it never touched the lock
