"""Sweeps: expand a config's grid into runs, run them one after another, resume, compare.

A sweep is a list of ordinary runs (each with its own deterministic id and folder), plus
`<output>/<task>/sweeps/<name>/sweep.json` listing them. Re-running a sweep skips finished runs
and resumes interrupted ones, so a killed sweep costs only the run it was in. Data files are
hashed when the sweep starts and checked before and after every run: a run that saw another
version of a file fails with a message naming it, so one sweep never mixes two versions.
"""

from __future__ import annotations

import itertools
import json
import re
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from harness.config import Config, config_from_dict, config_to_dict, load_config, set_dotted
from harness.data import file_sha256
from harness.errors import HarnessError
from harness.runs import atomic_write_json, read_json, read_status, run_folder, run_id, write_status

__all__ = ["data_files", "estimate_runs", "expand_sweep", "parse_shard", "run_sweep", "sweep_command", "sweep_folder"]

Log = Callable[[str], None]
_MISSING = object()


def _thaw(value: Any) -> Any:
    if isinstance(value, tuple):
        return [_thaw(v) for v in value]
    if isinstance(value, dict):
        return {k: _thaw(v) for k, v in value.items()}
    return value


def _lookup(data: dict[str, Any], key: str) -> Any:
    node: Any = data
    for part in key.split("."):
        if not isinstance(node, dict) or part not in node:
            return _MISSING  # e.g. method.lora.r on a run without adapters: the rule does not match
        node = node[part]
    return node


def _expand(cfg: Config) -> tuple[list[Config], list[int]]:
    """The runs, and how many combinations each exclude rule removed."""
    base = config_to_dict(cfg)
    base["sweep"] = {"grid": {}, "arms": [], "exclude": []}
    keys = list(cfg.sweep.grid)  # file order: dicts keep insertion order
    rules = [{k: _thaw(v) for k, v in rule.items()} for rule in cfg.sweep.exclude]
    hits = [0] * len(rules)
    runs: list[Config] = []
    seen: dict[str, int] = {}
    arms = [dict(arm) for arm in cfg.sweep.arms] or [{}]
    # arms outermost (each arm's runs together), then the grid in file order
    combos = [(arm, combo) for arm in arms for combo in itertools.product(*(cfg.sweep.grid[k] for k in keys))]
    for n, (arm, combo) in enumerate(combos):
        data = base
        for key, value in arm.items():
            data = set_dotted(data, key, _thaw(value), f"sweep.arms in {cfg.source}")
        for key, value in zip(keys, combo, strict=True):
            # a one-part key ('method') replaces the whole block; dotted keys set one field
            data = set_dotted(data, key, _thaw(value), f"sweep.grid.{key} in {cfg.source}")
        run = config_from_dict(data, source=cfg.source)
        resolved = config_to_dict(run)
        matched = [i for i, rule in enumerate(rules) if all(_lookup(resolved, k) == v for k, v in rule.items())]
        for i in matched:
            hits[i] += 1
        if matched:
            continue
        rid = run_id(run)
        if rid in seen:
            raise HarnessError(f"{cfg.source}: sweep combinations {seen[rid] + 1} and {n + 1} give the same run "
                               f"{rid}; remove the repeated value from sweep.grid")
        seen[rid] = n
        runs.append(run)
    return runs, hits


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
    base = Path(cfg.source).parent if Path(cfg.source).is_file() else Path.cwd()
    out: list[Path] = []
    for split in ("train", "dev", "test"):
        text = getattr(cfg.task, split)
        if text is None:
            continue
        if text.startswith("asset:"):
            from harness.assets import resolve_data

            out.append(Path(resolve_data(text[len("asset:"):])).resolve())
            continue
        path = Path(text)
        if not path.is_absolute() and not path.exists() and (base / path).exists():
            path = base / path
        out.append(path.resolve())
    return out


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


def _write_index(folder: Path, meta: dict[str, Any], runs: Sequence[Config]) -> list[dict[str, Any]]:
    records = [_record(i, cfg) for i, cfg in enumerate(runs)]
    atomic_write_json(folder / "sweep.json", {**meta, "updated": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                                              "runs": records})
    return records


def _run_one(cfg: Config, start: dict[str, str], tag: str, log: Log) -> str:
    """Run (or skip, or resume) one run of the sweep; return its final state."""
    from harness import runner  # looked up at call time so tests can replace execute_run
    from harness.checkpoints import Interrupted

    folder = run_folder(cfg)
    state = _state(folder)["state"]
    stale = _changed_in_run(folder, start) if state != "new" else None
    if state == "finished" and stale is None:
        log(f"{tag} done")
        return "finished"
    changed = _changed_now(cfg, start)
    if changed is not None:
        write_status(folder, "failed", error=changed)
        log(f"{tag} failed: {changed}")
        return "failed"
    if stale is not None:
        log(f"{tag} an earlier attempt read other data ({stale}); starting it again")
    resume = stale is None and (folder / "checkpoints" / "last.pt").is_file()  # what the runner resumes from
    log(f"{tag} {'resuming from its last checkpoint' if resume else 'running'}")
    try:
        runner.execute_run(cfg, resume=resume, overwrite=state != "new" and not resume, log=log)
    except Interrupted:
        raise  # Ctrl-C: the runner saved a checkpoint and marked the run; stop the whole sweep
    except Exception as exc:  # why: one broken run must not stop the rest; the error goes to status.json
        message = str(exc) if isinstance(exc, HarnessError) else f"{type(exc).__name__}: {exc}"
        if _state(folder)["state"] != "failed":
            write_status(folder, "failed", error=message)
        log(f"{tag} failed: {(message.splitlines() or [type(exc).__name__])[0]}")
        return "failed"
    changed = _changed_in_run(folder, start)
    if changed is not None:
        write_status(folder, "failed", error=changed)
        log(f"{tag} failed: {changed}")
        return "failed"
    return _state(folder)["state"]


def run_sweep(
    cfg: Config, name: str, *, shard: tuple[int, int] | None = None, compare: bool = True, log: Log = print
) -> dict[str, Any]:
    """Run every (shard's) run of the sweep; write sweep.json; compare the finished runs at the end."""
    runs, hits = _expand(cfg)
    folder = sweep_folder(cfg, name)
    picked = [i for i in range(len(runs)) if shard is None or i % shard[1] == shard[0]]
    start = _hash_data([runs[i] for i in picked])
    meta = {"sweep": name, "config": cfg.source, "grid": list(cfg.sweep.grid), "runs_total": len(runs),
            "shard": None if shard is None else f"{shard[0]}/{shard[1]}", "data_files": start}
    _note_rules(cfg, hits, log)
    log(f"sweep {name}: {len(runs)} runs" + ("" if shard is None else f", shard {meta['shard']}: {len(picked)}"))
    states: dict[int, str] = {}
    try:
        for n, i in enumerate(picked):
            tag = f"[{n + 1}/{len(picked)}] #{i} {run_id(runs[i])}:"
            states[i] = _run_one(runs[i], start, tag, log)
            _write_index(folder, meta, runs)
    finally:  # a kill mid-run still leaves an up-to-date index
        records = _write_index(folder, meta, runs)
    failed = [i for i in picked if states.get(i) != "finished"]
    summary: dict[str, Any] = {"folder": str(folder), "runs": records, "picked": picked, "failed": failed}
    log(f"sweep {name}: {len(picked) - len(failed)} finished, {len(failed)} failed; index in {folder / 'sweep.json'}")
    if compare and any(r["state"] == "finished" for r in records):
        from harness.compare import compare_runs

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


def _note_rules(cfg: Config, hits: list[int], log: Log) -> None:
    for i, count in enumerate(hits):
        if count == 0:
            log(f"note: sweep.exclude[{i}] in {cfg.source} matches no combination (a misspelt value?)")


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
    from harness.data import load_task

    rows_cache: dict[str, int] = {}
    out = []
    for cfg in runs:
        key = json.dumps([config_to_dict(cfg)["task"], cfg.train.seed], sort_keys=True)
        if key not in rows_cache:  # the same base folder as the runner's
            base = Path(cfg.source).parent if Path(cfg.source).is_file() else None
            rows_cache[key] = len(load_task(cfg.task, seed=cfg.train.seed, base=base).train)
        folder = run_folder(cfg)
        state = _state(folder)["state"]
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


def _dry_run(cfg: Config, name: str, shard: tuple[int, int] | None, log: Log) -> int:
    runs, hits = _expand(cfg)
    _note_rules(cfg, hits, log)
    picked = [i for i in range(len(runs)) if shard is None or i % shard[1] == shard[0]]
    plan = estimate_runs([runs[i] for i in picked])
    log(f"sweep {name}: {len(runs)} runs" + ("" if shard is None else f", shard {shard[0]}/{shard[1]}: {len(picked)}")
        + f"; sweep folder {sweep_folder(cfg, name)}")
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
    return 0


def sweep_command(
    config_path: Path, overrides: Sequence[str] = (), *, dry_run: bool = False, shard: str | None = None,
    compare: bool = True,
) -> int:
    """`harness sweep CONFIG`: exit 0 when every run (of the shard) finished, 1 when some failed."""
    parts = parse_shard(shard)
    cfg = load_config(config_path, overrides)
    if not cfg.sweep.grid:
        raise HarnessError(f"{config_path} has no sweep.grid; run a single config with 'harness run {config_path}'")
    name = Path(config_path).stem
    if dry_run:
        return _dry_run(cfg, name, parts, print)
    summary = run_sweep(cfg, name, shard=parts, compare=compare)
    return 1 if summary["failed"] else 0
