"""Resumable training checkpoints, the best model so far, and a clean stop on Ctrl-C.

`<run>/checkpoints/last.pt` holds everything a resumed run needs to continue bit for bit: the
trainable weights, optimizer and scheduler state, the python/numpy/torch random states, the
data-order position (epoch, batch within the epoch) and the training state (step, best so far,
evaluations without improvement). `<run>/checkpoints/best.safetensors` holds the trainable weights
of the best evaluation. Both are written to a temporary name and renamed, by the main process only
when several run together (see harness.train.processes). Every tensor and value
in last.pt loads with `torch.load(weights_only=True)`: no pickled code.
"""

from __future__ import annotations

import contextlib
import json
import random
import signal
import threading
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch
from safetensors.torch import load_file
from torch import nn
from torch.nn.parallel import DistributedDataParallel

from harness.errors import HarnessError
from harness.files import atomic_write_stream
from harness.train.processes import is_main_process, wait_for_everyone

__all__ = ["Checkpoints", "Interrupted", "TrainState", "interrupt_guard", "trainable_state", "write_safetensors"]


class Interrupted(HarnessError):
    """Training stopped on SIGINT after saving a checkpoint; the CLI exits with 130 (128 + SIGINT)."""

    exit_code = 130


@dataclass
class TrainState:
    """Where training is and how it has gone; saved with every checkpoint."""

    step: int = 0  # optimiser steps done
    epoch: int = 0  # current epoch (0-based)
    batch: int = 0  # batches of the current epoch consumed
    best_value: float | None = None
    best_step: int | None = None
    best_metrics: dict[str, Any] | None = None
    bad_evals: int = 0  # evaluations since the last improvement
    last_eval_step: int = -1
    stopped_early: bool = False
    history: list[dict[str, Any]] = field(default_factory=list)  # one record per evaluation
    window_loss: torch.Tensor | None = None  # summed batch losses since the last log line
    window_batches: int = 0


def _unwrapped(model: nn.Module) -> nn.Module:
    """The module inside a DDP wrapper (several processes), so names carry no 'module.' prefix."""
    return model.module if isinstance(model, DistributedDataParallel) else model


def trainable_state(model: nn.Module) -> dict[str, torch.Tensor]:
    """Parameters that train (the rest is rebuilt from the checkpoint on load), detached, on the CPU.

    On the CPU these share the parameters' memory (no copy: a decoder's would be 0.5 GB); they are written
    out before the next optimiser step changes them.
    """
    return {n: p.detach().cpu() for n, p in _unwrapped(model).named_parameters() if p.requires_grad}


# torch dtype -> the safetensors format's dtype name (its specification, github.com/huggingface/safetensors README)
_SAFETENSORS_DTYPES = {torch.float32: "F32", torch.float16: "F16", torch.bfloat16: "BF16", torch.float64: "F64",
                       torch.int64: "I64", torch.int32: "I32", torch.int16: "I16", torch.int8: "I8",
                       torch.uint8: "U8", torch.bool: "BOOL"}


def write_safetensors(fh: Any, tensors: dict[str, torch.Tensor]) -> None:
    """Write `tensors` to the binary file `fh` in the safetensors format, one tensor at a time.

    Why not `safetensors.torch.save`: it builds the whole file as bytes in memory (and `save_file` turns
    every tensor into bytes first). The layout follows the format's specification: an 8-byte
    little-endian header length, a JSON header of dtype, shape and [begin, end) byte offsets into the
    data that follows, padded with spaces to a multiple of 8 bytes, then the tensors' raw bytes.
    """
    header: dict[str, Any] = {}
    offset = 0
    parts = []
    for name, tensor in tensors.items():
        raw = tensor.detach().cpu().contiguous().reshape(-1).view(torch.uint8)  # little-endian on our CPUs
        header[name] = {"dtype": _SAFETENSORS_DTYPES[tensor.dtype], "shape": list(tensor.shape),
                        "data_offsets": [offset, offset + raw.numel()]}
        offset += raw.numel()
        parts.append(raw)
    text = json.dumps(header, separators=(",", ":")).encode("utf-8")
    text += b" " * (-len(text) % 8)
    fh.write(len(text).to_bytes(8, "little"))
    fh.write(text)
    for raw in parts:
        fh.write(memoryview(raw.numpy()))  # type: ignore[arg-type]  # (numpy arrays are buffers; the stubs lag)


def _load_trainable(model: nn.Module, state: dict[str, torch.Tensor], path: Path) -> None:
    model = _unwrapped(model)
    expected = {n for n, p in model.named_parameters() if p.requires_grad}
    if set(state) != expected:
        raise HarnessError(f"{path} does not match this model's trainable parameters; the config changed since "
                           "it was written: start over without resume")
    params = dict(model.named_parameters())
    with torch.no_grad():
        for name, value in state.items():
            params[name].copy_(value)


def _rng_states() -> dict[str, Any]:
    state: Any = np.random.get_state()  # the legacy tuple: (kind, keys, pos, has_gauss, gauss)
    kind, keys, pos, has_gauss, gauss = state
    version, internal, gauss_next = random.getstate()
    return {
        "python": [version, list(internal), gauss_next],
        "numpy": [kind, torch.from_numpy(keys.astype(np.int64)), pos, has_gauss, gauss],
        "torch": torch.get_rng_state(),
    }


def _set_rng_states(states: dict[str, Any]) -> None:
    version, internal, gauss_next = states["python"]
    random.setstate((version, tuple(internal), gauss_next))
    kind, keys, pos, has_gauss, gauss = states["numpy"]
    np.random.set_state((kind, keys.numpy().astype(np.uint32), pos, has_gauss, gauss))
    torch.set_rng_state(states["torch"])


class Checkpoints:
    """Reads and writes `<run>/checkpoints/`."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        self.last = folder / "last.pt"
        self.best = folder / "best.safetensors"

    def save(self, model: nn.Module, optimizer: Any, scheduler: Any, state: TrainState) -> None:
        """Write last.pt atomically (the main process only: the others hold the same state)."""
        if not is_main_process():
            return
        payload = {
            "model": trainable_state(model),
            "optimizer": optimizer.state_dict(),
            "scheduler": scheduler.state_dict(),
            "rng": _rng_states(),
            "state": asdict(state),
        }
        atomic_write_stream(self.last, lambda fh: torch.save(payload, fh))  # streamed: no copy in memory

    def restore(self, model: nn.Module, optimizer: Any, scheduler: Any) -> TrainState:
        """Load last.pt into model, optimizer, scheduler and the random streams; return the training state."""
        if not self.last.exists():
            raise HarnessError(f"cannot resume: {self.last} does not exist; run without resume to start over")
        try:
            payload = torch.load(self.last, map_location="cpu", weights_only=True)
        except Exception as exc:  # torch raises several types for a damaged or foreign file
            raise HarnessError(f"{self.last} cannot be read ({type(exc).__name__}); start over without resume") from None
        _load_trainable(model, payload["model"], self.last)
        optimizer.load_state_dict(payload["optimizer"])
        scheduler.load_state_dict(payload["scheduler"])
        _set_rng_states(payload["rng"])
        return TrainState(**payload["state"])

    def save_best(self, model: nn.Module) -> None:
        """Write best.safetensors atomically (the main process only)."""

        if not is_main_process():
            return
        atomic_write_stream(self.best, lambda fh: write_safetensors(fh, trainable_state(model)))

    def load_best(self, model: nn.Module) -> None:
        """Load best.safetensors into `model` (every process, once the main one has written it)."""

        wait_for_everyone()
        if not self.best.exists():
            raise HarnessError(f"{self.best} is missing: the run never evaluated; train for at least one step")
        _load_trainable(model, load_file(str(self.best)), self.best)


@contextlib.contextmanager
def interrupt_guard() -> Iterator[threading.Event]:
    """While active, SIGINT sets the yielded event instead of raising, so the loop can save and stop.

    A second Ctrl-C raises KeyboardInterrupt at once. Outside the main thread this is a plain event.
    """
    event = threading.Event()
    if threading.current_thread() is not threading.main_thread():
        yield event
        return

    def handler(signum: int, frame: Any) -> None:
        if event.is_set():
            raise KeyboardInterrupt
        event.set()

    previous = signal.signal(signal.SIGINT, handler)
    try:
        yield event
    finally:
        signal.signal(signal.SIGINT, previous)
