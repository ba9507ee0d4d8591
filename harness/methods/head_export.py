"""Save a trained `head` model so it can be reloaded for prediction, in the library's format when exact.

Two formats, both a folder with the tokenizer and `harness_head.json` (labels, pooling, family):
- "transformers": a plain AutoModelForSequenceClassification folder (id2label/label2id set). Written
  when the library class computes exactly what our model does: BERT-like encoders with `first`
  pooling through the trained pooler (`classifier` on the pooler output), and decoders with `last`
  pooling (GPT-2/Llama `score` on the last non-pad token; our pad token is never eos). The claim is
  checked numerically on a probe batch before it is written.
- "harness": the bare backbone (save_pretrained) plus `head.safetensors` (head and pooling weights),
  for what the library classes cannot express (mean pooling, `first` without the pooler, T5 encoders).
Low-rank adapters are merged into the backbone weights first, so neither format needs peft.
`load_head_model` reads either.
"""

from __future__ import annotations

import copy
import json
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
import transformers as tf
from safetensors.torch import load_file, save_file
from torch import nn
from transformers import AutoModelForSequenceClassification

from harness.errors import HarnessError
from harness.files import atomic_folder
from harness.methods.batches import collate_encoded, encode_texts, predict_batches
from harness.methods.pooling import ClassifierHead, HeadModel, build_pooling
from harness.models.quiet import quiet_library

__all__ = ["ExportedHead", "load_head_model", "save_head_model"]

INFO_FILE = "harness_head.json"
HEAD_FILE = "head.safetensors"
_PROBE = ["a short probe text", "a second and somewhat longer probe text for the check"]


def _plain_backbone(method: Any) -> Any:
    """The backbone without adapters: merged into a copy, so the live model keeps training state."""
    backbone = method.model.backbone
    if hasattr(backbone, "merge_and_unload"):
        return copy.deepcopy(backbone).merge_and_unload()
    return backbone


def _library_model(method: Any, backbone: Any) -> Any | None:
    """The library's sequence classifier holding our weights, or None when it cannot express our model."""
    model = method.model
    names = list(method.label_names)
    config: Any = copy.deepcopy(backbone.config)
    config.num_labels = len(names)
    config.id2label = dict(enumerate(names))
    config.label2id = {name: i for i, name in enumerate(names)}
    config.pad_token_id = method.tokenizer.pad_token_id
    pooler = getattr(model.pooling, "pooler", None)
    with torch.random.fork_rng(devices=[]), quiet_library(reports=True):  # building it initialises weights from the global stream
        try:
            lib = AutoModelForSequenceClassification.from_config(config, dtype=torch.float32)
        except (ValueError, KeyError):
            return None
    attr = "classifier" if hasattr(lib, "classifier") else "score"
    linear = getattr(lib, attr, None)
    if not isinstance(linear, nn.Linear) or (linear.bias is not None) != (model.head.linear.bias is not None):
        return None
    bert_like = (method.pooling_name == "first" and pooler is not None and attr == "classifier"
                 and getattr(lib.base_model, "pooler", None) is not None)
    gpt_like = method.pooling_name == "last" and method.family == "decoder" and attr == "score"
    if not (bert_like or gpt_like):
        return None
    state = dict(backbone.state_dict())
    if pooler is not None:
        state.update({f"pooler.{k}": v for k, v in pooler.state_dict().items()})
    result = lib.base_model.load_state_dict(state, strict=False)
    if result.missing_keys or result.unexpected_keys:
        return None
    with torch.no_grad():
        linear.load_state_dict(model.head.linear.state_dict())
    return lib if _same_logits(method, lib) else None


def _same_logits(method: Any, lib: nn.Module) -> bool:
    """Check on a probe batch that the library class reproduces our logits."""
    items = encode_texts(method.tokenizer, _PROBE, [0] * len(_PROBE), method.max_length, method.uses_type_ids)
    batch = collate_encoded(items, method.tokenizer.pad_token_id, method.uses_type_ids)
    batch.pop("labels")
    device = next(method.model.parameters()).device
    lib.to(device).eval()
    ours = predict_batches(method.model, [batch], method.logits)
    theirs = predict_batches(lib, [batch], lambda b: lib(**b).logits)
    return bool(np.allclose(ours, theirs, atol=1e-5))


def save_head_model(method: Any, folder: Path) -> str:
    """Write the model, tokenizer and harness_head.json into `folder` (replaced whole); returns the format."""
    backbone = _plain_backbone(method)
    lib = _library_model(method, backbone)
    info = {
        "format": "transformers" if lib is not None else "harness",
        "family": method.family, "pooling": method.pooling_name,
        "use_pooler": getattr(method.model.pooling, "pooler", None) is not None,
        "labels": list(method.label_names), "max_length": method.max_length,
        "head_bias": method.head_bias, "type_ids": method.uses_type_ids,
        "hidden_size": int(backbone.config.hidden_size),
    }
    with atomic_folder(folder) as tmp:  # the folder appears complete or not at all
        with quiet_library():
            if lib is not None:
                lib.save_pretrained(tmp)
            else:
                backbone.save_pretrained(tmp)
                state = {f"head.{k}": v for k, v in method.model.head.state_dict().items()}
                state.update({f"pooling.{k}": v for k, v in method.model.pooling.state_dict().items()})
                save_file({k: v.detach().contiguous().cpu() for k, v in state.items()}, str(tmp / HEAD_FILE))
            method.tokenizer.save_pretrained(tmp)
        (tmp / INFO_FILE).write_text(json.dumps(info, indent=2) + "\n", encoding="utf-8")
    return str(info["format"])


@dataclass
class ExportedHead:
    """A reloaded head model: `predict_proba(texts)` gives (n, num_labels) probabilities."""

    model: HeadModel
    tokenizer: Any
    label_names: tuple[str, ...]
    max_length: int
    type_ids: bool
    info: dict[str, Any]

    def predict_proba(self, texts: Sequence[Any], batch_size: int = 64) -> np.ndarray:
        items = encode_texts(self.tokenizer, texts, [0] * len(texts), self.max_length, self.type_ids)
        if not items:
            return np.zeros((0, len(self.label_names)))
        batches = (collate_encoded(items[i:i + batch_size], self.tokenizer.pad_token_id, self.type_ids)
                   for i in range(0, len(items), batch_size))
        return predict_batches(self.model, batches,
                               lambda b: self.model(b["input_ids"], b["attention_mask"], b.get("token_type_ids")))


def load_head_model(folder: Path) -> ExportedHead:
    """Reload what `save_head_model` wrote (either format), ready for prediction."""
    path = folder / INFO_FILE
    if not path.exists():
        raise HarnessError(f"{folder} holds no exported head model ({INFO_FILE} is missing)")
    info = json.loads(path.read_text(encoding="utf-8"))
    k = len(info["labels"])
    with quiet_library(reports=True):
        tokenizer = tf.AutoTokenizer.from_pretrained(str(folder), local_files_only=True)
        if info["format"] == "transformers":
            lib = tf.AutoModelForSequenceClassification.from_pretrained(str(folder), local_files_only=True,
                                                                        dtype=torch.float32)
            bare, linear = lib.base_model, getattr(lib, "classifier", None) or lib.score
        else:
            cls = tf.AutoModelForTextEncoding if info["family"] == "encoder-decoder" else tf.AutoModel
            bare = cls.from_pretrained(str(folder), local_files_only=True, dtype=torch.float32)
            linear = None
    pooler = getattr(bare, "pooler", None)
    if isinstance(pooler, nn.Module):
        bare.pooler = None
    pooling = build_pooling(info["pooling"], pooler=pooler if info["use_pooler"] else None)
    head = ClassifierHead(info["hidden_size"], k, dropout=0.0, seed=0, bias=info["head_bias"])
    if linear is not None:
        head.linear = linear
    else:
        state = load_file(str(folder / HEAD_FILE))
        head.load_state_dict({n[5:]: v for n, v in state.items() if n.startswith("head.")})
        pooling.load_state_dict({n[8:]: v for n, v in state.items() if n.startswith("pooling.")})
    model = HeadModel(bare, pooling, head, info["family"]).eval()
    return ExportedHead(model, tokenizer, tuple(info["labels"]), int(info["max_length"]), bool(info["type_ids"]), info)
