"""A sweep's folder and its index (sweep.json), and the --shard option.

`sweep.json` lists every run of the sweep with its state, role (a tuning trial or a run of the
grid), checkpoint, method, seed and memory; it is rewritten after every run, so a killed sweep
leaves an up-to-date index.
"""

from __future__ import annotations

import re
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from harness.config import Config
from harness.errors import HarnessError
from harness.experiments.steps import run_state
from harness.files import atomic_write_json
from harness.runs.folders import run_folder, run_id
from harness.train.processes import is_main_process

__all__ = ["parse_shard", "sweep_folder", "write_index"]


def parse_shard(text: str | None) -> tuple[int, int] | None:
    """'I/N' -> (I, N) with 0 <= I < N; None stays None."""
    if text is None:
        return None
    m = re.fullmatch(r"\s*(\d+)\s*/\s*(\d+)\s*", text)
    if not m or int(m.group(2)) < 1 or int(m.group(1)) >= int(m.group(2)):
        raise HarnessError(f"--shard {text!r}: expected I/N with 0 <= I < N (0-based), e.g. --shard 0/2 and 1/2")
    return int(m.group(1)), int(m.group(2))


def sweep_folder(cfg: Config, name: str) -> Path:
    """`<output>/<task>/sweeps/<name>/`."""
    safe = re.sub(r"[^A-Za-z0-9_.-]+", "-", name).strip(".-") or "sweep"
    return Path(cfg.output).resolve() / cfg.task.name / "sweeps" / safe


def _record(index: int, cfg: Config) -> dict[str, Any]:
    status = run_state(run_folder(cfg))
    return {"index": index, "id": run_id(cfg), "path": str(run_folder(cfg)), "state": status["state"],
            "checkpoint": cfg.model.checkpoint, "method": cfg.method.kind, "seed": cfg.train.seed,
            "train_size": cfg.task.train_size, **({"error": status["error"]} if status.get("error") else {})}


def write_index(folder: Path, meta: dict[str, Any], runs: Sequence[Config],
                 memory: dict[int, dict[str, float | None]] | None = None,
                 roles: dict[int, dict[str, Any]] | None = None) -> list[dict[str, Any]]:
    records = [{**_record(i, cfg), **(roles or {}).get(i, {"role": "run"})} for i, cfg in enumerate(runs)]
    for i, mem in (memory or {}).items():
        mem = dict(mem)
        wall = mem.pop("wall_seconds", None)  # the serial sweep times each run it ran
        records[i]["memory"] = mem
        if wall is not None:
            records[i]["wall_seconds"] = wall
    if is_main_process():  # under `accelerate launch` every process walks the sweep; one writes
        atomic_write_json(folder / "sweep.json", {**meta, "updated": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                                                  "runs": records})
    return records
