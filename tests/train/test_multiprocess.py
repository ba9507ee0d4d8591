"""Two processes on one config through accelerate's own launcher, on this machine's CPU (gloo).

`accelerate launch --multi_gpu --num_processes 2 -m harness run CONFIG`: accelerate 1.x starts
several CPU processes only through this (torchrun-based) launcher; `--cpu --num_processes 2`
alone starts one process unless given an MPI host file (its simple launcher). On a machine
without a GPU the harness joins the processes on the CPU itself (harness.train.processes).

Checked: every test row is predicted exactly once; every dev evaluation scores each dev row once in
total (each process its own shard), with the same dev metrics as one process; the metrics agree with
one process at the same effective batch size (one process with grad_accum 2 sees the same batches, two per step, as two
processes each taking every other batch); only the main process writes the run folder.

Tolerance and why not bit-identical in general: the mean of two processes' gradients and the
mean of two accumulated micro-batches round alike (halving is exact in binary floating point), so
on this dropout-free model the two runs come out identical here. With another process count the
all-reduce sums in its own order, and with dropout each process draws its own masks, so the
stated tolerance is 1e-5 on every probability and 1e-6 on every metric (from memory: float32
training noise over a few dozen steps stays orders of magnitude below these).
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import sys
import textwrap
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from harness.config import load_config
from harness.data.task import load_task
from harness.runs.folders import read_status, run_folder
from harness.runs.run import execute_run
from tests.common import FERRY

ACCELERATE = Path(sys.executable).with_name("accelerate")
pytestmark = [
    pytest.mark.skipif(not ACCELERATE.exists(), reason="needs accelerate's launcher next to this Python"),
]

CONFIG = """\
task:
  name: ferry
  train: {data}/train.csv
  dev: {data}/dev.csv
  test: {data}/test.csv
  id: id
  max_rows: 75            # 75 rows: 10 batches of 8 (an even count, so no process is topped up), odd test split
model:
  checkpoint: {checkpoint}
method:
  kind: head
  dropout: 0.0
train: {{epochs: 3, batch_size: 8, grad_accum: {accum}, learning_rate: 2.0e-3, max_length: 32, seed: 5,
        threads: 1, log_every: 2}}
eval: {{bootstrap: 50}}
output: {output}
"""

# Records every write-like call of a launched worker (RANK is set) to a file of its own, so the test can
# see which process touched the run folder.
TRACER = textwrap.dedent("""
    import builtins, io, os, tempfile
    _rank = os.environ.get("RANK")
    if _rank is not None:
        _real_open = io.open
        _log = os.path.join(os.environ["WRITE_TRACE"], f"rank{_rank}-{os.getpid()}.txt")

        def _note(kind, path):
            with _real_open(_log, "a", encoding="utf-8") as fh:
                fh.write(f"{kind}\\t{os.path.abspath(os.fsdecode(os.fspath(path)))}\\n")

        def _open(file, mode="r", *args, **kwargs):
            if isinstance(file, (str, bytes, os.PathLike)) and any(c in mode for c in "wax+"):
                _note("open", file)
            return _real_open(file, mode, *args, **kwargs)

        builtins.open = io.open = _open
        for _name in ("replace", "rename", "mkdir", "makedirs", "unlink", "remove", "rmdir"):
            def _wrap(*args, _real=getattr(os, _name), _kind=_name, **kwargs):
                _note(_kind, args[0])
                return _real(*args, **kwargs)
            setattr(os, _name, _wrap)
        for _name in ("mkstemp", "mkdtemp"):
            def _wrap_tmp(*args, _real=getattr(tempfile, _name), _kind=_name, **kwargs):
                made = _real(*args, **kwargs)
                _note(_kind, made[1] if isinstance(made, tuple) else made)
                return made
            setattr(tempfile, _name, _wrap_tmp)

        # Count the rows each process scores: every call of the scorer inside predict_sharded (dev and test).
        import harness.train.processes as _processes
        _real_sharded = _processes.predict_sharded
        _scored = os.path.join(os.environ["WRITE_TRACE"], f"scored-rank{_rank}.txt")

        def _counted(predict, items):
            def _counting(rows):
                with _real_open(_scored, "a", encoding="utf-8") as fh:
                    fh.write(f"{len(rows)}\\n")
                return predict(rows)
            return _real_sharded(_counting, items)

        _processes.predict_sharded = _counted
""")


def free_port() -> int:
    with socket.socket() as s:  # other test sessions on this machine may hold accelerate's default 29500
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture(scope="module")
def no_dropout_decoder(toy_paths: dict[str, Path], tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The toy decoder with every dropout at 0: the one source of per-process randomness gone."""
    folder = tmp_path_factory.mktemp("nodrop") / "decoder"
    shutil.copytree(toy_paths["decoder"], folder)
    config = json.loads((folder / "config.json").read_text())
    config.update(resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0)  # GPT-2's three dropout settings
    (folder / "config.json").write_text(json.dumps(config))
    return folder


def _outputs(folder: Path) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    metrics = json.loads((folder / "metrics.json").read_text())
    rows = [json.loads(line) for line in (folder / "predictions.jsonl").read_text().splitlines()]
    return metrics, rows


def test_two_processes_score_every_test_and_dev_row_once_and_agree_with_one(no_dropout_decoder: Path, tmp_path: Path) -> None:
    data = FERRY
    two = tmp_path / "two.yaml"
    two.write_text(CONFIG.format(data=data, checkpoint=no_dropout_decoder, accum=1, output=tmp_path / "runs"))
    trace = tmp_path / "trace"
    (trace / "site").mkdir(parents=True)
    (trace / "site" / "sitecustomize.py").write_text(TRACER)
    env = {**os.environ, "HF_HUB_OFFLINE": "1", "WRITE_TRACE": str(trace),
           "PYTHONPATH": os.pathsep.join(filter(None, [str(trace / "site"), os.environ.get("PYTHONPATH")]))}
    cmd = [str(ACCELERATE), "launch", "--multi_gpu", "--num_processes", "2", "--num_machines", "1",
           "--mixed_precision", "no", "--dynamo_backend", "no", "--num_cpu_threads_per_process", "1",
           "--main_process_port", str(free_port()), "-m", "harness", "run", str(two)]
    proc = subprocess.run(cmd, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    folder = run_folder(load_config(two))
    assert read_status(folder)["state"] == "finished"
    assert proc.stdout.count("run folder: ") == 1  # one summary: only the main process reports

    # every test row exactly once, in the test split's order
    metrics, rows = _outputs(folder)
    test = load_task(load_config(two).task).test
    assert len(test) % 2 == 1  # an odd split: the two shards differ in size
    assert [r["id"] for r in rows] == list(test.ids)
    assert metrics["cost"]["processes"] == 2
    assert json.loads((folder / "environment.json").read_text())["processes"] == 2

    # one process with grad_accum 2: the same effective batch of 16
    one = tmp_path / "one.yaml"
    one.write_text(CONFIG.format(data=data, checkpoint=no_dropout_decoder, accum=2, output=tmp_path / "one"))
    reference = execute_run(load_config(one), log=lambda _: None)
    ref_metrics, ref_rows = _outputs(reference)
    assert metrics["cost"]["steps"] == ref_metrics["cost"]["steps"] == 15  # 10 batches / 2 per step x 3 epochs
    for name, value in ref_metrics["metrics"].items():
        assert value == pytest.approx(metrics["metrics"][name], abs=1e-6), name
    probs = np.array([list(r["probs"].values()) for r in rows])
    ref_probs = np.array([list(r["probs"].values()) for r in ref_rows])
    np.testing.assert_allclose(probs, ref_probs, rtol=0, atol=1e-5)
    assert [r["predicted"] for r in rows] == [r["predicted"] for r in ref_rows]
    assert len({r["predicted"] for r in rows}) > 1  # a model that learned something, not one constant answer

    # dev: every evaluation scored each dev row once in total, half on each process, with one process's metrics
    dev_rows = len(load_task(load_config(two).task).dev)
    log = [json.loads(line) for line in (folder / "log.jsonl").read_text().splitlines()]
    evaluations = sum("dev" in line for line in log)
    calls = {rank: [int(n) for n in (trace / f"scored-rank{rank}.txt").read_text().split()] for rank in (0, 1)}
    assert evaluations == 3 and len(calls[0]) == len(calls[1]) == evaluations + 1  # an evaluation per epoch, then test
    for k in range(evaluations):
        assert calls[0][k] + calls[1][k] == dev_rows and max(calls[0][k], calls[1][k]) <= (dev_rows + 1) // 2
    assert calls[0][-1] + calls[1][-1] == len(test)
    ref_log = [json.loads(line) for line in (reference / "log.jsonl").read_text().splitlines()]
    for mine, theirs in zip([r for r in log if "dev" in r], [r for r in ref_log if "dev" in r], strict=True):
        assert mine["step"] == theirs["step"] and mine["best_step"] == theirs["best_step"]
        for name, value in theirs["dev"].items():
            assert value == pytest.approx(mine["dev"][name], abs=1e-6), name
    assert metrics["dev"]["best_step"] == ref_metrics["dev"]["best_step"]
    for name, value in ref_metrics["dev"]["metrics"].items():
        assert value == pytest.approx(metrics["dev"]["metrics"][name], abs=1e-6), name

    # only the main process (RANK 0) wrote into the output folder; the other touched nothing there
    out = str(tmp_path / "runs")
    writes: dict[str, list[str]] = {"0": [], "1": []}
    for log in trace.glob("rank*-*.txt"):
        rank = log.name[4:].split("-")[0]
        writes[rank] += [line.split("\t", 1)[1] for line in log.read_text().splitlines()]
    inside = {rank: [p for p in paths if p.startswith(out)] for rank, paths in writes.items()}
    assert inside["0"], "the tracer saw no write of the main process: it is not working"
    assert inside["1"] == [], inside["1"][:5]
