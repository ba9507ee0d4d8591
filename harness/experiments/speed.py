"""This machine's speed for a family of runs: measured once by a few steps of a real run, cached per machine.

A family is what changes the speed: the checkpoint (with its layer cut and attention dropout), the
method kind, what trains (freeze, adapters), bf16 and the batch sizes. The cache file is named by
the machine's fingerprint (CPU model, cores, torch version, torch threads), so another machine, or
the same one with another thread count, measures again: `<cache>/speed/<fingerprint>.json`.

The measurement runs the family's first run for real (`execute_run`) in a temporary folder, made
small: every split cut to a few batches (`task.max_rows`), STEPS optimiser steps on batches of the
run's own size and data, one dev evaluation at the end. From it:

- `train_rate`: seconds per padded training FLOP (6 N per token), the median over the optimiser steps
  after the first (which warms up), each timed as it ends (execute_run's `on_step`);
- `first_step`: setting training up and the first step's extra time, once per run;
- `per_eval`: an evaluation's cost beyond its dev scoring (the checkpoint files it writes);
- `score_rate`: seconds per padded scoring FLOP (2 N per token), from the final test scoring
  (`cost.eval_seconds` in metrics.json);
- `overhead`: the rest of the run's wall time: loading the checkpoint, the audit, the files, the
  model export, the report.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import logging
import os
import platform
import statistics
import tempfile
import time
from collections.abc import Callable, Iterator
from dataclasses import asdict, dataclass, fields, replace
from pathlib import Path
from typing import Any

import psutil
import torch

from harness.config import Config, config_folder, config_to_dict
from harness.data.task import load_task
from harness.errors import HarnessError
from harness.experiments.work import TRAIN_FLOPS_PER_TOKEN, RunWork, count_work, encode_run
from harness.files import atomic_write_json, cache_dir, read_json
from harness.methods.registry import Method
from harness.runs import run as runner  # the module: execute_run looked up at call time
from harness.runs.serving import LATENCY_BUDGET, LATENCY_ROWS, WARMUP_ROWS
from harness.train.loop import resolve_threads
from harness.train.precision import uses_bf16

__all__ = ["STEPS", "Speed", "SpeedCache", "cpu_seconds", "family_key", "family_name", "machine_fingerprint",
           "measure_speed", "others_share", "speed_dir"]

STEPS = 4  # optimiser steps of a measurement: the first warms up, the other three are timed
PROMPT_ROWS = 16  # rows scored when measuring a method that does not train
_FORMAT = 1

Log = Callable[[str], None]


@dataclass(frozen=True)
class Speed:
    """One family's measured speed on this machine (see the module docstring)."""

    score_rate: float  # seconds per padded scoring FLOP
    overhead: float  # seconds per run outside training and the final scoring
    measured: str  # when, ISO 8601
    seconds: float  # how long the measurement took
    train_rate: float = 0.0  # seconds per padded training FLOP (0: the method does not train)
    first_step: float = 0.0  # seconds, once per run that trains
    per_eval: float = 0.0  # seconds per dev evaluation beyond its scoring
    others: float | None = None  # the share of this machine's CPU time other processes used meanwhile
    row_latency: float = 0.0  # seconds to score one row alone (the small run's serving p50)

    def serving_seconds(self) -> float:
        """The single-row timing a run scored on test does for its serving cost (harness.runs.serving)."""
        return min(LATENCY_BUDGET, (WARMUP_ROWS + LATENCY_ROWS) * self.row_latency)

    @property
    def date(self) -> str:
        return self.measured[:10]

    def train_seconds(self, work: RunWork) -> float:
        """Forecast training time: setup, the steps, and every dev evaluation (its scoring and checkpoint)."""
        if not work.train.step_tokens:
            return 0.0
        return (self.first_step + self.train_rate * work.train_flops(padded=True)
                + self.per_eval * work.train.evaluations + self.score_rate * work.dev_flops(padded=True))

    def score_seconds(self, work: RunWork) -> float:
        return self.score_rate * work.test_flops(padded=True)


def speed_dir() -> Path:
    """`<cache>/speed` (the cache folder is $HARNESS_CACHE, else ~/.cache/harness)."""
    return cache_dir() / "speed"


def _cpu_model() -> str:
    cpuinfo = Path("/proc/cpuinfo")
    if cpuinfo.exists():
        for line in cpuinfo.read_text(encoding="utf-8", errors="replace").splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    return platform.processor() or platform.machine()


def machine_fingerprint(threads: int) -> dict[str, Any]:
    """What makes this machine's speed its own: CPU model, cores (those this process may use), torch, threads."""
    usable = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    return {"cpu_model": _cpu_model(), "cores": os.cpu_count(), "usable_cores": usable,
            "torch": torch.__version__, "threads": threads}


def _trains_in_bf16(cfg: Config) -> bool:
    """train.bf16 as resolved here, for a method that trains (prompt scoring never runs under autocast)."""
    return cfg.method.kind != "prompt" and uses_bf16(cfg.train)


def family_key(cfg: Config) -> str:
    """The settings that change a run's speed, as one string (the cache key within a machine's file)."""
    m, t = cfg.method, cfg.train
    data = {"model": config_to_dict(cfg)["model"], "kind": m.kind, "freeze": m.freeze,
            "lora": None if m.lora is None else config_to_dict(cfg)["method"]["lora"],
            "bf16": _trains_in_bf16(cfg), "batch_size": t.batch_size, "grad_accum": t.grad_accum, "eval_batch_size": cfg.eval.batch_size}
    return json.dumps(data, sort_keys=True)


def family_name(cfg: Config) -> str:
    """A family in words for the log: 'asset:minilm-l6 head, bf16, batch 16'."""
    parts = [f"{cfg.model.checkpoint} {cfg.method.kind}"]
    if cfg.model.layers is not None:
        parts.append(f"{cfg.model.layers} layers")
    if cfg.method.lora is not None:
        parts.append(f"LoRA r={cfg.method.lora.r}")
    elif cfg.method.freeze != "none":
        parts.append(f"{cfg.method.freeze} frozen")
    if _trains_in_bf16(cfg):
        parts.append("bf16")
    parts.append(f"batch {cfg.train.batch_size}")
    return ", ".join(parts)


class SpeedCache:
    """The speeds measured on this machine with `threads` torch threads, read from and written to its file."""

    def __init__(self, threads: int, *, folder: Path | None = None, log: Log) -> None:
        self.machine = machine_fingerprint(threads)
        digest = hashlib.sha256(json.dumps(self.machine, sort_keys=True).encode("utf-8")).hexdigest()[:16]
        self.path = (folder or speed_dir()) / f"{digest}.json"
        self.speeds = self._read(log)

    def _read(self, log: Log | None) -> dict[str, Speed]:
        if not self.path.exists():
            return {}
        try:
            data = read_json(self.path)
            if data.get("format") != _FORMAT or data.get("machine") != self.machine:
                return {}  # an older layout, or another machine's file under a colliding name: measure again
            known = {f.name for f in fields(Speed)}
            return {key: Speed(**{k: v for k, v in value.items() if k in known})
                    for key, value in data["families"].items()}
        except (HarnessError, AttributeError, KeyError, TypeError) as exc:
            if log is not None:
                why = str(exc) if isinstance(exc, HarnessError) else f"unexpected content ({type(exc).__name__})"
                log(f"speed cache {self.path} cannot be used ({why}); measuring again")
            return {}

    def get(self, key: str) -> Speed | None:
        return self.speeds.get(key)

    def put(self, key: str, speed: Speed) -> None:
        """Add one family's speed; the file is read again first, so another process's new entries are kept."""
        self.speeds = {**self._read(None), **self.speeds, key: speed}
        atomic_write_json(self.path, {"format": _FORMAT, "machine": self.machine,
                                      "families": {k: asdict(v) for k, v in sorted(self.speeds.items())}})


def _small(cfg: Config, output: Path) -> Config:
    """The run made small for a measurement: a few batches of rows, STEPS steps, one evaluation at the end."""
    t = cfg.train
    rows = PROMPT_ROWS if cfg.method.kind == "prompt" else STEPS * t.batch_size * t.grad_accum
    if cfg.task.max_rows is not None:
        rows = min(rows, cfg.task.max_rows)
    # eval_every far beyond the steps: no evaluation at epoch ends, only the one after the last step
    train = replace(t, epochs=float(STEPS), max_steps=STEPS, eval_every=10**9, patience=None, checkpoint_every=0)
    # scored on test, whatever the run scores: a tuning trial's family must learn the single-row (serving) speed too
    return replace(cfg, task=replace(cfg.task, max_rows=rows), train=train, output=str(output),
                   eval=replace(cfg.eval, score_on="test"))


@contextlib.contextmanager
def _quiet() -> Iterator[None]:
    """The measurement's own warnings (data findings on its cut splits) are not the sweep's: hold them back."""
    logger = logging.getLogger("harness")
    level = logger.level
    logger.setLevel(logging.ERROR)
    try:
        yield
    finally:
        logger.setLevel(level)


def cpu_seconds() -> tuple[float, float]:
    """(CPU seconds the whole machine has been busy, CPU seconds of this process) so far."""
    machine, own = psutil.cpu_times(), psutil.Process().cpu_times()
    busy = machine.user + machine.nice + machine.system + getattr(machine, "irq", 0.0) + getattr(machine, "softirq", 0.0)
    return busy, own.user + own.system


def others_share(before: tuple[float, float], after: tuple[float, float], wall: float) -> float | None:
    """The share of all cores' time over `wall` seconds that other processes kept busy (0 on an idle machine)."""
    cores = psutil.cpu_count() or 1
    if wall <= 0:
        return None
    others = (after[0] - before[0]) - (after[1] - before[1])
    return min(1.0, max(0.0, others / (wall * cores)))


def measure_speed(cfg: Config) -> Speed:
    """Run `cfg` small (see `_small`) in a temporary folder and derive its family's speed from the timings."""
    stamps: list[float] = []
    held: dict[str, Any] = {}

    def prepare(method: Method) -> None:
        held["method"], held["at"] = method, time.perf_counter()

    threads = resolve_threads(cfg.train.threads)
    busy_before = cpu_seconds()
    started = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="tiltyard-speed-") as tmp, _quiet():
        small = _small(cfg, Path(tmp))
        folder = runner.execute_run(small, log=lambda _: None, shown_findings=set(), prepare=prepare,
                                    on_step=lambda step: stamps.append(time.perf_counter()), threads=threads)
        wall = time.perf_counter() - started
        busy_after = cpu_seconds()
        cost = read_json(folder / "metrics.json")["cost"]
        method: Method = held["method"]
        data = load_task(small.task, seed=small.train.seed, base=config_folder(small))
        work = count_work(small, method, *encode_run(method, data, small))  # token cache hits: no new tokenising
    score_rate = float(cost["eval_seconds"]) / max(work.test_flops(padded=True), 1.0)
    train_seconds = float(cost["train_seconds"])
    serving = cost.get("serving") or {}
    latency = (serving.get("latency_p50_ms") or 0.0) / 1000.0
    timed_rows = (WARMUP_ROWS + int(serving.get("latency_rows") or 0)) * latency  # the small run's own serving
    speed = Speed(score_rate=score_rate, row_latency=latency,
                  overhead=max(0.0, wall - train_seconds - float(cost["eval_seconds"]) - timed_rows),
                  measured=time.strftime("%Y-%m-%dT%H:%M:%S%z"), seconds=time.perf_counter() - started,
                  others=others_share(busy_before, busy_after, wall))
    if not method.trains or not stamps:
        return speed
    timed = work.train.step_tokens[1:len(stamps)] if len(stamps) > 1 else work.train.step_tokens[:1]
    spans = [b - a for a, b in zip(stamps, stamps[1:], strict=False)] or [stamps[0] - held["at"]]
    # The median step: one step slowed by another process on a shared machine does not set the rate.
    per_flop = statistics.median([s / max(TRAIN_FLOPS_PER_TOKEN * work.params * n, 1.0)
                                  for s, n in zip(spans, timed, strict=True)])
    step = statistics.median(spans)
    # The evaluation after the last step, with its checkpoint writes, ends training. Training is taken to start
    # at the prepare hook: the files written before the loop's clock starts count as setup (first_step), once.
    evaluation = train_seconds - (stamps[-1] - held["at"])
    dev = score_rate * work.dev_flops(padded=True) / max(work.train.evaluations, 1)
    return replace(speed, train_rate=per_flop, first_step=max(0.0, stamps[0] - held["at"] - step),
                   per_eval=max(0.0, evaluation - dev))
