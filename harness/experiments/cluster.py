"""A sweep's runs on a Ray cluster: one Ray task per run, the run folders brought back to this machine.

The driver (this process) decides about every run exactly as a local sweep does
(harness.experiments.steps: skip finished, refuse changed data, resume, rerun), claims each run it
hands out in its own output folder (harness.runs.claim), and sends it as one task that asks for the
CPUs the run will use: `train.threads`, else `ClusterSpec.cpus_per_run` (default 1), and the run's
torch threads are set to match, so runs never oversubscribe a machine. The worker runs it in a
scratch folder of its own and returns the folder as an archive (harness.experiments.cluster_task),
which the driver writes into its output folder in one rename: no shared file system is needed for
the results. A run whose worker dies (killed, out of memory, machine lost) is sent once more; if
that dies too, the run is marked failed with the reason, and the sweep goes on with the rest.

Ray is an optional extra and is imported only here, inside functions: `pip install -e ".[cluster]"`.
`local` starts a private Ray instance on this machine for the sweep's length; any other address
joins a running cluster (the `RAY_ADDRESS` convention: `auto`, `HOST:PORT`, `ray://HOST:PORT`).
"""

from __future__ import annotations

import contextlib
import logging
import os
import shutil
import tempfile
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harness.config import Config
from harness.errors import HarnessError
from harness.experiments.data_checks import data_files
from harness.experiments.steps import check_after_run, decide_run, mark_failed
from harness.runs.claim import RunBusy, claim_holder, claim_run, wait_for_release
from harness.runs.folders import run_folder, run_id

__all__ = ["ClusterSpec", "connect", "import_ray", "run_on_cluster"]

logger = logging.getLogger(__name__)

Log = Callable[[str], None]
Progress = Callable[[dict[int, str], dict[int, dict[str, float | None]]], None]
EXTRA = 'pip install -e ".[cluster]"'
# Errors that mean the worker (or its machine) went away, not that the run failed: the run is sent again once.
_LOST = ("WorkerCrashedError", "NodeDiedError", "OutOfMemoryError", "LocalRayletDiedError", "ObjectLostError")


@dataclass(frozen=True)
class ClusterSpec:
    """Where a sweep's runs go: `address` is 'local' (a Ray instance started here) or a cluster's address.

    `workers`: with 'local', how many runs at once (default: physical cores // cpus_per_run).
    `cpus_per_run`: the CPUs (and torch threads) of a run whose config leaves train.threads unset (default 1).
    `weights`: bring each run's model/ back too (and an unfinished run's checkpoints/), not only its results.
    """

    address: str
    workers: int | None = None
    cpus_per_run: int | None = None
    weights: bool = False

    def run_cpus(self, cfg: Config) -> int:
        """The CPUs one run asks for."""
        return int(cfg.train.threads or self.cpus_per_run or 1)


def import_ray() -> Any:
    """The `ray` module, or a HarnessError naming the extra that installs it."""
    try:
        import ray
    except ImportError:
        raise HarnessError(f"--cluster needs Ray, an optional extra: {EXTRA} (or pip install 'ray>=2.40')") from None
    return ray


def _local_cpus(spec: ClusterSpec) -> int:
    import psutil

    per_run = spec.cpus_per_run or 1
    workers = spec.workers or max(1, (psutil.cpu_count(logical=False) or 1) // per_run)
    return workers * per_run


@contextlib.contextmanager
def connect(spec: ClusterSpec) -> Iterator[str]:
    """Join (or, for 'local', start) the cluster for the block and leave it after; yields a description.

    A process already joined to a Ray instance keeps it (and it is not shut down here). Ray's own log
    lines stay in its log folder: workers' output is not forwarded, and only Ray's errors are shown.
    """
    ray = import_ray()
    if ray.is_initialized():
        yield "the Ray instance this process has already joined"
        return
    quiet: dict[str, Any] = {"log_to_driver": False, "logging_level": logging.ERROR}
    scratch = None
    if spec.address == "local":
        cpus = _local_cpus(spec)
        # a private folder for the instance's sockets and logs (not the shared /tmp/ray of other users)
        scratch = tempfile.mkdtemp(prefix="tiltyard-ray-", dir=os.environ.get("RAY_TMPDIR"))
        # address="local": a new instance even when RAY_ADDRESS names another one
        ray.init(address="local", num_cpus=cpus, include_dashboard=False, _temp_dir=scratch, **quiet)
        where = f"a local Ray instance with {cpus} CPUs (logs in {scratch} while it runs)"
    else:
        _check_reachable(spec.address)
        try:
            ray.init(address=spec.address, **quiet)
        except (ConnectionError, RuntimeError, ValueError) as exc:
            first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
            raise HarnessError(f"--cluster {spec.address}: cannot join the Ray cluster ({first}); check the "
                               "address (RAY_ADDRESS, or 'ray status' on its head machine)") from None
        where = f"the Ray cluster at {spec.address}"
    try:
        yield where
    finally:
        ray.shutdown()
        if scratch is not None:
            shutil.rmtree(scratch, ignore_errors=True)


def _check_reachable(address: str) -> None:
    """HOST:PORT (or ray://HOST:PORT) must answer within 10 s: Ray itself retries an unreachable address for
    minutes, printing as it goes. Other forms ('auto': the cluster started on this machine) go to Ray as given."""
    import socket

    host, sep, port = address.removeprefix("ray://").rpartition(":")
    if not sep or not port.isdigit() or not host:
        return
    try:
        with socket.create_connection((host.strip("[]"), int(port)), timeout=10):
            pass
    except OSError as exc:
        raise HarnessError(f"--cluster {address}: nothing answers at {host}:{port} ({exc.strerror or exc}); check "
                           "the address (RAY_ADDRESS, or 'ray status' on the cluster's head machine)") from None


def _largest_machine(ray: Any) -> float:
    """The most CPUs any one live machine of the cluster has (a run must fit on one)."""
    return max((float(n.get("Resources", {}).get("CPU", 0)) for n in ray.nodes() if n.get("Alive")), default=0.0)


@dataclass
class _Job:
    index: int
    tag: str
    claim: contextlib.ExitStack
    earlier: bytes | None  # the archive of an interrupted attempt to resume from
    attempt: int = 1


def run_on_cluster(spec: ClusterSpec, runs: Sequence[Config], picked: Sequence[int], start: dict[str, str],
                   log: Log, progress: Progress) -> tuple[dict[int, str], dict[int, dict[str, float | None]]]:
    """Run the picked runs on the cluster; returns their final states and memory, calling `progress` after each."""
    ray = import_ray()
    from harness.experiments.cluster_task import pack_folder, run_task

    states: dict[int, str] = {}
    memory: dict[int, dict[str, float | None]] = {}
    tags = {i: f"[{n + 1}/{len(picked)}] #{i} {run_id(runs[i])}:" for n, i in enumerate(picked)}
    shown: set[str] = set()
    jobs: dict[Any, _Job] = {}  # Ray object ref -> the run it will carry back
    with connect(spec) as where:
        log(f"cluster: {where}")
        task = ray.remote(run_task)
        largest = _largest_machine(ray)

        def send(job: _Job) -> None:
            cfg = runs[job.index]
            cpus = spec.run_cpus(cfg)
            expected = [(str(p), start.get(str(p), "")) for p in data_files(cfg)]
            ref = task.options(num_cpus=cpus, max_retries=0).remote(
                cfg, expected, os.getcwd(), job.earlier, weights=spec.weights, threads=cpus)
            jobs[ref] = job

        def offer(i: int) -> bool:
            """Claim run i and send it; False when another process holds it (come back later)."""
            cfg, folder, claim = runs[i], run_folder(runs[i]), contextlib.ExitStack()
            try:
                claim.enter_context(claim_run(folder, doing="running it on a Ray cluster"))
            except RunBusy as exc:
                log(f"{tags[i]} skipped for now: claimed by {exc.holder}; coming back to it at the end")
                return False
            step = decide_run(cfg, start, tags[i], log)
            if step in ("done", "refused"):
                states[i] = "finished" if step == "done" else "failed"
            elif spec.run_cpus(cfg) > largest:
                states[i] = "failed"
                message = (f"the run asks for {spec.run_cpus(cfg)} CPUs (train.threads or --cpus-per-run) but "
                           f"the largest machine of the cluster has {largest:g}; ask for fewer")
                mark_failed(folder, message)
                log(f"{tags[i]} failed: {message}")
            else:
                resume = step == "resume"
                log(f"{tags[i]} sent to the cluster" + (" (resuming from its last checkpoint)" if resume else ""))
                send(_Job(i, tags[i], claim, pack_folder(folder, checkpoints=True, weights=True) if resume else None))
                return True
            claim.close()
            return True

        try:
            busy = [i for i in picked if not offer(i)]
            progress(states, memory)
            while jobs or busy:
                if not jobs:  # only runs another process holds are left: wait for each to be let go
                    i = busy.pop(0)
                    log(f"{tags[i]} coming back to it: waiting for {claim_holder(run_folder(runs[i]))} to let go")
                    wait_for_release(run_folder(runs[i]))
                    if not offer(i):
                        busy.append(i)
                    continue
                ready, _ = ray.wait(list(jobs), num_returns=1, timeout=1.0)  # wakes for Ctrl-C every second
                if not ready:
                    continue
                job = jobs.pop(ready[0])
                folder = run_folder(runs[job.index])
                try:
                    result = ray.get(ready[0])
                except ray.exceptions.RayError as exc:
                    reason = _reason(exc)
                    if type(exc).__name__ in _LOST and job.attempt == 1:
                        log(f"{job.tag} its worker was lost ({reason}); sending it once more")
                        job.attempt += 1
                        send(job)  # this folder is unchanged: the lost attempt wrote only on its worker
                        continue
                    lost = type(exc).__name__ in _LOST
                    message = (f"its worker was lost twice on the cluster: {reason}" if lost
                               else f"failed on the cluster: {reason}")
                    mark_failed(folder, message)
                    log(f"{job.tag} failed: {message}")
                    states[job.index] = "failed"
                else:
                    states[job.index] = _bring_back(result, folder, start, job.tag, log, shown)
                    memory[job.index] = result["memory"]
                job.claim.close()
                progress(states, memory)
        finally:  # Ctrl-C or an error here: stop what is still out there, let go of the claims
            for ref, job in jobs.items():
                ray.cancel(ref, force=True)
                job.claim.close()
    return states, memory


def _reason(exc: BaseException) -> str:
    """One line: the run's own exception for a task error, else Ray's error type and first line."""
    cause = getattr(exc, "cause", None)
    if isinstance(cause, BaseException):
        text = str(cause).strip().splitlines()
        hint = " (is tiltyard installed on every machine of the cluster?)" if isinstance(cause, ImportError) else ""
        return f"{type(cause).__name__}: {text[0] if text else ''}{hint}"
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0] if text else ''}"


def _bring_back(result: dict[str, Any], folder: Path, start: dict[str, str], tag: str, log: Log,
                shown: set[str]) -> str:
    """Write a worker's run folder into the output folder (whole, in one rename); return its final state."""
    from harness.experiments.cluster_task import unpack_folder

    for warning in result["warnings"]:
        if warning not in shown:  # a data finding is the same for every run of the grid: say it once
            shown.add(warning)
            logger.warning("%s", warning)
    status = result["status"]
    if "started" in status or not (folder / "status.json").exists():
        unpack_folder(result["archive"], folder)
    else:  # it never started (bad input): an earlier attempt here stays as it was, with the reason
        mark_failed(folder, str(status.get("error")))
    state = check_after_run(folder, start, tag, log)
    where = f"on {result['host']} (pid {result['pid']}) in {result['seconds']:.1f} s"
    if state == "finished":
        log(f"{tag} finished {where}")
        for line in result["log"]:
            if not line.startswith("run folder: "):  # the worker's scratch folder: gone already
                log(f"{tag}   {line}")
    else:
        error = str(status.get("error") or state).splitlines()
        log(f"{tag} {state} {where}: {error[0] if error else state}")
    return state
