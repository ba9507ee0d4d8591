"""Keep only the first N transformer layers of a checkpoint, on disk or in memory.

A cut model is the full model's first N layers exactly: the embeddings and the layers kept are
untouched, later layers are dropped, and the config's layer count is updated. Heads and final
norms stay, so a cut model is a smaller model of the same kind, not a truncated forward pass.
"""

from __future__ import annotations

import json
import os
import re
import shutil
from pathlib import Path
from typing import Any

import torch
from safetensors.torch import load_file, save_file
from torch import nn
from transformers import AutoConfig

from harness.errors import HarnessError
from harness.files import atomic_folder

__all__ = ["cut_checkpoint", "cut_model_in_memory"]

# Layer stacks by attribute name: BERT-style `encoder.layer`, Llama-style `model.layers`,
# GPT-2 `transformer.h`, T5 `encoder.block` / `decoder.block`.
_STACK_NAMES = ("layer", "layers", "h", "block")
# The leftmost match is the stack index (T5 keys also hold `.layer.<sub-layer>.` further right).
_STACK_KEY = re.compile(r"(?:^|\.)(?:layer|layers|h|block)\.(\d+)\.")
_WEIGHT_GLOBS = ("*.safetensors", "*.safetensors.index.json", "pytorch_model*.bin", "pytorch_model*.bin.index.json")


def _layer_total(config: Any, where: object) -> int:
    # num_hidden_layers reaches n_layer (GPT-2) and num_layers (T5) through the config's attribute_map.
    total = getattr(config, "num_hidden_layers", None)
    if not isinstance(total, int):
        raise HarnessError(f"{where}: the config states no layer count (num_hidden_layers / n_layer / num_layers)")
    return total


def _check_n(n_layers: int, total: int, where: object) -> None:
    if isinstance(n_layers, bool) or not isinstance(n_layers, int) or not 1 <= n_layers <= total:
        raise HarnessError(f"{where}: model.layers must be a whole number from 1 to {total}, got {n_layers!r}")


def _update_config(config: Any, n_layers: int) -> None:
    config.num_hidden_layers = min(n_layers, config.num_hidden_layers)
    if isinstance(getattr(config, "num_decoder_layers", None), int):  # T5 counts its decoder apart
        config.num_decoder_layers = min(n_layers, config.num_decoder_layers)
    layer_types = getattr(config, "layer_types", None)
    if isinstance(layer_types, list | tuple) and len(layer_types) > n_layers:  # per-layer attention kinds
        config.layer_types = list(layer_types[:n_layers])


def _read_weights(src: Path) -> dict[str, Any]:
    if (src / "model.safetensors").is_file():
        return load_file(src / "model.safetensors")
    index = src / "model.safetensors.index.json"
    if index.is_file():
        shards = sorted(set(json.loads(index.read_text(encoding="utf-8"))["weight_map"].values()))
        tensors: dict[str, Any] = {}
        for shard in shards:
            tensors.update(load_file(src / shard))
        return tensors
    if (src / "pytorch_model.bin").is_file():
        state = torch.load(src / "pytorch_model.bin", map_location="cpu", weights_only=True)
        # tied weights share storage in a .bin; safetensors wants each tensor on its own
        return {k: v.clone().contiguous() for k, v in state.items()}
    raise HarnessError(f"{src}: no model.safetensors, model.safetensors.index.json or pytorch_model.bin to cut")


def _cut_record(src: Path, n_layers: int) -> dict[str, Any]:
    weights = sorted(p.name for g in _WEIGHT_GLOBS for p in src.glob(g))
    stamp = {name: [(src / name).stat().st_size, (src / name).stat().st_mtime_ns] for name in weights}
    return {"cut_from": str(src.resolve()), "n_layers": n_layers, "weights": stamp}


def cut_checkpoint(src: Path | str, n_layers: int, out: Path | str) -> Path:
    """Write `out`: a copy of the checkpoint folder `src` keeping only its first `n_layers` layers.

    (An asset name is resolved to its folder first, by `harness.models.assets.resolve_checkpoint`.) An existing `out` holding the same cut is
    reused, an older cut made here is replaced, and any other non-empty `out` is an error.
    """
    src_path = Path(src)
    if not (src_path / "config.json").is_file():
        raise HarnessError(f"{src_path}: not a checkpoint folder (no config.json)")
    out = Path(out)
    record = _cut_record(src_path, n_layers)
    if out.exists() and any(out.iterdir()):
        try:
            previous = json.loads((out / "asset.json").read_text(encoding="utf-8"))
        except (OSError, ValueError):
            previous = {}
        if previous == record:
            return out
        if "cut_from" not in previous:  # only ever replace a folder this function wrote
            raise HarnessError(f"{out} already exists and is not a cut made by tiltyard; "
                               f"remove it or choose another folder")
    os.environ["HF_HUB_OFFLINE"] = "1"
    config = AutoConfig.from_pretrained(src_path)
    total = _layer_total(config, src_path / "config.json")
    _check_n(n_layers, total, src_path)
    tensors = _read_weights(src_path)
    kept = {}
    for key, tensor in tensors.items():
        match = _STACK_KEY.search(key)
        if match is None or int(match.group(1)) < n_layers:
            kept[key] = tensor
    if n_layers < total and len(kept) == len(tensors):
        raise HarnessError(f"{src_path}: no per-layer weights (names like encoder.layer.N. or model.layers.N.) "
                           f"to drop; this architecture cannot be cut")
    _update_config(config, n_layers)

    # `out` is empty or an older cut of ours (other source or layer count), checked above
    with atomic_folder(out) as tmp:
        # tokenizer files, generation config and the rest travel unchanged
        shutil.copytree(src_path, tmp, dirs_exist_ok=True,
                        ignore=shutil.ignore_patterns(*_WEIGHT_GLOBS, "config.json", "asset.json", "*.gguf"))
        config.save_pretrained(tmp)
        save_file(kept, tmp / "model.safetensors", metadata={"format": "pt"})
        (tmp / "asset.json").write_text(json.dumps(record, indent=2) + "\n", encoding="utf-8")
    return out


def _layer_stacks(model: Any) -> list[tuple[str, Any]]:
    """(dotted name, ModuleList) of each top-level layer stack, outermost first."""
    stacks: list[tuple[str, Any]] = []
    for name, module in model.named_modules():
        if not isinstance(module, nn.ModuleList) or name.rsplit(".", 1)[-1] not in _STACK_NAMES:
            continue
        if any(name.startswith(outer + ".") for outer, _ in stacks):
            continue  # a stack inside a layer (T5 blocks keep their sub-layers in `.layer`)
        stacks.append((name, module))
    return stacks


def cut_model_in_memory(model: Any, n_layers: int) -> Any:
    """Keep the first `n_layers` layers of a loaded PreTrainedModel, in place; returns the model."""
    total = _layer_total(model.config, type(model).__name__)
    _check_n(n_layers, total, type(model).__name__)
    stacks = _layer_stacks(model)
    if not stacks:
        raise HarnessError(f"cannot find the layer stack of {type(model).__name__} "
                           f"(looked for ModuleLists named {', '.join(_STACK_NAMES)})")
    for name, stack in stacks:
        parent_name, _, attr = name.rpartition(".")
        parent = model.get_submodule(parent_name) if parent_name else model
        setattr(parent, attr, nn.ModuleList(list(stack)[:n_layers]))
    # Submodules may hold their own config copies (T5 stacks do); update each once.
    configs = {id(m.config): m.config for m in model.modules() if hasattr(getattr(m, "config", None), "to_dict")}
    for config in configs.values():
        _update_config(config, n_layers)
    return model
