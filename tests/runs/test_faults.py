"""Faults survived: a killed or interrupted training resumes to the same result, a killed sweep
keeps its finished runs, files are written whole, and readers refuse half-written run folders.

The kill tests run the real command line in a subprocess (`python -m harness ...`) and send the
real signal once a checkpoint exists on disk; the command that picks the work up again runs through
`harness.cli.main` in this process (the same entry point, without a second interpreter start-up).
"""

from __future__ import annotations

import dataclasses
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import torch

from harness.cli import main
from harness.config import load_config
from harness.experiments.sweep import expand_sweep
from harness.runs.folders import read_status, run_folder, run_id
from harness.runs.run import execute_run
from tests.common import ROOT, ferry_config


def write_config(folder: Path, output: Path, *, rows: int = 160, sweep: dict | None = None,
                 name: str = "run.yaml") -> Path:
    """The shared ferry config on the toy decoder, 2 epochs with a checkpoint every 3 steps."""
    return ferry_config(folder, name, output=output, rows=rows, checkpoint="toy:decoder", sweep=sweep,
                        train={"epochs": 2, "seed": 3, "checkpoint_every": 3, "log_every": 5}, eval={"bootstrap": 50})


def harness_process(*args: str, cwd: Path) -> subprocess.Popen[str]:
    """`python -m harness ARGS` in a child process, with this session's cache and the hub off."""
    env = {**os.environ, "HF_HUB_OFFLINE": "1", "PYTHONUNBUFFERED": "1"}
    return subprocess.Popen([sys.executable, "-m", "harness", *args], cwd=cwd, env=env, text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def wait_for(path: Path, proc: subprocess.Popen[str], timeout: float = 120) -> None:
    """Poll until `path` exists (the child's first checkpoint); fail if the child ends first."""
    deadline = time.monotonic() + timeout
    while not path.exists():
        if proc.poll() is not None:
            out, err = proc.communicate()
            raise AssertionError(f"the run ended (exit {proc.returncode}) before {path} appeared:\n{err[-2000:]}")
        if time.monotonic() > deadline:
            proc.kill()
            raise AssertionError(f"{path} did not appear within {timeout} s")
        time.sleep(0.005)


def outputs(folder: Path) -> dict[str, Any]:
    """What must be identical between an interrupted-and-resumed run and an uninterrupted one."""
    metrics = json.loads((folder / "metrics.json").read_text())
    rows = [json.loads(line) for line in (folder / "predictions.jsonl").read_text().splitlines()]
    log = [json.loads(line) for line in (folder / "log.jsonl").read_text().splitlines()]
    return {"metrics": metrics["metrics"], "intervals": metrics["intervals"], "dev": metrics["dev"],
            "steps": metrics["cost"]["steps"], "ids": [r["id"] for r in rows],
            "probs": np.array([list(r["probs"].values()) for r in rows]),
            "losses": [r["loss"] for r in log if "loss" in r]}


def assert_same(a: dict[str, Any], b: dict[str, Any]) -> None:
    assert a["metrics"] == b["metrics"] and a["intervals"] == b["intervals"] and a["dev"] == b["dev"]
    assert a["steps"] == b["steps"] and a["ids"] == b["ids"]
    assert np.array_equal(a["probs"], b["probs"])  # bit for bit, not approximately
    assert a["losses"] == b["losses"]  # the same batches and dropout masks, step for step


def checkpoint_step(folder: Path) -> int:
    return int(torch.load(folder / "checkpoints" / "last.pt", weights_only=True)["state"]["step"])


@pytest.fixture(scope="module")
def reference(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """An uninterrupted run of the kill tests' config, in this process."""
    root = tmp_path_factory.mktemp("faults-reference")
    cfg = load_config(write_config(root, root / "runs"))
    folder = execute_run(cfg, log=lambda _: None)
    return {"outputs": outputs(folder), "id": run_id(cfg)}


def test_sigkill_mid_training_then_resume_equals_an_uninterrupted_run(reference: dict[str, Any], tmp_path: Path) -> None:
    path = write_config(tmp_path, tmp_path / "runs")
    folder = run_folder(load_config(path))
    assert folder.name == reference["id"]  # same config, same run id: only the output folder differs
    proc = harness_process("run", str(path), cwd=tmp_path)
    wait_for(folder / "checkpoints" / "last.pt", proc)
    proc.kill()  # SIGKILL: no handler runs, nothing is cleaned up
    proc.communicate(timeout=60)
    assert proc.returncode == -signal.SIGKILL
    assert read_status(folder)["state"] == "running"  # killed: nobody could say otherwise
    assert checkpoint_step(folder) < reference["outputs"]["steps"]  # killed part-way, not after the end
    stale = folder / "checkpoints" / ".last.pt.killedwriter.tmp"  # what a kill inside a write leaves
    stale.write_bytes(b"half a checkpoint")

    assert main(["--quiet", "run", str(path), "--resume"]) == 0
    assert read_status(folder)["state"] == "finished" and read_status(folder)["resumed"] is True
    assert not stale.exists()
    assert_same(outputs(folder), reference["outputs"])


def test_sigint_saves_a_checkpoint_and_exits_130(reference: dict[str, Any], tmp_path: Path) -> None:
    path = write_config(tmp_path, tmp_path / "runs")
    folder = run_folder(load_config(path))
    proc = harness_process("run", str(path), cwd=tmp_path)
    wait_for(folder / "checkpoints" / "last.pt", proc)
    proc.send_signal(signal.SIGINT)  # what Ctrl-C sends
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err  # 128 + SIGINT, as a shell reports it (common practice)
    last = err.strip().splitlines()[-1]
    step = checkpoint_step(folder)
    assert re.fullmatch(rf"tiltyard run: error: interrupted at step {step}; checkpoint saved in "
                        rf"{re.escape(str(folder / 'checkpoints' / 'last.pt'))}; run it again with --resume to continue",
                        last), last
    status = read_status(folder)
    assert status["state"] == "interrupted" and f"step {step}" in status["message"]
    resumed = execute_run(load_config(path), resume=True, log=lambda _: None)
    assert_same(outputs(resumed), reference["outputs"])


def test_killed_sweep_resumes_without_redoing_finished_runs(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = write_config(tmp_path, tmp_path / "runs", rows=96, name="grid.yaml",
                        sweep={"grid": {"train.seed": [1, 2, 3]}})
    runs = expand_sweep(load_config(path))
    folders = [run_folder(r) for r in runs]
    proc = harness_process("sweep", str(path), "--no-compare", cwd=tmp_path)
    wait_for(folders[1] / "checkpoints" / "last.pt", proc)
    proc.kill()
    proc.communicate(timeout=60)
    assert [read_status(f)["state"] for f in folders[:2]] == ["finished", "running"] and not folders[2].exists()
    first = {p: (p.stat().st_mtime_ns, p.read_bytes()) for p in folders[0].rglob("*") if p.is_file()}

    capsys.readouterr()
    assert main(["sweep", str(path)]) == 0
    said = capsys.readouterr().out
    assert re.search(rf"\[1/3\] #0 {run_id(runs[0])}: done", said)
    assert re.search(rf"\[2/3\] #1 {run_id(runs[1])}: resuming from its last checkpoint", said)
    assert {p: (p.stat().st_mtime_ns, p.read_bytes()) for p in folders[0].rglob("*") if p.is_file()} == first
    assert [read_status(f)["state"] for f in folders] == ["finished"] * 3
    assert read_status(folders[1])["resumed"] is True and read_status(folders[2])["resumed"] is False
    whole = execute_run(dataclasses.replace(runs[1], output=str(tmp_path / "whole")), log=lambda _: None)
    assert_same(outputs(folders[1]), outputs(whole))  # the resumed run is the run it would have been
    comparison = json.loads((tmp_path / "runs" / "ferry" / "sweeps" / "grid" / "comparison.json").read_text())
    assert comparison["runs"] == 3 and not comparison["incomplete"]


# ----- files are written whole ---------------------------------------------------------------------

# Writes that do not go through harness.files.atomic_write_*, each with the reason the file is still whole.
_WHOLE_ANYWAY = {
    "models/assets.py": "into harness.files.atomic_folder's temporary folder, renamed into place as a whole",
    "models/cut.py": "into harness.files.atomic_folder's temporary folder, renamed into place as a whole",
    "methods/head_export.py": "into harness.files.atomic_folder's temporary folder, renamed into place as a whole",
    "methods/next_token.py": "Method.save writes the folder it is given: the runner's temporary one, renamed whole",
    "models/toy.py": "build_toy writes the temporary folder ensure_toy renames whole; `tiltyard toy OUT_DIR` writes "
                     "straight into OUT_DIR, a folder of the user's, not a run",
    "train/memory.py": "a kernel control file (/proc/self/clear_refs), not data",
    "files.py": "the atomic writer itself, and the run lock's note (written in place: the lock is the file's own)",
}
# (torch.save into `fh`: the temporary file harness.files.atomic_write_stream hands its writer)
_WRITE = re.compile(r"""\.write_(text|bytes)\(|\bopen\([^)]*["'](w|a|x)b?\+?["']|os\.fdopen\([^)]*["']w"""
                    r"""|\.save_pretrained\(|\bsave_file\(|\btorch\.save\((?![^)]*\b(buffer|fh)\))|\.savefig\((?!buf\b)""")


def test_every_write_in_the_package_is_atomic() -> None:
    offenders = []
    sources = sorted((ROOT / "harness").rglob("*.py"))
    assert any(p.parent.name == "methods" for p in sources)  # the subpackages are searched too
    for path in sources:
        name = path.relative_to(ROOT / "harness").as_posix()
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
            if _WRITE.search(line) and name not in _WHOLE_ANYWAY:
                offenders.append(f"{name}:{number}: {line.strip()}")
    assert not offenders, "write through harness.files.atomic_write_*:\n" + "\n".join(offenders)
    assert all((ROOT / "harness" / name).is_file() for name in _WHOLE_ANYWAY)  # no stale exemption
    # the pattern finds the usual ways to write, and lets in-memory buffers through
    for write in ('Path("x").write_text("y")', 'open(p, "w")', 'open(p, "ab")', "m.save_pretrained(out)",
                  "save_file(t, p)", "torch.save(state, path)", "fig.savefig(path)"):
        assert _WRITE.search(write), write
    for in_memory in ("torch.save(payload, buffer)", "fig.savefig(buf, format='png')", 'open(p, "rb")'):
        assert not _WRITE.search(in_memory), in_memory


def test_atomic_write_leaves_the_old_file_when_the_writer_dies(tmp_path: Path) -> None:
    # A writer killed half-way must leave the previous version readable, not a truncated file.
    target = tmp_path / "metrics.json"
    target.write_text('{"old": true}\n')
    code = textwrap.dedent(f"""
        import os, sys
        from pathlib import Path
        import harness.runs.folders as runs
        real = os.replace
        def die(src, dst):  # the process dies after the bytes are written, before the rename
            os._exit(9)
        os.replace = die
        runs.atomic_write_json(Path({str(target)!r}), {{"new": "x" * 100000}})
    """)
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 9, proc.stderr
    assert json.loads(target.read_text()) == {"old": True}
    leftovers = [p.name for p in tmp_path.iterdir() if p.name != "metrics.json"]
    assert len(leftovers) == 1 and leftovers[0].startswith(".metrics.json.") and leftovers[0].endswith(".tmp")
    from harness.files import remove_stale_temporaries

    assert [p.name for p in remove_stale_temporaries(tmp_path)] == leftovers
    assert [p.name for p in tmp_path.iterdir()] == ["metrics.json"]


# ----- readers refuse half-written run folders ------------------------------------------------------

@pytest.fixture(scope="module")
def finished(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("faults-finished")
    path = write_config(root, root / "runs", rows=40)
    path.write_text(path.read_text().replace("epochs: 2,", "epochs: 1, max_steps: 3,"))
    return execute_run(load_config(path), log=lambda _: None)


def _damaged(finished: Path, tmp_path: Path, how: str) -> Path:
    """A copy of a finished run, damaged as a crash (or an editor) might leave it."""
    folder = tmp_path / "runs" / "ferry" / finished.name
    shutil.copytree(finished, folder)
    if how == "running":
        status = json.loads((folder / "status.json").read_text())
        (folder / "status.json").write_text(json.dumps({**status, "state": "running"}))
    else:
        name = {"metrics": "metrics.json", "predictions": "predictions.jsonl", "method": "method.json",
                "export": "model/harness_head.json"}[how]
        data = (folder / name).read_bytes()
        (folder / name).write_bytes(data[: len(data) // 2])  # cut in the middle of a line
    return folder


def _input_csv(tmp_path: Path) -> Path:
    path = tmp_path / "new.csv"
    path.write_text("id,text\nn1,when is the next sailing\nn2,I left my bag on the boat\n")
    return path


@pytest.mark.parametrize("how, named", [
    ("running", "is running, not finished"),
    ("metrics", "metrics.json is not valid JSON"),
    ("predictions", "predictions.jsonl line "),
])
def test_report_replay_and_predict_refuse_a_half_written_run(finished: Path, tmp_path: Path, how: str, named: str,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    from harness.errors import HarnessError
    from harness.report.run_report import load_run

    folder = _damaged(finished, tmp_path, how)
    with pytest.raises(HarnessError, match=re.escape(named)):
        load_run(folder)  # what report and compare read
    for argv in (["replay", str(folder), "--out", str(tmp_path / "replayed")],
                 ["predict", str(folder), str(_input_csv(tmp_path)), "--out", str(tmp_path / "out.csv")]):
        code = main(argv)
        err = capsys.readouterr().err.strip()
        assert code == 2 and err.count("\n") == 0 and str(folder) in err and named in err, err
    assert not (tmp_path / "replayed").exists() and not (tmp_path / "out.csv").exists()  # refused before any work


@pytest.mark.parametrize("how, named", [("method", "method.json is not valid JSON"),
                                        ("export", "model cannot be reloaded")])
def test_predict_refuses_a_damaged_export(finished: Path, tmp_path: Path, how: str, named: str,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    folder = _damaged(finished, tmp_path, how)
    code = main(["predict", str(folder), str(_input_csv(tmp_path)), "--out", str(tmp_path / "out.csv")])
    err = capsys.readouterr().err.strip()
    assert code == 2 and err.count("\n") == 0 and named in err and str(folder) in err, err


def test_compare_leaves_out_a_half_written_run_and_says_why(finished: Path, tmp_path: Path,
                                                            capsys: pytest.CaptureFixture[str]) -> None:
    broken = _damaged(finished, tmp_path / "b", "predictions")
    good = tmp_path / "g" / "runs" / "ferry" / finished.name
    shutil.copytree(finished, good)
    assert main(["compare", str(good), str(broken), "--out", str(tmp_path / "cmp")]) == 0
    out = capsys.readouterr().out
    assert f"left out: {broken.name} (finished): {broken / 'predictions.jsonl'} line " in out
    result = json.loads((tmp_path / "cmp" / "comparison.json").read_text())
    assert result["runs"] == 1 and [i["path"] for i in result["incomplete"]] == [str(broken)]
