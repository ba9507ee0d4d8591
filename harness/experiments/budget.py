"""A wall-time budget for a sweep (`--budget 15m`, `sweep.budget`): fit the sweep to it before anything runs.

The forecast (harness.experiments.forecast) gives every run's seconds on this machine; finished runs
cost nothing more. A tuned arm's seeds are forecast at its most expensive trial's cost (the trials
have not chosen yet). When the whole forecast is over the budget, the rule is, in this order:
1. fewer tuning trials, the same number for every tuned arm (the last trials go first: the earlier
   draws stay as they were), down to 2 per arm;
2. then fewer seeds (the last values of the grid's `train.seed` list go first), down to 2;
3. if it still does not fit, refuse, saying what the smallest sweep would take.
With `sweep.over_budget: refuse` the sweep is refused at the first step instead, naming the key.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from harness.config import Config, key_location
from harness.config.tune_space import parse_duration
from harness.errors import HarnessError
from harness.experiments.steps import run_state
from harness.experiments.tune import Trial, tune_seed
from harness.runs.folders import run_folder
from harness.runs.twin import dev_twin

__all__ = ["Fitted", "fit_budget", "machine_forecaster", "sweep_cost"]

Log = Callable[[str], None]
Forecaster = Callable[[Sequence[Config]], list[tuple[float, float]]]  # per run: (training, total) seconds left
# (trials, runs of the grid, the tuned arm each run stands in for) for a trial count: sweep.expand_planned
Planner = Callable[[Config, "int | None"], "tuple[list[Trial], list[Config], list[int | None]]"]
_FLOOR = 2


@dataclass(frozen=True)
class Fitted:
    """The sweep to run: its config (the seed list maybe shortened), trials per tuned arm, and what was done."""

    cfg: Config
    trials: int | None
    note: str | None


def _minutes(seconds: float) -> str:
    return f"{seconds / 60:.1f} min"


def _with_seeds(cfg: Config, count: int) -> Config:
    grid = dict(cfg.sweep.grid)
    grid["train.seed"] = tuple(grid["train.seed"])[:count]
    return dataclasses.replace(cfg, sweep=dataclasses.replace(cfg.sweep, grid=grid))


def sweep_cost(cfg: Config, trials: int | None, forecaster: Forecaster, planner: Planner) -> float:
    """Forecast seconds still to spend on the sweep with `trials` per tuned arm (None: all of them)."""
    trial_list, finals, stand_in = planner(cfg, trials)
    trial_cost = forecaster([t.cfg for t in trial_list]) if trial_list else []
    final_cost = forecaster(finals) if finals else []
    dearest: dict[int, tuple[float, float]] = {}
    for trial, (train, total) in zip(trial_list, trial_cost, strict=True):
        if total >= dearest.get(trial.arm, (0.0, -1.0))[1]:
            dearest[trial.arm] = (train, total)
    seed = tune_seed(cfg) if cfg.sweep.tune is not None else None
    cost = sum(total for _, total in trial_cost)
    for run, arm, (_, total) in zip(finals, stand_in, final_cost, strict=True):
        if arm is None or arm not in dearest:
            cost += total  # final settings known: the forecaster saw the run itself
        else:  # still tuning: at the dearest trial; the tune seed's run takes over its trial's training
            train, whole = dearest[arm]
            cost += whole - train if run.train.seed == seed else whole
    return cost


def machine_forecaster(log: Log) -> Forecaster:
    """This machine's forecast (harness.experiments.forecast) as seconds still to spend: a finished run costs
    nothing, a run whose tuning trial trained it (harness.runs.twin) costs its scoring; an unknown is refused."""
    from harness.experiments.forecast import forecast_runs  # late: forecasting loads models, only when asked

    def forecast(runs: Sequence[Config]) -> list[tuple[float, float]]:
        out = []
        for run, f in zip(runs, forecast_runs(runs, log=log), strict=True):
            if run_state(run_folder(run))["state"] == "finished":
                out.append((0.0, 0.0))
                continue
            if f.total_seconds is None or f.train_seconds is None:
                raise HarnessError(f"cannot fit the sweep to a budget: run {f.run_id} has no forecast ({f.basis})")
            train = 0.0 if dev_twin(run) is not None else f.train_seconds
            out.append((train, f.total_seconds - f.train_seconds + train))
        return out

    return forecast


def fit_budget(cfg: Config, budget: str | None, log: Log, planner: Planner,
               forecaster: Forecaster | None = None) -> Fitted:
    """The sweep that fits `budget` (or sweep.budget) by the module's rule; a refusal is a HarnessError."""
    tune = cfg.sweep.tune
    text = budget if budget is not None else cfg.sweep.budget
    if text is None:
        return Fitted(cfg, tune.trials if tune else None, None)
    limit = parse_duration(text, option="--budget" if budget is not None else key_location(cfg, "sweep.budget") + ":")
    forecast = forecaster if forecaster is not None else machine_forecaster(log)
    trials = tune.trials if tune else None
    seeds = len(cfg.sweep.grid.get("train.seed", ()))
    began = time.perf_counter()
    cost = sweep_cost(cfg, trials, forecast, planner)
    # the budget is wall time from here: measuring this machine's speed (once per family) spends some of it
    given, spent = limit, time.perf_counter() - began
    limit = max(0.0, limit - spent)
    said = f"budget {_minutes(given)} ({_minutes(limit)} left after {spent:.0f} s of forecasting)"
    first = f"forecast {_minutes(cost)} for the sweep as written"
    if cost <= limit:
        log(f"{said}: {first}; it fits")
        return Fitted(cfg, trials, f"fits: {first}")
    if cfg.sweep.over_budget == "refuse":
        key = "sweep.tune.trials" if tune else "sweep.budget"
        raise HarnessError(f"{key_location(cfg, key)}: {first}, over the budget of {_minutes(given)} "
                           f"({'--budget' if budget is not None else 'sweep.budget'}); lower it, or set "
                           "sweep.over_budget: trim to let the sweep cut trials, then seeds")
    steps: list[str] = []
    while cost > limit and trials is not None and trials > _FLOOR:
        trials -= 1
        cost = sweep_cost(cfg, trials, forecast, planner)
        steps.append(f"{trials} trials per arm: {_minutes(cost)}")
    while cost > limit and seeds > _FLOOR:
        seeds -= 1
        cfg = _with_seeds(cfg, seeds)
        cost = sweep_cost(cfg, trials, forecast, planner)
        steps.append(f"{seeds} seeds: {_minutes(cost)}")
    if cost > limit:
        raise HarnessError(f"{'--budget' if budget is not None else key_location(cfg, 'sweep.budget')} {text}: "
                           f"{first}; even trimmed to {trials or 0} trials per arm and {seeds} seeds it needs "
                           f"{_minutes(cost)}; give a budget of at least {_minutes(cost * 1.05)} or a smaller sweep")
    note = f"trimmed to fit {_minutes(limit)}: {first}; " + "; ".join(steps)
    log(f"{said}: {note}")
    return Fitted(cfg, trials, note)
