"""Peak memory of whole runs as users launch them: each bake-off arm, and a MiniLM head at the defaults.

A `memory` job runs one complete `execute_run` (training, dev scoring, checkpoints, test scoring,
serving measurement, exports) in its own process, and bench.jobs reads the process's own peak
(VmHWM) afterwards. `arm` picks a run of configs/bakeoff.yaml's sweep (the arm's own settings,
seed 13, untuned); `defaults` is a MiniLM `head` run with nothing set beyond the task.
Run by scripts/benchmark.py, never by tests.
"""

from __future__ import annotations

import dataclasses
import json
import tempfile
from pathlib import Path
from typing import Any

__all__ = ["MEMORY_RUNS", "memory_config", "run_memory"]

REPO = Path(__file__).resolve().parent.parent
BAKEOFF = REPO / "configs" / "bakeoff.yaml"

# name -> (bake-off arm index, or None for the defaults run; the ceiling in MB)
MEMORY_RUNS: dict[str, tuple[int | None, float]] = {
    "MiniLM head, default settings (sms-spam, 2,000 train)": (None, 1500.0),
    "SmolLM2-135M head, bake-off arm": (1, 2500.0),
    "SmolLM2-135M next_token, bake-off arm": (2, 2500.0),
    "SmolLM2-135M prompt scoring, bake-off arm": (3, 1500.0),
}


def memory_config(name: str, output: Path, defaults_task: dict[str, Any] | None = None) -> Any:
    """The Config a memory job runs: the bake-off arm's first run, or a MiniLM head at the defaults."""
    from harness.config import config_from_dict, load_config
    from harness.experiments.sweep import expand_sweep
    from harness.experiments.tune import arm_name

    arm, _ = MEMORY_RUNS[name]
    if arm is None:
        return config_from_dict({"task": dict(defaults_task or {}), "model": {"checkpoint": "asset:minilm-l6"},
                                 "method": {"kind": "head"}, "output": str(output)})
    cfg = load_config(BAKEOFF)
    names = list(dict.fromkeys(arm_name(run) for run in expand_sweep(cfg)))
    run = next(r for r in expand_sweep(cfg) if arm_name(r) == names[arm])
    return dataclasses.replace(run, output=str(output))  # relative task paths stay resolved against the config


def run_memory(job: dict[str, Any]) -> dict[str, Any]:
    """One whole run; returns what it measured (peak memory is added by bench.jobs.main)."""
    from harness.runs.run import execute_run

    with tempfile.TemporaryDirectory(prefix="bench-memory-") as tmp:
        cfg = memory_config(job["memory_run"], Path(tmp), job.get("task"))
        folder = execute_run(cfg, log=lambda _line: None, threads=job.get("threads"))
        metrics = json.loads((folder / "metrics.json").read_text(encoding="utf-8"))
    m = metrics.get("metrics", {})
    return {"memory_run": job["memory_run"], "method": cfg.method.kind, "checkpoint": cfg.model.checkpoint,
            "batch_size": cfg.train.batch_size, "bf16": cfg.train.bf16, "accuracy": m.get("accuracy"),
            "macro_f1": m.get("macro_f1"), "cost": metrics.get("cost", {})}
