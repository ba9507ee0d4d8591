"""What a sweep will cost before it runs (`tiltyard sweep --dry-run`): a forecast for every run.

Each run's training, scoring and total seconds come from `harness.experiments.forecast`: its work
(parameters x its own tokens x the passes it makes) at this machine's measured speed, or what
finished runs like it took; a finished run shows what it took. The table says which basis each
line rests on, and the total line what the runs still to do will take on this machine.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

from harness.config import Config, config_folder, config_to_dict
from harness.data.task import load_task
from harness.experiments.forecast import Forecast, forecast_runs
from harness.experiments.steps import run_state
from harness.runs.folders import run_folder, run_id

__all__ = ["estimate_runs", "log_plan", "seconds_text"]


def _example_epochs(cfg: Config, train_rows: int) -> float:
    """Training examples seen: rows x epochs, capped by max_steps; 0 for prompt (no training)."""
    if cfg.method.kind == "prompt":
        return 0.0
    seen = train_rows * cfg.train.epochs
    if cfg.train.max_steps is not None:
        seen = min(seen, cfg.train.max_steps * cfg.train.batch_size * cfg.train.grad_accum)
    return float(seen)


def estimate_runs(runs: Sequence[Config], *, log: Callable[[str], None] = lambda _: None, calibrate: bool = True,
                  speed_folder: Path | None = None) -> list[dict[str, Any]]:
    """Per run: its config, id, state, training rows, examples x epochs and its `Forecast`.

    `calibrate` measures this machine's speed for families not measured yet (see `forecast_runs`).
    """
    rows_cache: dict[str, int] = {}
    out: list[dict[str, Any]] = []
    forecasts = forecast_runs(runs, log=log, calibrate=calibrate, speed_folder=speed_folder)
    for cfg, forecast in zip(runs, forecasts, strict=True):
        key = json.dumps([config_to_dict(cfg)["task"], cfg.train.seed], sort_keys=True)
        if key not in rows_cache:  # the same base folder as the runner's
            rows_cache[key] = len(load_task(cfg.task, seed=cfg.train.seed, base=config_folder(cfg)).train)
        rows = rows_cache[key]
        out.append({"cfg": cfg, "id": run_id(cfg), "state": str(run_state(run_folder(cfg))["state"]),
                    "train_rows": rows, "example_epochs": _example_epochs(cfg, rows), "forecast": forecast})
    return out


def seconds_text(seconds: float | None) -> str:
    """'12.3' (seconds), '?' when unknown."""
    return "?" if seconds is None else f"{seconds:.1f}"


def _minutes(seconds: float) -> str:
    minutes = seconds / 60
    return f"~{minutes:.1f} min" if minutes < 10 else f"~{minutes:.0f} min"


def log_plan(picked: Sequence[int], plan: Sequence[dict[str, Any]], log: Callable[[str], None],
             roles: Mapping[int, str] | None = None) -> None:
    """The dry run's table (one line per run: forecast train, scoring and total seconds, basis) and its total;
    `roles` names what a run is for (a tuning trial, a tuned arm's seed), shown before its id."""
    log(f"{'#':>3}  {'role':<9} {'run id':<40} {'checkpoint':<22} {'method':<10} {'seed':>5} {'train':>6} {'state':<11} "
        f"{'train s':>8} {'score s':>8} {'total s':>8}  basis")
    todo, known, unknown, examples = 0, 0.0, 0, 0.0
    for i, r in zip(picked, plan, strict=True):
        c, f = r["cfg"], r["forecast"]
        assert isinstance(f, Forecast)  # estimate_runs builds every row with one
        log(f"{i:>3}  {(roles or {}).get(i, 'run'):<9} {r['id']:<40} {c.model.checkpoint[:22]:<22} {c.method.kind:<10} {c.train.seed:>5} "
            f"{r['train_rows']:>6} {r['state']:<11} {seconds_text(f.train_seconds):>8} "
            f"{seconds_text(f.score_seconds):>8} {seconds_text(f.total_seconds):>8}  {f.basis}")
        if r["state"] == "finished":
            continue
        todo += 1
        examples += r["example_epochs"]
        if f.total_seconds is None:
            unknown += 1
        else:
            known += f.total_seconds
    line = f"forecast: {_minutes(known)} for {todo - unknown} runs on this machine"
    if unknown:  # said plainly rather than guessed: a rate from another checkpoint would mislead
        line += f", plus {unknown} runs of unknown cost"
    finished = len(plan) - todo
    log(line + f" ({todo} to run, {examples:g} training examples x epochs"
        + (f"; {finished} finished, not counted)" if finished else ")"))
