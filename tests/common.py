"""Paths and the small ferry-task config that many tests share.

The sample tasks are committed files: when one is missing the tests fail at collection (they do
not skip), since a skip would hide a broken checkout.
"""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import yaml

__all__ = ["CONFIGS", "FERRY", "REPLY", "ROOT", "ferry_config", "ferry_dict", "write_yaml"]

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ROOT / "configs"
FERRY = ROOT / "sample_tasks" / "ferry_messages"
REPLY = ROOT / "sample_tasks" / "reply_check"

for _folder in (FERRY, REPLY):
    for _split in ("train", "dev", "test"):
        if not (_folder / f"{_split}.csv").is_file():
            raise FileNotFoundError(f"committed sample file {_folder / _split}.csv is missing; "
                                    "regenerate it with: python scripts/make_sample_tasks.py")


def _merge(base: dict[str, Any], extra: dict[str, Any]) -> dict[str, Any]:
    out = copy.deepcopy(base)
    for key, value in extra.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = _merge(out[key], value)
        elif value is None:
            out.pop(key, None)
        else:
            out[key] = value
    return out


def ferry_dict(output: Path, *, data: Path = FERRY, rows: int | None = 24, checkpoint: str = "toy:encoder",
               **sections: Any) -> dict[str, Any]:
    """A small, fast run config on the ferry task (or a copy of it in `data`) as plain data.

    Each keyword section (`task`, `method`, `train`, `eval`, `sweep`, ...) is merged into the defaults
    key by key; a value of None removes the key.
    """
    base: dict[str, Any] = {
        "task": {"name": "ferry", "train": str(data / "train.csv"), "dev": str(data / "dev.csv"),
                 "test": str(data / "test.csv"), "id": "id", "max_rows": rows},
        "model": {"checkpoint": checkpoint},
        "method": {"kind": "head"},
        "train": {"epochs": 1, "batch_size": 8, "learning_rate": 1.0e-3, "max_length": 32, "seed": 1, "threads": 1},
        "eval": {"bootstrap": 20},
        "output": str(output),
    }
    return _merge(base, sections)


def write_yaml(path: Path, data: dict[str, Any]) -> Path:
    """Write `data` as a YAML config file and return its path."""
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(yaml.safe_dump(data, sort_keys=False, allow_unicode=True), encoding="utf-8")
    return path


def ferry_config(folder: Path, name: str = "run.yaml", *, output: Path | None = None, **kw: Any) -> Path:
    """`ferry_dict` written to `folder/name` (runs go to `folder/runs` unless `output` is given)."""
    return write_yaml(folder / name, ferry_dict(output or folder / "runs", **kw))
