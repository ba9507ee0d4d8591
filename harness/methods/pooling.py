"""Pooling modules and the fresh classification head, as small nn.Modules chosen by name.

Every pooling finds real tokens from the attention mask, never from a token id, so left and right
padding give the same vector and a text that ends in a special token (eos) is pooled at it.
The `head` method that puts these on a backbone lives in `harness.methods.head`.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import torch
from torch import nn

from harness.errors import HarnessError, SettingError

__all__ = ["ClassifierHead", "FirstPooling", "HeadModel", "LastPooling", "MeanPooling", "POOLINGS", "Pooling",
           "build_pooling", "position_ids_from_mask", "register_pooling", "resolve_pooling"]


class Pooling(nn.Module):
    """Maps hidden states (batch, seq, hidden) and the attention mask (batch, seq) to (batch, hidden)."""

    def forward(self, hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:  # pragma: no cover - abstract
        raise NotImplementedError


POOLINGS: dict[str, type[Pooling]] = {}


def register_pooling(name: str) -> Callable[[type[Pooling]], type[Pooling]]:
    """Class decorator: make a pooling available as `method.pooling: NAME`."""

    def wrap(cls: type[Pooling]) -> type[Pooling]:
        POOLINGS[name] = cls
        return cls

    return wrap


def _gather(hidden: torch.Tensor, index: torch.Tensor) -> torch.Tensor:
    """hidden[b, index[b]] for every row b."""
    return hidden[torch.arange(hidden.shape[0], device=hidden.device), index]  # (batch, hidden)


@register_pooling("first")
class FirstPooling(Pooling):
    """The first real token (the [CLS] position of BERT-like encoders), optionally through a trained pooler.

    `pooler` is the checkpoint's own pooler module (BertModel's dense + tanh over position 0); it is
    moved here from the backbone so that it runs once and is saved with the head.
    """

    def __init__(self, pooler: nn.Module | None = None) -> None:
        super().__init__()
        self.pooler = pooler

    def forward(self, hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
        first = mask.long().argmax(dim=-1)  # index of the first 1: 0 under right padding
        if self.pooler is None:
            return _gather(hidden, first)
        # BERT's pooler reads position 0 of whatever it is given: hand it the first real token there.
        return self.pooler(_gather(hidden, first).unsqueeze(1))  # (batch, 1, hidden) -> (batch, hidden)


@register_pooling("last")
class LastPooling(Pooling):
    """The last real token, located from the attention mask (works for left and right padding)."""

    def forward(self, hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
        positions = torch.arange(mask.shape[-1], device=mask.device)  # (seq,)
        # Why the mask and not `input_ids != pad_token_id` (what the library's classes do): when a tokenizer
        # pads with eos, a text that really ends in eos would be taken for padding and pooled too early.
        last = (positions * mask.long()).argmax(dim=-1)  # (batch,)
        return _gather(hidden, last)


@register_pooling("mean")
class MeanPooling(Pooling):
    """The mean over real tokens (mask-weighted)."""

    def forward(self, hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
        keep = mask.unsqueeze(-1).bool()  # (batch, seq, 1)
        # masked_fill, not a product: a fully masked pad row may hold NaN, and NaN * 0 is NaN.
        total = hidden.masked_fill(~keep, 0.0).sum(dim=1)  # (batch, hidden)
        return total / keep.sum(dim=1).clamp(min=1).to(hidden.dtype)


def resolve_pooling(name: str, family: str) -> str:
    """`auto` -> first for encoders, last for decoders, mean for encoder-decoders (no [CLS] token)."""
    if name == "auto":
        return {"encoder": "first", "decoder": "last"}.get(family, "mean")
    if name not in POOLINGS:
        raise SettingError("method.pooling", f"unknown pooling {name!r}; choose one of auto, {', '.join(sorted(POOLINGS))}")
    return name


def build_pooling(name: str, *, pooler: nn.Module | None = None) -> Pooling:
    """A pooling module by registry name; only `first` takes a trained pooler."""
    if name not in POOLINGS:
        raise SettingError("method.pooling", f"unknown pooling {name!r}; choose one of {', '.join(sorted(POOLINGS))}")
    if pooler is not None:
        if name != "first":
            raise HarnessError(f"method.use_pooler needs method.pooling: first (the pooler reads the first token), got {name!r}")
        return FirstPooling(pooler)
    return POOLINGS[name]()


def position_ids_from_mask(mask: torch.Tensor) -> torch.Tensor:
    """0, 1, 2... over real tokens only (cumsum - 1, clamped), so a left-padded row starts at position 0."""
    return (mask.long().cumsum(dim=-1) - 1).clamp(min=0)  # (batch, seq)


class ClassifierHead(nn.Module):
    """Dropout + Linear(hidden, num_labels), initialised from `seed` with its own generator.

    The weight is drawn from N(0, std) (std = the checkpoint's initializer_range, as the library's own
    heads do); a dedicated torch.Generator makes the same seed give the same head bit for bit, whatever
    else consumed the global random stream.
    """

    def __init__(self, hidden: int, num_labels: int, *, dropout: float, seed: int, std: float = 0.02,
                 bias: bool = True) -> None:
        super().__init__()
        self.dropout = nn.Dropout(dropout)
        self.linear = nn.Linear(hidden, num_labels, bias=bias)  # weight (num_labels, hidden)
        generator = torch.Generator().manual_seed(seed)
        with torch.no_grad():
            nn.init.normal_(self.linear.weight, mean=0.0, std=std, generator=generator)
            if self.linear.bias is not None:
                self.linear.bias.zero_()

    def forward(self, pooled: torch.Tensor) -> torch.Tensor:
        return self.linear(self.dropout(pooled))  # (batch, num_labels)


class HeadModel(nn.Module):
    """backbone -> pooling -> head; returns logits (batch, num_labels)."""

    def __init__(self, backbone: nn.Module, pooling: Pooling, head: ClassifierHead, family: str) -> None:
        super().__init__()
        self.backbone = backbone
        self.pooling = pooling
        self.head = head
        self.family = family

    def forward(self, input_ids: torch.Tensor, attention_mask: torch.Tensor,
                token_type_ids: torch.Tensor | None = None) -> torch.Tensor:
        extra: dict[str, Any] = {}
        if token_type_ids is not None:
            extra["token_type_ids"] = token_type_ids
        if self.family == "decoder":
            # Positions from the mask, so left and right padding give the same logits.
            extra["position_ids"] = position_ids_from_mask(attention_mask)
        out = self.backbone(input_ids=input_ids, attention_mask=attention_mask, **extra)
        hidden = out.last_hidden_state  # (batch, seq, hidden)
        return self.head(self.pooling(hidden, attention_mask))
