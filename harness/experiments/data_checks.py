"""One version of the data per sweep: hash the split files at the start, check before and after each run.

A run that saw another version of a file than the sweep started with is failed with a message
naming the file, so one sweep (local or on a cluster) never mixes two versions of its data.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from harness.config import Config, config_folder
from harness.data.task import split_paths
from harness.errors import HarnessError
from harness.files import file_sha256, read_json
from harness.runs.folders import run_id

__all__ = ["changed_in_run", "changed_now", "changed_since", "data_files", "hash_data"]


def data_files(cfg: Config) -> list[Path]:
    """The split files a run reads, resolved as the runner resolves them (working folder, then config folder)."""
    return [path.resolve() for path in split_paths(cfg.task, config_folder(cfg)).values()]


def hash_data(runs: Sequence[Config]) -> dict[str, str]:
    """sha256 of every split file the runs read, by resolved path."""
    hashes: dict[str, str] = {}
    for cfg in runs:
        for path in data_files(cfg):
            if str(path) not in hashes:
                if not path.is_file():
                    raise HarnessError(f"data file {path} (task of run {run_id(cfg)}) does not exist")
                hashes[str(path)] = file_sha256(path)
    return hashes


def changed_now(cfg: Config, start: dict[str, str]) -> str | None:
    """A message naming the first data file whose bytes differ from the sweep start, else None."""
    for path in data_files(cfg):
        now = file_sha256(path) if path.is_file() else "missing"
        if now != start.get(str(path), now):
            return (f"data file {path} changed since the sweep started (sha256 {start[str(path)][:12]} -> "
                    f"{now[:12]}); not mixing two versions of it in one sweep: re-run the sweep")
    return None


def changed_in_run(folder: Path, start: dict[str, str]) -> str | None:
    """Same check against the hashes the runner recorded in data.json (what the run really read)."""
    path = folder / "data.json"
    if not path.exists():
        return None
    files = read_json(path).get("files", {})
    for name, digest in files.items():
        key = str(Path(name).resolve())
        if key in start and start[key] != digest:
            return (f"data file {key} differs from the sweep start (sha256 {start[key][:12]} at sweep start, "
                    f"{digest[:12]} in this run's data.json); this run is not mixed into the sweep")
    return None


def changed_since(start: dict[str, str]) -> str | None:
    """The first data file whose bytes now differ from the sweep start, as a message; None when none."""
    for name, digest in start.items():
        path = Path(name)
        now = file_sha256(path) if path.is_file() else "missing"
        if now != digest:
            return f"data file {path} changed while the sweep ran (sha256 {digest[:12]} -> {now[:12]})"
    return None
