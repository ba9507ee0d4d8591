"""Tuning trials (`sweep.tune`): the same number of seeded draws for every trained arm, chosen on dev only.

Trial t of an arm is an ordinary run (its own id and folder, resumable like any other): the arm's
settings, the first value of every grid key, the tune seed as `train.seed`, the draw of trial t
(`harness.config.tune_space.draw_settings`), and `eval.score_on: dev`, so the trial is trained on
train and scored on dev, and the test split is never scored. Once every trial of an arm is over, the
best finished one by the primary metric on dev (the earlier trial on a tie) gives the settings the
arm's seeds then run with on test. Trials run trial-major (trial 0 of every arm, then trial 1...), so
a sweep stopped half-way leaves every arm with as many trials as the others, give or take one.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from harness.config import Config, config_from_dict, config_to_dict, set_dotted
from harness.config.dotted import thaw
from harness.config.tune_space import ARM_KEY, arm_space, draw_settings
from harness.experiments.steps import run_state
from harness.files import read_json
from harness.metrics.scores import METRICS
from harness.runs.folders import run_folder, run_id

__all__ = ["Trial", "arm_data", "arm_name", "choose_settings", "trial_runs", "tune_seed"]

_HEAD_ONLY = ("train.head_learning_rate", "method.pooling", "method.dropout", "method.use_pooler")


@dataclass(frozen=True)
class Trial:
    """One tuning trial: arm index (in sweep.arms), trial index, the drawn settings and the run's config."""

    arm: int
    index: int
    settings: dict[str, Any]
    cfg: Config


def arm_data(cfg: Config, arm: dict[str, Any]) -> dict[str, Any]:
    """The config as plain data with an empty sweep block and the arm's settings applied (not its own space)."""
    data = config_to_dict(cfg)
    data["sweep"] = {"grid": {}, "arms": [], "exclude": [], "tune": None, "budget": None}
    for key, value in arm.items():
        if key != ARM_KEY:
            data = set_dotted(data, key, thaw(value), f"sweep.arms in {cfg.source}")
    return data


def arm_name(run: Config) -> str:
    """How tables name an arm: checkpoint and method (and pooling for a head)."""
    model = run.model.checkpoint.rstrip("/").split("/")[-1].split(":")[-1]
    detail = f" · {run.method.pooling} pooling" if run.method.kind == "head" and run.method.pooling != "auto" else ""
    return f"{model} · {run.method.kind}{detail}"


def tune_seed(cfg: Config) -> int:
    """sweep.tune.seed, else the first train.seed of the grid, else train.seed."""
    assert cfg.sweep.tune is not None
    if cfg.sweep.tune.seed is not None:
        return cfg.sweep.tune.seed
    seeds = cfg.sweep.grid.get("train.seed")
    return int(seeds[0]) if seeds else cfg.train.seed


def trial_runs(cfg: Config, trials: int | None = None) -> list[Trial]:
    """Every trial of every tuned arm, trial-major; `trials` caps the count per arm (a budget's trim)."""
    tune = cfg.sweep.tune
    if tune is None:
        return []
    seed = tune_seed(cfg)
    count = tune.trials if trials is None else min(trials, tune.trials)
    arms = [dict(arm) for arm in cfg.sweep.arms] or [{}]
    spaces: dict[int, tuple[dict[str, Any], dict[str, Any]]] = {}
    for a, arm in enumerate(arms):
        data = arm_data(cfg, arm)
        space = arm_space(thaw(tune.space), arm)
        if space is None or data["method"]["kind"] == "prompt":
            continue
        if data["method"]["kind"] != "head":  # a setting that does nothing for this method is not drawn
            space = {k: v for k, v in space.items() if k not in _HEAD_ONLY}
        for key, values in cfg.sweep.grid.items():  # trials sit at the grid's first combination
            data = set_dotted(data, key, thaw(values[0]), f"sweep.grid.{key} in {cfg.source}")
        spaces[a] = (data, space)
    out: list[Trial] = []
    for t in range(count):
        for a, (data, space) in spaces.items():
            settings = draw_settings(space, seed, t)
            run = data
            for key, value in {**settings, "train.seed": seed, "eval.score_on": "dev"}.items():
                run = set_dotted(run, key, value, f"sweep.tune in {cfg.source}")
            out.append(Trial(a, t, settings, config_from_dict(run, source=cfg.source, check_sweep=False)))
    return out


def _result(trial: Trial, primary: str) -> dict[str, Any]:
    folder = run_folder(trial.cfg)
    record: dict[str, Any] = {"trial": trial.index, "id": run_id(trial.cfg), "path": str(folder),
                              "state": run_state(folder)["state"], "settings": trial.settings, "dev": None,
                              "train_seconds": None, "eval_seconds": None}
    if record["state"] == "finished":
        try:
            metrics = read_json(folder / "metrics.json")
        except Exception:  # why: a damaged metrics file makes the trial unusable, not the sweep
            record["state"] = "damaged"
            return record
        value = metrics.get("metrics", {}).get(primary)
        record["dev"] = float(value) if isinstance(value, (int, float)) and math.isfinite(value) else None
        cost = metrics.get("cost", {})
        record["train_seconds"], record["eval_seconds"] = cost.get("train_seconds"), cost.get("eval_seconds")
    return record


def choose_settings(cfg: Config, trials: Sequence[Trial]) -> tuple[dict[int, dict[str, Any]], dict[int, str],
                                                                   dict[str, Any]]:
    """Per tuned arm: the chosen settings (arm index -> settings), the arms that cannot go on yet with the
    reason (trials still to run, or none finished), and the tuning summary the comparison shows."""
    primary = cfg.eval.primary
    higher = METRICS[primary].higher_is_better
    chosen: dict[int, dict[str, Any]] = {}
    blocked: dict[int, str] = {}
    arms: list[dict[str, Any]] = []
    for a in sorted({t.arm for t in trials}):
        mine = sorted((t for t in trials if t.arm == a), key=lambda t: t.index)
        records = [_result(t, primary) for t in mine]
        scored = [(r["dev"], r["trial"]) for r in records if r["dev"] is not None]
        pending = [r for r in records if r["state"] in ("new", "running", "interrupted")]
        best: int | None = None
        if scored:
            best = min(scored, key=lambda s: (-s[0] if higher else s[0], s[1]))[1]
        if pending:
            blocked[a] = f"{len(pending)} of its {len(records)} trials are not finished"
        elif best is None:
            blocked[a] = f"none of its {len(records)} trials finished with a dev score"
        else:
            chosen[a] = dict(mine[best].settings)
        arms.append({"arm": arm_name(mine[0].cfg), "index": a, "chosen_trial": None if pending else best,
                     "chosen": chosen.get(a), "trials": records})
    summary = {"metric": primary, "higher_is_better": higher,
               "trials_per_arm": max((len(a["trials"]) for a in arms), default=0),
               "seed": tune_seed(cfg) if cfg.sweep.tune else None, "arms": arms}
    return chosen, blocked, summary
