"""Sweeps: expand a config's grid into runs, run them one after another, resume, compare.

A sweep is a list of ordinary runs (each with its own deterministic id and folder), plus
`<output>/<task>/sweeps/<name>/sweep.json` listing them. Re-running a sweep skips finished runs
and resumes interrupted ones, so a killed sweep costs only the run it was in. Data files are
hashed when the sweep starts and checked before and after every run: a run that saw another
version of a file fails with a message naming it, so one sweep never mixes two versions.
sweep.json also records each run's peak memory and the memory left once it is over and collected,
so growth from run to run (a leak) shows.
"""

from __future__ import annotations

import itertools
import json
import logging
import re
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from harness.config import Config, config_folder, config_from_dict, config_to_dict, set_dotted
from harness.config.dotted import thaw
from harness.data.task import split_paths
from harness.errors import HarnessError
from harness.experiments.plan import estimate_runs, log_plan
from harness.files import atomic_write_json, file_sha256, read_json
from harness.report.compare import compare_runs
from harness.runs import run as runner
from harness.runs.folders import read_status, run_folder, run_id, write_status
from harness.train.checkpoints import Interrupted
from harness.train.memory import current_rss_mb, peak_rss_mb
from harness.train.processes import is_main_process

__all__ = ["data_files", "estimate_runs", "expand_sweep", "parse_shard", "run_sweep", "plan_sweep", "sweep_folder"]

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


def _expand(cfg: Config) -> tuple[list[Config], list[int], int]:
    """The runs, how many combinations each exclude rule removed, and how many seed-free runs were reused.

    A zero-shot `prompt` run comes out the same for every train.seed: it runs once (with the first
    seed the grid gives it) and stands for every seed, so no `exclude` rule is needed for it.
    """
    base = config_to_dict(cfg)
    base["sweep"] = {"grid": {}, "arms": [], "exclude": []}
    keys = list(cfg.sweep.grid)  # file order: dicts keep insertion order
    rules = [{k: thaw(v) for k, v in rule.items()} for rule in cfg.sweep.exclude]
    hits = [0] * len(rules)
    runs: list[Config] = []
    seen: dict[str, int] = {}
    seed_free: set[str] = set()
    reused = 0
    arms = [dict(arm) for arm in cfg.sweep.arms] or [{}]
    # arms outermost (each arm's runs together), then the grid in file order
    combos = [(arm, combo) for arm in arms for combo in itertools.product(*(cfg.sweep.grid[k] for k in keys))]
    for n, (arm, combo) in enumerate(combos):
        data = base
        for key, value in arm.items():
            data = set_dotted(data, key, thaw(value), f"sweep.arms in {cfg.source}")
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
    return runs, hits, reused


def expand_sweep(cfg: Config) -> list[Config]:
    """One validated Config (with an empty sweep block) per grid combination not excluded, in grid order."""
    return _expand(cfg)[0]


def parse_shard(text: str | None) -> tuple[int, int] | None:
    """'I/N' -> (I, N) with 0 <= I < N; None stays None."""
    if text is None:
        return None
    m = re.fullmatch(r"\s*(\d+)\s*/\s*(\d+)\s*", text)
    if not m or int(m.group(2)) < 1 or int(m.group(1)) >= int(m.group(2)):
        raise HarnessError(f"--shard {text!r}: expected I/N with 0 <= I < N (0-based), e.g. --shard 0/2 and 1/2")
    return int(m.group(1)), int(m.group(2))


def sweep_folder(cfg: Config, name: str) -> Path:
    """`<output>/<task>/sweeps/<name>/`."""
    safe = re.sub(r"[^A-Za-z0-9_.-]+", "-", name).strip(".-") or "sweep"
    return Path(cfg.output).resolve() / cfg.task.name / "sweeps" / safe


def data_files(cfg: Config) -> list[Path]:
    """The split files a run reads, resolved as the runner resolves them (working folder, then config folder)."""
    base = config_folder(cfg)
    return [path.resolve() for path in split_paths(cfg.task, base).values()]


def _hash_data(runs: Sequence[Config]) -> dict[str, str]:
    hashes: dict[str, str] = {}
    for cfg in runs:
        for path in data_files(cfg):
            if str(path) not in hashes:
                if not path.is_file():
                    raise HarnessError(f"data file {path} (task of run {run_id(cfg)}) does not exist")
                hashes[str(path)] = file_sha256(path)
    return hashes


def _changed_now(cfg: Config, start: dict[str, str]) -> str | None:
    """A message naming the first data file whose bytes differ from the sweep start, else None."""
    for path in data_files(cfg):
        now = file_sha256(path) if path.is_file() else "missing"
        if now != start.get(str(path), now):
            return (f"data file {path} changed since the sweep started (sha256 {start[str(path)][:12]} -> "
                    f"{now[:12]}); not mixing two versions of it in one sweep: re-run the sweep")
    return None


def _changed_in_run(folder: Path, start: dict[str, str]) -> str | None:
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


def _state(folder: Path) -> dict[str, Any]:
    return read_status(folder) if (folder / "status.json").exists() else {"state": "new"}


def _record(index: int, cfg: Config) -> dict[str, Any]:
    status = _state(run_folder(cfg))
    return {"index": index, "id": run_id(cfg), "path": str(run_folder(cfg)), "state": status["state"],
            "checkpoint": cfg.model.checkpoint, "method": cfg.method.kind, "seed": cfg.train.seed,
            "train_size": cfg.task.train_size, **({"error": status["error"]} if status.get("error") else {})}


def _write_index(folder: Path, meta: dict[str, Any], runs: Sequence[Config],
                 memory: dict[int, dict[str, float | None]] | None = None) -> list[dict[str, Any]]:
    records = [_record(i, cfg) for i, cfg in enumerate(runs)]
    for i, mem in (memory or {}).items():
        records[i]["memory"] = mem
    if is_main_process():  # under `accelerate launch` every process walks the sweep; one writes
        atomic_write_json(folder / "sweep.json", {**meta, "updated": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                                                  "runs": records})
    return records


def _mark_failed(folder: Path, message: str) -> None:
    if is_main_process():
        write_status(folder, "failed", error=message)


def _run_one(cfg: Config, start: dict[str, str], tag: str, log: Log, shown: set[str]) -> tuple[str, bool]:
    """Run (or skip, or resume) one run of the sweep; return its final state and whether it ran."""
    folder = run_folder(cfg)
    state = _state(folder)["state"]
    stale = _changed_in_run(folder, start) if state != "new" else None
    if state == "finished" and stale is None:
        log(f"{tag} done")
        return "finished", False
    changed = _changed_now(cfg, start)
    if changed is not None:
        _mark_failed(folder, changed)
        log(f"{tag} failed: {changed}")
        return "failed", False
    if stale is not None:
        log(f"{tag} an earlier attempt read other data ({stale}); starting it again")
    resume = stale is None and (folder / "checkpoints" / "last.pt").is_file()  # what the runner resumes from
    log(f"{tag} {'resuming from its last checkpoint' if resume else 'running'}")
    try:
        # looked up at call time (module attribute), so tests can stand in for execute_run
        runner.execute_run(cfg, resume=resume, overwrite=state != "new" and not resume, log=log,
                           shown_findings=shown)
    except Interrupted:
        raise  # Ctrl-C: the runner saved a checkpoint and marked the run; stop the whole sweep
    except Exception as exc:  # why: one broken run must not stop the rest; the error goes to status.json
        message = str(exc) if isinstance(exc, HarnessError) else f"{type(exc).__name__}: {exc}"
        if _state(folder)["state"] != "failed":
            _mark_failed(folder, message)
        log(f"{tag} failed: {(message.splitlines() or [type(exc).__name__])[0]}")
        return "failed", True
    changed = _changed_in_run(folder, start)
    if changed is not None:
        _mark_failed(folder, changed)
        log(f"{tag} failed: {changed}")
        return "failed", True
    return _state(folder)["state"], True


def run_sweep(
    cfg: Config, name: str, *, shard: tuple[int, int] | None = None, compare: bool = True, log: Log = logger.info
) -> dict[str, Any]:
    """Run every (shard's) run of the sweep; write sweep.json; compare the finished runs at the end."""
    runs, hits, reused = _expand(cfg)
    folder = sweep_folder(cfg, name)
    picked = [i for i in range(len(runs)) if shard is None or i % shard[1] == shard[0]]
    start = _hash_data([runs[i] for i in picked])
    meta = {"sweep": name, "config": cfg.source, "grid": list(cfg.sweep.grid), "runs_total": len(runs),
            "shard": None if shard is None else f"{shard[0]}/{shard[1]}", "data_files": start}
    _note_rules(cfg, hits, reused, log)
    log(f"sweep {name}: {len(runs)} runs" + ("" if shard is None else f", shard {meta['shard']}: {len(picked)}"))
    states: dict[int, str] = {}
    memory: dict[int, dict[str, float | None]] = {}
    shown: set[str] = set()  # a data finding is the same for every run of the grid: say it once
    try:
        for n, i in enumerate(picked):
            tag = f"[{n + 1}/{len(picked)}] #{i} {run_id(runs[i])}:"
            states[i], ran = _run_one(runs[i], start, tag, log, shown)
            if ran:
                memory[i] = _memory_after()
            _write_index(folder, meta, runs, memory)
    finally:  # a kill mid-run still leaves an up-to-date index
        records = _write_index(folder, meta, runs, memory)
    failed = [i for i in picked if states.get(i) != "finished"]
    summary: dict[str, Any] = {"folder": str(folder), "runs": records, "picked": picked, "failed": failed,
                               "data_changed": _changed_since(start)}
    log(f"sweep {name}: {len(picked) - len(failed)} finished, {len(failed)} failed; index in {folder / 'sweep.json'}")

    if compare and is_main_process() and any(r["state"] == "finished" for r in records):
        # every started run goes in: compare lists unfinished ones as left out instead of averaging them
        started = [Path(r["path"]) for r in records if r["state"] != "new"]
        try:
            summary["comparison"] = compare_runs(started, folder)
        except HarnessError as exc:  # the runs stand on their own; say why there is no table
            log(f"comparison not written: {exc}")
        else:
            left = len(summary["comparison"]["incomplete"])
            log(f"comparison of {len(started) - left} finished runs written to {folder / 'comparison.md'}"
                + (f" ({left} left out, listed there)" if left else ""))
    return summary


def _memory_after() -> dict[str, float | None]:
    """Memory once a run is over and collected: what the next run starts from (growth here is a leak)."""
    import gc


    peak = peak_rss_mb()  # since the runner reset the window at the run's start: scoring and report included
    gc.collect()  # the finished run's model, optimiser and batches are garbage now; return them before the next
    return {"peak_rss_mb": round(peak, 1), "rss_mb_after": round(current_rss_mb(), 1)}


def _changed_since(start: dict[str, str]) -> str | None:
    """The first data file whose bytes now differ from the sweep start, as a message; None when none."""
    for name, digest in start.items():
        path = Path(name)
        now = file_sha256(path) if path.is_file() else "missing"
        if now != digest:
            return f"data file {path} changed while the sweep ran (sha256 {digest[:12]} -> {now[:12]})"
    return None


def _note_rules(cfg: Config, hits: list[int], reused: int, log: Log) -> None:
    for i, count in enumerate(hits):
        if count == 0:
            log(f"note: sweep.exclude[{i}] in {cfg.source} matches no combination (a misspelt value?)")
    if reused:
        log(f"note: {reused} zero-shot prompt combinations differ only in train.seed, which zero-shot scoring does "
            "not use; each such run is done once and stands for every seed")


def plan_sweep(cfg: Config, name: str, shard: tuple[int, int] | None, log: Log) -> None:
    """Log the runs a sweep (or one shard of it) would do, with their estimated cost; run nothing."""
    runs, hits, reused = _expand(cfg)
    _note_rules(cfg, hits, reused, log)
    picked = [i for i in range(len(runs)) if shard is None or i % shard[1] == shard[0]]
    plan = estimate_runs([runs[i] for i in picked])
    log(f"sweep {name}: {len(runs)} runs" + ("" if shard is None else f", shard {shard[0]}/{shard[1]}: {len(picked)}")
        + f"; sweep folder {sweep_folder(cfg, name)}")
    log_plan(picked, plan, log)
