"""The decisions a sweep takes about one run, the same whether the run goes to this process or a cluster.

Before: skip a finished run, refuse one whose data changed since the sweep started, start again one
whose earlier attempt read other data, resume one with a checkpoint, else run it. After: refuse a
run whose data.json shows another version of the data. A refused or broken run is marked failed
with the reason in its status.json, and the sweep goes on with the rest.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any, Literal

from harness.config import Config
from harness.errors import HarnessError
from harness.experiments.data_checks import changed_in_run, changed_now
from harness.runs.folders import read_status, run_folder, write_status
from harness.train.memory import current_rss_mb, peak_rss_mb
from harness.train.processes import is_main_process

__all__ = ["Step", "check_after_run", "decide_run", "failure_message", "mark_failed", "memory_after", "run_state"]

Log = Callable[[str], None]
Step = Literal["done", "refused", "resume", "fresh", "rerun"]


def run_state(folder: Path) -> dict[str, Any]:
    """The run's status record, or {'state': 'new'} when it has none yet."""
    return read_status(folder) if (folder / "status.json").exists() else {"state": "new"}


def mark_failed(folder: Path, message: str) -> None:
    """Record `message` as the run's failure (the main process only, under `accelerate launch`)."""
    if is_main_process():
        write_status(folder, "failed", error=message)


def failure_message(exc: BaseException) -> str:
    """A HarnessError's own message; anything else with its type, as status.json records it."""
    return str(exc) if isinstance(exc, HarnessError) else f"{type(exc).__name__}: {exc}"


def decide_run(cfg: Config, start: dict[str, str], tag: str, log: Log) -> Step:
    """What to do with one run: 'done' (finished), 'refused' (data changed now; marked failed), or run it:
    'resume' (from its last checkpoint), 'fresh' (no earlier attempt) or 'rerun' (replace an earlier attempt)."""
    folder = run_folder(cfg)
    state = run_state(folder)["state"]
    stale = changed_in_run(folder, start) if state != "new" else None
    if state == "finished" and stale is None:
        log(f"{tag} done")
        return "done"
    changed = changed_now(cfg, start)
    if changed is not None:
        mark_failed(folder, changed)
        log(f"{tag} failed: {changed}")
        return "refused"
    if stale is not None:
        log(f"{tag} an earlier attempt read other data ({stale}); starting it again")
    if stale is None and (folder / "checkpoints" / "last.pt").is_file():  # what the runner resumes from
        return "resume"
    return "fresh" if state == "new" else "rerun"


def check_after_run(folder: Path, start: dict[str, str], tag: str, log: Log) -> str:
    """The run's final state, after refusing (marking failed) one that read other data than the sweep start."""
    changed = changed_in_run(folder, start)
    if changed is not None:
        mark_failed(folder, changed)
        log(f"{tag} failed: {changed}")
        return "failed"
    return str(run_state(folder)["state"])


def memory_after() -> dict[str, float | None]:
    """Memory once a run is over and collected: what the next run starts from (growth here is a leak)."""
    import gc


    peak = peak_rss_mb()  # since the runner reset the window at the run's start: scoring and report included
    gc.collect()  # the finished run's model, optimiser and batches are garbage now; return them before the next
    return {"peak_rss_mb": round(peak, 1), "rss_mb_after": round(current_rss_mb(), 1)}
