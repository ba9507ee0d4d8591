"""Low-rank adapters (LoRA, Hu et al. 2021) through peft, one setup for every method that trains."""

from __future__ import annotations

import warnings
from typing import Any

import torch
from transformers.pytorch_utils import Conv1D

from harness.config import LoraConfig
from harness.errors import SettingError

__all__ = ["add_lora"]


def add_lora(model: Any, lora: LoraConfig, *, seed: int, task_type: str | None = None) -> Any:
    """`model` wrapped in peft adapters as `method.lora` describes; peft freezes everything else in it.

    `task_type` is peft's ("CAUSAL_LM", "SEQ_2_SEQ_LM") for a language model, None for a bare backbone.
    A target list that names no module of the model is refused naming `method.lora.targets`.
    """
    import peft  # late: peft imports much of transformers

    settings = peft.LoraConfig(
        r=lora.r, lora_alpha=lora.alpha, lora_dropout=lora.dropout,  # type: ignore[arg-type]  # a float works
        target_modules=list(lora.targets) if lora.targets else None,  # None: peft's per-architecture default
        task_type=task_type,
        # GPT-2 stores its projections as Conv1D (transposed weights); peft must be told.
        fan_in_fan_out=any(isinstance(m, Conv1D) for m in model.modules()),
    )
    # peft draws adapter A matrices from the global stream: seed it locally so adapters are reproducible.
    with torch.random.fork_rng(devices=[]), warnings.catch_warnings():
        torch.manual_seed(seed)
        # peft calls a transformers method that transformers itself marks deprecated; not ours to act on.
        warnings.simplefilter("ignore", FutureWarning)
        try:
            return peft.get_peft_model(model, settings)
        except ValueError as exc:
            raise SettingError("method.lora.targets", str(exc).splitlines()[0]) from None
