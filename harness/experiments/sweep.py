"""Sweeps: expand a config's grid into runs, run them one after another, resume, compare.

A sweep is a list of ordinary runs (each with its own deterministic id and folder), plus
`<output>/<task>/sweeps/<name>/sweep.json` listing them. Re-running a sweep skips finished runs
and resumes interrupted ones, so a killed sweep costs only the run it was in. Data files are
hashed when the sweep starts and checked before and after every run: a run that saw another
version of a file fails with a message naming it, so one sweep never mixes two versions.
sweep.json also records each run's peak memory and the memory left once it is over and collected,
so growth from run to run (a leak) shows. A run another process holds (harness.runs.claim) is
skipped and come back to once the others are done. With a cluster (harness.experiments.cluster)
the runs go to its workers instead of this process, under the same rules (harness.experiments.steps).
"""

from __future__ import annotations

import itertools
import json
import logging
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from harness.config import Config, config_from_dict, config_to_dict, set_dotted
from harness.config.dotted import thaw
from harness.errors import HarnessError
from harness.experiments.budget import fit_budget
from harness.experiments.data_checks import changed_since, data_files, hash_data
from harness.experiments.plan import estimate_runs, log_plan
from harness.experiments.steps import (
    check_after_run,
    decide_run,
    failure_message,
    mark_failed,
    memory_after,
    run_state,
)
from harness.experiments.sweep_index import parse_shard, sweep_folder, write_index
from harness.experiments.tune import Trial, arm_data, choose_settings, trial_runs
from harness.files import atomic_write_json
from harness.report.compare import compare_runs
from harness.runs import run as runner
from harness.runs.claim import RunBusy, claim_holder, claim_launched, wait_for_release
from harness.runs.folders import run_folder, run_id
from harness.train.checkpoints import Interrupted
from harness.train.processes import is_main_process

__all__ = ["data_files", "estimate_runs", "expand_planned", "expand_sweep", "parse_shard", "run_sweep", "plan_sweep", "sweep_folder"]

logger = logging.getLogger(__name__)

Log = Callable[[str], None]
_MISSING = object()


def _lookup(data: dict[str, Any], key: str) -> Any:
    node: Any = data
    for part in key.split("."):
        if not isinstance(node, dict) or part not in node:
            return _MISSING  # e.g. method.lora.r on a run without adapters: the rule does not match
        node = node[part]
    return node


def _seed_free_key(run: Config) -> str | None:
    """For a run that does not depend on train.seed (zero-shot `prompt`: no training, no demonstrations
    drawn, the splits carved with task.split_seed), its config without the seed; else None."""
    if run.method.kind != "prompt" or run.method.shots != 0:
        return None
    data = config_to_dict(run)
    data["train"].pop("seed")
    return json.dumps(data, sort_keys=True)


def _expand(cfg: Config, chosen: dict[int, dict[str, Any]] | None = None,
            held: Sequence[int] = (), arm_of: list[int] | None = None) -> tuple[list[Config], list[int], int]:
    """The runs, how many combinations each exclude rule removed, and how many seed-free runs were reused.

    `chosen` gives tuned arms (by index in sweep.arms) the settings their trials chose; arms in `held`
    (tuned arms whose choice is not made yet) give no runs; `arm_of`, when given, gets each run's arm
    index. A zero-shot `prompt` run comes out the
    same for every train.seed: it runs once (with the first seed the grid gives it) and stands for
    every seed, so no `exclude` rule is needed for it.
    """
    keys = list(cfg.sweep.grid)  # file order: dicts keep insertion order
    rules = [{k: thaw(v) for k, v in rule.items()} for rule in cfg.sweep.exclude]
    hits = [0] * len(rules)
    runs: list[Config] = []
    seen: dict[str, int] = {}
    seed_free: set[str] = set()
    reused = 0
    arms = [dict(arm) for arm in cfg.sweep.arms] or [{}]
    # arms outermost (each arm's runs together), then the grid in file order
    combos = [(a, combo) for a in range(len(arms)) if a not in held
              for combo in itertools.product(*(cfg.sweep.grid[k] for k in keys))]
    for n, (a, combo) in enumerate(combos):
        data = arm_data(cfg, arms[a])
        for key, value in (chosen or {}).get(a, {}).items():
            data = set_dotted(data, key, value, f"sweep.tune in {cfg.source}")
        for key, value in zip(keys, combo, strict=True):
            # a one-part key ('method') replaces the whole block; dotted keys set one field
            data = set_dotted(data, key, thaw(value), f"sweep.grid.{key} in {cfg.source}")
        run = config_from_dict(data, source=cfg.source)
        resolved = config_to_dict(run)
        matched = [i for i, rule in enumerate(rules) if all(_lookup(resolved, k) == v for k, v in rule.items())]
        for i in matched:
            hits[i] += 1
        if matched:
            continue
        free = _seed_free_key(run)
        if free is not None and free in seed_free:
            reused += 1
            continue
        if free is not None:
            seed_free.add(free)
        rid = run_id(run)
        if rid in seen:
            raise HarnessError(f"{cfg.source}: sweep combinations {seen[rid] + 1} and {n + 1} give the same run "
                               f"{rid}; remove the repeated value from sweep.grid")
        seen[rid] = n
        runs.append(run)
        if arm_of is not None:
            arm_of.append(a)
    return runs, hits, reused


def expand_planned(cfg: Config, trials: int | None = None) -> tuple[list[Trial], list[Config], list[int | None]]:
    """What the sweep will run, as far as it is known before it runs: the trials (`trials` per tuned arm), the
    runs of the grid, and for each run the tuned arm it stands in for (None: its settings are final). A tuned
    arm whose trials have chosen gets its chosen settings; one still tuning is shown with the arm's own."""
    trial_list = trial_runs(cfg, trials)
    chosen, held, _ = choose_settings(cfg, trial_list) if trial_list else ({}, {}, {})
    arm_of: list[int] = []
    finals = _expand(cfg, chosen, arm_of=arm_of)[0]
    return trial_list, finals, [a if a in held else None for a in arm_of]


def expand_sweep(cfg: Config) -> list[Config]:
    """One validated Config (with an empty sweep block) per grid combination not excluded, in grid order."""
    return _expand(cfg)[0]


def _run_one(cfg: Config, start: dict[str, str], tag: str, log: Log, shown: set[str]) -> tuple[str, bool]:
    """Run (or skip, or resume) one run of the sweep; return its final state ('busy': another process holds
    it) and whether it ran."""
    try:
        with claim_launched(run_folder(cfg), doing="running it in a sweep"):
            return _run_claimed(cfg, start, tag, log, shown)
    except RunBusy as exc:
        log(f"{tag} skipped for now: claimed by {exc.holder}; coming back to it at the end")
        return "busy", False


def _run_claimed(cfg: Config, start: dict[str, str], tag: str, log: Log, shown: set[str]) -> tuple[str, bool]:
    folder = run_folder(cfg)
    step = decide_run(cfg, start, tag, log)
    if step in ("done", "refused"):
        return ("finished" if step == "done" else "failed"), False
    log(f"{tag} {'resuming from its last checkpoint' if step == 'resume' else 'running'}")
    try:
        # looked up at call time (a module attribute), so tests can stand in for execute_run
        runner.execute_run(cfg, resume=step == "resume", overwrite=step == "rerun", log=log, shown_findings=shown,
                           reuse_training=True)
    except Interrupted:
        raise  # Ctrl-C: the runner saved a checkpoint and marked the run; stop the whole sweep
    except Exception as exc:  # why: one broken run must not stop the rest; the error goes to status.json
        message = failure_message(exc)
        if run_state(folder)["state"] != "failed":
            mark_failed(folder, message)
        log(f"{tag} failed: {(message.splitlines() or [type(exc).__name__])[0]}")
        return "failed", True
    return check_after_run(folder, start, tag, log), True


def _run_here(runs: Sequence[Config], picked: Sequence[int], start: dict[str, str], log: Log,
              progress: Callable[[dict[int, str], dict[int, dict[str, float | None]]], None],
              ) -> tuple[dict[int, str], dict[int, dict[str, float | None]]]:
    """The runs one after another in this process; runs another process holds come last, once it lets go."""
    states: dict[int, str] = {}
    memory: dict[int, dict[str, float | None]] = {}
    shown: set[str] = set()  # a data finding is the same for every run of the grid: say it once
    order, busy = list(picked), []
    tags = {i: f"[{n + 1}/{len(picked)}] #{i} {run_id(runs[i])}:" for n, i in enumerate(picked)}
    while order:
        i = order.pop(0)
        began = time.perf_counter()
        states[i], ran = _run_one(runs[i], start, tags[i], log, shown)
        if ran:  # the wall time of the whole run (loading to report): what a forecast is checked against
            memory[i] = {**memory_after(), "wall_seconds": round(time.perf_counter() - began, 2)}
        progress(states, memory)
        if states[i] == "busy":
            busy.append(i)
        if not order and busy:  # come back to each held run, waiting for its holder to let go
            i = busy.pop(0)
            log(f"{tags[i]} coming back to it: waiting for {claim_holder(run_folder(runs[i]))} to let go")
            wait_for_release(run_folder(runs[i]))
            order.append(i)
    return states, memory


def _pick(count: int, offset: int, shard: tuple[int, int] | None) -> list[int]:
    return [offset + i for i in range(count) if shard is None or i % shard[1] == shard[0]]


def run_sweep(
    cfg: Config, name: str, *, shard: tuple[int, int] | None = None, compare: bool = True, log: Log = logger.info,
    cluster: Any = None, budget: str | None = None,
) -> dict[str, Any]:
    """Run every (shard's) run of the sweep; write sweep.json; compare the finished runs at the end.

    With a `sweep.tune` block the tuning trials run first (harness.experiments.tune), then every arm's
    seeds with the settings its trials chose. `budget` (or sweep.budget) trims or refuses the sweep
    by its forecast before anything runs (harness.experiments.budget). `cluster` (a
    harness.experiments.cluster.ClusterSpec) sends the runs to a Ray cluster's workers; None runs
    them here, one after another.
    """
    fitted = fit_budget(cfg, budget, log, expand_planned)
    cfg, trials = fitted.cfg, trial_runs(fitted.cfg, fitted.trials)
    folder = sweep_folder(cfg, name)
    roles = {i: {"role": "trial", "arm": t.arm, "trial": t.index, "settings": t.settings} for i, t in enumerate(trials)}
    runs: list[Config] = [t.cfg for t in trials]
    states: dict[int, str] = {}
    memory: dict[int, dict[str, float | None]] = {}
    meta: dict[str, Any] = {"sweep": name, "config": cfg.source, "grid": list(cfg.sweep.grid),
                            "shard": None if shard is None else f"{shard[0]}/{shard[1]}", "budget": fitted.note}

    def progress(now_states: dict[int, str], now_memory: dict[int, dict[str, float | None]]) -> None:
        states.update(now_states)
        memory.update(now_memory)
        write_index(folder, meta, runs, memory, roles)

    def phase(picked: list[int]) -> None:
        try:
            if cluster is None:
                _run_here(runs, picked, start, log, progress)
            else:
                from harness.experiments.cluster import run_on_cluster

                run_on_cluster(cluster, runs, picked, start, log, progress)
        finally:  # a kill mid-run still leaves an up-to-date index
            write_index(folder, meta, runs, memory, roles)

    start = hash_data(runs + _expand(cfg)[0])  # once, before anything runs: every run must see these versions
    picked = _pick(len(trials), 0, shard)
    tuning: dict[str, Any] | None = None
    chosen: dict[int, dict[str, Any]] = {}
    held: dict[int, str] = {}
    if trials:
        meta.update(runs_total=len(runs), data_files=start)
        log(f"sweep {name}: {len(trials)} tuning trials first ({fitted.trials} per trained arm, scored on dev)"
            + ("" if shard is None else f", shard {meta['shard']}: {len(picked)}"))
        # then the other shards' trials: unstarted ones are taken over, running ones waited for (claims keep
        # any trial from running twice), so every shard goes on to its seeds with every arm's choice made
        picked += [i for i in range(len(trials)) if i not in picked]
        phase(picked)
        chosen, held, tuning = choose_settings(cfg, trials)
        if is_main_process():
            atomic_write_json(folder / "tuning.json", tuning)
        for a, why in held.items():
            log(f"arm {a + 1}: {why}; its seeds wait (run the sweep again once its trials are done)")
        for a, settings in chosen.items():
            log(f"arm {a + 1}: chose {', '.join(f'{k}={v}' for k, v in settings.items())} on dev")
    finals, hits, reused = _expand(cfg, chosen, list(held))
    _note_rules(cfg, hits, reused, log)
    offset = len(runs)
    runs += finals
    meta.update(runs_total=len(runs), data_files=start)
    mine = _pick(len(finals), offset, shard)
    log(f"sweep {name}: {len(finals)} runs" + ("" if shard is None else f", shard {meta['shard']}: {len(mine)}"))
    phase(mine)
    picked += mine
    records = write_index(folder, meta, runs, memory, roles)
    failed = [i for i in picked if states.get(i) != "finished"]
    summary: dict[str, Any] = {"folder": str(folder), "runs": records, "picked": picked, "failed": failed,
                               "data_changed": changed_since(start), "tuning": tuning, "held": held}
    log(f"sweep {name}: {len(picked) - len(failed)} finished, {len(failed)} failed; index in {folder / 'sweep.json'}")
    if compare:
        _compare(folder, [r for r in records if r["role"] != "trial"], summary, log, tuning)
    return summary


def _compare(folder: Path, records: list[dict[str, Any]], summary: dict[str, Any], log: Log,
             tuning: dict[str, Any] | None) -> None:

    if not is_main_process() or not any(r["state"] == "finished" for r in records):
        return

    # every started run goes in: compare lists unfinished ones as left out instead of averaging them
    started = [Path(r["path"]) for r in records if r["state"] != "new"]
    try:
        summary["comparison"] = compare_runs(started, folder, tuning=tuning)
    except HarnessError as exc:  # the runs stand on their own; say why there is no table
        log(f"comparison not written: {exc}")
    else:
        left = len(summary["comparison"]["incomplete"])
        log(f"comparison of {len(started) - left} finished runs written to {folder / 'comparison.md'}"
            + (f" ({left} left out, listed there)" if left else ""))


def _note_rules(cfg: Config, hits: list[int], reused: int, log: Log) -> None:
    for i, count in enumerate(hits):
        if count == 0:
            log(f"note: sweep.exclude[{i}] in {cfg.source} matches no combination (a misspelt value?)")
    if reused:
        log(f"note: {reused} zero-shot prompt combinations differ only in train.seed, which zero-shot scoring does "
            "not use; each such run is done once and stands for every seed")


def plan_sweep(cfg: Config, name: str, shard: tuple[int, int] | None, log: Log, *, calibrate: bool = True,
               budget: str | None = None) -> None:
    """Log the runs a sweep (or one shard of it) would do, tuning trials first, with their forecast cost; train
    nothing for them. `calibrate` measures this machine's speed first where it is not cached
    (harness.experiments.forecast). A budget is fitted first (harness.experiments.budget), so the plan is the
    one that would run."""
    fitted = fit_budget(cfg, budget, log, expand_planned)
    trials, finals, stand_in = expand_planned(fitted.cfg, fitted.trials)
    _note_rules(fitted.cfg, *_expand(fitted.cfg)[1:], log)
    runs = [t.cfg for t in trials] + finals
    picked = _pick(len(trials), 0, shard) + _pick(len(finals), len(trials), shard)
    log(f"sweep {name}: {len(trials)} tuning trials, then {len(finals)} runs"
        + ("" if shard is None else f"; shard {shard[0]}/{shard[1]}: {len(picked)}")
        + f"; sweep folder {sweep_folder(fitted.cfg, name)}")
    if any(a is not None for a in stand_in):
        log("role 'untuned': a tuned arm's run, shown with the arm's own settings until its trials have chosen "
            "(the budget line above counts it at its dearest trial)")
    roles = {i: f"trial {t.index}" for i, t in enumerate(trials)}
    roles.update({len(trials) + n: "untuned" for n, a in enumerate(stand_in) if a is not None})
    log_plan(picked, estimate_runs([runs[i] for i in picked], log=log, calibrate=calibrate), log, roles)
