"""Sweeps on a Ray cluster: a local 2-worker instance (1 CPU per run) on this machine stands for one.

Checked: a 6-run toy sweep gives the same predictions (every probability within 1e-6) and the same
comparison table as the serial sweep, with a finished run skipped and an interrupted one resumed on
the cluster; a worker killed (SIGKILL) mid-run is replaced and the run redone, nothing half-written
left behind; the driver's output folder alone serves `compare` and `replay`, while the workers wrote
only into their temporary folders (and the caches); failures are per run; a stopped driver cancels
its tasks and lets go of its claims.

Every process this module starts inherits a write tracer (a sitecustomize on PYTHONPATH, as in
tests/train/test_multiprocess.py): each process but this one notes every file it writes. Every test
runs under a deadline (SIGALRM), and the module's Ray instance is shut down at its end.
"""

from __future__ import annotations

import json
import os
import signal
import tempfile
import textwrap
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from harness.config import Config, load_config
from harness.experiments.cluster import ClusterSpec, connect, run_on_cluster
from harness.experiments.cluster_task import SCRATCH_PREFIX
from harness.experiments.data_checks import hash_data
from harness.experiments.sweep import expand_sweep, run_sweep
from harness.runs import run as runner
from harness.runs.claim import claim_run
from harness.runs.folders import read_status, require_finished, run_folder, run_id
from harness.train.checkpoints import Interrupted
from tests.common import ferry_config

# Notes every write of a process other than the test's own (TRACE_SKIP_PID) in TRACE_DIR/<pid>.txt.
TRACER = textwrap.dedent("""
    import builtins, io, os
    if os.environ.get("TRACE_DIR") and str(os.getpid()) != os.environ.get("TRACE_SKIP_PID"):
        _real_open = io.open
        _log = os.path.join(os.environ["TRACE_DIR"], f"{os.getpid()}.txt")

        def _note(path):
            with _real_open(_log, "a", encoding="utf-8") as fh:
                fh.write(os.path.abspath(os.fsdecode(os.fspath(path))) + "\\n")

        def _open(file, mode="r", *args, **kwargs):
            if isinstance(file, (str, bytes, os.PathLike)) and any(c in mode for c in "wax+"):
                _note(file)
            return _real_open(file, mode, *args, **kwargs)

        builtins.open = io.open = _open
        for _name in ("replace", "rename", "mkdir", "makedirs"):
            def _wrap(*args, _real=getattr(os, _name), **kwargs):
                _note(args[0])
                return _real(*args, **kwargs)
            setattr(os, _name, _wrap)
""")


class Deadline(Exception):
    pass


@pytest.fixture(autouse=True)
def deadline() -> Iterator[None]:
    """Each test ends within 5 minutes, whatever Ray does (the driver polls, so the alarm gets through)."""
    def expire(signum: int, frame: Any) -> None:
        raise Deadline("the test ran past its 300 s deadline")

    previous = signal.signal(signal.SIGALRM, expire)
    signal.alarm(300)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory, harness_cache: Path) -> Iterator[dict[str, Path]]:
    """A local Ray instance of 2 CPUs for the module, its workers with their own TMPDIR and the write tracer."""
    root = tmp_path_factory.mktemp("cluster")
    worker_tmp, trace = root / "worker-tmp", root / "trace"
    (trace / "site").mkdir(parents=True)
    worker_tmp.mkdir()
    (trace / "site" / "sitecustomize.py").write_text(TRACER)
    ray_tmp = Path(tempfile.mkdtemp(prefix="ty-ray-", dir="/tmp" if Path("/tmp").is_dir() else None))
    with pytest.MonkeyPatch.context() as patch:
        patch.setenv("TMPDIR", str(worker_tmp))  # inherited by the workers; this process keeps its own
        patch.setenv("RAY_TMPDIR", str(ray_tmp))  # short: Ray's sockets live there
        patch.setenv("TRACE_DIR", str(trace))
        patch.setenv("TRACE_SKIP_PID", str(os.getpid()))
        patch.setenv("PYTHONPATH", os.pathsep.join(filter(None, [str(trace / "site"), os.environ.get("PYTHONPATH")])))
        with connect(ClusterSpec("local", workers=2, cpus_per_run=1)):
            yield {"worker_tmp": worker_tmp, "trace": trace, "ray_tmp": ray_tmp, "cache": harness_cache}
    assert not list(ray_tmp.iterdir())  # connect removed the instance's own folder on shutdown
    ray_tmp.rmdir()


SPEC = ClusterSpec("local", workers=2, cpus_per_run=1)
ARMS = {"arms": [{"model.checkpoint": "toy:encoder"}, {"model.checkpoint": "toy:decoder"},
                 {"model.checkpoint": "toy:decoder", "method.kind": "next_token", "method.template": "Q: {text} A:"}],
        "grid": {"train.seed": [1, 2]}}


def _probs(folder: Path) -> tuple[list[str], np.ndarray]:
    rows = [json.loads(line) for line in (folder / "predictions.jsonl").read_text().splitlines()]
    return [r["id"] for r in rows], np.array([list(r["probs"].values()) for r in rows])


# timings and memory differ from machine to machine; the saved model's size by a few bytes of its folder's path
_TIMED = ("train_seconds", "peak_rss_mb", "rows_per_second", "latency_p50_ms", "latency_p95_ms", "model_mb")


def _table(sweep: Path) -> dict[str, Any]:
    """The comparison's groups without what differs from machine to machine (timings and memory)."""
    groups = json.loads((sweep / "comparison.json").read_text())["groups"]
    return {g["group"]: {k: v for k, v in g.items() if k not in _TIMED} for g in groups}


def _sigint_on_first_step(calls: list[str]) -> Any:
    real = runner.execute_run

    def execute(cfg: Config, **kw: Any) -> Path:
        calls.append(run_id(cfg))
        kw["on_step"] = lambda step: signal.raise_signal(signal.SIGINT)  # Ctrl-C after the first step
        return real(cfg, **kw)

    return execute


def test_six_runs_on_two_workers_match_the_serial_sweep(cluster: dict[str, Path], tmp_path: Path,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    serial_cfg = load_config(ferry_config(tmp_path, "serial.yaml", output=tmp_path / "serial", rows=40, sweep=ARMS))
    cfg = load_config(ferry_config(tmp_path, "grid.yaml", output=tmp_path / "out", rows=40, sweep=ARMS))
    runs = expand_sweep(cfg)
    assert len(runs) == 6 and [run_id(r) for r in runs] == [run_id(r) for r in expand_sweep(serial_cfg)]
    assert run_sweep(serial_cfg, "grid", log=lambda _: None)["failed"] == []

    # before the cluster sweep: run 0 finished here, run 1 interrupted here after one step (a checkpoint)
    runner.execute_run(runs[0], log=lambda _: None)
    calls: list[str] = []
    monkeypatch.setattr(runner, "execute_run", _sigint_on_first_step(calls))
    with pytest.raises(Interrupted):
        runner.execute_run(runs[1], log=lambda _: None)
    monkeypatch.undo()
    assert read_status(run_folder(runs[1]))["state"] == "interrupted"

    said: list[str] = []
    summary = run_sweep(cfg, "grid", log=said.append, cluster=SPEC)
    assert summary["failed"] == [], said
    text = "\n".join(said)
    assert f"#0 {run_id(runs[0])}: done" in text  # skipped: not sent
    assert f"#1 {run_id(runs[1])}: sent to the cluster (resuming from its last checkpoint)" in text
    assert text.count("sent to the cluster") == 5 and text.count(" finished on ") == 5
    assert read_status(run_folder(runs[1]))["resumed"] is True
    for run in runs:
        ids, probs = _probs(run_folder(run))
        ref_ids, ref_probs = _probs(tmp_path / "serial" / "ferry" / run_id(run))
        assert ids == ref_ids
        np.testing.assert_allclose(probs, ref_probs, rtol=0, atol=1e-6)
    sweeps = Path("sweeps") / "grid"
    assert _table(tmp_path / "out" / "ferry" / sweeps) == _table(tmp_path / "serial" / "ferry" / sweeps)
    index = json.loads((tmp_path / "out" / "ferry" / sweeps / "sweep.json").read_text())
    assert {r["state"] for r in index["runs"]} == {"finished"}
    assert all(set(r["memory"]) == {"peak_rss_mb", "rss_mb_after"} for r in index["runs"][1:])  # the worker's


def test_the_driver_folder_serves_compare_and_replay_and_workers_wrote_only_to_their_own_folders(
    cluster: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from harness.cli import main

    out = tmp_path / "out"
    cfg = load_config(ferry_config(tmp_path, "grid.yaml", output=out, rows=24,
                                   sweep={"grid": {"train.seed": [1, 2]}}))
    assert run_sweep(cfg, "grid", compare=False, log=lambda _: None, cluster=SPEC)["failed"] == []
    folder = run_folder(expand_sweep(cfg)[0])
    assert not (folder / "model").exists() and not (folder / "checkpoints").exists()  # weights only when asked
    capsys.readouterr()
    assert main(["compare", str(out / "ferry" / "sweeps" / "grid")]) == 0  # the sweep folder lists its runs
    assert "comparison written to" in capsys.readouterr().out
    assert main(["replay", str(folder), "--out", str(tmp_path / "replayed")]) == 0  # identical, from these files
    assert "replay identical" in capsys.readouterr().out

    # every file the cluster's processes wrote: the workers' temporary folders, the caches (ours, and the
    # libraries' as any run writes them: matplotlib's, and torch's compiler cache once some code in this
    # process has named it in the environment the workers inherit), Ray's own folder, and the kernel's files
    import getpass
    import tempfile

    import matplotlib

    # torch's own compile cache folder, which it may create on import: <tmp>/torchinductor_<user> by default
    # (torch/_inductor/runtime/cache_dir_utils.py, default_cache_dir)
    torch_cache = Path(tempfile.gettempdir()) / f"torchinductor_{getpass.getuser()}"
    allowed = [cluster["worker_tmp"], cluster["cache"], cluster["ray_tmp"], cluster["trace"],
               Path(matplotlib.get_cachedir()), Path(matplotlib.get_configdir()), torch_cache]
    allowed += [Path(os.environ[name]) for name in ("TORCHINDUCTOR_CACHE_DIR", "TRITON_CACHE_DIR") if name in os.environ]
    written = [Path(line) for log in cluster["trace"].glob("*.txt") for line in log.read_text().splitlines()]
    assert any(cluster["worker_tmp"] in p.parents for p in written), "the tracer saw no worker write"
    outside = [p for p in written if not any(p == a or a in p.parents for a in allowed)
               and p not in (Path("/dev/null"), Path("/proc/self/clear_refs"))]
    assert outside == [], outside[:5]
    assert not any(out in p.parents for p in written)
    assert not list(cluster["worker_tmp"].glob(f"{SCRATCH_PREFIX}*"))  # and they cleaned up after themselves


def _kill_trainers(worker_tmp: Path, killed: list[tuple[int, str]], stop: threading.Event, times: int) -> None:
    """Watch the workers' scratch folders; SIGKILL the worker training a run (its log has a line), `times`
    times, each time the worker of the run killed first."""
    earlier = set(worker_tmp.iterdir())  # what killed workers of earlier tests may have left
    while not stop.is_set() and len(killed) < times:
        for log in worker_tmp.glob(f"{SCRATCH_PREFIX}*/runs/ferry/*/log.jsonl"):
            scratch = worker_tmp / log.parts[len(worker_tmp.parts)]
            pid = int(scratch.name[len(SCRATCH_PREFIX):].split("@")[0])
            if scratch in earlier or pid in {k[0] for k in killed} or (killed and log.parent.name != killed[0][1]):
                continue  # a worker killed already (its scratch folder stays), or another run
            os.kill(pid, signal.SIGKILL)
            killed.append((pid, log.parent.name))
            break
        time.sleep(0.005)


def _sweep_killing(cluster: dict[str, Path], cfg: Config, times: int) -> tuple[dict[str, Any], list[str], list[Any]]:
    killed: list[tuple[int, str]] = []
    stop = threading.Event()
    watcher = threading.Thread(target=_kill_trainers, args=(cluster["worker_tmp"], killed, stop, times), daemon=True)
    watcher.start()
    said: list[str] = []
    try:
        summary = run_sweep(cfg, "grid", log=said.append, cluster=SPEC)
    finally:
        stop.set()
        watcher.join(timeout=10)
    assert len(killed) == times, said
    return summary, said, killed


def _long_grid(tmp_path: Path) -> Config:
    return load_config(ferry_config(tmp_path, "grid.yaml", output=tmp_path / "out", rows=160, checkpoint="toy:decoder",
                                    train={"epochs": 6, "log_every": 2}, sweep={"grid": {"train.seed": [1, 2]}}))


def test_a_worker_killed_mid_run_is_replaced_and_the_run_redone(cluster: dict[str, Path], tmp_path: Path) -> None:
    out = tmp_path / "out"
    cfg = _long_grid(tmp_path)
    summary, said, killed = _sweep_killing(cluster, cfg, times=1)
    assert summary["failed"] == [], said
    lost = [line for line in said if "its worker was lost" in line]
    assert len(lost) == 1 and lost[0].endswith("; sending it once more"), said
    assert "WorkerCrashedError" in lost[0]
    for run in expand_sweep(cfg):
        folder = run_folder(run)
        require_finished(folder, need=("config.yaml", "data.json", "metrics.json", "predictions.jsonl", "log.jsonl"))
        assert read_status(folder)["resumed"] is False  # redone from the start: the killed attempt left nothing here
    assert not [p for p in out.rglob("*") if p.name.endswith(".tmp")]  # nothing half-written in the output folder
    leftovers = list(cluster["worker_tmp"].glob(f"{SCRATCH_PREFIX}*"))
    assert all(p.name.startswith(f"{SCRATCH_PREFIX}{killed[0][0]}@") for p in leftovers)  # only the dead one's, if any


def test_a_run_whose_worker_dies_twice_is_failed_with_the_reason(cluster: dict[str, Path], tmp_path: Path) -> None:
    cfg = _long_grid(tmp_path)
    summary, said, killed = _sweep_killing(cluster, cfg, times=2)
    runs = expand_sweep(cfg)
    doomed = [i for i, r in enumerate(runs) if run_id(r) == killed[0][1]]
    assert summary["failed"] == doomed, said
    status = read_status(run_folder(runs[doomed[0]]))
    assert status["state"] == "failed"
    assert status["error"].startswith("its worker was lost twice on the cluster: WorkerCrashedError: ")
    assert sorted(p.name for p in run_folder(runs[doomed[0]]).iterdir()) == ["status.json"]  # nothing half-done
    other = run_folder(runs[1 - doomed[0]])
    assert read_status(other)["state"] == "finished"  # the sweep went on with the rest


def test_failures_stay_with_their_runs(cluster: dict[str, Path], tmp_path: Path) -> None:
    arms = {"arms": [{}, {"method.kind": "next_token"}, {"train.threads": 3}]}  # fine; fails on the worker; too big
    cfg = load_config(ferry_config(tmp_path, "grid.yaml", output=tmp_path / "out", rows=24, sweep=arms))
    runs = expand_sweep(cfg)
    said: list[str] = []
    summary = run_sweep(cfg, "grid", compare=False, log=said.append, cluster=SPEC)
    assert summary["failed"] == [1, 2]
    states = [read_status(run_folder(r)) for r in runs]
    assert [s["state"] for s in states] == ["finished", "failed", "failed"]
    assert "needs a decoder or encoder-decoder checkpoint" in states[1]["error"]  # the worker's own reason
    assert states[2]["error"] == ("the run asks for 3 CPUs (train.threads or --cpus-per-run) but the largest "
                                  "machine of the cluster has 2; ask for fewer")
    assert any(line.startswith(f"[2/3] #1 {run_id(runs[1])}: failed on ") for line in said), said


def test_a_stopped_driver_cancels_its_tasks_and_lets_go_of_its_claims(cluster: dict[str, Path], tmp_path: Path) -> None:
    cfg = load_config(ferry_config(tmp_path, "grid.yaml", output=tmp_path / "out", rows=160, checkpoint="toy:decoder",
                                   train={"epochs": 6}, sweep={"grid": {"train.seed": [1, 2, 3]}}))
    runs = expand_sweep(cfg)
    calls: list[int] = []

    def progress(states: dict[int, str], memory: dict[int, Any]) -> None:
        calls.append(len(states))
        if len(calls) == 1:  # every run handed out: the user presses Ctrl-C
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_on_cluster(SPEC, runs, [0, 1, 2], hash_data(runs), lambda _: None, progress)
    for run in runs:
        with claim_run(run_folder(run)):  # free again
            pass
        assert not run_folder(run).exists()  # nothing came back half-done
