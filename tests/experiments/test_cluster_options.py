"""Cluster sweeps without a cluster: the options, the errors, the worker's checks and the archive.

Nothing here starts Ray; the worker's task runs in this process.
"""

from __future__ import annotations

import io
import os
import socket
import sys
import tarfile
from pathlib import Path

import pytest

from harness.cli import main
from harness.commands import cluster_spec
from harness.config import Config, load_config
from harness.errors import HarnessError
from harness.experiments import cluster_task
from harness.experiments.cluster import ClusterSpec, connect
from harness.experiments.cluster_task import SCRATCH_PREFIX, pack_folder, run_task, unpack_folder
from harness.experiments.data_checks import data_files, hash_data
from harness.files import file_sha256
from harness.runs.folders import run_id
from tests.common import FERRY, ferry_config


def _grid(tmp_path: Path) -> Path:
    return ferry_config(tmp_path, "grid.yaml", rows=24, sweep={"grid": {"train.seed": [1, 2]}})


def test_without_ray_the_error_names_the_extra(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setitem(sys.modules, "ray", None)  # what an environment without the extra looks like
    assert main(["sweep", str(_grid(tmp_path)), "--cluster", "local"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == ["tiltyard sweep: error: --cluster needs Ray, an optional extra: pip install -e \".[cluster]\" "
                   "(or pip install 'ray>=2.40')"]
    assert not (tmp_path / "runs").exists()  # refused before anything was written


@pytest.mark.parametrize(("kwargs", "message"), [
    ({"cluster": None, "workers": 2}, "--workers only apply to a cluster sweep: add --cluster local"),
    ({"cluster": "none", "fetch_weights": True}, "--fetch-weights only apply to a cluster sweep"),
    ({"cluster": "local", "workers": 0}, "--workers 0: expected a whole number of at least 1"),
    ({"cluster": "local", "cpus_per_run": -1}, "--cpus-per-run -1: expected a whole number of at least 1"),
    ({"cluster": "head:6379", "workers": 2}, "--workers applies to --cluster local only"),
])
def test_option_mistakes_are_one_line_errors(kwargs: dict[str, object], message: str,
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("RAY_ADDRESS", raising=False)
    cluster = kwargs.pop("cluster")
    with pytest.raises(HarnessError, match=message.replace("[", r"\[").replace(".", r"\.")):
        cluster_spec(cluster, **kwargs)  # type: ignore[arg-type]


def test_ray_address_is_the_default_and_none_runs_here(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("RAY_ADDRESS", raising=False)
    assert cluster_spec(None) is None
    monkeypatch.setenv("RAY_ADDRESS", "head:6379")
    assert cluster_spec(None) == ClusterSpec("head:6379")
    assert cluster_spec("none") is None
    assert cluster_spec("local", workers=2, cpus_per_run=1, fetch_weights=True) == ClusterSpec("local", 2, 1, True)


def test_a_cluster_sweep_is_not_started_under_accelerate_launch(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("WORLD_SIZE", "2")  # what accelerate's launcher sets in each process it starts
    with pytest.raises(HarnessError, match="start the sweep without 'accelerate launch'"):
        cluster_spec("local")


def test_an_address_nobody_answers_is_refused_quickly(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    pytest.importorskip("ray")
    with socket.socket() as s:  # a port that was free a moment ago: nothing listens there
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    for address in (f"127.0.0.1:{port}", f"ray://127.0.0.1:{port}"):
        with pytest.raises(HarnessError, match=rf"--cluster {address}: nothing answers at 127\.0\.0\.1:{port} "):
            with connect(ClusterSpec(address)):
                pass


def _run_cfg(tmp_path: Path, data: Path = FERRY) -> Config:
    return load_config(ferry_config(tmp_path, data=data, rows=24))


def test_the_worker_refuses_data_missing_or_different_on_its_machine(tmp_path: Path,
                                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TMPDIR", str(tmp_path / "tmp"))
    monkeypatch.setattr("tempfile.tempdir", None)  # tempfile reads TMPDIR again
    (tmp_path / "tmp").mkdir()
    cfg = _run_cfg(tmp_path)
    files = data_files(cfg)
    start = hash_data([cfg])
    wrong = [(str(p), "0" * 64 if p.name == "train.csv" else start[str(p)]) for p in files]
    result = run_task(cfg, wrong, str(tmp_path), None, weights=False, threads=1)
    host = socket.gethostname()
    assert result["status"]["state"] == "failed" and "started" not in result["status"]
    assert result["status"]["error"] == (
        f"data file {FERRY / 'train.csv'} on host {host} differs from {FERRY / 'train.csv'} on the driver (sha256 "
        f"{file_sha256(FERRY / 'train.csv')[:12]} here, 000000000000 there); copy the driver's version to every machine")

    copy = tmp_path / "data"
    copy.mkdir()
    for split in ("train", "dev", "test"):
        (copy / f"{split}.csv").write_bytes((FERRY / f"{split}.csv").read_bytes())
    cfg = _run_cfg(tmp_path, data=copy)
    expected = [(str(p), file_sha256(p)) for p in data_files(cfg)]
    (copy / "dev.csv").unlink()  # on this "machine" the dev split is not there
    result = run_task(cfg, expected, str(tmp_path), None, weights=False, threads=1)
    assert result["status"]["error"].startswith(f"data file {copy / 'dev.csv'} is not on host {host}: a cluster "
                                                "sweep reads the data at the same path on every machine")
    assert not list((tmp_path / "tmp").iterdir())  # the scratch folder is gone


def test_the_archive_carries_results_not_weights_nor_temporaries(tmp_path: Path) -> None:
    run = tmp_path / "run"
    for name in ("status.json", "metrics.json", "plots/confusion.png", "model/weights.bin", "checkpoints/last.pt",
                 ".predictions.jsonl.abc.tmp", "plots/.x.png.def.tmp"):
        (run / name).parent.mkdir(parents=True, exist_ok=True)
        (run / name).write_bytes(name.encode())
    light = tarfile.open(fileobj=io.BytesIO(pack_folder(run)), mode="r:gz").getnames()
    assert sorted(light) == ["metrics.json", "plots/confusion.png", "status.json"]
    heavy = pack_folder(run, weights=True, checkpoints=True)
    target = tmp_path / "out" / "run"
    target.mkdir(parents=True)
    (target / "old.txt").write_text("an earlier attempt")
    unpack_folder(heavy, target)
    got = sorted(str(p.relative_to(target)) for p in target.rglob("*") if p.is_file())
    assert got == ["checkpoints/last.pt", "metrics.json", "model/weights.bin", "plots/confusion.png", "status.json"]
    assert (target / "model" / "weights.bin").read_bytes() == b"model/weights.bin"
    assert [p.name for p in target.parent.iterdir()] == ["run"]  # replaced in one piece, no temporary left


def test_scratch_folders_of_dead_workers_are_cleared_and_live_ones_kept(tmp_path: Path) -> None:
    import subprocess

    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()  # a pid that no longer runs (reaped)
    host = socket.gethostname()
    folders = {name: tmp_path / name for name in (
        f"{SCRATCH_PREFIX}{dead.pid}@{host}-abc", f"{SCRATCH_PREFIX}{os.getppid()}@{host}-def",
        f"{SCRATCH_PREFIX}{dead.pid}@another-host-ghi", "unrelated")}
    for folder in folders.values():
        folder.mkdir()
    cluster_task._clear_dead_scratch(tmp_path)
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(list(folders)[1:])


def test_run_ids_do_not_depend_on_the_output_folder(tmp_path: Path) -> None:
    import dataclasses

    cfg = _run_cfg(tmp_path)
    moved = dataclasses.replace(cfg, output=str(tmp_path / "elsewhere"))  # what a worker runs
    assert run_id(cfg) == run_id(moved)


def test_a_cluster_ray_cannot_join_is_one_line(monkeypatch: pytest.MonkeyPatch) -> None:
    ray = pytest.importorskip("ray")

    def refuse(*args: object, **kwargs: object) -> None:
        # what ray.init(address="auto") raises with no Ray instance running here (ray/_private/services.py);
        # raised by hand: on a shared machine, "auto" would join any other user's instance it finds
        raise ConnectionError("Could not find any running Ray instance. Please specify the one to connect to by "
                              "setting the `--address` flag or `RAY_ADDRESS` environment variable.")

    monkeypatch.setattr(ray, "init", refuse)
    with pytest.raises(HarnessError) as err:
        with connect(ClusterSpec("auto")):
            pass
    assert str(err.value) == ("--cluster auto: cannot join the Ray cluster (Could not find any running Ray instance. "
                              "Please specify the one to connect to by setting the `--address` flag or `RAY_ADDRESS` "
                              "environment variable.); check the address (RAY_ADDRESS, or 'ray status' on its head "
                              "machine)")


def test_task_errors_and_lost_workers_are_one_line_reasons() -> None:
    ray = pytest.importorskip("ray")
    from harness.experiments.cluster import _reason

    missing = ray.exceptions.RayTaskError("run_task", "Traceback ...", ModuleNotFoundError("No module named 'harness'"))
    assert _reason(missing) == ("ModuleNotFoundError: No module named 'harness' (is tiltyard installed on every "
                                "machine of the cluster?)")
    assert _reason(ray.exceptions.RayTaskError("run_task", "...", ValueError("bad\nmore"))) == "ValueError: bad"
    assert _reason(ray.exceptions.WorkerCrashedError()).startswith("WorkerCrashedError: ")
