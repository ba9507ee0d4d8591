"""What a sweep will cost before it runs (`tiltyard sweep --dry-run`): measured where known, never guessed.

Estimates use only finished runs of the same checkpoint, method and max_length (seconds per
example-epoch); with none to go on, a run's cost is 'unknown'.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from harness.config import Config, config_folder, config_to_dict
from harness.data.task import load_task
from harness.errors import HarnessError
from harness.files import read_json
from harness.runs.folders import read_status, run_folder, run_id

__all__ = ["estimate_runs", "log_plan"]


def _state(folder: Path) -> str:
    return str(read_status(folder)["state"]) if (folder / "status.json").exists() else "new"


def _example_epochs(cfg: Config, train_rows: int) -> float:
    """Training examples seen: rows x epochs, capped by max_steps; 0 for prompt (no training)."""
    if cfg.method.kind == "prompt":
        return 0.0
    seen = train_rows * cfg.train.epochs
    if cfg.train.max_steps is not None:
        seen = min(seen, cfg.train.max_steps * cfg.train.batch_size * cfg.train.grad_accum)
    return float(seen)


def _train_seconds(folder: Path) -> float | None:
    try:
        cost = read_json(folder / "metrics.json").get("cost", {})
    except HarnessError:
        return None
    value = cost.get("train_seconds")
    return float(value) if isinstance(value, (int, float)) else None


def estimate_runs(runs: Sequence[Config]) -> list[dict[str, Any]]:
    """Per run: state, training rows, examples x epochs and training seconds, measured or estimated.

    Estimates use only finished runs of the same checkpoint, method and max_length (seconds per
    example-epoch); with none to go on the estimate is None ('unknown'), never a made-up rate.
    """
    rows_cache: dict[str, int] = {}
    out: list[dict[str, Any]] = []
    for cfg in runs:
        key = json.dumps([config_to_dict(cfg)["task"], cfg.train.seed], sort_keys=True)
        if key not in rows_cache:  # the same base folder as the runner's
            base = config_folder(cfg)
            rows_cache[key] = len(load_task(cfg.task, seed=cfg.train.seed, base=base).train)
        folder = run_folder(cfg)
        state = _state(folder)
        rows = rows_cache[key]
        out.append({"cfg": cfg, "id": run_id(cfg), "state": state, "train_rows": rows,
                    "example_epochs": _example_epochs(cfg, rows), "group": (cfg.model.checkpoint, cfg.method.kind,
                                                                            cfg.train.max_length),
                    "measured": _train_seconds(folder) if state == "finished" else None})
    rates: dict[Any, list[float]] = {}
    for r in out:
        if r["measured"] is not None and r["example_epochs"] > 0:
            acc = rates.setdefault(r["group"], [0.0, 0.0, 0.0])  # seconds, example-epochs, runs
            acc[0], acc[1], acc[2] = acc[0] + r["measured"], acc[1] + r["example_epochs"], acc[2] + 1
    for r in out:
        sums = rates.get(r["group"])
        r["estimate"] = 0.0 if r["example_epochs"] == 0 else (
            sums[0] / sums[1] * r["example_epochs"] if sums else None)
        r["basis"] = int(sums[2]) if sums else 0
    return out


def log_plan(picked: Sequence[int], plan: Sequence[dict[str, Any]], log: Callable[[str], None]) -> None:
    """The dry run's table (one line per run) and its total, as `estimate_runs` gives them."""
    log(f"{'#':>3}  {'run id':<40} {'checkpoint':<22} {'method':<10} {'seed':>5} {'train':>6} {'state':<11} train time")
    known, unknown, estimated, examples = 0.0, 0, 0, 0.0
    for i, r in zip(picked, plan, strict=True):
        c = r["cfg"]
        if r["measured"] is not None:
            when = f"{r['measured']:.1f} s measured"
        elif r["estimate"] is None:
            when, unknown = "unknown", unknown + 1
        elif r["example_epochs"] == 0:
            when = "0 s (no training)"
        else:
            when, estimated = f"~{r['estimate']:.1f} s estimated from {r['basis']} finished run(s) like it", estimated + 1
        if r["state"] != "finished":
            known += r["estimate"] or 0.0
            examples += r["example_epochs"]
        log(f"{i:>3}  {r['id']:<40} {c.model.checkpoint[:22]:<22} {c.method.kind:<10} {c.train.seed:>5} "
            f"{r['train_rows']:>6} {r['state']:<11} {when}")
    todo = sum(1 for r in plan if r["state"] != "finished")
    when = f"~{known:.0f} s estimated from measured rates" if estimated else ""
    if unknown:  # said plainly rather than guessed: a rate from another checkpoint would mislead
        when += (" plus " if when else "") + f"{unknown} runs of unknown cost (no finished run like them yet)"
    log(f"to run: {todo} runs, {examples:g} training examples x epochs; training time: {when or '0 s'}; "
        "scoring time not included")
