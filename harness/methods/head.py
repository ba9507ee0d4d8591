"""The `head` method: a bare backbone, a pooling module and a fresh seeded classification head.

Everything the training loop needs (encode, collate, loss, predict_proba) is here; the modules
themselves are in `harness.methods.pooling` and the export format in `harness.methods.head_export`.

Every head is `Linear(hidden, num_labels)` with a bias, D*K + K parameters, for every family (common
practice for a fresh classifier). The library's decoder classes (GPT-2's and Llama's `score`) have
no bias, so a decoder head is exported in our own format (see `harness.methods.head_export`), not theirs.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn

from harness.config import Config
from harness.data.task import TaskData
from harness.errors import SettingError
from harness.methods.adapters import add_lora
from harness.methods.batches import (
    PAD_MULTIPLE,
    collate_encoded,
    count_parameters,
    encode_texts,
    predict_batches,
)
from harness.methods.head_export import save_head_model
from harness.methods.pooling import ClassifierHead, HeadModel, build_pooling, resolve_pooling
from harness.methods.registry import Encoded, register_method
from harness.models.backbones import Backbone, clamp_max_length, load_backbone

__all__ = ["HeadMethod", "class_weights"]

_EMBEDDING_PARTS = {"embeddings", "wte", "wpe", "embed_tokens", "embed_positions", "shared"}
def class_weights(spec: str | dict[str, float] | None, train_labels: Sequence[int],
                  label_names: Sequence[str]) -> torch.Tensor | None:
    """Cross-entropy class weights: None, `balanced` (n / (K * count_k)) or explicit {label: weight} (others 1)."""
    if spec is None:
        return None
    k = len(label_names)
    if spec == "balanced":
        counts = Counter(train_labels)
        missing = [label_names[i] for i in range(k) if counts.get(i, 0) == 0]
        if missing:
            raise SettingError("method.class_weights", f"balanced: label {missing[0]!r} has no training rows, "
                               "so its weight would be infinite; give explicit weights")
        n = len(train_labels)
        return torch.tensor([n / (k * counts[i]) for i in range(k)], dtype=torch.float32)
    assert isinstance(spec, dict)  # the config only allows None, 'balanced' or a mapping
    for name in spec:
        if name not in label_names:
            raise SettingError(f"method.class_weights.{name}", f"not a label of the task ({', '.join(label_names)})")
    return torch.tensor([float(spec.get(name, 1.0)) for name in label_names], dtype=torch.float32)


def _head_dropout(cfg: Config, config: Any) -> float:
    """method.dropout, else the checkpoint's classifier/hidden dropout, else 0.1."""
    if cfg.method.dropout is not None:
        return cfg.method.dropout
    for name in ("classifier_dropout", "hidden_dropout_prob", "resid_pdrop", "dropout_rate", "hidden_dropout"):
        value = getattr(config, name, None)
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return float(value)
    return 0.1


def _freeze(model: HeadModel, what: str) -> None:
    if what == "backbone":  # linear probe: only the fresh head trains
        for p in [*model.backbone.parameters(), *model.pooling.parameters()]:
            p.requires_grad_(False)
    elif what == "embeddings":
        backbone: Any = model.backbone
        input_embedding = backbone.get_input_embeddings()
        frozen = {id(p) for p in input_embedding.parameters()}
        for name, p in backbone.named_parameters():
            if id(p) in frozen or _EMBEDDING_PARTS.intersection(name.split(".")):
                p.requires_grad_(False)


@register_method("head")
class HeadMethod:
    """Backbone + pooling + fresh head, trained with cross-entropy."""

    name = "head"
    trains = True
    # Wide batches are padded up to a multiple of this (see harness.methods.batches.batch_width); the
    # benchmark sets 1 on a method object, through execute_run's `prepare`, to measure exact widths.
    pad_multiple = PAD_MULTIPLE

    def __init__(self, *, cfg: Config, data: TaskData, backbone: Backbone | None = None) -> None:
        m = cfg.method
        self.cfg = cfg
        self.label_names = tuple(data.label_names)
        self.backbone = backbone or load_backbone(cfg.model, for_lm=False)
        self.tokenizer = self.backbone.tokenizer
        self.family = self.backbone.family
        self.max_length = clamp_max_length(self.backbone, cfg.train.max_length)
        self.pooling_name = resolve_pooling(m.pooling, self.family)
        bare = self.backbone.model
        pooler = getattr(bare, "pooler", None)
        if m.use_pooler and pooler is None:
            raise SettingError("method.use_pooler", f"{cfg.model.checkpoint!r} has no trained pooler layer; "
                               "set method.use_pooler: false")
        if isinstance(pooler, nn.Module):
            bare.pooler = None  # moved into the pooling module when used; otherwise not computed at all
        pooling = build_pooling(self.pooling_name, pooler=pooler if m.use_pooler else None)
        config = self.backbone.config
        self.head_bias = True  # kept as a field: exports record it, older runs may lack it
        head = ClassifierHead(config.hidden_size, len(self.label_names), dropout=_head_dropout(cfg, config),
                              seed=cfg.train.seed, std=float(getattr(config, "initializer_range", 0.02)),
                              bias=self.head_bias)
        if m.lora is not None:
            bare = add_lora(bare, m.lora, seed=cfg.train.seed)
        self.model = HeadModel(bare, pooling, head, self.family)
        _freeze(self.model, m.freeze)
        weights = class_weights(m.class_weights, data.train.labels, self.label_names)
        self.loss_fn = nn.CrossEntropyLoss(weight=weights, label_smoothing=m.label_smoothing)
        # Encoders take segment ids for text pairs; GPT-2 would add them through its token embeddings.
        self.uses_type_ids = self.family == "encoder" and "token_type_ids" in self.tokenizer.model_input_names

    # ----- the Method protocol -----

    def cache_params(self) -> dict[str, Any]:
        """What besides tokenizer, data and max_length changes `encode`'s output."""
        return {"method": "head", "type_ids": self.uses_type_ids}

    def encode(self, texts: Sequence[Any], labels: Sequence[int]) -> list[Encoded]:
        """Tokenise with truncation to max_length; pairs as two segments."""
        return encode_texts(self.tokenizer, texts, labels, self.max_length, self.uses_type_ids)

    def collate(self, items: Sequence[Encoded]) -> dict[str, torch.Tensor]:
        """Right-pad to the longest example of the batch (wide batches rounded up, see `batch_width`)."""
        return collate_encoded(items, self.tokenizer.pad_token_id, self.uses_type_ids, limit=self.max_length,
                               multiple=self.pad_multiple)

    def logits(self, batch: dict[str, torch.Tensor]) -> torch.Tensor:
        return self.model(batch["input_ids"], batch["attention_mask"], batch.get("token_type_ids"))

    def loss(self, batch: dict[str, torch.Tensor]) -> torch.Tensor:
        # float(): under bf16 autocast the logits are bf16; the loss is taken in fp32.
        return self.loss_fn.to(batch["labels"].device)(self.logits(batch).float(), batch["labels"])

    def loss_weight(self, batch: dict[str, torch.Tensor]) -> float:
        """What `loss` averages over: the rows, or their class weights (CrossEntropyLoss's weighted mean)."""
        weight = self.loss_fn.weight
        return float(len(batch["labels"]) if weight is None else weight[batch["labels"].to(weight.device)].sum())

    def predict_proba(self, items: Sequence[Encoded], batch_size: int) -> np.ndarray:
        """Softmax probabilities (n, num_labels) in the order given, in eval mode, without gradients."""
        if not items:
            return np.zeros((0, len(self.label_names)))
        # Batches of similar lengths pad less; rows go back to the caller's order at the end.
        order = sorted(range(len(items)), key=lambda i: len(items[i]))
        batches = (self.collate([items[i] for i in order[lo:lo + batch_size]]) for lo in range(0, len(items), batch_size))
        probs = predict_batches(self.model, batches, self.logits)
        out = np.empty_like(probs)
        out[order] = probs
        return out

    def trainable_parameters(self) -> list[tuple[str, nn.Parameter]]:
        return [(n, p) for n, p in self.model.named_parameters() if p.requires_grad]

    def save(self, folder: Any) -> None:
        self.export_format = save_head_model(self, Path(folder))

    def describe(self) -> dict[str, Any]:
        trainable, total = count_parameters(self.model)
        m = self.cfg.method
        return {
            "kind": "head", "family": self.family, "checkpoint": self.cfg.model.checkpoint,
            "source": str(self.backbone.source), "pooling": self.pooling_name, "use_pooler": m.use_pooler,
            "hidden_size": int(self.backbone.config.hidden_size), "num_labels": len(self.label_names),
            "labels": list(self.label_names), "head_bias": self.head_bias, "dropout": self.model.head.dropout.p,
            "freeze": m.freeze, "lora": None if m.lora is None else {"r": m.lora.r, "alpha": m.lora.alpha,
                                                                      "dropout": m.lora.dropout},
            "class_weights": None if self.loss_fn.weight is None else self.loss_fn.weight.tolist(),
            "label_smoothing": m.label_smoothing, "max_length": self.max_length,
            "pad_token": self.tokenizer.pad_token, "pad_token_id": self.tokenizer.pad_token_id,
            "pad_token_added": self.backbone.pad_token_added, "notes": list(self.backbone.notes),
            "trainable_parameters": trainable, "total_parameters": total,
            "export_format": getattr(self, "export_format", None),
        }
