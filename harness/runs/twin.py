"""A run scored on test whose training was already done by its tuning trial (its "dev twin").

A tuning trial (`eval.score_on: dev`) and the run of the same arm, settings and seed scored on
test train exactly alike: training never reads the scored split, and the batch order, dropout and
head initialisation depend only on the seed. So the run scored on test can take over the trial's
final training checkpoint (`checkpoints/last.pt`, `best.safetensors`) and its `log.jsonl`, resume
at the end of training (nothing left to do), and score test: the same weights as training again,
at none of the cost. Its metrics record the trial's training cost and say where the training came from.
"""

from __future__ import annotations

import dataclasses
import os
from pathlib import Path
from typing import Any

from harness.config import Config
from harness.files import atomic_write_bytes, read_json
from harness.runs.folders import read_status, run_folder

__all__ = ["adopt_training", "dev_twin", "twin_cost"]

_TAKEN = ("checkpoints/last.pt", "checkpoints/best.safetensors", "log.jsonl")


def dev_twin(cfg: Config) -> Path | None:
    """The finished dev-scored run that trained exactly as `cfg` does, with its checkpoints kept; else None."""
    if cfg.eval.score_on != "test":
        return None
    twin = run_folder(dataclasses.replace(cfg, eval=dataclasses.replace(cfg.eval, score_on="dev")))
    if not (twin / "status.json").exists() or read_status(twin).get("state") != "finished":
        return None
    if not all((twin / name).is_file() for name in _TAKEN):
        return None
    return twin


def adopt_training(twin: Path, folder: Path) -> None:
    """Give `folder` the twin's final checkpoint, best weights and training log: a hard link where the file system
    allows (run files are only ever replaced by a rename, never changed in place, so a link stays the twin's
    version), else a copy; each appears whole or not at all."""
    for name in _TAKEN:
        target = folder / name
        target.parent.mkdir(parents=True, exist_ok=True)
        temporary = target.with_name(f".{target.name}.link.tmp")
        temporary.unlink(missing_ok=True)
        try:
            os.link(twin / name, temporary)
        except OSError:  # another file system, or links not allowed: copy (a decoder's checkpoint is ~1.6 GB)
            atomic_write_bytes(target, (twin / name).read_bytes())
        else:
            os.replace(temporary, target)


def twin_cost(twin: Path) -> dict[str, Any]:
    """The training cost the twin measured, as the run's own: seconds, steps, examples/s, and whose it was."""
    cost = read_json(twin / "metrics.json").get("cost", {})
    return {"train_seconds": cost.get("train_seconds", 0.0), "steps": cost.get("steps", 0),
            "train_examples_per_second": cost.get("train_examples_per_second"),
            "train_dev_seconds": cost.get("train_dev_seconds", 0.0), "training_from": twin.name}
