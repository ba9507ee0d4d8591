"""Token batches for the methods: tokenising, padding, the batch width rule, scoring passes, parameter counts."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import torch
from torch import nn

from harness.methods.registry import Encoded

__all__ = ["PAD_MULTIPLE", "ROUND_ABOVE", "batch_width", "collate_encoded", "count_parameters", "encode_texts",
           "pad_batch", "predict_batches"]

# Batches wider than ROUND_ABOVE tokens are padded on to a multiple of PAD_MULTIPLE. Why: a width for every
# length up to max_length means new matrix shapes nearly every batch; the CPU kernel library keeps the
# kernels it builds per shape, and the allocator keeps blocks of every size. Measured on MiniLM / SMS spam
# (scripts/benchmark.py, 2 epochs): peak memory about 2.0 GB -> 1.6 GB at the same speed. Short batches stay
# exact: their activations are small, and rounding 13 tokens up to 16 would cost a fifth more work.
PAD_MULTIPLE = 8
ROUND_ABOVE = 32


def pad_batch(ids: Sequence[Sequence[int]], pad_id: int, *, side: str = "right",
              type_ids: Sequence[Sequence[int]] | None = None, width: int | None = None) -> dict[str, torch.Tensor]:
    """Pad token id lists to the longest one (or to `width` when that is wider).

    Returns input_ids, attention_mask (and token_type_ids), each (batch, width).
    """
    width = max(max(len(x) for x in ids), width or 0)
    input_ids = torch.full((len(ids), width), pad_id, dtype=torch.long)  # (batch, seq)
    mask = torch.zeros((len(ids), width), dtype=torch.long)
    types = torch.zeros((len(ids), width), dtype=torch.long) if type_ids is not None else None
    for row, seq in enumerate(ids):
        span = slice(0, len(seq)) if side == "right" else slice(width - len(seq), width)
        input_ids[row, span] = torch.as_tensor(seq, dtype=torch.long)
        mask[row, span] = 1
        if types is not None and type_ids is not None:
            types[row, span] = torch.as_tensor(type_ids[row], dtype=torch.long)
    out = {"input_ids": input_ids, "attention_mask": mask}
    if types is not None:
        out["token_type_ids"] = types
    return out


def batch_width(longest: int, limit: int, multiple: int = PAD_MULTIPLE) -> int:
    """The width a batch is padded to: its longest row, rounded up to `multiple` above ROUND_ABOVE, within `limit`."""
    if longest <= ROUND_ABOVE:
        return longest
    return max(longest, min(-(-longest // multiple) * multiple, limit))


def count_parameters(module: nn.Module) -> tuple[int, int]:
    """(trainable, total) parameter counts."""
    params = list(module.parameters())
    return sum(p.numel() for p in params if p.requires_grad), sum(p.numel() for p in params)


def encode_texts(tokenizer: Any, texts: Sequence[Any], labels: Sequence[int], max_length: int,
                 type_ids: bool) -> list[Encoded]:
    """Tokenise texts (strings or pairs) with truncation; keep segment ids when the model takes them."""
    if not texts:
        return []
    if isinstance(texts[0], tuple):
        enc = tokenizer([t[0] for t in texts], [t[1] for t in texts], truncation="longest_first",
                        max_length=max_length)
    else:
        enc = tokenizer(list(texts), truncation=True, max_length=max_length)
    out = []
    for i, label in enumerate(labels):
        extra = {"token_type_ids": tuple(enc["token_type_ids"][i])} if type_ids else None
        out.append(Encoded(tuple(enc["input_ids"][i]), int(label), extra))
    return out


def collate_encoded(items: Sequence[Encoded], pad_id: int, type_ids: bool,
                    limit: int | None = None, multiple: int = PAD_MULTIPLE) -> dict[str, torch.Tensor]:
    """A right-padded batch with labels; given `limit` (max_length), its width follows `batch_width`."""
    types = [it.extra["token_type_ids"] for it in items] if type_ids else None  # type: ignore[index]
    width = batch_width(max(len(it) for it in items), limit, multiple) if limit is not None else None
    batch = pad_batch([it.input_ids for it in items], pad_id, type_ids=types, width=width)
    batch["labels"] = torch.tensor([it.label for it in items], dtype=torch.long)
    return batch


def predict_batches(model: nn.Module, batches: Any, forward: Any) -> np.ndarray:
    """Softmax rows of `forward(batch)` over `batches`, in eval mode under inference_mode; mode restored."""
    device = next(model.parameters()).device
    was_training = model.training
    model.eval()
    rows = []
    try:
        with torch.inference_mode():
            for batch in batches:
                batch = {k: v.to(device) for k, v in batch.items()}
                rows.append(torch.softmax(forward(batch).float(), dim=-1).cpu().numpy())
    finally:
        model.train(was_training)
    return np.concatenate(rows).astype(np.float64)
