"""The training loop: one function, top to bottom (setup, epochs, evaluate, checkpoint, log).

It drives any method through the `harness.methods.registry.Method` protocol on an accelerate
`Accelerator` (the CPU when there is no GPU), so it holds no device names. Helpers with plain
names carry the optimiser, schedule, evaluation and log; the data order is `harness.train.batching`,
the checkpoints `harness.train.checkpoints`.
"""

from __future__ import annotations

import json
import math
import os
import random
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch

from harness.config import Config
from harness.files import atomic_write_text
from harness.methods.batches import batch_width
from harness.methods.registry import Encoded, Method
from harness.metrics.scores import METRICS, compute_metrics
from harness.train import processes  # the module: looked up at call time (tests count the rows scored)
from harness.train.batching import EpochBatches, PieceCollate
from harness.train.checkpoints import Checkpoints, Interrupted, TrainState, interrupt_guard
from harness.train.precision import uses_bf16
from harness.train.processes import any_process, average_gradients, is_main_process, local_process_count

__all__ = ["TrainResult", "backward_pieces", "evaluate", "make_accelerator", "make_loader", "make_optimizer",
           "make_scheduler", "max_pieces", "planned_steps", "release_large_blocks", "resolve_threads", "seed_everything", "set_threads", "train", "update_best"]


@dataclass(frozen=True)
class TrainResult:
    """What the runner records about training."""

    steps: int
    train_seconds: float
    examples_per_second: float
    best_step: int | None
    best_value: float | None
    best_metrics: dict[str, Any] | None
    stopped_early: bool
    dev_seconds: float = 0.0  # of train_seconds: dev evaluations and checkpoint writes


def seed_everything(seed: int) -> None:
    """Seed python, numpy and torch (dropout, adapters) from train.seed."""
    random.seed(seed)
    np.random.seed(seed % 2**32)
    torch.manual_seed(seed)


def resolve_threads(threads: int | None) -> int:
    """The torch thread count `set_threads` would set, without setting it (the forecast keys speeds on it)."""
    import psutil

    cores = psutil.cpu_count(logical=False) or torch.get_num_threads()
    if hasattr(os, "sched_getaffinity"):  # the share a scheduler gave this process (Slurm's cpuset, taskset)
        cores = min(cores, len(os.sched_getaffinity(0)))
    return threads or max(1, cores // local_process_count())  # processes launched together share the cores


def set_threads(threads: int | None) -> int:
    """torch intra-op threads: train.threads, else the physical cores this process may use (hyper-threads
    slow matmuls down)."""
    n = resolve_threads(threads)
    torch.set_num_threads(n)
    return n


def release_large_blocks(threshold: int = 4 * 2**20) -> bool:
    """Have glibc's malloc hand blocks of `threshold` bytes or more back to the system as soon as they are freed.

    Why: glibc raises its mmap threshold whenever a large block is freed, so after a few steps every
    activation comes from the heap, and batches of ever-changing widths leave it in pieces that
    count as resident memory. A fixed threshold keeps the large activations out of the heap (about
    -100 MB peak on MiniLM / SMS spam at the same speed, see scripts/benchmark.py; smaller thresholds
    cost page faults). False where the C library has no mallopt (not glibc, not Linux).
    """
    if not sys.platform.startswith("linux"):
        return False
    import ctypes

    try:
        mallopt = ctypes.CDLL(None).mallopt  # the C library this process already runs on
    except (OSError, AttributeError):
        return False
    m_mmap_threshold = -3  # M_MMAP_THRESHOLD in glibc's malloc.h
    return bool(mallopt(m_mmap_threshold, threshold))


def planned_steps(batches_per_epoch: int, cfg: Config) -> int:
    """Optimiser steps of the whole run: epochs (fractions allowed) of batches, capped by max_steps."""
    per_epoch = math.ceil(batches_per_epoch / cfg.train.grad_accum)  # a short last group still steps
    steps = max(1, math.ceil(cfg.train.epochs * per_epoch))
    return min(steps, cfg.train.max_steps) if cfg.train.max_steps else steps


def make_optimizer(method: Method, cfg: Config) -> torch.optim.Optimizer:
    """AdamW (fused where the device has the kernel); 1-D parameters get no weight decay; the head its own rate."""
    t = cfg.train
    groups: dict[tuple[bool, bool], list[torch.nn.Parameter]] = {}
    for name, p in method.trainable_parameters():
        is_head = name.startswith("head.")  # freshly initialised parameters (see harness.methods.pooling.HeadModel)
        groups.setdefault((is_head, p.ndim >= 2), []).append(p)
    param_groups = [
        {"params": ps, "weight_decay": t.weight_decay if decay else 0.0,
         "lr": (t.head_learning_rate or t.learning_rate) if is_head else t.learning_rate}
        for (is_head, decay), ps in sorted(groups.items())
    ]
    try:
        # One fused kernel for every parameter: the default per-tensor loop spent about as long on
        # MiniLM's 100 small tensors as the backward pass on the CPU (see scripts/benchmark.py, ablation).
        return torch.optim.AdamW(param_groups, lr=t.learning_rate, fused=True)
    except (RuntimeError, ValueError):  # a device or dtype without the fused kernel
        return torch.optim.AdamW(param_groups, lr=t.learning_rate)


def make_scheduler(optimizer: torch.optim.Optimizer, cfg: Config, total_steps: int) -> Any:
    """Linear warmup over `train.warmup` of the steps, then linear, cosine or constant."""
    from transformers import get_scheduler

    name = {"linear": "linear", "cosine": "cosine", "constant": "constant_with_warmup"}[cfg.train.schedule]
    warmup = round(cfg.train.warmup * total_steps)
    return get_scheduler(name, optimizer, num_warmup_steps=warmup, num_training_steps=total_steps)


def evaluate(method: Method, items: Sequence[Encoded], label_names: Sequence[str], cfg: Config) -> dict[str, Any]:
    """Dev metrics (no bootstrap), as compute_metrics gives them.

    Launched as several processes, each scores its own shard of the rows and all get every row back
    (harness.train.processes.predict_sharded), so the dev set is scored once in total and every
    process computes the same metrics (and takes the same early-stopping decision).
    """
    probs = processes.predict_sharded(lambda rows: method.predict_proba(rows, cfg.eval.batch_size), items)
    return compute_metrics([it.label for it in items], probs, label_names, positive=cfg.eval.positive, bootstrap=0)


def make_accelerator(cfg: Config) -> Any:
    """An Accelerator on the best available device, with bf16 autocast when train.bf16 resolves to on."""
    from accelerate import Accelerator
    from accelerate.state import AcceleratorState

    precision = "bf16" if uses_bf16(cfg.train) else "no"
    shared = AcceleratorState._shared_state
    if shared and shared.get("_mixed_precision") != precision:
        # accelerate keeps one process-wide state and refuses a new precision; a sweep in one process
        # may mix bf16 and fp32 runs, so start that state afresh.
        AcceleratorState._reset_state()
    return Accelerator(mixed_precision=precision, gradient_accumulation_steps=cfg.train.grad_accum)


def _improved(value: float | None, best: float | None, higher: bool) -> bool:
    if value is None:
        return best is None  # an undefined metric still gives the first evaluation a best checkpoint
    return best is None or (value > best if higher else value < best)


class _Log:
    """log.jsonl, rewritten atomically; a resumed run keeps the lines up to its checkpoint."""

    def __init__(self, path: Path, keep_until: int) -> None:
        self.path = path
        self.lines: list[str] = []
        self.window_start, self.window_examples = time.perf_counter(), 0  # for examples/s, never resumed
        if keep_until and path.exists():
            self.lines = [ln for ln in path.read_text(encoding="utf-8").splitlines()
                          if ln.strip() and json.loads(ln).get("step", 0) <= keep_until]

    def write(self, **record: Any) -> None:
        self.lines.append(json.dumps(record, ensure_ascii=False))
        if is_main_process():  # the others keep their lines in memory only
            atomic_write_text(self.path, "\n".join(self.lines) + "\n")

    def add_batch(self, state: TrainState, loss: torch.Tensor, examples: int) -> None:
        """Count a batch; its loss is summed on its device, without .item(): the host syncs only at log lines."""
        state.window_loss = loss.detach() if state.window_loss is None else state.window_loss + loss.detach()
        state.window_batches += 1
        self.window_examples += examples

    def loss_line(self, state: TrainState, lr: float) -> float:
        """Write the mean loss since the last line (one host sync) and start a new window; returns it."""
        now, mean = time.perf_counter(), float(state.window_loss) / max(state.window_batches, 1)  # type: ignore[arg-type]
        self.write(step=state.step, epoch=state.epoch, loss=mean, lr=lr,
                   examples_per_second=self.window_examples / max(now - self.window_start, 1e-9))
        state.window_loss, state.window_batches, self.window_start, self.window_examples = None, 0, now, 0
        return mean


def max_pieces(method: Method, cfg: Config) -> int:
    """train.pieces for methods that say how their mean loss is weighted (`loss_weight`), else 1 (whole batches)."""
    return cfg.train.pieces if callable(getattr(method, "loss_weight", None)) else 1


def make_loader(method: Method, items: Sequence[Encoded], cfg: Config) -> tuple[EpochBatches, Any]:
    """The batch sampler (epoch chosen by the loop) and a DataLoader whose batches are lists of padded
    pieces of similar length (`harness.train.batching.PieceCollate`; one piece with train.pieces: 1)."""
    from torch.utils.data import DataLoader

    t = cfg.train
    sampler = EpochBatches([len(it) for it in items], t.batch_size, mode=t.batching,
                           pool_batches=t.pool_batches, seed=t.seed, labels=[it.label for it in items])
    dataset: Any = list(items)  # a list is a map-style dataset
    # Its own generator: every new DataLoader iterator draws a seed, which must not come from the global
    # stream (dropout's), or a resumed run (one extra iterator) would drift from an uninterrupted one.
    pieces = PieceCollate(method.collate, max_pieces(method, cfg), width=lambda n: batch_width(n, t.max_length))
    loader = DataLoader(dataset, batch_sampler=sampler, collate_fn=pieces, generator=torch.Generator().manual_seed(t.seed))
    return sampler, loader


def backward_pieces(method: Method, pieces: Sequence[dict[str, torch.Tensor]],
                    backward: Callable[[torch.Tensor], None]) -> torch.Tensor:
    """Backward through a batch given as pieces; returns the batch's mean loss (detached when cut).

    Each piece's mean loss counts by its share of the batch's loss weight (`method.loss_weight`:
    rows, class weights or target tokens), so the summed gradient is the whole batch's, padded once.
    """
    if len(pieces) == 1:
        loss = method.loss(pieces[0])
        backward(loss)
        return loss
    weights = [method.loss_weight(piece) for piece in pieces]  # type: ignore[attr-defined]
    total = sum(weights)
    parts = []
    for piece, weight in zip(pieces, weights, strict=True):
        loss = method.loss(piece) * (weight / total)
        backward(loss)
        parts.append(loss.detach())
    return torch.stack(parts).sum()  # on the device: no host sync


def update_best(state: TrainState, metrics: dict[str, Any], cfg: Config) -> bool:
    """Record an evaluation in `state` (best so far, patience); True when it is the new best."""
    value = metrics["metrics"].get(cfg.eval.primary)
    better = _improved(value, state.best_value, METRICS[cfg.eval.primary].higher_is_better)
    if better:
        state.best_value, state.best_step, state.best_metrics, state.bad_evals = value, state.step, metrics["metrics"], 0
    else:
        state.bad_evals += 1
        state.stopped_early = cfg.train.patience is not None and state.bad_evals >= cfg.train.patience
    state.last_eval_step = state.step
    state.history.append({"step": state.step, cfg.eval.primary: value})
    return better


def train(method: Method, train_items: Sequence[Encoded], dev_items: Sequence[Encoded],
          label_names: Sequence[str], cfg: Config, folder: Path, *, resume: bool = False,
          on_step: Callable[[int], None] | None = None,
          optimizer_factory: Callable[[Method, Config], torch.optim.Optimizer] | None = None,
          threads: int | None = None) -> TrainResult:
    """Train `method.model` on train_items, evaluating on dev_items; leaves the best weights loaded.

    `folder` receives log.jsonl and checkpoints/. `on_step(step)` runs after every optimiser step
    (tests use it to interrupt). SIGINT saves a checkpoint and raises `Interrupted`.
    `optimizer_factory` replaces `make_optimizer` (the benchmark measures other optimisers through it).
    `threads` is used when `train.threads` is unset (as in `set_threads`, the physical cores otherwise).
    """
    from tqdm import tqdm

    t = cfg.train
    seed_everything(t.seed)
    set_threads(t.threads or threads)
    if os.environ.get("HARNESS_HEAP") != "default":  # the benchmark's ablation keeps glibc's adaptive threshold
        release_large_blocks()
    accelerator = make_accelerator(cfg)
    sampler, loader = make_loader(method, train_items, cfg)
    # N processes take every N-th batch (see harness.train.processes): ceil(batches / N) each per epoch
    total = planned_steps(math.ceil(len(sampler) / accelerator.num_processes), cfg)
    optimizer = (optimizer_factory or make_optimizer)(method, cfg)
    scheduler = make_scheduler(optimizer, cfg, total)
    # The scheduler stays unwrapped and steps once per optimiser step below: accelerate's wrapper
    # would step it once per process, for schedules built on the single-process step count.
    model, optimizer, loader = accelerator.prepare(method.model, optimizer, loader)
    ckpt = Checkpoints(folder / "checkpoints")
    state = ckpt.restore(model, optimizer, scheduler) if resume else TrainState()
    log = _Log(folder / "log.jsonl", keep_until=state.step if resume else 0)
    bar = tqdm(total=total, initial=state.step, disable=not sys.stderr.isatty(), desc="train", unit="step")
    started, seen, aside = time.perf_counter(), 0, [0.0]  # aside: seconds of dev evaluation and checkpoints

    def evaluate_and_checkpoint() -> None:
        began = time.perf_counter()
        metrics = evaluate(method, dev_items, label_names, cfg)
        if update_best(state, metrics, cfg):
            ckpt.save_best(model)
        log.write(step=state.step, epoch=state.epoch, dev=metrics["metrics"], best_step=state.best_step)
        ckpt.save(model, optimizer, scheduler, state)
        aside[0] += time.perf_counter() - began

    with interrupt_guard() as interrupted:
        while state.step < total and not state.stopped_early:
            sampler.use_epoch(state.epoch)
            batches = accelerator.skip_first_batches(loader, state.batch) if state.batch else loader
            model.train()
            for batch in batches:
                with accelerator.accumulate(model), accelerator.autocast():
                    loss = backward_pieces(method, batch, accelerator.backward)
                    if accelerator.sync_gradients:
                        average_gradients(model)  # over processes; a no-op for one
                    if t.max_grad_norm is not None and accelerator.sync_gradients:
                        accelerator.clip_grad_norm_(model.parameters(), t.max_grad_norm)
                    optimizer.step()
                    if accelerator.sync_gradients:
                        scheduler.step()
                    optimizer.zero_grad()
                rows = sum(len(piece["labels"]) for piece in batch)
                state.batch, seen = state.batch + 1, seen + rows
                log.add_batch(state, loss, rows)
                if not accelerator.sync_gradients:
                    continue
                state.step += 1
                bar.update(1)
                if state.step % t.log_every == 0:  # the only host sync of the loop
                    lr = scheduler.get_last_lr()[0]
                    bar.set_postfix(loss=f"{log.loss_line(state, lr):.4f}", lr=f"{lr:.2e}")
                if t.eval_every and state.step % t.eval_every == 0:
                    evaluate_and_checkpoint()
                elif t.checkpoint_every and state.step % t.checkpoint_every == 0:
                    ckpt.save(model, optimizer, scheduler, state)
                if on_step is not None:
                    on_step(state.step)
                if any_process(interrupted.is_set()):  # every process stops at the same step
                    ckpt.save(model, optimizer, scheduler, state)
                    bar.close()
                    raise Interrupted(f"interrupted at step {state.step}; checkpoint saved in {ckpt.last}; "
                                      "run it again with --resume to continue")
                if state.step >= total or state.stopped_early:
                    break
            else:  # the epoch ran to its end
                state.epoch, state.batch = state.epoch + 1, 0
                if not t.eval_every:
                    evaluate_and_checkpoint()
        if state.last_eval_step != state.step:  # stopped between evaluations (max_steps, fractional epoch)
            evaluate_and_checkpoint()
    bar.close()
    ckpt.load_best(model)
    seconds = time.perf_counter() - started
    return TrainResult(state.step, seconds, seen / max(seconds, 1e-9), state.best_step,
                       state.best_value, state.best_metrics, state.stopped_early, dev_seconds=aside[0])
