"""Several processes on one config (`accelerate launch`): who writes, who waits, how results meet.

A run launched as N processes trains one model: every process takes every N-th batch of the
epoch (so `train.batch_size` is per process and N processes step like one with
`train.grad_accum` x N), gradients are averaged over the processes after each accumulation
group, and the test split is scored in N disjoint shards that are gathered and put back in row
order, each row exactly once. Only the main process writes the run folder; the others wait at
barriers. With one process every function here is a no-op.

On a machine without an accelerator device, accelerate joins launched processes only when told
to use the CPU; `process_state` does that itself, so the processes talk over gloo.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import torch

__all__ = ["any_process", "average_gradients", "is_launched", "is_main_process", "local_process_count", "predict_sharded",
           "process_state", "wait_for_everyone"]


def is_launched() -> bool:
    """True in a process started by a distributed launcher (torchrun, accelerate launch, MPI)."""
    names = ("WORLD_SIZE", "PMI_SIZE", "OMPI_COMM_WORLD_SIZE", "MV2_COMM_WORLD_SIZE")
    return any(int(os.environ.get(name, "1") or 1) > 1 for name in names)


def process_state() -> Any:
    """accelerate's process-wide state (an `accelerate.PartialState`), created on first use.

    Launched processes on a machine without an accelerator device are joined on the CPU (gloo):
    accelerate would otherwise treat each as a lone process.
    """
    from accelerate import PartialState

    if PartialState._shared_state:  # already set up (by this function or by an Accelerator)
        return PartialState()
    # `accelerate launch --cpu` says so in ACCELERATE_USE_CPU, which only accelerate's Accelerator reads;
    # a state made here without it would take the GPU and the Accelerator would then refuse the CPU.
    wants_cpu = os.environ.get("ACCELERATE_USE_CPU", "").strip().lower() in ("1", "true", "yes")
    no_device = not (hasattr(torch, "accelerator") and torch.accelerator.is_available())
    return PartialState(cpu=wants_cpu or (is_launched() and no_device))


def is_main_process() -> bool:
    """True in the process that writes files (the only one when not launched)."""
    return bool(process_state().is_main_process)


def wait_for_everyone() -> None:
    """A barrier across processes."""
    process_state().wait_for_everyone()


def local_process_count() -> int:
    """Processes launched on this machine (they share its cores)."""
    return max(1, int(os.environ.get("LOCAL_WORLD_SIZE", "1") or 1))


def any_process(flag: bool) -> bool:
    """True on every process when `flag` is true on any (one all-reduce), so all stop at the same step."""
    state = process_state()
    if state.num_processes == 1:
        return flag
    from accelerate.utils import reduce

    value = torch.tensor([1.0 if flag else 0.0], device=state.device)
    return bool(reduce(value, reduction="sum").item() > 0)


def average_gradients(model: torch.nn.Module) -> None:
    """Replace every gradient by its mean over the processes.

    DDP averages gradients only when the forward pass runs through its wrapper; the methods call
    their own module (`method.model`), so the loop averages here, in one all-reduce of all
    gradients flattened. Averaging gradients that are already equal changes nothing, so this stays
    correct if a method ever does go through the wrapper. Every process must hold gradients for
    the same parameters (true: the same model and code on each).
    """
    state = process_state()
    if state.num_processes == 1:
        return
    from accelerate.utils import reduce

    grads = [p.grad for p in model.parameters() if p.grad is not None]
    if not grads:
        return
    flat = torch.cat([g.reshape(-1) for g in grads])  # (total parameters with a gradient,)
    flat = reduce(flat, reduction="mean")
    offset = 0
    for g in grads:
        n = g.numel()
        g.copy_(flat[offset:offset + n].view_as(g))
        offset += n


def predict_sharded(predict: Callable[[Sequence[Any]], np.ndarray], items: Sequence[Any]) -> np.ndarray:
    """`predict(items)` computed in disjoint shards, one per process, gathered in row order.

    Process i scores rows i, i + N, i + 2N...; the rows come back with their indices, so there is no
    padding and no row twice (checked: a row missing or repeated is a bug, not a user error).
    """
    state = process_state()
    if state.num_processes == 1 or not items:
        return predict(items)
    from accelerate.utils import gather_object

    mine = list(range(state.process_index, len(items), state.num_processes))
    probs = predict([items[i] for i in mine]) if mine else None
    rows = [(i, probs[k]) for k, i in enumerate(mine)] if probs is not None else []
    gathered = gather_object(rows)
    indices = sorted(i for i, _ in gathered)
    if indices != list(range(len(items))):
        raise AssertionError(f"sharded scoring returned rows {indices[:5]}... for {len(items)} items")  # internal
    by_index = dict(gathered)
    return np.stack([np.asarray(by_index[i]) for i in range(len(items))])  # (rows, labels)
