"""An int8 copy of a model for CPU serving: PyTorch dynamic quantisation of its linear layers.

`int8_copy` deep-copies modules, merges LoRA adapters into their base layers, turns GPT-2-style
`Conv1D` layers (a linear layer with its weight stored transposed) into `nn.Linear`, and replaces
every `nn.Linear` by torch's dynamically quantised one (`torch.ao.quantization.quantize_dynamic`,
dtype `torch.qint8`): weights stored as int8 with one scale per output channel, activations
quantised on the fly per batch, int8 matrix products on the CPU. Embeddings, norms and attention's
own matrix products stay float.

Weights per output channel (`per_channel_dynamic_qconfig`) rather than torch's default one scale per
tensor: measured on the packaged MiniLM (head) and SmolLM2 (prompt), the per-channel copy agreed with
the float model on more test rows at the same speed (DEVELOPERS.md, "int8 export").

torch 2.13 still ships `quantize_dynamic` and it works on this CPU, but marks `torch.ao.quantization`
deprecated in favour of the separate torchao package's `quantize_` API (the warning text points to
pytorch/ao issue 2259). torchao is not among the pinned dependencies, so the copy uses the torch API
and silences its deprecation notices here, where they would otherwise be raised on every run.
"""

from __future__ import annotations

import copy
import warnings
from collections.abc import Iterator, Mapping
from typing import Any

import torch
from peft.tuners.tuners_utils import BaseTunerLayer
from torch import nn
from torch.ao.nn.quantized.dynamic import Linear as QuantizedLinear
from torch.ao.quantization import per_channel_dynamic_qconfig, quantize_dynamic
from transformers.pytorch_utils import Conv1D

from harness.errors import HarnessError
from harness.train.precision import drop_autocast

__all__ = ["QuantizedLinear", "int8_copy", "linear_weights", "quantized_engines", "state_bytes"]


def quantized_engines() -> list[str]:
    """The quantised CPU kernel libraries this torch build has ('none' does not count)."""
    return [e for e in torch.backends.quantized.supported_engines if e != "none"]


def _linear_like(root: nn.Module) -> Iterator[nn.Module]:
    for module in root.modules():
        if isinstance(module, (nn.Linear, Conv1D)):
            yield module


def linear_weights(modules: Mapping[str, nn.Module]) -> tuple[int, int]:
    """(weights in nn.Linear / Conv1D layers, all weights) of `modules`, each parameter counted once."""
    seen: set[int] = set()
    linear = total = 0
    for root in modules.values():
        for module in _linear_like(root):
            linear += sum(p.numel() for p in module.parameters(recurse=False) if id(p) not in seen)
            seen.update(id(p) for p in module.parameters(recurse=False))
    seen_all: set[int] = set()
    for root in modules.values():
        for p in root.parameters():
            if id(p) not in seen_all:
                seen_all.add(id(p))
                total += p.numel()
    return linear, total


def _unwrap(module: nn.Module) -> int:
    """Merge LoRA adapters into their base layers and put the base layers in their place; returns how many."""
    merged = 0
    for name, child in list(module.named_children()):
        if isinstance(child, BaseTunerLayer):  # a LoRA layer: merged, then its base layer takes its place
            child.merge()
            setattr(module, name, child.get_base_layer())
            merged += 1
        else:
            merged += _unwrap(child)
    return merged


def _as_linear(conv: Conv1D) -> nn.Linear:
    """The nn.Linear computing what a Conv1D does: Conv1D keeps weight as (in, out), Linear as (out, in)."""
    linear = nn.Linear(conv.nx, conv.nf)
    with torch.no_grad():
        linear.weight.copy_(conv.weight.t())
        linear.bias.copy_(conv.bias)
    return linear


def _convert_conv1d(module: nn.Module) -> int:
    converted = 0
    for name, child in list(module.named_children()):
        if isinstance(child, Conv1D):
            setattr(module, name, _as_linear(child))
            converted += 1
        else:
            converted += _convert_conv1d(child)
    return converted


def _roots(modules: dict[str, nn.Module]) -> dict[str, nn.Module]:
    """The modules that are not part of another one (each object once): what to quantise and measure."""
    unique: dict[int, tuple[str, nn.Module]] = {}
    for name, module in modules.items():
        unique.setdefault(id(module), (name, module))
    return {name: m for name, m in unique.values()
            if not any(m is not other and any(m is sub for sub in other.modules()) for _, other in unique.values())}


class _Counter:
    """A write-only file that counts bytes: torch.save's size without holding a second copy in memory."""

    def __init__(self) -> None:
        self.size = 0

    def write(self, data: bytes) -> int:
        self.size += len(data)
        return len(data)

    def flush(self) -> None:
        pass


def state_bytes(module: nn.Module) -> int:
    """Bytes torch's own serialisation of `module.state_dict()` takes, counted as it is written (nothing kept)."""
    buffer = _Counter()  # an in-memory byte counter, not a file
    state = module.state_dict()
    torch.save(state, buffer)  # type: ignore[arg-type]
    return buffer.size


def int8_copy(modules: Mapping[str, nn.Module]) -> tuple[dict[str, nn.Module], dict[str, Any]]:
    """Quantised copies of `modules` (the originals are untouched) and facts about the copy.

    The modules are copied together, so one that is part of another (next_token's `lm` inside a LoRA
    wrapper) stays part of it. Facts: quantized_layers, converted_conv1d, merged_adapters,
    bf16_autocast_removed (the float model scored under train.bf16's autocast, the copy in float32),
    quantized_weight_share (weights in quantised layers / all weights), float_state_bytes (the merged
    float copy) and state_bytes (the int8 copy), both as torch.save writes them.
    """
    engines = quantized_engines()
    if not engines:
        raise HarnessError("this torch build has no quantised CPU engine (torch.backends.quantized."
                           "supported_engines is empty); int8 cannot run here")
    copied: dict[str, nn.Module] = copy.deepcopy(dict(modules))
    merged = sum(_unwrap(m) for m in copied.values())
    autocast = sum(drop_autocast(m) for m in copied.values())
    converted = sum(_convert_conv1d(m) for m in copied.values())
    linear, total = linear_weights(copied)
    if linear == 0:
        raise HarnessError("the model has no nn.Linear or Conv1D layer: dynamic int8 quantisation would change nothing")
    roots = _roots(copied)
    weighted = [name for name, m in roots.items() if any(True for _ in m.parameters())]  # not e.g. a loss module
    float_bytes = sum(state_bytes(roots[name]) for name in weighted)
    with warnings.catch_warnings():
        # the deprecation notices of torch.ao.quantization (see the module docstring)
        warnings.filterwarnings("ignore", category=DeprecationWarning, message=r".*torch\.ao\.quantization")
        warnings.filterwarnings("ignore", category=UserWarning, message=r".*quantize_per_(tensor|channel)")
        for name, module in roots.items():
            copied[name] = quantize_dynamic(module, {nn.Linear: per_channel_dynamic_qconfig}, dtype=torch.qint8,
                                            inplace=True)
    layers = sum(isinstance(m, QuantizedLinear) for name in roots for m in copied[name].modules())
    facts = {"scheme": "torch dynamic quantisation, int8 weights per output channel, activations per batch",
             "engine": torch.backends.quantized.engine, "quantized_layers": layers, "converted_conv1d": converted,
             "merged_adapters": merged, "bf16_autocast_removed": autocast > 0, "quantized_weight_share": linear / total if total else 0.0,
             "float_state_bytes": float_bytes,
             "state_bytes": sum(state_bytes(copied[name]) for name in weighted)}
    return copied, facts
