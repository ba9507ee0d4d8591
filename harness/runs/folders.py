"""Run folders: ids, paths that cannot escape the output folder, atomic files, status.

One run is one config and one seed, in `<output>/<task>/<run-id>/`. Every file is written to
a temporary name and renamed, so a reader never sees half a file; `status.json` says whether
the run is running, finished or failed, and readers refuse anything but finished runs.
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import sys
import time
from pathlib import Path
from typing import Any

from harness.config import Config, config_to_dict
from harness.errors import HarnessError
from harness.files import atomic_write_json, read_json

__all__ = [
    "RUN_STATES",
    "environment_info",
    "read_status",
    "require_finished",
    "run_folder",
    "run_id",
    "write_status",
]

RUN_STATES = ("running", "finished", "failed", "interrupted")
_PACKAGES = ("torch", "transformers", "accelerate", "datasets", "peft", "tokenizers", "safetensors",
             "scikit-learn", "numpy", "scipy", "harness")


def run_id(cfg: Config) -> str:
    """A deterministic id: readable parts plus a hash of the whole resolved config."""
    data = config_to_dict(cfg)
    data.pop("sweep", None)
    data.pop("output", None)
    digest = hashlib.sha256(json.dumps(data, sort_keys=True).encode("utf-8")).hexdigest()[:10]
    model = cfg.model.checkpoint.rstrip("/").replace("\\", "/").split("/")[-1].split(":")[-1]
    model = "".join(ch if ch.isalnum() or ch in "-_." else "-" for ch in model)[:32].strip(".") or "model"
    return f"{model}-{cfg.method.kind}-s{cfg.train.seed}-{digest}"


def run_folder(cfg: Config) -> Path:
    """`<output>/<task>/<run-id>`, refusing any path that would leave the output folder."""
    root = Path(cfg.output).resolve()
    folder = (root / cfg.task.name / run_id(cfg)).resolve()
    if root not in folder.parents:  # a '..' in a name, or a link inside the output folder pointing out of it
        raise HarnessError(f"'task.name' in {cfg.source}: {cfg.task.name!r} would put the run outside the output "
                           f"folder {root} (at {folder}); use a plain name, and no link under {root}")
    return folder


def write_status(folder: Path, state: str, **info: Any) -> None:
    """Record the run's state (running/finished/failed/interrupted) with a timestamp."""
    if state not in RUN_STATES:
        raise AssertionError(f"unknown run state {state}")  # internal invariant
    previous = read_status(folder) if (folder / "status.json").exists() else {}
    record = {**previous, **info, "state": state, "updated": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
    if state == "running" and "started" not in record:
        record["started"] = record["updated"]
    if state != "failed":
        record.pop("error", None)
    atomic_write_json(folder / "status.json", record)


def read_status(folder: Path) -> dict[str, Any]:
    """The run's status record; a folder without one is not a run folder."""
    path = folder / "status.json"
    if not path.exists():
        raise HarnessError(f"{folder} is not a run folder (no status.json)")
    status = read_json(path)
    if not isinstance(status, dict) or status.get("state") not in RUN_STATES:
        raise HarnessError(f"{path} has no valid 'state'; the folder may be damaged")
    return status


def require_finished(folder: Path, *, need: tuple[str, ...] = ("metrics.json", "predictions.jsonl")) -> dict[str, Any]:
    """Refuse a run that did not finish, lacks a needed file or holds one that does not parse, naming it."""
    status = read_status(folder)
    if status["state"] != "finished":
        extra = f": {status['error']}" if status.get("error") else ""
        raise HarnessError(f"run {folder} is {status['state']}, not finished{extra}")
    for name in need:
        if not (folder / name).exists():
            raise HarnessError(f"run {folder} says finished but has no {name}; it is incomplete")
        _check_parses(folder / name)
    return status


def _check_parses(path: Path) -> None:
    """A JSON or JSON-lines file must parse to the end: a truncated one is refused, naming the file (and line)."""
    if path.suffix == ".json":
        read_json(path)
    elif path.suffix == ".jsonl":
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
            if not line.strip():
                continue
            try:
                json.loads(line)
            except json.JSONDecodeError:
                raise HarnessError(f"{path} line {number} is not valid JSON: half-written or edited by hand?") from None


def environment_info() -> dict[str, Any]:
    """Package versions, threads and platform: what `replay` compares."""
    from importlib import metadata

    import torch  # late: run folders are read by compare and dry runs, which need no torch

    versions: dict[str, str | None] = {}
    for name in _PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = None
    return {
        "python": sys.version.split()[0],
        "platform": platform.platform(),
        "machine": platform.machine(),
        "processor": platform.processor(),
        "cpu_count": os.cpu_count(),
        "torch_threads": torch.get_num_threads(),
        "packages": versions,
    }
